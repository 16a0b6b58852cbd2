"""Study files (TOML): reading and checking.

Every key is documented in the README ("Study file"). A bad file gives one
:class:`~planner.errors.InputError` line that names the file, the key and the problem, e.g.
``demo.toml: levels[2].hours: must be a positive number, got -5``.
"""
from __future__ import annotations

import dataclasses
import math
import os
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import InputError
from ..inputs import MAX_TOML_BYTES, parse_toml, read_input_bytes

TOP_KEYS = {"study", "limits", "levels", "banks", "generators", "taps", "economics", "objective",
            "alternatives", "solver", "outages", "profile", "bank_checks", "sweep"}   # last four: planner/proof


@dataclass
class LevelSpec:
    name: str
    hours: float = 8760.0
    p_scale: float = 1.0
    q_scale: float = 1.0
    bus_scale: dict = field(default_factory=dict)     # bus -> factor on P and Q
    v_min_pu: float | None = None
    v_max_pu: float | None = None


@dataclass
class SiteSpec:
    bus: int
    unit_mvar: float
    max_units: int
    kinds: tuple


@dataclass
class BankSpec:
    candidates: object = field(default_factory=list)  # bus numbers, or "all-pq"
    overrides: dict = field(default_factory=dict)     # bus -> SiteSpec
    unit_mvar: float = 0.3
    max_units: int = 4
    kinds: tuple = ("fixed", "switched")
    max_new_sites: int | None = None
    budget: float | None = None
    per_site: float = 0.0
    per_mvar: float = 0.0
    switched_per_mvar: float = 0.0
    switched_per_site: float = 0.0
    existing_switchable: bool = True


@dataclass
class AlternativeSpec:
    name: str
    description: str = ""
    banks: bool = True
    setpoints: bool = True
    taps: bool = True
    budget: float | None = None
    max_new_sites: int | None = None
    secure_against_outages: bool = False    # N-1 security as a constraint, outages of [outages]


@dataclass
class StudySpec:
    path: Path
    title: str
    network_path: Path
    question: str = ""
    output: Path | None = None
    currency: str = ""
    v_min_pu: float = 0.95
    v_max_pu: float = 1.05
    bus_limits: dict = field(default_factory=dict)
    ratings: bool = True
    q_limits: bool = True
    levels: list = field(default_factory=list)
    banks: BankSpec = field(default_factory=BankSpec)
    gen_range: dict | None = None                      # bus or "*" -> (lo, hi)
    setpoints_per_level: bool = True
    taps: bool = False
    economics: dict = field(default_factory=dict)
    objective: str = "cost"
    alternatives: list = field(default_factory=list)
    max_iterations: int = 30
    mip_gap: float = 5e-4
    rel_tolerance: float = 1e-4
    step_seconds: float = 120.0
    peak_level: str = ""
    proof: object = None       # planner.proof.spec.ProofSpec: N-1, hourly profile, bank checks, sweep


