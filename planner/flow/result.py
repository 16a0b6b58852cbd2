"""The one result object of a load flow, converged or not."""
from __future__ import annotations

import enum
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..network.compile import PQ, SLACK, KIND_NAMES, Compiled
from .equations import branch_flows, load_power

__all__ = ["FlowStatus", "FlowResult", "build_result", "branch_flows", "generator_table"]


class FlowStatus(enum.IntEnum):
    """Outcome of a load flow. Integer values are kept from earlier releases, so
    ``res.status == 0`` still means converged.

    CONVERGED
        Every mismatch is within tolerance, reactive limits settled, and the solution passed the
        plausibility checks (or was confirmed by continuation from light load).
    ITERATION_LIMIT
        The iteration budget ran out before the mismatch fell within tolerance.
    DIVERGED
        The iteration ran away or stalled (no step lowered the mismatch, or a numerical
        overflow); the continuation could not rescue it either.
    SINGULAR
        The Jacobian is singular (voltage collapse, or an island the model cannot carry).
    SUSPECT
        The equations are solved to tolerance, but the solution looks inoperable (voltages far
        below the band, a branch beyond its maximum-transfer angle, or losses far above a DC
        estimate) and continuation from light load found no other solution. ``message`` says
        why; ``success`` is False. The voltages are a valid solution of the equations.
    LIMITS_UNSETTLED
        Reactive-limit switching did not settle within the allowed rounds.
    COLLAPSE
        Continuation from light load stopped short of the full schedule (the fraction reached
        is in ``message``): most likely no operable solution exists at this loading.
    """
    CONVERGED = 0
    ITERATION_LIMIT = 1
    DIVERGED = 2
    SINGULAR = 3
    SUSPECT = 4
    LIMITS_UNSETTLED = 5
    COLLAPSE = 6


# the words of earlier releases, kept for the JSON output
STATUS = {
    FlowStatus.CONVERGED: "converged",
    FlowStatus.ITERATION_LIMIT: "iteration limit reached",
    FlowStatus.DIVERGED: "diverged",
    FlowStatus.SINGULAR: "singular Jacobian",
    FlowStatus.SUSPECT: "converged to a suspect (likely inoperable) solution",
    FlowStatus.LIMITS_UNSETTLED: "reactive-limit switching did not settle",
    FlowStatus.COLLAPSE: "no solution reached from light load",
}


@dataclass(repr=False)
class FlowResult:
    """Outcome of :func:`planner.flow.newton.solve_flow`.

    Always check ``success`` (or ``status == FlowStatus.CONVERGED``) before using the voltages:
    a failed solve returns its last iterate with ``message``, ``worst_bus`` and
    ``mismatch_history`` saying what went wrong. ``converged`` is a read-only alias of
    ``success``. ``equations_solved`` is True when the mismatch is within tolerance, even for a
    ``SUSPECT`` solution.
    """
    success: bool
    status: FlowStatus
    message: str
    iterations: int
    mismatch_history: list
    worst_bus: int | None
    worst_mismatch_mva: float
    losses_mw: float
    losses_mvar: float
    solve_seconds: float
    limited_buses: list
    v: np.ndarray
    compiled: Compiled
    limit_state: np.ndarray          # +1 held at max Mvar, -1 at min, 0 on voltage control
    kind: np.ndarray                 # bus kinds as solved (codes)
    buses: pd.DataFrame | None = None
    generators: pd.DataFrame | None = None
    branches: pd.DataFrame | None = None
    bus_q_gen: np.ndarray = field(default=None)   # pu per bus
    bus_p_gen: np.ndarray = field(default=None)
    equations_solved: bool = False
    oscillating_buses: list = field(default_factory=list)   # generators frozen at a limit after flip-flopping
    continuation_steps: int = 0      # load steps taken by the continuation (0: plain Newton sufficed)
    strategy: str = "newton"         # "newton", "dc-start" (second start, DC angles), "monotone" (third start,
    #                                  monotone step control) or "continuation"

    @property
    def converged(self) -> bool:
        """Read-only alias of ``success``."""
        return self.success

    def __repr__(self) -> str:
        return (f"FlowResult(success={self.success}, status={self.status.name}, "
                f"iterations={self.iterations}, buses={self.compiled.n if self.compiled is not None else 0}, "
                f"losses_mw={self.losses_mw:.4g}, message={self.message!r})")

    def to_frames(self) -> dict:
        """The result tables (buses, generators, branches) as pandas DataFrames.

        Builds them if the solve was run with ``build_tables=False``.
        """
        if self.buses is None:
            _fill_tables(self)
        return {"buses": self.buses, "generators": self.generators, "branches": self.branches}

    @property
    def vm(self) -> np.ndarray:
        return np.abs(self.v)

    @property
    def va_deg(self) -> np.ndarray:
        return np.rad2deg(np.angle(self.v))

    def summary(self) -> str:
        """A few lines a person reads: convergence, losses, voltage extremes, limited generators."""
        c = self.compiled
        lines = [f"load flow: {self.message}" + ("" if self.equations_solved else
                 f"; worst bus {self.worst_bus} mismatch {self.worst_mismatch_mva:.4g} MVA")]
        lines.append(f"iterations: {self.iterations}   Newton time: {self.solve_seconds * 1000:.1f} ms"
                     + (f"   continuation steps: {self.continuation_steps}" if self.continuation_steps else ""))
        if self.equations_solved:
            vm = self.vm
            alive = c.alive
            lo = np.flatnonzero(alive)[np.argmin(vm[alive])]
            hi = np.flatnonzero(alive)[np.argmax(vm[alive])]
            lines.append(f"losses: {self.losses_mw:.4f} MW, {self.losses_mvar:.4f} Mvar")
            lines.append(f"lowest voltage: {vm[lo]:.4f} pu at bus {c.bus_ids[lo]} {c.names[lo]}".rstrip())
            lines.append(f"highest voltage: {vm[hi]:.4f} pu at bus {c.bus_ids[hi]} {c.names[hi]}".rstrip())
            if self.limited_buses:
                lines.append("generators at a reactive limit: " + ", ".join(
                    f"bus {b} ({'max' if s > 0 else 'min'})" for b, s in
                    zip(self.limited_buses, self.limit_state[c.index_of(self.limited_buses)])))
            else:
                lines.append("generators at a reactive limit: none")
            if self.oscillating_buses:
                lines.append("generators that flip-flopped and were held at a limit: "
                             + ", ".join(f"bus {b}" for b in self.oscillating_buses))
        return "\n".join(lines)


