"""Full-AC reference optima with scipy.optimize on the raw polar power-flow equations.

Independent of ``planner``: own injection equations S = V conj(Y V) with dense numpy
complex arithmetic, own analytic Jacobians, own Newton load flow, built from
``raw_cases`` (the raw data files).

Public functions
----------------
injections(Y, vm, va)        -> P, Q injections (pu)
injection_jacobian(Y, vm, va) -> dP/dva, dP/dvm, dQ/dva, dQ/dvm (dense)
newton_pf(case, ...)         -> plain Newton-Raphson load flow, reactive limits ignored
ieee30_voltage_schedule()    -> loss-minimising generator voltage schedule, IEEE 30-bus
feeder33_bank_sizing(buses)  -> loss-minimising continuous shunt capacitor ratings, 33-bus feeder

Import layout: ``tests/`` is not a package; use ``from reference.ac_opf import ...``
with ``tests/`` on ``sys.path`` (``tests/test_reference.py`` does this), or
``from tests.reference.ac_opf import ...`` from the repo root.
"""
from __future__ import annotations

import time

import numpy as np
from scipy.optimize import OptimizeResult, minimize

from .raw_cases import PV, SLACK, RawCase, feeder33, ieee30


def injections(Y, vm, va):
    """Active and reactive power injections at every bus, S = V conj(Y V)."""
    v = vm * np.exp(1j * va)
    s = v * np.conj(Y @ v)
    return s.real, s.imag


def injection_jacobian(Y, vm, va):
    """Dense derivatives of S = V conj(Y V) with respect to angles and magnitudes."""
    v = vm * np.exp(1j * va)
    i = Y @ v
    vn = v / vm
    ds_dva = 1j * v[:, None] * np.conj(np.diag(i) - Y * v[None, :])
    ds_dvm = v[:, None] * np.conj(Y * vn[None, :]) + np.diag(np.conj(i) * vn)
    return ds_dva.real, ds_dvm.real, ds_dva.imag, ds_dvm.imag


def newton_pf(case: RawCase, vset=None, extra_shunt=None, tol=1e-12, max_iter=30, start=None, Y=None):
    """Newton-Raphson load flow; PV buses hold ``vset`` whatever their reactive output.

    ``start``: (vm, va) to start from (flat by default); ``Y``: the case's bus admittance
    matrix when the caller already has it.
    Returns an OptimizeResult with vm, va (rad), p, q (pu injections), losses (pu,
    the sum of all active injections), iterations, success.
    """
    Y = case.ybus(extra_shunt) if Y is None else Y
    n = case.n
    vset = case.vset if vset is None else np.asarray(vset, float)
    slack = case.btype == SLACK
    pv = case.btype == PV
    pq = ~(slack | pv)
    ang = np.flatnonzero(~slack)
    mag = np.flatnonzero(pq)
    vm = np.where(pq, 1.0, vset) if start is None else np.where(pq, start[0], vset)
    va = np.zeros(n) if start is None else np.array(start[1], float)
    p_sch = case.pg - case.pd
    q_sch = case.qg - case.qd
    ok = False
    for it in range(max_iter + 1):
        p, q = injections(Y, vm, va)
        mis = np.concatenate([(p - p_sch)[ang], (q - q_sch)[mag]])
        if np.max(np.abs(mis)) < tol:
            ok = True
            break
        pa, pm, qa, qm = injection_jacobian(Y, vm, va)
        jac = np.block([[pa[np.ix_(ang, ang)], pm[np.ix_(ang, mag)]],
                        [qa[np.ix_(mag, ang)], qm[np.ix_(mag, mag)]]])
        dx = np.linalg.solve(jac, -mis)
        va[ang] += dx[:len(ang)]
        vm[mag] += dx[len(ang):]
    p, q = injections(Y, vm, va)
    return OptimizeResult(vm=vm, va=va, p=p, q=q, losses=float(p.sum()), iterations=it,
                          success=ok, max_mismatch=float(np.max(np.abs(mis))))