class _Reader:
    """Typed access to one TOML table with key paths for messages."""

    def __init__(self, file: Path, table: dict, path: str):
        self.file, self.table, self.path = file, table, path
        self.used: set = set()

    def _key(self, key):
        return f"{self.path}.{key}" if self.path else key

    def error(self, key, msg):
        return InputError(msg, file=self.file.name, field=self._key(key))

    def get(self, key, kind, default=None, *, required=False, check=None, why=""):
        self.used.add(key)
        if key not in self.table:
            if required:
                raise self.error(key, "missing (required)")
            return default
        v = self.table[key]
        if kind is float:
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                raise self.error(key, f"must be a number, got {v!r}")
            try:
                v = float(v)
            except OverflowError:          # a TOML integer beyond the float range
                raise self.error(key, f"must be a finite number, got {v!r}") from None
            if not math.isfinite(v):
                raise self.error(key, f"must be a finite number, got {v!r}")
        elif kind is int:
            if isinstance(v, bool) or not isinstance(v, int):
                raise self.error(key, f"must be a whole number, got {v!r}")
        elif kind is bool:
            if not isinstance(v, bool):
                raise self.error(key, f"must be true or false, got {v!r}")
        elif kind is str:
            if not isinstance(v, str):
                raise self.error(key, f"must be text, got {v!r}")
        elif kind is list:
            if not isinstance(v, list):
                raise self.error(key, f"must be a list, got {v!r}")
        elif kind is dict:
            if not isinstance(v, dict):
                raise self.error(key, f"must be a table, got {v!r}")
        if check is not None and not check(v):
            raise self.error(key, f"{why}, got {v!r}")
        return v

    def sub(self, key, *, required=False):
        t = self.get(key, dict, None, required=required)
        return _Reader(self.file, t or {}, self._key(key)) if t is not None or not required else None

    def finish(self, allowed=None):
        unknown = [k for k in self.table if k not in (allowed or self.used)]
        if unknown:
            raise self.error(unknown[0], "unknown key (see the README for the keys a study file takes)")


# Upper bounds of study keys: far beyond any real study, so only typos and absurd values hit them.
MAX_SCALE = 10.0             # load_scale, p_scale, q_scale, bus_scale: ten times the network's loads
MAX_UNIT_MVAR = 1000.0       # one capacitor unit
MAX_MONEY = 1e12             # any cost, budget or value in the study's currency
HOURS_PER_YEAR = 8784.0      # a leap year: levels may cover 8,760 or 8,784 hours
MONEY_WHY = f"must not be negative (and at most {MAX_MONEY:g})"


def _scale(v):
    return 0 < v <= MAX_SCALE


def _money(v):
    return 0 <= v <= MAX_MONEY


def _finite_number(v) -> bool:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return False
    try:
        return math.isfinite(float(v))
    except OverflowError:
        return False


def _band(r: _Reader, key, value):
    if (not isinstance(value, list) or len(value) != 2
            or not all(_finite_number(x) for x in value)
            or not 0.5 <= value[0] < value[1] <= 1.5):
        raise r.error(key, f"must be [low, high] in pu with 0.5 <= low < high <= 1.5, got {value!r}")
    return (float(value[0]), float(value[1]))


def _kinds(r: _Reader, kinds):
    if not kinds or any(k not in ("fixed", "switched") for k in kinds):
        raise r.error("kinds", f"must list \"fixed\" and/or \"switched\", got {kinds!r}")
    return kinds


def check_buses(spec: "StudySpec", net) -> None:
    """Every bus the study names must be in the network (generator ranges at generator buses)."""
    known = set(int(b) for b in net.buses["bus"])
    gens = set(int(b) for b in net.generators.loc[net.generators["energised"].astype(bool), "bus"])
    where = spec.network_path.name

    def bad(key, bus, what="is not in the network"):
        return InputError(f"bus {bus} {what} {where}", file=spec.path.name, field=key)
    for b in spec.bus_limits:
        if b not in known:
            raise bad(f"limits.buses.{b}", b)
    for i, lv in enumerate(spec.levels):
        for b in lv.bus_scale:
            if b not in known:
                raise bad(f"levels[{i}].bus_scale.{b}", b)
    if spec.banks.candidates != "all-pq":
        for b in spec.banks.candidates:
            if b not in known:
                raise bad("banks.candidates", b)
    for i, b in enumerate(spec.banks.overrides):
        if b not in known:
            raise bad(f"banks.site[{i}].bus", b)
    for b in (spec.gen_range or {}):
        if b != "*" and b not in gens:
            raise bad(f"generators.buses.{b}", b, "has no generator in service in")


def _bus_key(r: _Reader, key):
    try:
        return int(key)
    except (TypeError, ValueError):
        raise r.error(key, "bus keys must be bus numbers") from None


MAX_DERIVED_LEVELS = 24


