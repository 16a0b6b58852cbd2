"""Full-space full-AC voltage schedule: scipy SLSQP over angles, magnitudes and generator outputs.

Independent of ``planner``: the classic full-space loss minimisation of :mod:`.ac_opf`
(``_LossProblem``: variables are the bus angles, every bus voltage magnitude, the slack's active
output and every generator's reactive output; equality constraints are the active and reactive
power balance at every bus, with exact dense Jacobians of S = V conj(Y V)) applied to any
:class:`.raw_cases.RawCase`, e.g. the ring of IEEE 30 copies of :func:`.schedule.ring_case`.

It is the formulation the reduced-space reference (:mod:`.schedule`) eliminates the state from;
both must reach the same optimum (``tests/test_schedule_reference.py`` checks it).

Problem: minimise the slack's active output (the other active injections are fixed, so this
is the losses up to a constant) with generator-bus (PV and slack) magnitudes in ``vgen``,
load-bus magnitudes in ``vload``, generator reactive outputs within their finite limits,
started from the Newton load flow at the file setpoints.

    python -m reference.full_schedule [copies]     # from tests/: one whole-process run
"""
from __future__ import annotations

import time

import numpy as np
from scipy.optimize import OptimizeResult

from .ac_opf import _LossProblem, injections, newton_pf
from .raw_cases import PV, SLACK, RawCase, ieee30


def full_space_schedule(case: RawCase | None = None, vgen=(0.95, 1.10), vload=(0.95, 1.05), ftol=1e-12,
                        maxiter=500) -> OptimizeResult:
    """Loss-minimising voltage schedule by full-space SLSQP with exact constraint Jacobians.

    Returns an OptimizeResult: losses_mw, vset (magnitudes at the generator buses, bus order),
    gen_buses (external numbers), vm, base_losses_mw, success, nit, max_mismatch,
    bound_violation, time_s.
    """
    try:        # small dense products: BLAS threads only contend on a shared machine
        from threadpoolctl import threadpool_limits
        limit = threadpool_limits(limits=1, user_api="blas")
    except ImportError:
        limit = None
    try:
        return _solve(case, vgen, vload, ftol, maxiter)
    finally:
        if limit is not None:
            limit.restore_original_limits()


def _solve(case, vgen, vload, ftol, maxiter) -> OptimizeResult:
    t0 = time.perf_counter()
    case = case or ieee30()
    gen = np.isin(case.btype, (PV, SLACK))
    vm_lo = np.where(gen, vgen[0], vload[0])
    vm_hi = np.where(gen, vgen[1], vload[1])
    qgb = np.flatnonzero(gen)
    prob = _LossProblem(case, vm_lo, vm_hi, np.full(case.n, np.nan), qgb, case.qmin[qgb], case.qmax[qgb], [])
    base = newton_pf(case)
    if not base.success:
        raise RuntimeError("full_space_schedule: the starting load flow did not converge")
    # start at the Newton solution (setpoints clipped to their range, outputs to their limits)
    x0 = prob.pack(base.va, np.clip(base.vm, vm_lo, vm_hi), base.p[prob.slack],
                   np.clip(base.q + case.qd, case.qmin, case.qmax), np.zeros(case.n))
    res = prob.solve(x0, ftol=ftol, maxiter=maxiter)
    mis = float(np.max(np.abs(prob.constraints(res.x))))
    bv = prob.bound_violation(res.x)
    va, vm, _, _, _ = prob.unpack(res.x)
    p, _ = injections(prob.Y, vm, va)
    mva = case.base_mva
    return OptimizeResult(losses_mw=float(p.sum() * mva), vset=vm[qgb], gen_buses=case.bus[qgb], vm=vm,
                          base_losses_mw=base.losses * mva, success=bool(res.success and mis < 1e-8 and bv < 1e-8),
                          message=res.message, nit=res.nit, max_mismatch=mis, bound_violation=bv,
                          time_s=time.perf_counter() - t0)


if __name__ == "__main__":      # a whole-process run for the benchmark: python -m reference.full_schedule [copies]
    import sys

    from .schedule import ring_case

    copies = int(sys.argv[1]) if len(sys.argv) > 1 else 4
    r = full_space_schedule(ring_case(copies=copies) if copies > 1 else ieee30())
    print(f"{r.losses_mw:.9f} {r.nit} 0 {int(r.success)} {r.time_s:.3f}")
