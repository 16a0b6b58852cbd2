"""Reduced-space full-AC voltage schedule: scipy SLSQP over generator setpoints, exact gradients.

Independent of ``planner``: own case assembly from the raw IEEE Common Data Format arrays
(:mod:`.raw_cases`), own Newton-Raphson load flow and own derivatives (:mod:`.ac_opf`'s dense
injection equations S = V conj(Y V)).

Problem: minimise the active losses (sum of all bus injections) over the voltage setpoints of
every generator bus (slack included), each within ``vgen``, subject to every load bus voltage
within ``vload`` and every PV generator's reactive output within its limits. The state (bus
angles, load-bus magnitudes) is eliminated by a Newton load flow at each setpoint vector, so
SLSQP sees only the setpoints (reduced space).

Gradients are exact, not finite differences:
  * objective: adjoint of the load-flow equations, one transposed solve ``J^T lam = dL/dx``,
    ``dL/du = dL/du|direct - lam^T dF/du``;
  * constraints: the direct sensitivities ``dx/du = -J^{-1} dF/du`` (one solve with a column
    per setpoint), from which load-bus voltages and generator reactive outputs follow.

Public functions
----------------
ring_case(base, copies, tie_buses, tie_r, tie_x) -> RawCase of ``copies`` copies in a ring
voltage_schedule(case, vgen, vload)               -> OptimizeResult (losses_mw, vset, ...)
"""
from __future__ import annotations

import time

import numpy as np
from scipy.optimize import OptimizeResult, minimize

from .ac_opf import injection_jacobian, injections, newton_pf
from .raw_cases import PQ, PV, SLACK, RawCase, ieee30


def ring_case(base: RawCase | None = None, copies: int = 4, tie_buses=(1, 2), tie_r: float = 0.005,
              tie_x: float = 0.05) -> RawCase:
    """``copies`` copies of ``base`` (default IEEE 30) joined in a ring by ties between the same
    bus numbers of neighbouring copies.

    Copy ``k`` numbers bus ``b`` as ``k * 100 + b`` (for bases with bus numbers below 100).
    Only copy 0 keeps its slack bus; in copies 1.. the slack bus becomes a generator bus (PV)
    with the slack's stored active output and setpoint and no reactive limit. Ties
    ``tie_r + j tie_x`` pu, no charging, join bus ``b`` of copy ``k`` to bus ``b`` of copy
    ``k + 1`` (and the last copy to the first) for every ``b`` in ``tie_buses``.
    """
    base = base or ieee30()
    if base.bus.max() >= 100:
        raise ValueError("ring_case numbers copies by hundreds: base bus numbers must be below 100")
    n = base.n
    cat = lambda a: np.concatenate([a] * copies)  # noqa: E731
    btype = cat(base.btype)
    btype[n:][btype[n:] == SLACK] = PV
    bus = np.concatenate([k * 100 + base.bus for k in range(copies)])
    shift = lambda a: np.concatenate([a + k * n for k in range(copies)])  # noqa: E731
    f, t = shift(base.f), shift(base.t)
    r, x, b = cat(base.r), cat(base.x), cat(base.b)
    ratio, ph = cat(base.ratio), cat(base.shift_deg)
    tf, tt = [], []
    for k in range(copies):
        for tb in tie_buses:
            i = base.index(tb)
            tf.append(k * n + i)
            tt.append(((k + 1) % copies) * n + i)
    m = len(tf)
    return RawCase(
        name=f"{base.name} ring x{copies}", base_mva=base.base_mva, bus=bus, btype=btype,
        pd=cat(base.pd), qd=cat(base.qd), pg=cat(base.pg), qg=cat(base.qg), vset=cat(base.vset),
        qmax=np.where(btype == PV, cat(base.qmax), np.inf), qmin=np.where(btype == PV, cat(base.qmin), -np.inf),
        gs=cat(base.gs), bs=cat(base.bs), vfinal=np.full(n * copies, np.nan), afinal_deg=np.full(n * copies, np.nan),
        f=np.concatenate([f, tf]), t=np.concatenate([t, tt]), r=np.concatenate([r, np.full(m, tie_r)]),
        x=np.concatenate([x, np.full(m, tie_x)]), b=np.concatenate([b, np.zeros(m)]),
        ratio=np.concatenate([ratio, np.ones(m)]), shift_deg=np.concatenate([ph, np.zeros(m)]))