def derived_level_names(k: int) -> list:
    """Names of ``k`` levels derived from a profile, highest load first.

    >>> derived_level_names(3), derived_level_names(2), derived_level_names(1)
    (['peak', 'shoulder', 'light'], ['peak', 'light'], ['all hours'])
    >>> derived_level_names(4)
    ['level 1 (peak)', 'level 2', 'level 3', 'level 4 (light)']
    """
    if k <= 3:
        return {1: ["all hours"], 2: ["peak", "light"], 3: ["peak", "shoulder", "light"]}[k]
    return ["level 1 (peak)"] + [f"level {i}" for i in range(2, k)] + [f"level {k} (light)"]


def _derived_levels(top: _Reader, here: Path):
    """Levels clustered from the profile's ``network`` column when ``[profile] derive_levels = N``
    is set (else ``None``): the load-duration clustering of :func:`planner.hourly.cluster.cluster_levels`.
    Each level's hours are the hours of the intervals it stands for and its load scale (P and Q)
    is their hour-weighted mean ``network`` factor; bands are the study's (``[limits]``)."""
    prof = top.table.get("profile")
    if not isinstance(prof, dict) or "derive_levels" not in prof:
        return None
    r = _Reader(top.file, prof, "profile")
    key = "derive_levels"
    k = r.get(key, int, check=lambda v: 1 <= v <= MAX_DERIVED_LEVELS,
              why=f"must be a whole number of levels 1-{MAX_DERIVED_LEVELS}")
    if "levels" in top.table:
        raise r.error(key, "derives the load levels from the profile: remove the [[levels]] entries "
                           "or this key (not both)")
    file = prof.get("file")
    if not isinstance(file, str) or not file.strip():
        raise r.error(key, "needs a load profile: give [profile] file")
    from ..hourly.cluster import cluster_levels
    from ..hourly.profile import read_profile
    profile = read_profile(here / file)
    if "network" not in profile.columns:
        raise r.error(key, f"needs a 'network' column in the profile {Path(file).name} "
                           f"(it has {', '.join(profile.columns)})")
    col = profile.columns.index("network")
    network_only = dataclasses.replace(profile, columns=["network"],
                                       factors=profile.factors[:, [col]].copy())
    table = cluster_levels(network_only, k).table
    names = derived_level_names(len(table))
    levels = []
    for name, row in zip(names, table.itertuples(index=False)):
        if not 0 < row.network <= MAX_SCALE:
            raise r.error(key, f"level {name!r} would have a load scale of {row.network:g} "
                               f"(must be above 0, at most {MAX_SCALE:g}): check the profile's factors")
        levels.append(LevelSpec(name=name, hours=float(row.hours), p_scale=float(row.network),
                                q_scale=float(row.network)))
    return levels