class _LossProblem:
    """Loss minimisation on the polar power-flow equations.

    Variables x = [va (non-slack), vm (free buses), pg_slack, qg (reactive-control buses), qc (banks)].
    Equalities at every bus: P_i(V) = Pg_i - Pd_i, Q_i(V) = Qg_i - Qd_i + qc_i vm_i^2.
    Objective: slack active output (the other injections are fixed, so this is the losses up to a constant).
    """

    def __init__(self, case, vm_lo, vm_hi, vm_fixed, qg_buses, qg_lo, qg_hi, bank_buses):
        self.case = case
        self.Y = case.ybus()
        n = self.n = case.n
        self.slack = int(np.flatnonzero(case.btype == SLACK)[0])
        self.ang = np.flatnonzero(np.arange(n) != self.slack)
        self.vm_fixed = np.asarray(vm_fixed, float)       # nan where free
        self.mag = np.flatnonzero(np.isnan(self.vm_fixed))
        self.qgb = np.asarray(qg_buses, int)
        self.bank = np.asarray(bank_buses, int)
        na, nm, ng, nk = len(self.ang), len(self.mag), len(self.qgb), len(self.bank)
        self.sl = dict(va=slice(0, na), vm=slice(na, na + nm), pg=slice(na + nm, na + nm + 1),
                       qg=slice(na + nm + 1, na + nm + 1 + ng), qc=slice(na + nm + 1 + ng, na + nm + 1 + ng + nk))
        self.nx = na + nm + 1 + ng + nk
        self.bounds = ([(-np.pi, np.pi)] * na + list(zip(vm_lo[self.mag], vm_hi[self.mag])) + [(None, None)]
                       + [(None if np.isinf(lo) else lo, None if np.isinf(hi) else hi) for lo, hi in zip(qg_lo, qg_hi)]
                       + [(0.0, None)] * nk)
        self.pg_fixed = case.pg.copy()
        self.pg_fixed[self.slack] = 0.0

    def unpack(self, x):
        va = np.zeros(self.n)
        va[self.ang] = x[self.sl["va"]]
        vm = self.vm_fixed.copy()
        vm[self.mag] = x[self.sl["vm"]]
        pg = self.pg_fixed.copy()
        pg[self.slack] = x[self.sl["pg"]][0]
        qg = np.zeros(self.n)
        qg[self.qgb] = x[self.sl["qg"]]
        qc = np.zeros(self.n)
        qc[self.bank] = x[self.sl["qc"]]
        return va, vm, pg, qg, qc

    def pack(self, va, vm, pg_slack, qg, qc):
        x = np.zeros(self.nx)
        x[self.sl["va"]] = va[self.ang]
        x[self.sl["vm"]] = vm[self.mag]
        x[self.sl["pg"]] = pg_slack
        x[self.sl["qg"]] = qg[self.qgb]
        x[self.sl["qc"]] = qc[self.bank]
        return x

    def objective(self, x):
        return x[self.sl["pg"]][0]

    def objective_grad(self, x):
        g = np.zeros(self.nx)
        g[self.sl["pg"]] = 1.0
        return g

    def constraints(self, x):
        va, vm, pg, qg, qc = self.unpack(x)
        p, q = injections(self.Y, vm, va)
        c = self.case
        return np.concatenate([p - pg + c.pd, q - qg + c.qd - qc * vm ** 2])

    def constraints_jac(self, x):
        va, vm, _, _, qc = self.unpack(x)
        pa, pm, qa, qm = injection_jacobian(self.Y, vm, va)
        qm = qm - np.diag(2.0 * qc * vm)
        n, s = self.n, self.sl
        jac = np.zeros((2 * n, self.nx))
        jac[:n, s["va"]] = pa[:, self.ang]
        jac[:n, s["vm"]] = pm[:, self.mag]
        jac[n:, s["va"]] = qa[:, self.ang]
        jac[n:, s["vm"]] = qm[:, self.mag]
        jac[self.slack, s["pg"]] = -1.0
        jac[n + self.qgb, np.arange(s["qg"].start, s["qg"].stop)] = -1.0
        jac[n + self.bank, np.arange(s["qc"].start, s["qc"].stop)] = -(vm[self.bank] ** 2)
        return jac

    def solve(self, x0, ftol=1e-10, maxiter=1000):
        res = minimize(self.objective, x0, jac=self.objective_grad, method="SLSQP", bounds=self.bounds,
                       constraints=[{"type": "eq", "fun": self.constraints, "jac": self.constraints_jac}],
                       options={"ftol": ftol, "maxiter": maxiter})
        return res

    def bound_violation(self, x):
        worst = 0.0
        for xi, (lo, hi) in zip(x, self.bounds):
            if lo is not None:
                worst = max(worst, lo - xi)
            if hi is not None:
                worst = max(worst, xi - hi)
        return worst


