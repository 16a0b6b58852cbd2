"""Study-file sections that prove a plan: ``[outages]``, ``[profile]``, ``[bank_checks]``, ``[sweep]``.

All sections are optional; a study without them runs as before. Keys (README, "Proving a plan"):

``[outages]``  N-1 verification of the base case and of every alternative's plan
    ``elements`` (list of "line", "transformer", "generator"; default all three), ``ids`` (only
    these element ids), ``min_kv`` (only elements at or above this voltage), ``band`` (emergency
    band, default [0.90, 1.10] pu), ``ratings`` (check emergency ratings, default true),
    ``levels`` (level names, default all), ``screen`` (default true), and a ``[outages.buses]``
    table of per-bus bands.
``[profile]``  hourly verification
    ``file`` (CSV, relative to the study file), ``control`` ("schedule" or "voltage"),
    ``v_on_pu``, ``v_off_pu``, ``delay_h`` (voltage control), ``[profile.groups]`` (bus groups
    named by factor columns), ``derive_levels`` (the study's load levels clustered from the
    profile, read in :mod:`planner.study.spec`).
``[bank_checks]``  ``step_limit_pct`` (default 3), ``resonance_margin`` (default 0.5),
    ``orders`` (default [5, 7, 11, 13]).
``[sweep]``  ``scheduler`` (a Dask scheduler address; default: this machine's cores),
    ``chunk_size`` (flows per task, default 400).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

SECTIONS = ("outages", "profile", "bank_checks", "sweep")


@dataclass
class OutageSpec:
    elements: tuple = ("line", "transformer", "generator")
    ids: list | None = None
    min_kv: float = 0.0
    band: tuple = (0.90, 1.10)
    bus_bands: dict = field(default_factory=dict)
    ratings: bool = True
    levels: list | None = None
    screen: bool = True


@dataclass
class ProfileSpec:
    file: Path
    control: str = "schedule"
    v_on_pu: float = 0.97
    v_off_pu: float = 1.03
    delay_h: float = 1.0
    groups: dict = field(default_factory=dict)
    derive_levels: int | None = None     # the study's levels come from the profile (planner.study.spec)


@dataclass
class BankCheckSpec:
    step_limit_pct: float = 3.0
    resonance_margin: float = 0.5
    orders: tuple = (5, 7, 11, 13)


@dataclass
class ProofSpec:
    outages: OutageSpec | None = None
    profile: ProfileSpec | None = None
    bank_checks: BankCheckSpec | None = None
    scheduler: str | None = None
    chunk_size: int = 400

    @property
    def any(self) -> bool:
        return bool(self.outages or self.profile or self.bank_checks)


def security_request(proof: ProofSpec, network):
    """The :class:`~planner.contingency.secure.SecurityRequest` of the study's ``[outages]`` set
    (for an alternative with ``secure_against_outages = true``)."""
    from ..contingency.n1 import outage_list
    from ..contingency.secure import SecurityRequest
    o = proof.outages
    return SecurityRequest(outages=outage_list(network, kinds=o.elements, ids=o.ids, min_kv=o.min_kv),
                           band=tuple(o.band), bus_bands=dict(o.bus_bands), ratings=o.ratings, levels=o.levels,
                           where=None, chunk_size=proof.chunk_size)


def read_proof(top, here: Path, level_names) -> ProofSpec:
    """Read the sections from the study file's top-level reader (``planner.study.spec._Reader``)."""
    from ..study.spec import _band, _bus_key
    ps = ProofSpec()
    if "outages" in top.table:
        r = top.sub("outages")
        els = r.get("elements", list, ["line", "transformer", "generator"],
                    check=lambda v: v and all(e in ("line", "transformer", "generator") for e in v),
                    why='must list "line", "transformer" and/or "generator"')
        ids = r.get("ids", list, None, check=lambda v: all(isinstance(x, (str, int)) for x in v),
                    why="must be a list of element ids")
        lv = r.get("levels", list, None, check=lambda v: all(x in level_names for x in v),
                   why=f"must name load levels ({', '.join(level_names)})")
        band = _band(r, "band", r.get("band", list, [0.90, 1.10]))
        buses = r.sub("buses")
        bus_bands = {_bus_key(buses, k): _band(buses, k, v) for k, v in buses.table.items()}
        r.used.add("buses")
        ps.outages = OutageSpec(
            elements=tuple(els), ids=[str(x) for x in ids] if ids is not None else None,
            min_kv=r.get("min_kv", float, 0.0, check=lambda v: 0 <= v <= 2000, why="must be 0-2000 kV"),
            band=band, bus_bands=bus_bands, ratings=r.get("ratings", bool, True), levels=lv,
            screen=r.get("screen", bool, True))
        r.finish()
    if "profile" in top.table:
        r = top.sub("profile")
        control = r.get("control", str, "schedule", check=lambda v: v in ("schedule", "voltage"),
                        why='must be "schedule" or "voltage"')
        v_on = r.get("v_on_pu", float, 0.97, check=lambda v: 0.5 <= v <= 1.5, why="must be 0.5-1.5 pu")
        v_off = r.get("v_off_pu", float, 1.03, check=lambda v: 0.5 <= v <= 1.5, why="must be 0.5-1.5 pu")
        if v_on >= v_off:
            raise r.error("v_on_pu", f"must be below v_off_pu ({v_off}), got {v_on}")
        g = r.sub("groups")
        groups = {}
        for name, buses in g.table.items():
            if not isinstance(buses, list) or not all(isinstance(b, int) and not isinstance(b, bool) for b in buses):
                raise g.error(name, f"must be a list of bus numbers, got {buses!r}")
            groups[str(name)] = [int(b) for b in buses]
        r.used.add("groups")
        ps.profile = ProfileSpec(
            file=here / r.get("file", str, required=True), control=control, v_on_pu=v_on, v_off_pu=v_off,
            delay_h=r.get("delay_h", float, 1.0, check=lambda v: 0 <= v <= 8784, why="must be 0-8784 hours"),
            groups=groups, derive_levels=r.get("derive_levels", int, None))   # checked in planner.study.spec
        r.finish()
    if "bank_checks" in top.table:
        r = top.sub("bank_checks")
        orders = r.get("orders", list, [5, 7, 11, 13],
                       check=lambda v: v and all(isinstance(x, int) and not isinstance(x, bool) and 2 <= x <= 100
                                                 for x in v), why="must list whole harmonic orders 2-100")
        ps.bank_checks = BankCheckSpec(
            step_limit_pct=r.get("step_limit_pct", float, 3.0, check=lambda v: 0 < v <= 50, why="must be 0-50 %"),
            resonance_margin=r.get("resonance_margin", float, 0.5, check=lambda v: 0 <= v <= 5,
                                   why="must be 0-5 harmonic orders"),
            orders=tuple(orders))
        r.finish()
    if "sweep" in top.table:
        r = top.sub("sweep")
        ps.scheduler = r.get("scheduler", str, None, check=lambda v: v.strip() != "", why="must not be empty")
        ps.chunk_size = r.get("chunk_size", int, 400, check=lambda v: 1 <= v <= 100000, why="must be 1-100000")
        r.finish()
    return ps
