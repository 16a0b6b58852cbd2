"""The engineer's view of a network: one pandas table per element kind.

Units inside these tables (the contract every reader, writer and the compiler keep):

* powers in MW and Mvar (a shunt's Mvar is its output at 1.0 pu voltage);
* branch impedances and charging in per unit on the system MVA base (``Network.base_mva``);
* voltages in per unit of the bus base kV, angles in degrees;
* bus ids are integers chosen by the modeller (the numbers in the source file); element ids are strings.

Helpers at the bottom convert ohms, kV, kW and kvar to these units, so a feeder given in
engineering units is loaded without hand arithmetic.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

# Column name -> dtype, in the order tables are written. Readers fill missing optional
# columns with the defaults in ``DEFAULTS``; nothing else is accepted silently.
BUS_COLUMNS = {
    "bus": "int64",          # bus number from the source file
    "name": "object",
    "base_kv": "float64",
    "kind": "object",        # "PQ", "PV" or "slack"
    "v_min_pu": "float64",   # planning limits for this bus
    "v_max_pu": "float64",
    "shunt_draw_mw": "float64",      # fixed shunt conductance, MW drawn at 1.0 pu
    "shunt_supply_mvar": "float64",    # fixed shunt susceptance, Mvar produced at 1.0 pu (capacitive > 0)
    "area": "int64",
    "v_pu": "float64",       # voltage magnitude of a stored solution (or start value)
    "angle_deg": "float64",
}
LOAD_COLUMNS = {
    "load_id": "object",
    "bus": "int64",
    "mw": "float64",       # demand at 1.0 pu voltage
    "mvar": "float64",
    # Voltage dependence (ZIP): share of constant current and constant impedance; the rest is
    # constant power. P(V) = P0 (1 - pi - pz + pi V + pz V^2), same form for Q.
    "p_share_i": "float64",
    "p_share_z": "float64",
    "q_share_i": "float64",
    "q_share_z": "float64",
    "energised": "bool",
}
GEN_COLUMNS = {
    "gen_id": "object",
    "bus": "int64",
    "mw": "float64",
    "mvar": "float64",     # output used when the bus is PQ (and the stored solution otherwise)
    "v_set_pu": "float64",   # voltage setpoint held at its bus while within reactive limits
    "q_min_mvar": "float64",
    "q_max_mvar": "float64",
    "x_source_pu": "float64",  # source (subtransient) reactance, pu on the system base; 0 = not given
    "energised": "bool",
}
LINE_COLUMNS = {
    "line_id": "object",
    "from_bus": "int64",
    "to_bus": "int64",
    "r_pu": "float64",
    "x_pu": "float64",
    "b_pu": "float64",       # total line charging, split half to each end
    "rating_mva": "float64", # 0 = no rating given
    "rating_emergency_mva": "float64",  # short-time rating after an outage; 0 = use rating_mva
    "energised": "bool",
}
TRANSFORMER_COLUMNS = {
    "xfmr_id": "object",
    "from_bus": "int64",
    "to_bus": "int64",
    "r_pu": "float64",
    "x_pu": "float64",
    "b_pu": "float64",       # magnetising susceptance, split half to each end like a line
    "ratio_pu": "float64",   # off-nominal turns ratio (1.0 = nominal)
    "tap_side": "object",    # "from" or "to": the winding that carries the ratio
    "shift_deg": "float64",  # phase shift of the tap side voltage
    "ratio_min_pu": "float64",
    "ratio_max_pu": "float64",
    "ratio_step_pu": "float64",  # 0 = continuous
    "adjustable": "bool",    # the optimiser may move the ratio
    "rating_mva": "float64",
    "rating_emergency_mva": "float64",  # short-time rating after an outage; 0 = use rating_mva
    "energised": "bool",
}
SHUNT_COLUMNS = {
    "shunt_id": "object",
    "bus": "int64",
    "mvar_per_step": "float64",  # Mvar at 1.0 pu per step (capacitive > 0, reactor < 0)
    "steps_max": "int64",
    "steps_on": "int64",         # steps in service now
    "switchable": "bool",        # steps may change with the load level
    "energised": "bool",
}

TABLES = {
    "buses": BUS_COLUMNS,
    "loads": LOAD_COLUMNS,
    "generators": GEN_COLUMNS,
    "lines": LINE_COLUMNS,
    "transformers": TRANSFORMER_COLUMNS,
    "shunts": SHUNT_COLUMNS,
}

DEFAULTS = {
    "buses": {"name": "", "v_min_pu": 0.95, "v_max_pu": 1.05, "shunt_draw_mw": 0.0, "shunt_supply_mvar": 0.0,
              "area": 1, "v_pu": 1.0, "angle_deg": 0.0},
    "loads": {"p_share_i": 0.0, "p_share_z": 0.0, "q_share_i": 0.0, "q_share_z": 0.0,
              "energised": True},
    "generators": {"mvar": 0.0, "v_set_pu": 1.0, "q_min_mvar": -9999.0, "q_max_mvar": 9999.0,
                   "x_source_pu": 0.0, "energised": True},
    "lines": {"b_pu": 0.0, "rating_mva": 0.0, "rating_emergency_mva": 0.0, "energised": True},
    "transformers": {"r_pu": 0.0, "b_pu": 0.0, "ratio_pu": 1.0, "tap_side": "from", "shift_deg": 0.0,
                     "ratio_min_pu": 0.9, "ratio_max_pu": 1.1, "ratio_step_pu": 0.0,
                     "adjustable": False, "rating_mva": 0.0, "rating_emergency_mva": 0.0,
                     "energised": True},
    "shunts": {"steps_max": 1, "steps_on": 1, "switchable": False, "energised": True},
}

BUS_KINDS = ("PQ", "PV", "slack")


def empty_table(kind: str) -> pd.DataFrame:
    """An empty table of one element kind with the standard columns and dtypes."""
    cols = TABLES[kind]
    return pd.DataFrame({c: pd.Series(dtype=t) for c, t in cols.items()})


def make_table(kind: str, records) -> pd.DataFrame:
    """Build a standard table from a list of dicts (or a DataFrame), filling defaults.

    Raises ``KeyError`` naming the first missing required column.

    >>> t = make_table("lines", [{"line_id": "L1", "from_bus": 1, "to_bus": 2, "r_pu": 0.01, "x_pu": 0.1}])
    >>> float(t.loc[0, "b_pu"]), bool(t.loc[0, "energised"])
    (0.0, True)
    """
    cols = TABLES[kind]
    if _is_standard(records, cols, DEFAULTS[kind]):     # a table made before: only copied
        return records.copy()
    df = pd.DataFrame(records) if not isinstance(records, pd.DataFrame) else records.copy()
    if df.empty and not len(df.columns):
        return empty_table(kind)
    for c, default in DEFAULTS[kind].items():
        if c not in df.columns:
            df[c] = default
        else:
            df[c] = df[c].where(df[c].notna(), default) if df[c].isna().any() else df[c]
    missing = [c for c in cols if c not in df.columns]
    if missing:
        raise KeyError(f"{kind}: missing column {missing[0]!r}")
    df = df[list(cols)]
    # only the columns not yet of their dtype (a table made before passes through cheaply)
    need = {c: t for c, t in cols.items() if df[c].dtype != np.dtype(t)}
    if need:
        df = df.astype(need)
    return df.reset_index(drop=True)


def _is_standard(df, cols: dict, defaults: dict) -> bool:
    """True for a DataFrame that already has exactly the standard columns, dtypes and a plain
    0..n-1 index, with no missing value in a column that has a default."""
    return (isinstance(df, pd.DataFrame) and list(df.columns) == list(cols)
            and isinstance(df.index, pd.RangeIndex) and df.index.start == 0 and df.index.step == 1
            and all(df[c].dtype == np.dtype(t) for c, t in cols.items())
            # integer and boolean columns cannot hold a missing value: only the others are checked
            and not any(df[c].isna().any() for c in defaults if cols[c] not in ("int64", "bool")))


@dataclass
class Network:
    """A network as tables; see the module docstring for units.

    >>> from planner.network.model import Network, make_table
    >>> net = Network(base_mva=100.0, name="two-bus",
    ...     buses=make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack"},
    ...                                {"bus": 2, "base_kv": 110.0, "kind": "PQ"}]),
    ...     generators=make_table("generators", [{"gen_id": "G1", "bus": 1, "mw": 0.0, "v_set_pu": 1.0}]),
    ...     loads=make_table("loads", [{"load_id": "D2", "bus": 2, "mw": 50.0, "mvar": 20.0}]),
    ...     lines=make_table("lines", [{"line_id": "L1", "from_bus": 1, "to_bus": 2, "r_pu": 0.01, "x_pu": 0.1}]))
    >>> len(net.buses)
    2
    """
    base_mva: float = 100.0
    name: str = ""
    buses: pd.DataFrame = field(default_factory=lambda: empty_table("buses"))
    loads: pd.DataFrame = field(default_factory=lambda: empty_table("loads"))
    generators: pd.DataFrame = field(default_factory=lambda: empty_table("generators"))
    lines: pd.DataFrame = field(default_factory=lambda: empty_table("lines"))
    transformers: pd.DataFrame = field(default_factory=lambda: empty_table("transformers"))
    shunts: pd.DataFrame = field(default_factory=lambda: empty_table("shunts"))
    source: str = ""  # file the network was read from, for messages

    def __post_init__(self):
        for kind in TABLES:
            setattr(self, kind, make_table(kind, getattr(self, kind)))

    def copy(self) -> "Network":
        """A deep copy: tables are copied, so edits never reach the original."""
        return dataclasses.replace(self, **{k: getattr(self, k).copy() for k in TABLES})

    def table(self, kind: str) -> pd.DataFrame:
        return getattr(self, kind)


# --- unit helpers -------------------------------------------------------------------------

def z_base_ohm(base_kv: float, base_mva: float) -> float:
    """Impedance base in ohms: kV^2 / MVA."""
    return base_kv ** 2 / base_mva


def ohm_to_pu(z_ohm, base_kv: float, base_mva: float):
    """Series impedance in ohms to per unit.

    >>> round(ohm_to_pu(16.0, 12.66, 100.0), 4)
    9.9828
    """
    return z_ohm / z_base_ohm(base_kv, base_mva)


def kw_to_mw(kw):
    return kw / 1000.0


def kvar_to_mvar(kvar):
    return kvar / 1000.0