def build_result(c: Compiled, y, v, kind, q_fixed, at_limit, *, status, message, iterations, history,
                 seconds, build_tables=True, equations_solved=None, ibus=None, **extra) -> FlowResult:
    """Assemble a :class:`FlowResult` from the solver's final state (no printing, no raising).

    ``ibus`` is ``Y v`` if the caller has it."""
    with np.errstate(all="ignore"):     # a diverged iterate may hold huge values: report, never warn
        res = _build(c, y, v, kind, q_fixed, at_limit, ibus, status=FlowStatus(status), message=message,
                     iterations=iterations, history=history, seconds=seconds,
                     equations_solved=equations_solved, **extra)
        if build_tables:
            _fill_tables(res)
    return res


def _build(c, y, v, kind, q_fixed, at_limit, ibus, *, status, message, iterations, history, seconds,
           equations_solved, **extra) -> FlowResult:
    base = c.base_mva
    vm = np.abs(v)
    s_load = load_power(c, vm)
    s_calc = v * np.conj(y @ v if ibus is None else ibus)
    mis = s_calc - (c.s_gen + 1j * q_fixed - s_load)      # bus_mismatch, with its parts kept
    # only equations that were solved count for the worst bus (P at PV/PQ, Q at PQ)
    solved_p = (kind != SLACK) & c.alive
    solved_q = (kind == PQ) & c.alive
    err = np.abs(np.where(solved_p, mis.real, 0.0)) + 1j * np.abs(np.where(solved_q, mis.imag, 0.0))
    worst = int(np.argmax(np.abs(err))) if c.n else 0
    s_from, s_to = branch_flows(c, v)
    loss = s_from + s_to
    s_gen_bus = s_calc + s_load            # generation that balances each bus
    # buses whose Q is not solved for keep their scheduled values
    q_gen_bus = np.where(kind == PQ, c.s_gen.imag + q_fixed, s_gen_bus.imag)
    p_gen_bus = np.where(kind == SLACK, s_gen_bus.real, c.s_gen.real)
    limited = [int(b) for b in c.bus_ids[at_limit != 0]]
    res = FlowResult(
        success=status == FlowStatus.CONVERGED, status=status, message=message, iterations=iterations,
        mismatch_history=list(history), worst_bus=int(c.bus_ids[worst]) if c.n else None,
        worst_mismatch_mva=float(np.abs(err[worst]) * base) if c.n else 0.0,
        losses_mw=float(loss.real.sum() * base), losses_mvar=float(loss.imag.sum() * base),
        solve_seconds=seconds, limited_buses=limited, v=v, compiled=c, limit_state=at_limit.copy(),
        kind=kind.copy(), bus_q_gen=q_gen_bus, bus_p_gen=p_gen_bus,
        equations_solved=bool(status in (FlowStatus.CONVERGED, FlowStatus.SUSPECT)
                              if equations_solved is None else equations_solved),
        **extra,
    )
    return res


