"""A lower bound beside the verified plan, and the gap between them.

The bound is the optimum of the continuous relaxation of the step model built at the final
plan's AC point: whole units may be fractional, sites may be partly open, and every lever may
move over its whole range (no trust region). The losses are the quadratic model of the final
point, under-estimated by its tangent cuts; limits are the linear rows without the margins the
loop learned, with the same penalty on any breach. So the bound is a valid lower bound of the
*model*: no plan the model can describe scores better. It is not a certificate for the AC
problem (the model is exact only at its own point), but where the model is good -- near the
final point, which is where a relaxed optimum lands for a well-solved plan -- a small gap says
the plan is close to the best one reachable, and a gap wider than the MILP tolerance says
where rounding to whole units, or the search, may leave something on the table.
"""
from __future__ import annotations

import numpy as np

from . import milp
from .problem import Evaluation, PlanProblem, Settings

MEANING = ("lower bound: the best objective the linear model of the final AC point allows when "
           "whole units may be fractional and every lever may move over its full range; no plan "
           "the model describes scores lower. It is a bound on the model, not on the AC problem.")


def plan_bound(pb: PlanProblem, st: Settings, ev: Evaluation) -> dict:
    """The relaxation bound at the final plan and the gap to its AC-verified objective.

    Returns a dict: ``lower_bound``, ``objective`` (the plan's AC merit), ``gap`` (their
    difference, objective units), ``relative_gap``, ``exceeds_mip_gap``, ``units``,
    ``meaning``; or ``{"reason": ...}`` when no bound could be computed.
    """
    if not ev.converged:
        return {"reason": "the final AC load flow did not converge: no model to bound with"}
    units = max([s.max_units for s in pb.sites] + list(pb.exist_max) + [1])
    taps = int(np.ceil(np.max((pb.tap_hi - pb.tap_lo) / np.where(pb.tap_step > 0, pb.tap_step, 1.0)))) \
        if len(pb.tap_br) else 0
    saved = pb.v_margin
    pb.v_margin = [(np.zeros_like(a), np.zeros_like(b)) for a, b in saved]
    try:
        spec = pb.step_spec(st, ev.flows, 1.0, units, max(taps, 1), float(units))
    finally:
        pb.v_margin = saved
    spec.tie_break = 0.0
    pyo = milp._load()
    model = milp.build_model(spec)
    pyo.TransformationFactory("core.relax_integer_vars").apply_to(model)
    res = milp.solve_model(model, spec)
    if not res.ok:
        return {"reason": f"the relaxed model could not be solved ({res.status})"}
    scale = milp.objective_scale(spec)
    # every level's loss model carries its constant: the objective is in merit units once scaled
    lower = float(res.objective * scale)
    merit = float(ev.merit)
    gap = merit - lower
    rel = gap / max(abs(merit), 1e-12)
    return {"lower_bound": lower, "objective": merit, "gap": gap, "relative_gap": rel,
            "exceeds_mip_gap": bool(rel > pb.options.mip_gap),
            "units": "MW of losses (weighted)" if pb.objective.kind == "losses" else "money",
            "meaning": MEANING}
