"""Polar Newton-Raphson load flow with reactive limits, continuation and a plausibility check.

One public function, :func:`solve_flow`, returns a :class:`~planner.flow.result.FlowResult`
whether or not the case converged; it never raises on a numerical failure and never prints
(numpy floating-point warnings are turned into the result's status inside the solver).

Method
------
* Unknowns: bus angles at PV and PQ buses, magnitudes at PQ buses. Mismatch
  ``V conj(Y V) - (S_gen - S_load(|V|))`` with voltage-dependent (ZIP) loads
  (:mod:`planner.flow.equations`).
* Each iteration: one Jacobian fill on a fixed sparsity pattern and one sparse LU (SuperLU) in
  a fill-reducing ordering computed once per network topology (:class:`SymbolicCache`).
* Step control, non-monotone: the full Newton step is taken unless the mismatch 2-norm would
  grow past ``GROWTH_BOUND`` times the best of the last ``WINDOW`` iterates (the early
  excursion of a flat start on a large meshed network is allowed; a runaway is not). A
  rejected step is scaled by the optimal multiplier (Iwamoto and Tamura 1981, here from the
  quadratic model ``F(x + mu dx) ~ (1 - mu) F + mu^2 F(x + dx)`` through the full-step point),
  then halved until the mismatch falls. Three tiny steps in a row end the attempt as stalled.
* Continuation: if Newton fails from the requested start, load and generation are scaled to
  the first of ``CONT_FIRST_TRIES`` that solves, and raised in steps (doubling after an easy step,
  halving after a failed one), each step warm-started from a secant prediction of the last two
  solutions; reactive limits are switched at every step. It reaches the operable
  (high-voltage) solution whenever the path from light load does not fold.
* Reactive limits (on by default): PV buses whose generators would exceed their summed limits
  become PQ at the limit; a limited bus returns to PV when its voltage would move back past the
  setpoint. Limits are first checked once the mismatch falls below ``LIMIT_CHECK_PU`` (with a
  margin of the current mismatch), so each switching round need not converge fully; at most
  ``MAX_LIMIT_ROUNDS`` rounds; a generator that returns to PV and is limited again
  ``FLIP_LIMIT`` times is held at its limit and reported in ``oscillating_buses``.
* Plausibility (:func:`implausible`): a converged point with a live bus far below its band, a
  branch beyond its maximum-transfer angle, or losses far above a DC estimate is checked by the
  continuation; if that reaches another solution, that one is reported; if it reaches the
  same one, the point is confirmed; else the status is ``SUSPECT``.

Every decision depends on iteration counts and mismatch values only, never on time.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ..network.compile import PQ, PV, SLACK, Compiled, compile_network
from .runtime import keep_freed_memory, one_blas_thread
from .equations import bus_mismatch, injection, load_derivative, load_power
from .jacobian import SymbolicCache
from .result import FlowResult, FlowStatus, build_result

__all__ = ["solve_flow", "initial_voltage", "dc_angles", "implausible", "SymbolicCache",
           "bus_mismatch", "load_power", "FlowStatus"]

MAX_LIMIT_ROUNDS = 12
LIMIT_CHECK_PU = 1e-3             # mismatch at which limits are first checked in each round
FLIP_LIMIT = 2                    # returns to PV after which a flip-flopping generator is held
LINE_SEARCH_STEPS = 10
GROWTH_BOUND = 1e2                # full step accepted unless the mismatch grows past this x best
WINDOW = 5                        # ... of the last WINDOW iterates
TINY_STEP = 0.05                  # a multiplier below this counts towards a stall
STALL_STEPS = 3
# fractions of the schedule the continuation tries to solve first, in this order, from a DC start.
# Half the schedule first: on a large meshed grid (50,000 buses) a DC start at a tenth of the
# schedule is far from its solution (the line charging, not the load, sets the voltages there)
# and Newton fails from it, while half the schedule solves as easily as the full one.
CONT_FIRST_TRIES = (0.5, 0.1, 0.01)
CONT_STEP = 0.15                  # first step of the fraction
CONT_MIN_STEP = 1e-3
CONT_STEP_ITERS = 8               # Newton iterations allowed per continuation step
CONT_TOL_PU = 1e-6                # tolerance at intermediate continuation steps
CONT_MAX_ITERS = 400              # all continuation iterations together
FAR_BELOW_BAND_PU = 0.15          # a voltage this far below its band minimum is suspect
LOSS_FACTOR = 5.0                 # losses above this x (DC estimate + 1 % of load) are suspect
SAME_SOLUTION_PU = 1e-4
MAX_ITER_CAP = 100_000
# networks from this many buses solve with BLAS held to one thread (see planner.flow.runtime); on
# smaller ones BLAS is hardly called and the switch would cost more than it saves
ONE_BLAS_THREAD_FROM = 1000
GIVE_UP_ITERS = 10                # an attempt still above its first mismatch after this many ends


def solve_flow(net=None, *, compiled: Compiled | None = None, tol_mva: float | None = None,
               max_iter: int = 30, enforce_q_limits: bool = True, start="flat",
               build_tables: bool = True, continuation: bool = True, check_plausibility: bool = True,
               symbolic: SymbolicCache | None = None) -> FlowResult:
    """Solve the AC load flow of a network by Newton-Raphson.

    Parameters
    ----------
    net : Network, optional
        The network; compiled here unless ``compiled`` is given.
    compiled : Compiled, optional
        Arrays of the network (from :func:`~planner.network.compile.compile_network`), for
        callers that change levers between solves.
    tol_mva : float, optional
        Convergence tolerance on the largest bus mismatch, MW or Mvar, finite and between 1e-15
        and 0.1 pu of the system base. Default 1e-8 pu of the system base.
    max_iter : int
        Newton iterations allowed from the requested start (all reactive-limit rounds
        together), 1 to 100,000. The continuation, when it runs, has its own budget.
    enforce_q_limits : bool
        Hold generator reactive output within limits by turning PV buses into PQ buses.
    start : "flat", "dc", "stored" or FlowResult
        Initial voltages: flat (1.0 pu or setpoint, angle 0); angles from a DC load flow;
        the voltages stored in the bus table; or a previous solution (warm start).
    build_tables : bool
        Build the pandas result tables (turn off inside optimisation loops;
        ``FlowResult.to_frames()`` builds them later).
    continuation : bool
        When Newton fails, or its solution is implausible, solve from light load upwards.
    check_plausibility : bool
        Test a converged point (see :func:`implausible`); off, any converged point is reported.
    symbolic : SymbolicCache, optional
        Symbolic work (Jacobian sparsity pattern and fill-reducing ordering) to reuse. The
        optimiser, N-1 and hourly sweeps call this function hundreds of times on networks that
        differ only in shunts, setpoints, taps or loads: create one ``SymbolicCache()`` and pass
        it to every call. It checks the admittance pattern and the live non-slack buses at each
        use and rebuilds itself when they differ, so passing it is always safe. Without it the
        cache kept on ``compiled`` is used, shared by repeated solves of one ``Compiled`` and of
        its copies made by :func:`planner.network.compile.replace`.

    Returns
    -------
    FlowResult
        ``success``, ``status`` (:class:`~planner.flow.result.FlowStatus`), ``message``,
        iterations, voltages and tables. A ``SUSPECT`` status means solved but likely
        inoperable (see ``message``).

    Raises
    ------
    ValueError
        For a tolerance or iteration limit that is not a sensible number.

    Examples
    --------
    >>> from planner.network.model import Network, make_table
    >>> net = Network(base_mva=100.0,
    ...     buses=make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack"},
    ...                                {"bus": 2, "base_kv": 110.0, "kind": "PQ"}]),
    ...     generators=make_table("generators", [{"gen_id": "G1", "bus": 1, "mw": 0.0, "v_set_pu": 1.0}]),
    ...     loads=make_table("loads", [{"load_id": "D2", "bus": 2, "mw": 50.0, "mvar": 20.0}]),
    ...     lines=make_table("lines", [{"line_id": "L1", "from_bus": 1, "to_bus": 2, "r_pu": 0.01, "x_pu": 0.1}]))
    >>> res = solve_flow(net)
    >>> res.success, res.status.name, res.iterations
    (True, 'CONVERGED', 3)
    >>> round(res.losses_mw, 4)
    0.3063
    >>> cache = SymbolicCache()
    >>> [solve_flow(net, symbolic=cache).iterations for _ in range(2)], cache.builds
    ([3, 3], 1)
    """
    keep_freed_memory()      # once per process: iterations reuse memory instead of page-faulting
    c = compiled if compiled is not None else compile_network(net)
    tol = _check_tolerance(tol_mva, c.base_mva)
    max_iter = _check_max_iter(max_iter)
    if symbolic is None:
        # shared by every copy of this Compiled made with compile.replace (lever changes)
        symbolic = c._cache.setdefault("shared", {}).setdefault("flow_symbolic", SymbolicCache())
    args = (c, tol, max_iter, enforce_q_limits, start, build_tables, continuation, check_plausibility,
            symbolic)
    if c.n < ONE_BLAS_THREAD_FROM:
        return _solve(*args)
    with one_blas_thread():
        return _solve(*args)


def _solve(c, tol, max_iter, enforce_q_limits, start, build_tables, continuation, check_plausibility,
           symbolic) -> FlowResult:
    t0 = time.perf_counter()
    y = _admittance(c)
    ctx = _Context(c, y, tol, enforce_q_limits, symbolic)
    with np.errstate(all="ignore"):
        v = initial_voltage(c, start)
    st = _LimitState.fresh(c)
    if isinstance(start, FlowResult) and enforce_q_limits and start.compiled is not None \
            and start.compiled.n == c.n:
        # a warm start keeps the limit states it had
        st = _LimitState.from_result(c, start)
        held = (st.at_limit != 0) & c.alive
        v[held] = start.v[held]
    history: list[float] = []
    ctx.give_up = continuation
    v_start, st_start = v.copy(), st.copy()
    v1, st1, iters, status, message = _solve_schedule(ctx, v, st, 1.0, tol, max_iter, history)
    strategy, steps = "newton", 0
    if continuation and status not in (FlowStatus.CONVERGED, FlowStatus.SUSPECT):
        # second start: flat magnitudes, angles of a DC flow whose imbalance the loads take up
        v2 = _balanced_dc_start(c, 1.0, symbolic)
        more = max(max_iter - iters, 1)
        v2, st2, it2, status2, message2 = _solve_schedule(ctx, v2, _LimitState.fresh(c), 1.0, tol, more, history)
        iters += it2
        if status2 == FlowStatus.CONVERGED:
            v1, st1, status, strategy = v2, st2, status2, "dc-start"
            message = f"converged in {iters} iterations (flat start: {message}; then from DC angles)"
    ctx.give_up = False
    total = iters
    if status == FlowStatus.CONVERGED and check_plausibility:
        reason = implausible(c, y, v1, symbolic, ibus=ctx.ibus_at(v1))
        if reason is not None:
            status, message = FlowStatus.SUSPECT, f"solution looks inoperable: {reason}"
    if continuation and status != FlowStatus.CONVERGED:
        # third start: the requested one again, with monotone step control (a step is kept only
        # where the mismatch falls). The non-monotone rule lets a flat start ride out the early
        # excursion of a large meshed network, but on a small one it can jump into the basin of a
        # low-voltage point -- e.g. a bus with no load and only shunts sits at 0 V, which the
        # power equations allow -- and the continuation cannot help where there is no load to
        # scale down (found by the property tests: a 23-bus network, two no-load buses behind a
        # long line and a phase shifter).
        # (an attempt that makes no progress ends early: the continuation still follows, and on a
        # case beyond its loadability this start would otherwise spend its whole budget)
        ctx.growth, ctx.give_up = 1.0, True
        v3, st3, it3, status3, message3 = _solve_schedule(ctx, v_start.copy(), st_start, 1.0, tol, max_iter,
                                                          history)
        ctx.growth, ctx.give_up = GROWTH_BOUND, False
        total += it3
        if status3 == FlowStatus.CONVERGED and (not check_plausibility or implausible(
                c, y, v3, symbolic, ibus=ctx.ibus_at(v3)) is None):
            first = message
            v1, st1, status, strategy = v3, st3, FlowStatus.CONVERGED, "monotone"
            message = (f"converged in {it3} iterations with monotone step control ({total} iterations in "
                       f"all); full steps: {first}")
    if continuation and status != FlowStatus.CONVERGED:
        vc, stc, it_c, status_c, msg_c, steps = _continuation(ctx, history)
        total += it_c
        if status_c == FlowStatus.CONVERGED:
            if status == FlowStatus.SUSPECT and np.abs(vc - v1).max() < SAME_SOLUTION_PU:
                # the continuation from light load reaches the same point: it is the operable one
                status, message = FlowStatus.CONVERGED, (
                    f"converged in {iters} iterations ({reason}; confirmed by continuation from "
                    "light load)")
            else:
                first = message
                v1, st1, status, strategy = vc, stc, FlowStatus.CONVERGED, "continuation"
                message = (f"converged by continuation from light load in {steps} load steps "
                           f"({total} iterations in all); plain Newton: {first}")
        elif status == FlowStatus.SUSPECT:
            message += f"; continuation from light load found no other solution ({msg_c})"
        elif status_c == FlowStatus.COLLAPSE:
            # the conclusion first: no solution was found, and how far the load could go
            status, message = FlowStatus.COLLAPSE, f"no solution found: {msg_c} (plain Newton: {message})"
        else:
            message += f"; continuation from light load: {msg_c}"
    elif status == FlowStatus.CONVERGED and strategy == "newton":
        message = f"converged in {iters} iterations"
    if st1.oscillating.size and status == FlowStatus.CONVERGED:
        message += ("; generators at bus " + ", ".join(str(b) for b in c.bus_ids[st1.oscillating])
                    + " flip-flopped between PV and their limit and are held at the limit")
    seconds = time.perf_counter() - t0
    return build_result(c, y, v1, st1.kind, st1.q_fixed, st1.at_limit, ibus=ctx.ibus_at(v1),
                        status=status, message=message,
                        iterations=total, history=history, seconds=seconds, build_tables=build_tables,
                        equations_solved=status in (FlowStatus.CONVERGED, FlowStatus.SUSPECT),
                        oscillating_buses=[int(b) for b in c.bus_ids[st1.oscillating]],
                        continuation_steps=steps, strategy=strategy)


def _admittance(c: Compiled) -> sp.csr_matrix:
    """``c.ybus()``, kept on ``c`` while its branch part and bus shunts are the same (repeated
    solves of one network build it once; never modified by the solver)."""
    yb = c.ybranch()                    # itself kept by compile while ratios and shifts hold
    hit = c._cache.get("flow_ybus")
    if hit is not None and hit[0] is yb and np.array_equal(hit[1], c.ysh):
        return hit[2]
    y = c.ybus()
    c._cache["flow_ybus"] = (yb, c.ysh.copy(), y)
    return y


def _check_tolerance(tol_mva, base_mva) -> float:
    if tol_mva is None:
        return 1e-8
    if isinstance(tol_mva, bool):
        raise ValueError(f"tol_mva must be a number of MVA, got {tol_mva!r}")
    try:
        t = float(tol_mva)
    except (TypeError, ValueError):
        raise ValueError(f"tol_mva must be a number of MVA, got {tol_mva!r}") from None
    lo, hi = 1e-15 * base_mva, 0.1 * base_mva
    if not (math.isfinite(t) and lo <= t <= hi):
        raise ValueError(f"tol_mva must be between {lo:.3g} and {hi:.3g} MVA (1e-15 to 0.1 pu of the "
                         f"{base_mva:g} MVA base), got {tol_mva!r}")
    return t / base_mva


def _check_max_iter(max_iter) -> int:
    if isinstance(max_iter, bool) or not isinstance(max_iter, (int, np.integer)):
        raise ValueError(f"max_iter must be a whole number, got {max_iter!r}")
    if not 1 <= max_iter <= MAX_ITER_CAP:
        raise ValueError(f"max_iter must be between 1 and {MAX_ITER_CAP}, got {max_iter}")
    return int(max_iter)


@dataclass
class _Context:
    c: Compiled
    y: sp.csr_matrix
    tol: float
    enforce: bool
    cache: SymbolicCache
    give_up: bool = False     # end an attempt that makes no progress (another start follows)
    growth: float = GROWTH_BOUND  # full step taken unless the mismatch grows past this x best
    last: tuple | None = None  # (v, Y v) at the latest Newton point

    def __post_init__(self):
        c = self.c
        self.free = np.flatnonzero((c.kind != SLACK) & c.alive)
        self.sym = self.cache.get(self.y, self.free)
        # voltage-dependent load anywhere (else the load is a constant of each Newton loop)
        self.zip_loads = bool(np.any(c.s_load_i) or np.any(c.s_load_z))

    def ibus_at(self, v):
        """``Y v`` if the latest Newton point is ``v`` (the same array), else None."""
        return self.last[1] if self.last is not None and self.last[0] is v else None


@dataclass
class _LimitState:
    """Bus kinds and reactive-limit states during a solve (copied before a trial)."""
    kind: np.ndarray
    q_fixed: np.ndarray       # reactive output (pu) of buses held at a limit
    at_limit: np.ndarray      # +1 at max, -1 at min
    returns: np.ndarray       # times each bus went back from a limit to PV
    frozen: np.ndarray        # held at the limit for good (flip-flopped)

    @classmethod
    def fresh(cls, c):
        return cls(c.kind.copy(), np.zeros(c.n), np.zeros(c.n, np.int8), np.zeros(c.n, np.int16),
                   np.zeros(c.n, bool))

    @classmethod
    def from_result(cls, c, res):
        at = res.limit_state.copy()
        kind = np.where(at != 0, PQ, c.kind)
        q = np.where(at > 0, c.q_max, np.where(at < 0, c.q_min, 0.0))
        return cls(kind, q, at, np.zeros(c.n, np.int16), np.zeros(c.n, bool))

    def copy(self):
        return _LimitState(self.kind.copy(), self.q_fixed.copy(), self.at_limit.copy(),
                           self.returns.copy(), self.frozen.copy())

    @property
    def oscillating(self) -> np.ndarray:
        return np.flatnonzero(self.frozen)


def initial_voltage(c: Compiled, start) -> np.ndarray:
    """Starting complex voltages for ``start`` (see :func:`solve_flow`)."""
    controlled = c.kind != PQ
    if isinstance(start, FlowResult):
        v = start.v.copy()
        if len(v) != c.n:
            raise ValueError("warm start from a result of a different network")
        vm = np.abs(v)
        vm[controlled] = c.v_set[controlled]
        v = vm * np.exp(1j * np.angle(v))
    elif isinstance(start, str) and start == "stored":
        vm = np.where(controlled, c.v_set, c.vm_stored)
        v = vm * np.exp(1j * c.va_stored)
    elif isinstance(start, str) and start in ("flat", "dc"):
        vm = np.where(controlled, c.v_set, 1.0)
        va = np.where(c.kind == SLACK, c.va_stored, 0.0)
        if start == "dc":
            va = dc_angles(c, va)
            v = vm * np.exp(1j * va)
        else:                         # only slack buses have an angle: no exponential for the rest
            v = vm.astype(complex)
            turned = va != 0.0
            v[turned] *= np.exp(1j * va[turned])
    else:
        raise ValueError(f"unknown start {start!r}: use 'flat', 'dc', 'stored' or a FlowResult")
    return np.where(c.alive, v, 0.0)


def _dc_matrix(c: Compiled):
    n = c.n
    bser = 1.0 / np.imag(1.0 / c.ys)  # 1/x
    bser = np.where(np.isfinite(bser), bser, 0.0)
    b = sp.csr_matrix((np.concatenate([bser, bser, -bser, -bser]),
                       (np.concatenate([c.f, c.t, c.f, c.t]), np.concatenate([c.f, c.t, c.t, c.f]))),
                      shape=(n, n))
    return b, bser


def dc_angles(c: Compiled, va_slack: np.ndarray, spread_imbalance: bool = False, scale: float = 1.0,
              cache: SymbolicCache | None = None) -> np.ndarray:
    """Bus angles of a DC load flow (lossless, 1 pu, series reactance only, phase shifts kept).

    ``spread_imbalance``: the difference between scheduled generation and load (which the AC
    solution mostly spends on losses) is taken up by the loads in proportion to their size
    rather than by the slack bus alone, so it does not flow across the whole network towards the
    slack; a better start on large networks. ``scale`` multiplies generation and load.
    ``cache``: a factorised DC matrix kept there is reused (see :func:`_dc_factor`)."""
    n = c.n
    with np.errstate(all="ignore"):
        free, fixed, lu, b_fx, bser = _dc_factor(c, cache, store=False)
        # a phase shifter on the from side injects b*phi at its ends
        p_shift = np.bincount(c.f, -bser * c.shift, n) + np.bincount(c.t, bser * c.shift, n)
        load = (c.s_load_p + c.s_load_i + c.s_load_z).real
        p = scale * (c.s_gen.real - load) - c.ysh.real - p_shift
        if spread_imbalance and load[c.alive].sum() > 0:
            live_load = np.where(c.alive, load, 0.0)
            p = p - p[c.alive].sum() * live_load / live_load.sum()
        va = va_slack.copy()
        if len(free):
            if lu is None:
                return va_slack
            va[free] = lu.solve(p[free] - b_fx @ va[fixed])
            if not np.all(np.isfinite(va)):
                return va_slack
    return va


def _dc_factor(c: Compiled, cache: SymbolicCache | None = None, store: bool = True):
    """(free buses, slack buses, LU of the DC matrix on the free buses or None if singular, its
    columns at the slack buses, series susceptance per branch); kept in ``cache`` while the
    branch impedances and the slack buses are the same, so a DC start or loss estimate after the
    first costs one pair of triangular solves. ``store=False`` uses a kept factor but does not
    keep a new one: the DC start of a cold solve, whose factor would otherwise stay in memory
    beside the Newton LUs that follow (50 MB more peak at 50,176 buses); the loss estimate after
    convergence keeps it."""
    free = np.flatnonzero((c.kind != SLACK) & c.alive)
    fixed = np.flatnonzero((c.kind == SLACK) & c.alive)
    key = (c.ys, c.f, c.t, free)
    hit = cache.extra.get("dc") if cache is not None else None
    if hit is None or not _same_arrays(hit[0], key):
        with np.errstate(all="ignore"):
            b, bser = _dc_matrix(c)
            try:
                lu = spla.splu(b[free][:, free].tocsc()) if len(free) else None
            except RuntimeError:
                lu = None
        hit = (tuple(a.copy() for a in key), (free, fixed, lu, b[free][:, fixed], bser), {})
        if cache is not None and store:
            cache.extra["dc"] = hit
    return hit[1]


# --- plausibility ---------------------------------------------------------------------------

def implausible(c: Compiled, y, v: np.ndarray, cache: SymbolicCache | None = None,
                ibus: np.ndarray | None = None) -> str | None:
    """Why a converged point looks like an inoperable (low-voltage) solution, or None.

    Three tests (rules of the trade, common practice): a live bus more than
    ``FAR_BELOW_BAND_PU`` below its band minimum; a branch whose angle across its series
    impedance exceeds the impedance angle ``atan2(x, r)``, past which the power it delivers
    falls as the angle grows (the far side of the nose of its transfer curve); total losses more
    than ``LOSS_FACTOR`` times an estimate plus 1 % of the load, the estimate being the larger of
    a DC one (``sum r P_dc^2``) and the AC losses at setpoint magnitudes with DC angles.
    ``ibus`` is ``Y v`` if the caller has it.
    """
    alive = c.alive
    if not alive.any():
        return None
    vm = np.abs(v)
    short = np.where(alive, c.v_min - FAR_BELOW_BAND_PU - vm, -np.inf)
    k = int(np.argmax(short))
    if short[k] > 0:
        return (f"bus {c.bus_ids[k]} at {vm[k]:.3f} pu, far below its band minimum "
                f"{c.v_min[k]:.2f} pu")
    limit, ok_branch, cos_limit, turn = _transfer_angles(c, cache)
    # screen without angles: |angle of z| > limit exactly when Re z < cos(limit) |z|, where
    # z = V_f conj(V_t) turned back by the phase shifts (no arctan, no wrapping for every branch)
    z = v[c.f] * np.conj(v[c.t])
    if c.shift.any():
        z *= turn
    if not (ok_branch & (z.real < cos_limit * np.abs(z))).any():
        return _loss_check(c, y, v, vm, cache, ibus)
    ang = np.angle(v)
    on_f = np.where(c.tap_from, c.shift, 0.0)
    on_t = np.where(c.tap_from, 0.0, c.shift)
    # angle across each branch, wrapped to [-pi, pi)
    delta = np.remainder((ang[c.f] - on_f) - (ang[c.t] - on_t) + np.pi, 2 * np.pi) - np.pi
    over = np.where(ok_branch, np.abs(delta) - limit, -np.inf)
    if len(over) and over.max() > 0:
        j = int(np.argmax(over))
        return (f"branch {c.branch_ids[j]} carries {np.rad2deg(abs(delta[j])):.1f} deg across it, beyond "
                f"its maximum-transfer angle {np.rad2deg(limit[j]):.1f} deg")
    return _loss_check(c, y, v, vm, cache, ibus)


def _loss_check(c, y, v, vm, cache, ibus) -> str | None:
    """The losses test of :func:`implausible`."""
    alive = c.alive
    s_inj = injection(y, v) if ibus is None else v * np.conj(ibus)
    losses = float((s_inj.real * alive).sum() - (c.ysh.real * vm ** 2 * alive).sum())
    load = float(np.abs(load_power(c, vm).real[alive]).sum())
    if losses <= LOSS_FACTOR * 0.01 * load:
        return None           # within the bound whatever the DC estimate (it is never negative)
    estimate = _dc_loss_estimate(c, cache)
    if estimate is not None and losses > LOSS_FACTOR * (estimate + 0.01 * load):
        # A DC estimate sees only active flows. Where little load flows, the reactive flows the
        # voltage setpoints and shunts drive can cause most of the losses (found by the property
        # tests: a network with no load, where the operable point lost 3.9 MW against a DC
        # estimate of 6e-8 MW): the AC losses at setpoint / 1 pu magnitudes with the DC angles
        # count them. Only worked out when the DC test fails.
        flat = _flat_loss_estimate(c, y, cache)
        if losses > LOSS_FACTOR * (max(estimate, flat) + 0.01 * load):
            return (f"losses {losses * c.base_mva:.1f} MW, over {LOSS_FACTOR:g} x an estimate of "
                    f"{max(estimate, flat) * c.base_mva:.1f} MW (DC flows, and AC flows at setpoint "
                    f"voltages) plus 1 % of load")
    return None


def _flat_loss_estimate(c: Compiled, y, cache: SymbolicCache | None = None) -> float:
    """AC losses (pu) at setpoint magnitudes (1 pu at PQ buses) and the angles of a DC flow."""
    vm = np.where(c.kind != PQ, c.v_set, 1.0) * c.alive
    with np.errstate(all="ignore"):
        va = dc_angles(c, np.where(c.kind == SLACK, c.va_stored, 0.0), cache=cache)
        v = vm * np.exp(1j * va)
        est = float(((v * np.conj(y @ v)).real - c.ysh.real * vm ** 2).sum())
    return est if math.isfinite(est) else 0.0


def _same_arrays(a: tuple, b: tuple) -> bool:
    return len(a) == len(b) and all(x.shape == y.shape and np.array_equal(x, y) for x, y in zip(a, b))


def _transfer_angles(c: Compiled, cache: SymbolicCache | None):
    """Maximum-transfer angle of each branch (the angle of its series impedance), whether it
    applies (inductive, both ends live), its cosine, and ``exp(-j (shift at from - shift at to))``;
    kept in ``cache`` while impedances, live buses and phase shifts hold."""
    key = (c.ys, c.f, c.t, c.alive, c.shift, c.tap_from)
    hit = cache.extra.get("transfer") if cache is not None else None
    if hit is not None and _same_arrays(hit[0], key):
        return hit[1]
    with np.errstate(all="ignore"):
        z = 1.0 / c.ys
        limit = np.arctan2(z.imag, z.real)
        out = (limit, (z.imag > 0) & c.alive[c.f] & c.alive[c.t], np.cos(limit),
               np.exp(-1j * np.where(c.tap_from, c.shift, -c.shift)))
    if cache is not None:
        cache.extra["transfer"] = (tuple(a.copy() for a in key), out)
    return out


def _dc_loss_estimate(c: Compiled, cache: SymbolicCache | None = None):
    """sum over branches of r |P_dc|^2 (pu), from a DC load flow; None if it cannot be made.

    The factorised DC matrix is kept in ``cache`` (valid while the branch impedances and the
    slack buses are the same), and the estimate itself while the injections are, so the check
    costs at most one triangular solve per load flow."""
    free, fixed, lu, b_fx, bser = _dc_factor(c, cache)
    last = cache.extra["dc"][2] if cache is not None else {}
    with np.errstate(all="ignore"):
        if lu is None:
            return None
        n = c.n
        # on the real parts (float passes, no complex temporaries); phase shifts are rare
        p = c.s_gen.real - c.s_load_p.real
        p -= c.s_load_i.real
        p -= c.s_load_z.real
        p -= c.ysh.real
        if c.shift.any():
            p -= np.bincount(c.f, -bser * c.shift, n) + np.bincount(c.t, bser * c.shift, n)
        va = np.where(c.kind == SLACK, c.va_stored, 0.0)
        if "p" in last and np.array_equal(last["p"], p) and np.array_equal(last["va"], va) \
                and np.array_equal(last["shift"], c.shift) and np.array_equal(last["tap_from"], c.tap_from):
            return last["estimate"]
        va_in = va.copy()
        va[free] = lu.solve(p[free] - b_fx @ va[fixed])
        flow = bser * (va[c.f] - va[c.t] + np.where(c.tap_from, -c.shift, c.shift))
        r = (1.0 / c.ys).real
        est = float(np.nansum(np.where(r > 0, r * flow * flow, 0.0)))
        est = est if math.isfinite(est) else None
        last.update(p=p, va=va_in, shift=c.shift.copy(), tap_from=c.tap_from.copy(), estimate=est)
    return est


# --- one schedule: Newton with limit rounds -------------------------------------------------

def _solve_schedule(ctx: _Context, v, st: _LimitState, scale, tol, max_iter, history):
    """Newton iterations and reactive-limit rounds at one fraction ``scale`` of the schedule.

    Returns (v, limit state, iterations, status, message); ``st`` is not modified."""
    st = st.copy()
    c, y = ctx.c, ctx.y
    iters = 0
    status, message = FlowStatus.DIVERGED, ""

    def early_check(vv, margin, ibus):
        changed = _update_limits(c, y, vv, st, scale, margin=margin, ibus=ibus)
        if changed:
            ctx.last = None                   # vv may have been changed in place
        return changed

    for _ in range(MAX_LIMIT_ROUNDS + 1):
        v, iters, status, message = _newton(ctx, v, st, scale, tol, max_iter, iters, history,
                                            early_check if ctx.enforce else None)
        if status == _SWITCHED:
            continue
        if status != FlowStatus.CONVERGED or not ctx.enforce:
            break
        if not _update_limits(c, y, v, st, scale, ibus=ctx.ibus_at(v)):
            break
        ctx.last = None                       # v may have been changed in place
    else:
        status, message = FlowStatus.LIMITS_UNSETTLED, (
            f"reactive-limit switching did not settle in {MAX_LIMIT_ROUNDS} rounds")
    return v, st, iters, status, message


_SWITCHED = -1                    # internal: the early limit check changed bus kinds


def _optimal_multiplier(f0: np.ndarray, f1: np.ndarray) -> float:
    """Step multiplier minimising ``|(1 - mu) f0 + mu^2 f1|^2`` on (0, 1].

    ``f1`` is the mismatch after the full step; the quadratic model through it is the polar
    counterpart of Iwamoto's optimal multiplier (exact for rectangular coordinates).
    """
    aa, ac, cc = float(f0 @ f0), float(f0 @ f1), float(f1 @ f1)
    roots = np.roots([2.0 * cc, -3.0 * ac, aa + 2.0 * ac, -aa])
    cand = [r.real for r in roots if abs(r.imag) < 1e-9 and 0.0 < r.real <= 1.0] + [1.0]

    def g(mu):
        return (1 - mu) ** 2 * aa + 2 * (1 - mu) * mu * mu * ac + mu ** 4 * cc

    return float(min(cand, key=g))


def _newton(ctx: _Context, v, st: _LimitState, scale, tol, max_iter, iters, history, early_check=None):
    """Newton iterations for one set of bus kinds. Returns (v, iterations, status, message).

    ``early_check(v, margin)``, if given, is called once, when the mismatch first falls below
    ``LIMIT_CHECK_PU``; if it returns True (bus kinds changed, ``v`` possibly adjusted in
    place) the iterations stop with status ``_SWITCHED``.
    """
    c, y = ctx.c, ctx.y
    free = ctx.free
    pq = np.flatnonzero((st.kind == PQ) & c.alive)
    pq_mask = np.zeros(c.n, bool)
    pq_mask[pq] = True
    system = ctx.sym.system(y, pq_mask)
    q_fixed = st.q_fixed
    diverged = FlowStatus.DIVERGED

    # as in bus_mismatch, with Y v kept for the Jacobian; the constant-power part of the schedule
    # is summed once, the voltage-dependent parts (if any) at each evaluation
    s_fixed = scale * c.s_gen + 1j * q_fixed - scale * c.s_load_p
    zip_loads = ctx.zip_loads
    # positions of [P at free buses, Q at PQ buses] in the float view of a complex bus vector
    pick = np.concatenate([2 * free, 2 * pq + 1])

    def residual(vv, vmm):
        ib = y @ vv
        s_bus = vv * np.conj(ib)             # kept: the next Jacobian needs it too
        mis = s_bus - s_fixed
        if zip_loads:
            mis += scale * (c.s_load_i * vmm + c.s_load_z * vmm ** 2)
        return np.take(mis.view(np.float64), pick), ib, s_bus

    n = c.n
    # place of each unknown in the stacked step [angle step, |V| step] over all buses; the other
    # entries stay 0, so a trial point is two contiguous subtractions, no indexed update
    step_pos = np.concatenate([free, n + pq])
    step = np.zeros(2 * n)
    step_va, step_vm = step[:n], step[n:]
    ordered = False

    with np.errstate(all="raise", under="ignore"):
        try:
            vm = np.abs(v)
            # e^(j angle) (1 at a dead bus); times |V| it is V
            unit = np.divide(v, vm, out=np.ones(n, complex), where=vm > 0)
            F, ibus, s_bus = residual(v, vm)
        except FloatingPointError:
            return v, iters, diverged, "the iteration diverged (numerical overflow)"
        recent: list[float] = []
        tiny = 0
        start_norm, local = None, 0
        merit = None
        while True:
            ctx.last = (v, ibus)             # Y v at the latest point, for the checks after the loop
            norm = max(float(F.max()), -float(F.min())) if F.size else 0.0   # max |F|, no temporary
            history.append(norm * c.base_mva)
            start_norm = norm if start_norm is None else start_norm
            if ctx.give_up and local >= GIVE_UP_ITERS and norm > start_norm:
                return v, iters, diverged, (
                    f"the iteration diverged (no progress in {GIVE_UP_ITERS} iterations)")
            if not np.isfinite(norm):
                return v, iters, diverged, "the iteration diverged (non-finite mismatch)"
            if norm <= tol:
                return v, iters, FlowStatus.CONVERGED, ""
            if early_check is not None and norm <= LIMIT_CHECK_PU:
                if early_check(v, norm, ibus):
                    return v, iters, _SWITCHED, ""
                early_check = None
            if iters >= max_iter:
                return v, iters, FlowStatus.ITERATION_LIMIT, f"no convergence within {max_iter} iterations"
            if not ordered and system.ordered:
                # the topology's ordering is known (after the first LU of a cold solve): from now
                # on equations and unknowns are kept in it, as the linear solver takes them
                ordered = True
                pick, step_pos, F = pick[system.perm], step_pos[system.perm], F[system.perm]
            try:
                dload = load_derivative(c, vm, scale) if zip_loads else None
                if ordered:
                    dx = system.solve_ordered(v, dload, F, ibus, s_bus)
                else:
                    dx = system.solve(v, dload, F, ibus)
                finite = np.isfinite(dx).all()
            except RuntimeError:
                return v, iters, FlowStatus.SINGULAR, \
                    "the Jacobian is singular (voltage collapse or an unsupported island)"
            except FloatingPointError:
                return v, iters, diverged, "the iteration diverged (numerical overflow)"
            if not finite:
                return v, iters, FlowStatus.SINGULAR, \
                    "the Jacobian is singular (voltage collapse or an unsupported island)"
            step[step_pos] = dx                  # the Newton step is minus this
            d_vm = step_vm * vm if ordered else step_vm      # ln |V| steps to |V| steps
            iters += 1
            local += 1
            if merit is None:
                merit = float(np.sqrt(F @ F))
            recent = (recent + [merit])[-WINDOW:]

            def trial(alpha):
                d_va = step_va if alpha == 1.0 else alpha * step_va
                vm_new = vm - (d_vm if alpha == 1.0 else alpha * d_vm)
                unit_new = unit * _turn_phasors(d_va, max(float(d_va.max()), -float(d_va.min())))
                v_new = vm_new * unit_new
                try:
                    F_new, ib_new, s_new = residual(v_new, vm_new)
                    m = float(np.sqrt(F_new @ F_new))
                except FloatingPointError:
                    F_new, ib_new, s_new, m = None, None, None, np.inf
                positive = pq.size == 0 or vm_new[pq].min() > 0.0
                return v_new, vm_new, unit_new, F_new, ib_new, s_new, (m if positive else np.inf), m

            v_new, vm_new, unit_new, F_new, ib_new, s_new, m1, m_next = trial(1.0)
            alpha = 1.0
            if not (m1 <= ctx.growth * min(recent)):
                # rejected: optimal multiplier from the full-step point, then halving
                if F_new is not None and np.isfinite(m1):
                    alpha = _optimal_multiplier(F, F_new)
                else:
                    alpha = 0.5
                for _ in range(LINE_SEARCH_STEPS):
                    v_new, vm_new, unit_new, F_new, ib_new, s_new, m, m_next = trial(alpha)
                    if m <= (1.0 - 1e-4 * alpha) * merit:
                        break
                    alpha *= 0.5
                else:
                    return v, iters, diverged, (
                        "the iteration diverged (no step along the Newton direction lowers the mismatch)")
            tiny = tiny + 1 if alpha < TINY_STEP else 0
            if tiny >= STALL_STEPS:
                return v, iters, diverged, "the iteration diverged (stalled: only tiny steps lower the mismatch)"
            v, vm, unit, F, ibus, s_bus = v_new, vm_new, unit_new, F_new, ib_new, s_new
            merit = m_next if np.isfinite(m_next) else None


# Angle steps up to this (rad) turn the voltage phasors by a short series instead of a complex
# exponential of the new angles (numpy's takes ~14 ns a bus, the series ~5): the terms to d^11
# leave out less than 0.2^12 / 12! ~ 1e-17, below double rounding. Larger steps, up to
# 2^MAX_HALVINGS times this, are halved that many times and the rotation squared as often (each
# squaring at most doubles the relative rounding error). Larger still (the first steps of a flat
# start on a ring of 714 IEEE 14 copies turn angles by up to 45 rad: the copies' surplus flows
# round the ring to the one slack), up to TABLE_LIMIT: see _rotation_table.
SMALL_ANGLE = 0.2
MAX_HALVINGS = 4
TABLE_LIMIT = 1e4
_COS = (1 / 3628800, -1 / 40320, 1 / 720, -1 / 24, 1 / 2)      # 1 - cos d = t/2 - t^2/24 + ..., t = d^2
_SIN = (1 / 39916800, -1 / 362880, 1 / 5040, -1 / 120, 1 / 6)  # 1 - sin(d)/d = t/6 - t^2/120 + ...
# exp(-j k q) for k = 0 .. TABLE_SIZE - 1, q = 2 pi / TABLE_SIZE (2 pi as a double; / 256 is exact)
TABLE_SIZE = 256
_TURN = 2 * np.pi / TABLE_SIZE
_TURNS = np.exp(-1j * _TURN * np.arange(TABLE_SIZE))


def _turn_phasors(d: np.ndarray, big: float) -> np.ndarray:
    """``exp(-j d)`` for the angle steps ``d`` whose largest magnitude is ``big``: the series
    (halved and squared for up to ``MAX_HALVINGS``), the table beyond, numpy's complex
    exponential past ``TABLE_LIMIT`` (or for a non-finite step)."""
    halvings = _halvings_of(big)
    if halvings is not None:
        return _rotation(d, halvings, _series_terms(big * 0.5 ** halvings))
    if big <= TABLE_LIMIT:
        return _rotation_table(d)
    return np.exp(-1j * d)


def _rotation_table(d: np.ndarray) -> np.ndarray:
    """``exp(-j d)`` for ``|d| <= TABLE_LIMIT`` as ``exp(-j k q) exp(-j (d - k q))``: ``k`` the
    nearest multiple of ``q = 2 pi / TABLE_SIZE``, its factor from a table, the rest
    (``|d - k q| <= q / 2``, 0.0123 rad) by three terms of the series. At 10,000 buses 72 us
    against about 160 for halving and squaring eight times (45 rad) and 180-230 for numpy's
    complex exponential (measured); the error is that of ``k q``, about ``|d|`` x 1e-16 rad."""
    k = np.rint(d * (1.0 / _TURN))
    fine = d - k * _TURN
    out = _rotation(fine, 0, _series_terms(0.5 * _TURN))
    out *= _TURNS[k.astype(np.int64) & (TABLE_SIZE - 1)]      # k mod TABLE_SIZE, for k < 0 too
    return out


def _halvings(d: np.ndarray) -> int | None:
    """How often ``d`` must be halved to be within ``SMALL_ANGLE``; None beyond ``MAX_HALVINGS``
    (or for a non-finite step)."""
    return _halvings_of(max(float(d.max()), -float(d.min())) if d.size else 0.0)


def _halvings_of(big: float) -> int | None:
    """:func:`_halvings` for a step whose largest magnitude is ``big``."""
    k = 0
    while not big <= SMALL_ANGLE:             # also ends for NaN: k passes MAX_HALVINGS
        big *= 0.5
        k += 1
        if k > MAX_HALVINGS:
            return None
    return k


# Terms of the series needed for angles up to each bound: the first term left out, d^(2K+2) /
# (2K+2)! for K terms of the cosine (the sine's is smaller still), is below 2^-56 there. Near
# convergence the angle steps are 1e-3 rad and less, and two or three terms do.
_TERM_BOUNDS = ((1.3e-4, 1), (4.6e-3, 2), (2.9e-2, 3), (9.3e-2, 4))


def _series_terms(big: float) -> int:
    """Terms of the cosine and sine series for angles within ``big`` (at most 5, for 0.2 rad)."""
    for bound, terms in _TERM_BOUNDS:
        if big <= bound:
            return terms
    return len(_COS)


def _rotation(d: np.ndarray, halvings: int = 0, terms: int | None = None) -> np.ndarray:
    """``exp(-j d)`` for angles ``|d| <= SMALL_ANGLE * 2**halvings`` by Horner sums of the cosine
    and sine series of ``d / 2**halvings`` (to double precision), squared ``halvings`` times.
    ``terms`` (from :func:`_series_terms` of the halved step; all by default) of each series."""
    if halvings:
        d = d * 0.5 ** halvings
    k = len(_COS) if terms is None else terms
    t = d * d
    out = np.empty(len(d), complex)
    parts = out.view(np.float64)
    for coef, into in ((_COS[-k:], parts[0::2]), (_SIN[-k:], parts[1::2])):
        acc = t * coef[0]
        for a in coef[1:]:
            acc += a
            acc *= t
        into[...] = acc
    # cos d = 1 - (t/2 - ...), -sin d = -(d - d (t/6 - ...)) = d * (t/6 - ...) - d
    np.subtract(1.0, parts[0::2], out=parts[0::2])
    parts[1::2] *= d
    parts[1::2] -= d
    for _ in range(halvings):
        out *= out
    return out


def _update_limits(c, y, v, st: _LimitState, scale=1.0, margin: float = 0.0, ibus=None) -> bool:
    """Switch PV buses at a reactive limit to PQ and back; True if anything changed.

    ``margin`` (pu of Mvar and of voltage) widens both tests, for a point not yet converged.
    ``ibus`` is ``Y v`` if the caller has it.
    A bus that has gone back to PV ``FLIP_LIMIT`` times is not let back again.
    """
    kind, q_fixed, at_limit = st.kind, st.q_fixed, st.at_limit
    vm = np.abs(v)
    s_inj = injection(y, v) if ibus is None else v * np.conj(ibus)
    q_gen = s_inj.imag + load_power(c, vm, scale).imag - scale * c.s_gen.imag
    tol_q = 1e-9 + margin
    pv_now = (kind == PV) & c.alive
    over = pv_now & (q_gen > c.q_max + tol_q)
    under = pv_now & (q_gen < c.q_min - tol_q)
    # a bus held at its maximum whose voltage is above the setpoint could give less: back to PV
    tol_v = 1e-9 + margin
    back = ((at_limit > 0) & (vm > c.v_set + tol_v)) | ((at_limit < 0) & (vm < c.v_set - tol_v))
    back &= ~st.frozen
    if not (over.any() or under.any() or back.any()):
        return False
    apply_limit_switches(c, v, kind, at_limit, q_fixed, over, under, back)
    st.returns[back] += 1
    st.frozen |= (st.returns >= FLIP_LIMIT) & (over | under)
    return True


def apply_limit_switches(c, v, kind, at_limit, q_fixed, over, under, back) -> None:
    """Apply one round of reactive-limit switching in place: buses in ``over`` / ``under`` become
    PQ held at their maximum / minimum Mvar, buses in ``back`` return to voltage control and
    start again from their setpoint (the rule every solver of this package follows)."""
    kind[over | under] = PQ
    at_limit[over] = 1
    at_limit[under] = -1
    q_fixed[over] = c.q_max[over]
    q_fixed[under] = c.q_min[under]
    kind[back] = PV
    at_limit[back] = 0
    q_fixed[back] = 0.0
    v[back] = c.v_set[back] * np.exp(1j * np.angle(v[back]))


# --- continuation on load and generation ----------------------------------------------------

def _continuation(ctx: _Context, history):
    """Solve at a fraction of the schedule and step up to the full schedule.

    Returns (v, limit state, iterations, status, message, steps)."""
    c = ctx.c
    tries = list(CONT_FIRST_TRIES)
    v = _balanced_dc_start(c, tries[0], ctx.cache)
    st = _LimitState.fresh(c)
    iters = 0
    lam, step = 0.0, CONT_STEP
    target = tries.pop(0)
    prev = None                    # (lam, v) of the solution before the current one
    steps = 0
    while True:
        budget = CONT_STEP_ITERS if lam > 0 else 3 * CONT_STEP_ITERS
        tol = ctx.tol if target >= 1.0 else max(ctx.tol, CONT_TOL_PU)
        guess = v if lam > 0 else _balanced_dc_start(c, target, ctx.cache)
        if prev is not None and lam > prev[0]:
            # secant predictor on magnitude and angle
            w = (target - lam) / (lam - prev[0])
            vm_g = np.abs(v) + w * (np.abs(v) - np.abs(prev[1]))
            va_g = np.angle(v) + w * _angle_diff(v, prev[1])
            vm_g = np.where(c.kind != PQ, np.abs(v), np.maximum(vm_g, 0.3))
            guess = np.where(c.alive, vm_g * np.exp(1j * va_g), 0.0)
        v_new, st_new, it, status, message = _solve_schedule(ctx, guess, st, target, tol, budget, history)
        iters += it
        if status == FlowStatus.CONVERGED:
            steps += 1
            if lam > 0:
                prev = (lam, v)
            v, st, lam = v_new, st_new, target
            if lam >= 1.0:
                return v, st, iters, FlowStatus.CONVERGED, "", steps
            if it <= 3:
                step = min(2.0 * step, 0.5)
            target = min(1.0, lam + step)
        else:
            if lam == 0.0:
                if tries:
                    target = tries.pop(0)
                    continue
                return v_new, st_new, iters, FlowStatus.DIVERGED, \
                    f"no solution even at {target:.0%} of the schedule ({message})", steps
            step *= 0.5
            if step < CONT_MIN_STEP:
                return v, st, iters, FlowStatus.COLLAPSE, (
                    f"continuation from light load reached only {lam:.1%} of the scheduled load and "
                    "generation; the load is likely beyond the network's loadability limit"), steps
            target = min(1.0, lam + step)
        if iters >= CONT_MAX_ITERS:
            return v, st, iters, FlowStatus.ITERATION_LIMIT, (
                f"iteration budget spent at {lam:.1%} of the schedule"), steps


def _balanced_dc_start(c: Compiled, scale: float, cache: SymbolicCache | None = None) -> np.ndarray:
    """Setpoint / 1 pu magnitudes with the angles of :func:`dc_angles` (imbalance spread)."""
    vm = np.where(c.kind != PQ, c.v_set, 1.0)
    va = dc_angles(c, np.where(c.kind == SLACK, c.va_stored, 0.0), spread_imbalance=True, scale=scale,
                   cache=cache)
    return np.where(c.alive, vm * np.exp(1j * va), 0.0)


def _angle_diff(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Angle of ``a`` minus angle of ``b``, wrapped to (-pi, pi]."""
    return np.angle(a * np.conj(b))