def _fill_tables(res: FlowResult) -> None:
    """Build the pandas tables of a result in place."""
    c, v, kind, at_limit = res.compiled, res.v, res.kind, res.limit_state
    base = c.base_mva
    vm = np.abs(v)
    s_load = load_power(c, vm)
    p_gen_bus, q_gen_bus = res.bus_p_gen, res.bus_q_gen
    s_from, s_to = branch_flows(c, v)
    loss = s_from + s_to
    with np.errstate(all="ignore"):
        res.buses = pd.DataFrame({
            "bus": c.bus_ids, "name": c.names, "kind": KIND_NAMES[kind], "v_pu": vm,
            "angle_deg": np.rad2deg(np.angle(v)),
            "p_inj_mw": (p_gen_bus - s_load.real) * base, "q_inj_mvar": (q_gen_bus - s_load.imag) * base,
            "p_load_mw": s_load.real * base, "q_load_mvar": s_load.imag * base,
            "p_gen_mw": p_gen_bus * base, "q_gen_mvar": q_gen_bus * base,
            "v_min_pu": c.v_min, "v_max_pu": c.v_max,
        })
        res.generators = generator_table(c, kind, p_gen_bus, q_gen_bus, at_limit)
        rating = c.rating
        s_max = np.maximum(np.abs(s_from), np.abs(s_to)) * base
        res.branches = pd.DataFrame({
            "branch_id": c.branch_ids, "element": c.branch_element,
            "from_bus": c.bus_ids[c.f], "to_bus": c.bus_ids[c.t],
            "from_end_mw": s_from.real * base, "from_end_mvar": s_from.imag * base,
            "to_end_mw": s_to.real * base, "to_end_mvar": s_to.imag * base,
            "loss_mw": loss.real * base, "loss_mvar": loss.imag * base,
            "rating_mva": rating,
            "loading_pct": np.where(rating > 0, 100.0 * s_max / np.where(rating > 0, rating, 1.0), np.nan),
        })


def generator_table(c: Compiled, kind, p_gen_bus, q_gen_bus, at_limit) -> pd.DataFrame:
    """Share each bus's generation among its generators.

    Rule: reactive output is shared in proportion to each generator's reactive range
    (Q_g = Qmin_g + (Q_bus - Qmin_bus) * range_g / range_bus; equal shares when the ranges are
    all zero). At a slack bus the active balance beyond the scheduled outputs is shared
    equally. Generators at PQ buses keep their scheduled output.
    """
    base = c.base_mva
    gb = c.gen_bus
    n = c.n
    ng = len(gb)
    p = c.gen_p.copy()
    q = c.gen_q.copy()
    count = np.bincount(gb, minlength=n).astype(float)
    controlled = kind[gb] != PQ
    limited = at_limit[gb] != 0
    share_q = controlled | limited
    rng = c.gen_q_max - c.gen_q_min
    rng_bus = np.bincount(gb, rng, n)
    frac = np.where(rng_bus[gb] > 0, rng / np.where(rng_bus[gb] > 0, rng_bus[gb], 1.0), 1.0 / count[gb])
    q = np.where(share_q, c.gen_q_min + (q_gen_bus[gb] - c.q_min[gb]) * frac, q)
    # equal-share case: q_min offsets must not be counted when ranges are zero
    q = np.where(share_q & (rng_bus[gb] <= 0), q_gen_bus[gb] / count[gb], q)
    slack = kind[gb] == SLACK
    extra = p_gen_bus - np.bincount(gb, c.gen_p, n)
    p = np.where(slack, p + extra[gb] / count[gb], p)
    state = np.where(at_limit[gb] > 0, "max", np.where(at_limit[gb] < 0, "min", ""))
    return pd.DataFrame({
        "gen_id": c.gen_ids, "bus": c.bus_ids[gb] if ng else np.array([], np.int64),
        "mw": p * base, "mvar": q * base,
        "q_min_mvar": c.gen_q_min * base, "q_max_mvar": c.gen_q_max * base, "at_limit": state,
    })