def ieee30_voltage_schedule(vgen=(0.95, 1.10), vload=(0.95, 1.05), ftol=1e-10):
    """Loss-minimising continuous voltage schedule of the IEEE 30-bus case (full AC, SLSQP).

    Generator (PV and slack) voltages in ``vgen``, load-bus voltages in ``vload``, type-2
    reactive outputs within the CDF limits, slack reactive output free, generator active
    outputs fixed at the file values except the slack. Several starts; the best converged
    one is kept.

    Returns an OptimizeResult: losses_mw, vm, va_deg, qg_mvar (per bus, zero at load buses),
    pg_slack_mw, success, start, max_mismatch, bound_violation, time_s, base_losses_mw.
    """
    t0 = time.perf_counter()
    case = ieee30()
    gen = np.isin(case.btype, (PV, SLACK))
    vm_lo = np.where(gen, vgen[0], vload[0])
    vm_hi = np.where(gen, vgen[1], vload[1])
    qgb = np.flatnonzero(gen)
    prob = _LossProblem(case, vm_lo, vm_hi, np.full(case.n, np.nan), qgb,
                        case.qmin[qgb], case.qmax[qgb], [])
    base = newton_pf(case)
    starts = {
        "flat": (np.zeros(case.n), np.ones(case.n), case.pd.sum() - case.pg.sum() + case.pg[prob.slack],
                 np.zeros(case.n)),
        "file solution": (np.deg2rad(case.afinal_deg), case.vfinal, case.pg[prob.slack], case.qg),
        "newton at file setpoints": (base.va, base.vm, base.p[prob.slack], base.q + case.qd),
    }
    best = None
    tried = {}
    for label, (va, vm, pgs, qg) in starts.items():
        x0 = prob.pack(va, np.clip(vm, vm_lo, vm_hi), pgs, np.clip(qg, case.qmin, case.qmax), np.zeros(case.n))
        res = prob.solve(x0, ftol=ftol)
        mis = float(np.max(np.abs(prob.constraints(res.x))))
        bv = prob.bound_violation(res.x)
        good = bool(res.success and mis < 1e-8 and bv < 1e-8)
        tried[label] = (float(res.fun), good)
        if good and (best is None or res.fun < best[0].fun):
            best = (res, label, mis, bv)
    if best is None:
        raise RuntimeError(f"ieee30_voltage_schedule: no start converged: {tried}")
    res, label, mis, bv = best
    va, vm, pg, qg, _ = prob.unpack(res.x)
    p, q = injections(prob.Y, vm, va)
    mva = case.base_mva
    return OptimizeResult(losses_mw=float(p.sum() * mva), vm=vm, va_deg=np.rad2deg(va), qg_mvar=qg * mva,
                          pg_slack_mw=float(pg[prob.slack] * mva), success=True, start=label, starts=tried,
                          max_mismatch=mis, bound_violation=bv, bounds=(vm_lo, vm_hi, case.qmin * mva, case.qmax * mva),
                          base_losses_mw=base.losses * mva, nit=res.nit, time_s=time.perf_counter() - t0)


def feeder33_losses(bank_mvar: dict | None = None):
    """Newton load flow of the 33-bus feeder with shunt banks {bus: Mvar at 1.0 pu}.

    Returns an OptimizeResult: losses_kw, vm, vmin, vmin_bus, success.
    """
    case = feeder33()
    shunt = np.zeros(case.n, dtype=complex)
    for bus, mvar in (bank_mvar or {}).items():
        shunt[case.index(bus)] += 1j * mvar / case.base_mva
    r = newton_pf(case, extra_shunt=shunt)
    k = int(np.argmin(r.vm))
    return OptimizeResult(losses_kw=r.losses * case.base_mva * 1000.0, vm=r.vm, vmin=float(r.vm[k]),
                          vmin_bus=int(case.bus[k]), success=r.success)


def feeder33_bank_sizing(buses=(14, 24, 30), ftol=1e-10):
    """Loss-minimising continuous shunt capacitor ratings on the 33-bus feeder (full AC, SLSQP).

    Ratings Q_k >= 0 Mvar at 1.0 pu (injection Q_k V^2) at ``buses``; substation at 1.0 pu;
    no voltage limits (the lowest voltage is reported).

    Returns an OptimizeResult: losses_kw, ratings_mvar {bus: Mvar}, vm, vmin, vmin_bus,
    success, max_mismatch, time_s, base_losses_kw.
    """
    t0 = time.perf_counter()
    case = feeder33()
    n = case.n
    bank = [case.index(b) for b in buses]
    vm_fixed = np.full(n, np.nan)
    prob_slack = int(np.flatnonzero(case.btype == SLACK)[0])
    vm_fixed[prob_slack] = 1.0
    prob = _LossProblem(case, np.full(n, 0.5), np.full(n, 1.5), vm_fixed, [prob_slack],
                        np.array([-np.inf]), np.array([np.inf]), bank)
    base = newton_pf(case)
    best = None
    for qc_start in (0.0, 0.5):
        qc0 = np.zeros(n)
        qc0[bank] = qc_start / case.base_mva
        x0 = prob.pack(base.va, base.vm, base.p[prob_slack], base.q, qc0)
        res = prob.solve(x0, ftol=ftol)
        mis = float(np.max(np.abs(prob.constraints(res.x))))
        if res.success and mis < 1e-8 and (best is None or res.fun < best[0].fun):
            best = (res, mis)
    if best is None:
        raise RuntimeError("feeder33_bank_sizing: SLSQP did not converge")
    res, mis = best
    va, vm, pg, qg, qc = prob.unpack(res.x)
    p, _ = injections(prob.Y, vm, va)
    k = int(np.argmin(vm))
    kw = case.base_mva * 1000.0
    return OptimizeResult(losses_kw=float(p.sum() * kw), ratings_mvar={int(b): float(qc[i] * case.base_mva)
                                                                      for b, i in zip(buses, bank)},
                          vm=vm, vmin=float(vm[k]), vmin_bus=int(case.bus[k]), success=True,
                          max_mismatch=mis, base_losses_kw=base.losses * kw, nit=res.nit,
                          time_s=time.perf_counter() - t0)