def read_study(path) -> StudySpec:
    """Read and check a study file; paths inside it are relative to the file.

    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> _ = (d / "s.toml").write_text('[study]\\ntitle = "T"\\nnetwork = "net"\\n'
    ...                                '[[levels]]\\nname = "peak"\\nhours = 2000\\n')
    >>> s = read_study(d / "s.toml")
    >>> s.title, s.levels[0].hours, s.network_path.name
    ('T', 2000.0, 'net')
    >>> _ = (d / "bad.toml").write_text('[study]\\ntitle = "T"\\nnetwork = "n"\\n[[levels]]\\nname = "p"\\nhours = -5\\n')
    >>> try:
    ...     read_study(d / "bad.toml")
    ... except Exception as e:
    ...     print(e)
    bad.toml: levels[0].hours: must be a positive number (of hours, at most 8,784: a leap year), got -5.0
    >>> import shutil; shutil.rmtree(d)
    """
    file = Path(path)
    if not os.path.lexists(file):
        raise InputError("study file not found", file=str(file))
    data = read_input_bytes(file, what="study file", max_bytes=MAX_TOML_BYTES)
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InputError(f"not UTF-8 text ({exc.reason})", file=file.name) from None
    raw = parse_toml(text, file.name)
    top = _Reader(file, raw, "")
    for k in raw:
        if k not in TOP_KEYS:
            raise top.error(k, "unknown section (see the README for the keys a study file takes)")
    here = file.parent

    st = top.sub("study", required=True)
    spec = StudySpec(
        path=file,
        title=st.get("title", str, required=True),
        network_path=(here / st.get("network", str, required=True)),
        question=st.get("question", str, ""),
        currency=st.get("currency", str, ""),
    )
    out = st.get("output", str)
    spec.output = here / out if out else None
    st.finish()

    lim = top.sub("limits")
    spec.v_min_pu = lim.get("v_min_pu", float, 0.95, check=lambda v: 0.5 <= v <= 1.2, why="must be 0.5-1.2 pu")
    spec.v_max_pu = lim.get("v_max_pu", float, 1.05, check=lambda v: 0.8 <= v <= 1.5, why="must be 0.8-1.5 pu")
    if spec.v_min_pu >= spec.v_max_pu:
        raise lim.error("v_min_pu", f"must be below v_max_pu ({spec.v_max_pu}), got {spec.v_min_pu}")
    spec.ratings = lim.get("branch_ratings", bool, True)
    spec.q_limits = lim.get("reactive_limits", bool, True)
    buses = lim.sub("buses")
    spec.bus_limits = {_bus_key(buses, k): _band(buses, k, v) for k, v in buses.table.items()}
    lim.used.add("buses")
    lim.finish()

    derived = _derived_levels(top, here)
    levels = [] if derived is not None else top.get("levels", list, required=True)
    if derived is None and not levels:
        raise top.error("levels", "needs at least one load level")
    names = set()
    for i, t in enumerate(levels):
        if not isinstance(t, dict):
            raise top.error(f"levels[{i}]", "must be a table ([[levels]])")
        r = _Reader(file, t, f"levels[{i}]")
        name = r.get("name", str, required=True, check=lambda v: v.strip() != "", why="must not be empty")
        if name in names:
            raise r.error("name", f"level {name!r} is defined twice")
        names.add(name)
        why_scale = f"must be a positive number (a factor of at most {MAX_SCALE:g})"
        scale = r.get("load_scale", float, None, check=_scale, why=why_scale)
        lv = LevelSpec(
            name=name,
            hours=r.get("hours", float, required=True, check=lambda v: 0 < v <= HOURS_PER_YEAR,
                        why=f"must be a positive number (of hours, at most {HOURS_PER_YEAR:,.0f}: a leap year)"),
            p_scale=r.get("p_scale", float, scale if scale is not None else 1.0, check=_scale, why=why_scale),
            q_scale=r.get("q_scale", float, scale if scale is not None else 1.0, check=_scale, why=why_scale),
            v_min_pu=r.get("v_min_pu", float, check=lambda v: 0.5 <= v <= 1.2, why="must be 0.5-1.2 pu"),
            v_max_pu=r.get("v_max_pu", float, check=lambda v: 0.8 <= v <= 1.5, why="must be 0.8-1.5 pu"),
        )
        lo = lv.v_min_pu if lv.v_min_pu is not None else spec.v_min_pu
        hi = lv.v_max_pu if lv.v_max_pu is not None else spec.v_max_pu
        if lo >= hi:
            raise r.error("v_min_pu" if lv.v_min_pu is not None else "v_max_pu",
                          f"the level's band {lo:g}-{hi:g} pu is empty (low must be below high)")
        bs = r.sub("bus_scale")
        for k, v in bs.table.items():
            if not _finite_number(v) or not _scale(v):
                raise bs.error(k, f"must be a positive number (a factor of at most {MAX_SCALE:g}), got {v!r}")
            lv.bus_scale[_bus_key(bs, k)] = float(v)
        r.used.add("bus_scale")
        r.finish()
        spec.levels.append(lv)
    if derived is not None:
        spec.levels = derived
        names = {lv.name for lv in derived}
    total_hours = sum(lv.hours for lv in spec.levels)
    if total_hours > HOURS_PER_YEAR + 1e-9:
        raise top.error("levels", f"hours add up to {total_hours:g}, more than a year "
                        f"(8,760 h; {HOURS_PER_YEAR:,.0f} h in a leap year)")
    spec.peak_level = max(spec.levels, key=lambda lv: lv.p_scale).name

    bk = top.sub("banks")
    why_unit = f"must be a positive number (of Mvar, at most {MAX_UNIT_MVAR:g})"
    unit = bk.get("unit_mvar", float, 0.3, check=lambda v: 0 < v <= MAX_UNIT_MVAR, why=why_unit)
    max_units = bk.get("max_units", int, 4, check=lambda v: 1 <= v <= 1000, why="must be 1-1000")
    kinds = _kinds(bk, bk.get("kinds", list, ["fixed", "switched"]))
    cand = bk.get("candidates", None, [])
    if cand == "all-pq":
        cand_list = "all-pq"
    elif isinstance(cand, list) and all(isinstance(b, int) and not isinstance(b, bool) for b in cand):
        cand_list = cand
    else:
        raise bk.error("candidates", f"must be a list of bus numbers or \"all-pq\", got {cand!r}")
    overrides = {}
    for i, t in enumerate(bk.get("site", list, [])):
        r = _Reader(file, t if isinstance(t, dict) else {}, f"banks.site[{i}]")
        b = r.get("bus", int, required=True)
        overrides[b] = SiteSpec(b, r.get("unit_mvar", float, unit, check=lambda v: 0 < v <= MAX_UNIT_MVAR,
                                         why=why_unit),
                                r.get("max_units", int, max_units, check=lambda v: 1 <= v <= 1000, why="must be 1-1000"),
                                tuple(_kinds(r, r.get("kinds", list, kinds))))
        r.finish()
    costs = bk.sub("costs")
    spec.banks = BankSpec(
        candidates=cand_list, overrides=overrides, unit_mvar=unit, max_units=max_units, kinds=tuple(kinds),
        max_new_sites=bk.get("max_new_sites", int, None, check=lambda v: 0 <= v <= 100000, why="must not be negative (and at most 100000)"),
        budget=bk.get("budget", float, None, check=_money, why=MONEY_WHY),
        per_site=costs.get("per_site", float, 0.0, check=_money, why=MONEY_WHY),
        per_mvar=costs.get("per_mvar", float, 0.0, check=_money, why=MONEY_WHY),
        switched_per_mvar=costs.get("switched_per_mvar", float, 0.0, check=_money, why=MONEY_WHY),
        switched_per_site=costs.get("switched_per_site", float, 0.0, check=_money, why=MONEY_WHY),
        existing_switchable=bk.get("existing_switchable", bool, True),
    )
    costs.finish()
    bk.used.add("costs")
    bk.finish()

    gen = top.sub("generators")
    if gen.table:
        lo = gen.get("v_min_pu", float, 0.95)
        hi = gen.get("v_max_pu", float, 1.05)
        spec.gen_range = {"*": _band(gen, "v_min_pu", [lo, hi])}
        gb = gen.sub("buses")
        for k, v in gb.table.items():
            spec.gen_range[_bus_key(gb, k)] = _band(gb, k, v)
        gen.used.add("buses")
        spec.setpoints_per_level = gen.get("per_level", bool, True)
        if not gen.get("adjust", bool, True):
            spec.gen_range = None
        gen.finish()

    tp = top.sub("taps")
    spec.taps = tp.get("adjust", bool, False)
    tp.finish()

    ec = top.sub("economics")
    energy = ec.get("energy_value_per_mwh", None, 0.0)
    if isinstance(energy, dict):
        for k, v in energy.items():
            if k not in names:
                raise ec.error(f"energy_value_per_mwh.{k}", f"is not a load level (levels: {sorted(names)})")
            if not _finite_number(v) or not _money(v):
                raise ec.error(f"energy_value_per_mwh.{k}", f"must be a non-negative number (at most {MAX_MONEY:g}), "
                                                            f"got {v!r}")
        missing = [n for n in names if n not in energy]
        if missing:
            raise ec.error("energy_value_per_mwh", f"has no value for level {missing[0]!r}")
    elif not _finite_number(energy) or not _money(energy):
        raise ec.error("energy_value_per_mwh", f"must be a non-negative number or a table per level, got {energy!r}")
    spec.economics = dict(
        energy_value_per_mwh=energy,
        demand_value_per_kw_year=ec.get("demand_value_per_kw_year", float, 0.0, check=_money, why=MONEY_WHY),
        discount_rate=ec.get("discount_rate", float, 0.07, check=lambda v: 0 <= v < 1, why="must be a fraction 0-1 (0.07 = 7 %)"),
        horizon_years=ec.get("horizon_years", int, 20, check=lambda v: 1 <= v <= 100, why="must be 1-100"),
        bank_life_years=ec.get("bank_life_years", int, None, check=lambda v: 1 <= v <= 100, why="must be 1-100"),
        om_fraction=ec.get("om_fraction", float, 0.0, check=lambda v: 0 <= v < 1, why="must be a fraction 0-1"),
    )
    ec.finish()

    ob = top.sub("objective")
    spec.objective = ob.get("kind", str, "cost", check=lambda v: v in ("cost", "losses"),
                            why="must be \"cost\" (value of losses plus annualised capital) or \"losses\"")
    ob.finish()
    sv = top.sub("solver")
    spec.max_iterations = sv.get("max_iterations", int, 30, check=lambda v: 1 <= v <= 500, why="must be 1-500")
    spec.mip_gap = sv.get("mip_gap", float, 5e-4, check=lambda v: 0 < v < 0.1, why="must be between 0 and 0.1")
    spec.rel_tolerance = sv.get("rel_tolerance", float, 1e-4, check=lambda v: 0 <= v < 0.1,
                                why="must be between 0 and 0.1")
    spec.step_seconds = sv.get("step_seconds", float, 120.0, check=lambda v: 0.5 <= v <= 3600,
                               why="must be 0.5-3600 s")
    sv.finish()

    alts = top.get("alternatives", list, [])
    seen = set()
    for i, t in enumerate(alts):
        r = _Reader(file, t if isinstance(t, dict) else {}, f"alternatives[{i}]")
        a = AlternativeSpec(
            name=r.get("name", str, required=True, check=lambda v: v.strip() != "", why="must not be empty"),
            description=r.get("description", str, ""),
            banks=r.get("banks", bool, True), setpoints=r.get("setpoints", bool, True),
            taps=r.get("taps", bool, True),
            budget=r.get("budget", float, None, check=_money, why=MONEY_WHY),
            max_new_sites=r.get("max_new_sites", int, None, check=lambda v: 0 <= v <= 100000, why="must not be negative (and at most 100000)"),
            secure_against_outages=r.get("secure_against_outages", bool, False),
        )
        if a.secure_against_outages and not isinstance(top.table.get("outages"), dict):
            raise r.error("secure_against_outages", "needs an [outages] section naming the outages to secure against")
        if a.name in seen:
            raise r.error("name", f"alternative {a.name!r} is defined twice")
        seen.add(a.name)
        r.finish()
        spec.alternatives.append(a)
    if not spec.alternatives:
        spec.alternatives.append(AlternativeSpec(name="Plan", description="all levers in the study file"))
    from ..proof.spec import read_proof
    spec.proof = read_proof(top, here, [lv.name for lv in spec.levels])
    return spec
