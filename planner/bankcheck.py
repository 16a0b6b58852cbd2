"""Engineering checks of capacitor banks: short-circuit strength, switching voltage step, and
parallel resonance. Each check is common practice for planning-stage screening, not a design
study; the report carries the usual cautions.

For each bank bus:

* **Short-circuit strength** ``S_sc`` (MVA) from the Thevenin impedance ``Z_th`` at the bus,
  the diagonal entry of the inverse of the network's short-circuit admittance matrix: branch
  series impedances with their tap ratios (line charging, shunts and loads left out), plus each
  generator's source reactance ``x_source_pu`` where the network file gives one. Generators with
  no source reactance are left out (their contribution is unknown, so ``S_sc`` errs low), except
  at the slack bus, which stands for the wider grid and is taken as an ideal source when no
  source reactance is given (``S_sc`` errs high there). Pre-switching voltage 1.0 pu:
  ``S_sc = S_base / |Z_th|``.
* **Voltage step** of one switched step: ``dV ~ Q_step / S_sc`` (common practice), flagged above
  ``step_limit_pct`` (a study setting; a few percent is common practice, default 3 %).
* **Parallel resonance** of the bank with the network: harmonic order ``h = sqrt(S_sc / Q)`` for
  the bank's Mvar ``Q`` at each number of steps in service, flagged within ``margin`` of a
  characteristic order of six-pulse converters (5, 7, 11, 13; common practice). Banks at other
  buses and the network's own capacitance are not included.

>>> from planner.network.model import Network, make_table
>>> net = Network(buses=make_table("buses", [{"bus": 1, "base_kv": 33.0, "kind": "slack"},
...                                          {"bus": 2, "base_kv": 11.0, "kind": "PQ"}]),
...     generators=make_table("generators", [{"gen_id": "GRID", "bus": 1, "mw": 0.0}]),
...     transformers=make_table("transformers", [{"xfmr_id": "T", "from_bus": 1, "to_bus": 2, "x_pu": 0.1}]),
...     shunts=make_table("shunts", [{"shunt_id": "C", "bus": 2, "mvar_per_step": 10.0, "steps_max": 4,
...                                   "steps_on": 0, "switchable": True}]))
>>> res = check_banks(net)
>>> res
BankCheckResult(status=flagged, banks=1, flagged_rows=2)
>>> res.table[["bank_mvar", "s_sc_mva", "step_pct", "harmonic_order"]].values.tolist()
[[10.0, 1000.0, 1.0, 10.0], [20.0, 1000.0, 1.0, 7.0711], [30.0, 1000.0, 1.0, 5.7735], [40.0, 1000.0, 1.0, 5.0]]
>>> res.table.near_order.tolist()
[0, 7, 0, 5]
"""
from __future__ import annotations

import enum
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.sparse.linalg as spla

from .network.compile import SLACK, compile_network, replace
from .network.model import Network

CHARACTERISTIC_ORDERS = (5, 7, 11, 13)   # six-pulse converter harmonics (common practice)
STEP_LIMIT_PCT = 3.0                     # common practice: a few percent
RESONANCE_MARGIN = 0.5                   # harmonic orders either side of a characteristic order

CAUTION = ("These checks are planning-stage screening by common-practice formulas. Where a bank "
           "is flagged for resonance, or sits near harmonic sources, study detuning reactors or "
           "harmonic filters with specialists; switching transients, protection and the final "
           "design follow local codes and licensed engineering practice.")


class BankCheckStatus(enum.Enum):
    """``CLEAR``: no bank step is flagged. ``FLAGGED``: at least one voltage step above the limit or a
    resonance near a characteristic order. ``NO_SOURCE``: some bank bus has no path to a source, so
    its strength is zero (listed with ``s_sc_mva`` 0)."""
    CLEAR = "clear"
    FLAGGED = "flagged"
    NO_SOURCE = "no_source"


@dataclass
class BankCheckResult:
    """One row per bank and number of steps in service: ``bank_id, bus, base_kv, steps,
    bank_mvar, s_sc_mva, z_th_ohm, step_pct, step_flag, harmonic_order, near_order,
    resonance_flag``. ``assumptions`` lists what was assumed about sources."""
    success: bool
    status: BankCheckStatus
    message: str
    table: pd.DataFrame
    assumptions: list = field(default_factory=list)
    caution: str = CAUTION

    def __repr__(self):
        return (f"BankCheckResult(status={self.status.value}, banks={self.table.bank_id.nunique()}, "
                f"flagged_rows={int((self.table.step_flag | self.table.resonance_flag).sum())})")

    def to_frames(self) -> dict:
        return {"bank_checks": self.table.copy()}