class _Schedule:
    """Load flow and exact derivatives as functions of the generator setpoints ``u``."""

    def __init__(self, case: RawCase):
        self.case = case
        self.Y = case.ybus()
        n = case.n
        self.slack = np.flatnonzero(case.btype == SLACK)
        self.gen = np.flatnonzero(np.isin(case.btype, (PV, SLACK)))
        self.pq = np.flatnonzero(case.btype == PQ)
        self.ang = np.flatnonzero(case.btype != SLACK)
        self.vm = np.where(case.btype == PQ, 1.0, case.vset)
        self.va = np.zeros(n)
        self._key = None
        self.flows = 0

    def _solve(self, u):
        """Newton load flow (:func:`.ac_opf.newton_pf`) with the generator buses held at ``u``
        (reactive limits not enforced: they are constraints of the optimisation), warm-started
        from the previous point, from flat if that fails."""
        key = u.tobytes()
        if key == self._key:
            return
        vset = self.case.vset.copy()
        vset[self.gen] = u
        r = newton_pf(self.case, vset=vset, tol=1e-11, start=(self.vm, self.va), Y=self.Y)
        if not r.success:
            r = newton_pf(self.case, vset=vset, tol=1e-11, Y=self.Y)
        if not r.success:
            raise RuntimeError("reference load flow did not converge at the SLSQP point")
        Y, ang, pq = self.Y, self.ang, self.pq
        vm, va = r.vm, r.va
        self.flows += 1
        self.vm, self.va, self._key = vm, va, key
        pa, pm, qa, qm = injection_jacobian(Y, vm, va)
        self.p, self.q = injections(Y, vm, va)
        self.parts = (pa, pm, qa, qm)
        self.jac = np.block([[pa[np.ix_(ang, ang)], pm[np.ix_(ang, pq)]],
                             [qa[np.ix_(pq, ang)], qm[np.ix_(pq, pq)]]])
        # dF/du: a setpoint is the magnitude of its bus
        self.dfdu = np.vstack([pm[np.ix_(ang, self.gen)], qm[np.ix_(pq, self.gen)]])
        self._dxdu = None

    def dxdu(self):
        if self._dxdu is None:
            self._dxdu = -np.linalg.solve(self.jac, self.dfdu)
        return self._dxdu

    # losses and their adjoint gradient
    def losses(self, u):
        self._solve(u)
        return float(self.p.sum())

    def losses_grad(self, u):
        self._solve(u)
        pa, pm, _, _ = self.parts
        dl_dva, dl_dvm = pa.sum(axis=0), pm.sum(axis=0)
        dl_dx = np.concatenate([dl_dva[self.ang], dl_dvm[self.pq]])
        lam = np.linalg.solve(self.jac.T, dl_dx)
        return dl_dvm[self.gen] - lam @ self.dfdu

    # constraint values: load-bus magnitudes and generator reactive outputs
    def load_vm(self, u):
        self._solve(u)
        return self.vm[self.pq]

    def load_vm_jac(self, u):
        self._solve(u)
        return self.dxdu()[len(self.ang):]

    def gen_q(self, u):
        self._solve(u)
        return self.q[self.gen] + self.case.qd[self.gen]

    def gen_q_jac(self, u):
        self._solve(u)
        _, _, qa, qm = self.parts
        d = self.dxdu()
        na = len(self.ang)
        g = self.gen
        return qa[np.ix_(g, self.ang)] @ d[:na] + qm[np.ix_(g, self.pq)] @ d[na:] + qm[np.ix_(g, g)]


def voltage_schedule(case: RawCase | None = None, vgen=(0.95, 1.10), vload=(0.95, 1.05), ftol=1e-12,
                     maxiter=500):
    """Loss-minimising generator voltage setpoints (full AC, reduced-space SLSQP, exact gradients).

    Starts from the file setpoints clipped to ``vgen``. Returns an OptimizeResult: losses_mw,
    vset (per generator bus, in ``gen_buses`` order), gen_buses (external numbers), vm, qg_mvar
    (per generator bus), base_losses_mw, success, message, nit, flows (load flows solved),
    worst_violation (pu / pu of Mvar), time_s.
    """
    t0 = time.perf_counter()
    case = case or ieee30()
    pb = _Schedule(case)
    g = pb.gen
    u0 = np.clip(case.vset[g], *vgen)
    base_losses = pb.losses(case.vset[g].copy())
    lim = np.isfinite(case.qmax[g]) & np.isfinite(case.qmin[g])
    qmax, qmin = case.qmax[g][lim], case.qmin[g][lim]
    cons = [
        {"type": "ineq", "fun": lambda u: pb.load_vm(u) - vload[0], "jac": lambda u: pb.load_vm_jac(u)},
        {"type": "ineq", "fun": lambda u: vload[1] - pb.load_vm(u), "jac": lambda u: -pb.load_vm_jac(u)},
        {"type": "ineq", "fun": lambda u: qmax - pb.gen_q(u)[lim], "jac": lambda u: -pb.gen_q_jac(u)[lim]},
        {"type": "ineq", "fun": lambda u: pb.gen_q(u)[lim] - qmin, "jac": lambda u: pb.gen_q_jac(u)[lim]},
    ]
    res = minimize(pb.losses, u0, jac=pb.losses_grad, method="SLSQP", bounds=[vgen] * len(g),
                   constraints=cons, options={"ftol": ftol, "maxiter": maxiter})
    u = np.clip(res.x, *vgen)
    losses = pb.losses(u)
    vm = pb.load_vm(u)
    q = pb.gen_q(u)
    worst = max(0.0, float(np.max(vload[0] - vm)), float(np.max(vm - vload[1])),
                float(np.max(q[lim] - qmax, initial=0.0)), float(np.max(qmin - q[lim], initial=0.0)))
    mva = case.base_mva
    return OptimizeResult(losses_mw=losses * mva, vset=u, gen_buses=case.bus[g], vm=pb.vm.copy(), qg_mvar=q * mva,
                          base_losses_mw=base_losses * mva, success=bool(res.success and worst < 1e-7),
                          message=res.message, nit=res.nit, flows=pb.flows, worst_violation=worst,
                          time_s=time.perf_counter() - t0)


if __name__ == "__main__":      # a whole-process run for the benchmark: python -m reference.schedule [copies]
    import sys

    copies = int(sys.argv[1]) if len(sys.argv) > 1 else 4
    r = voltage_schedule(ring_case(copies=copies) if copies > 1 else ieee30())
    print(f"{r.losses_mw:.9f} {r.nit} {r.flows} {int(r.success)} {r.time_s:.3f}")