def short_circuit_mva(net: Network, buses) -> tuple:
    """``(S_sc in MVA, Z_th in pu, assumptions)`` at each of ``buses`` (see module docstring).

    >>> from planner.network.model import Network, make_table
    >>> net = Network(buses=make_table("buses", [{"bus": 1, "base_kv": 33.0, "kind": "slack"},
    ...                                          {"bus": 2, "base_kv": 33.0, "kind": "PQ"}]),
    ...     generators=make_table("generators", [{"gen_id": "G", "bus": 1, "mw": 0.0, "x_source_pu": 0.1}]),
    ...     lines=make_table("lines", [{"line_id": "L", "from_bus": 1, "to_bus": 2, "r_pu": 0.0, "x_pu": 0.1}]))
    >>> s, z, notes = short_circuit_mva(net, [1, 2])
    >>> s.round(6).tolist(), notes
    ([1000.0, 500.0], [])
    """
    c = compile_network(net)
    c0 = replace(c, bc=np.zeros_like(c.bc), ysh=np.zeros(c.n, complex))
    y = c0.ybranch().tolil()
    g = net.generators[net.generators.energised.astype(bool)]
    assumptions = []
    grounded = np.zeros(c.n, bool)
    missing = []
    for r in g.itertuples(index=False):
        k = c.index_of([int(r.bus)])[0]
        if r.x_source_pu > 0:
            y[k, k] += 1.0 / (1j * r.x_source_pu)
        elif c.kind[k] == SLACK:
            grounded[k] = True
            assumptions.append(f"slack bus {int(r.bus)} ({r.gen_id}) has no source reactance: taken as an "
                               "ideal source (the wider grid); short-circuit strength errs high")
        else:
            missing.append(str(r.gen_id))
    if missing:
        assumptions.append("generators without a source reactance are left out of the short-circuit "
                           f"strength (errs low): {', '.join(missing)}")
    keep = np.flatnonzero(~grounded & c.alive)
    y = y.tocsc()[keep][:, keep]
    idx = c.index_of(list(buses))
    pos = np.full(c.n, -1)
    pos[keep] = np.arange(len(keep))
    z = np.zeros(len(idx), complex)
    try:
        lu = spla.splu(y.tocsc())
    except RuntimeError:
        lu = None
    for j, k in enumerate(idx):
        if grounded[k]:
            z[j] = 0.0
            continue
        if lu is None or pos[k] < 0:
            z[j] = np.inf
            continue
        e = np.zeros(len(keep), complex)
        e[pos[k]] = 1.0
        zz = lu.solve(e)[pos[k]]
        z[j] = zz if np.isfinite(zz) else np.inf
    with np.errstate(divide="ignore"):
        s = np.where(np.abs(z) > 0, c.base_mva / np.abs(z), np.inf)
    s = np.where(np.isfinite(np.abs(z)), s, 0.0)
    return s, z, assumptions


def check_banks(net: Network, banks=None, *, step_limit_pct: float = STEP_LIMIT_PCT,
                orders=CHARACTERISTIC_ORDERS, margin: float = RESONANCE_MARGIN) -> BankCheckResult:
    """Run the three checks for each bank (see module docstring).

    ``banks``: records with ``bank_id, bus, mvar_per_step, steps_max`` (default: the capacitor
    shunts of the network, ``mvar_per_step > 0``).
    """
    if banks is None:
        sh = net.shunts[net.shunts.energised.astype(bool) & (net.shunts.mvar_per_step > 0)]
        banks = [dict(bank_id=str(r.shunt_id), bus=int(r.bus), mvar_per_step=float(r.mvar_per_step),
                      steps_max=int(r.steps_max)) for r in sh.itertuples(index=False)]
    banks = [dict(b) for b in banks]
    cols = ["bank_id", "bus", "base_kv", "steps", "bank_mvar", "s_sc_mva", "z_th_ohm", "step_pct", "step_flag",
            "harmonic_order", "near_order", "resonance_flag"]
    if not banks:
        return BankCheckResult(True, BankCheckStatus.CLEAR, "no capacitor banks to check", pd.DataFrame(columns=cols))
    buses = [int(b["bus"]) for b in banks]
    s_sc, z, notes = short_circuit_mva(net, buses)
    kv = dict(zip(net.buses.bus.astype(int), net.buses.base_kv.astype(float)))
    rows = []
    orders = np.asarray(orders, float)
    for b, s, zz in zip(banks, s_sc, z):
        q = float(b["mvar_per_step"])
        zb = kv[int(b["bus"])] ** 2 / float(net.base_mva)
        for steps in range(1, int(b["steps_max"]) + 1):
            qb = q * steps
            h = float(np.sqrt(s / qb)) if s > 0 and np.isfinite(s) else np.nan
            near = 0
            if np.isfinite(h):
                d = np.abs(orders - h)
                if d.min() <= margin:
                    near = int(orders[np.argmin(d)])
            step_pct = 100.0 * q / s if s > 0 else np.inf
            rows.append(dict(bank_id=str(b["bank_id"]), bus=int(b["bus"]), base_kv=kv[int(b["bus"])], steps=steps,
                             bank_mvar=round(qb, 9), s_sc_mva=round(float(s), 6),
                             z_th_ohm=float(abs(zz) * zb) if np.isfinite(abs(zz)) else np.inf,
                             step_pct=round(step_pct, 6), step_flag=bool(step_pct > step_limit_pct),
                             harmonic_order=round(h, 4), near_order=near, resonance_flag=near > 0))
    table = pd.DataFrame(rows, columns=cols)
    flagged = table.step_flag | table.resonance_flag
    status = BankCheckStatus.FLAGGED if flagged.any() else BankCheckStatus.CLEAR
    if (table.s_sc_mva <= 0).any():
        status = BankCheckStatus.NO_SOURCE
    msg = (f"{table.bank_id.nunique()} banks checked: {int(table.step_flag.sum())} step settings above "
           f"{step_limit_pct:g} % voltage step, {int(table.resonance_flag.sum())} near a characteristic "
           f"harmonic (within {margin:g} of {', '.join(str(int(o)) for o in orders)})")
    return BankCheckResult(status is not BankCheckStatus.NO_SOURCE, status, msg, table, notes)
