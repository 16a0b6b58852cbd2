"""What an optimisation returns: :class:`PlanResult`, its :class:`PlanStatus`, the limit
breaches of a plan (:class:`Violation`) and one entry of the step log (:class:`StepRecord`)."""
from __future__ import annotations

import enum
from dataclasses import asdict, dataclass, field, fields

import numpy as np


class PlanStatus(enum.Enum):
    """How an optimisation ended.

    VERIFIED        the final AC load flow converged at every level and every limit holds.
    LEAST_VIOLATION the final AC load flow converged at every level but limits remain broken:
                    the levers cannot meet them all; the plan breaks them least (by the penalty).
    NOT_VERIFIED    the final AC load flow did not converge at some level.
    FAILED          the optimiser could not work: the base case did not converge or a MILP step
                    failed. The result holds the best AC-checked point reached before that.
    """
    VERIFIED = "verified"
    LEAST_VIOLATION = "least violation"
    NOT_VERIFIED = "not verified"
    FAILED = "failed"


@dataclass
class Violation:
    """One limit broken in an AC load flow."""
    level: str
    kind: str          # "voltage", "reactive", "loading", "no convergence"
    element: str       # bus or branch
    value: float
    limit: float
    excess: float      # in the limit's unit (pu voltage, Mvar, % loading)

    def text(self) -> str:
        unit = {"voltage": " pu", "post-outage voltage": " pu", "reactive": " Mvar",
                "loading": " %"}.get(self.kind, "")
        if self.kind == "no convergence":
            return f"{self.level}: load flow did not converge ({self.element})"
        return (f"{self.level}: {self.kind} at {self.element}: {self.value:.4f}{unit} against limit "
                f"{self.limit:.4f}{unit} (by {self.excess:.4f}{unit})")


@dataclass
class StepRecord:
    """One entry of the optimiser's log: a MILP step, or a move of the final search.

    Reads also like a mapping (``rec["merit"]``, ``rec.get("polish")``) for callers written
    against the earlier dict log.
    """
    iteration: int
    accepted: bool
    merit: float | None                   # objective of the AC-checked point (None: not checked)
    predicted_mw: dict | None = None      # level -> MW the linear model predicted for this point
    ac_mw: dict | None = None             # level -> MW from the AC load flows
    violation: float | None = None        # sum of limit excesses (pu)
    worst_violation: str | None = None    # the largest breach, as text
    radius_v: float | None = None         # trust radius of setpoints (pu)
    radius_units: int | None = None       # trust radius of bank units
    polish: bool = False                  # a move of the final search, not a MILP step
    repeat: bool = False                  # proposed before: no load flow needed

    def __getitem__(self, key):
        return getattr(self, key)

    def get(self, key, default=None):
        return getattr(self, key, default)

    def keys(self):
        return [f.name for f in fields(self)]

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass
class PlanResult:
    """The outcome of :func:`planner.optimize.engine.plan`: the plan, its AC verification and
    how it was found. ``success`` is True when the optimiser ran to its own stop (the plan may
    still break limits: see ``status``)."""
    success: bool
    status: PlanStatus
    message: str
    levels: list             # level names
    banks: list              # [{bus, units, fixed_units, switched_units, unit_mvar, mvar, steps_by_level, mvar_by_level}]
    setpoints: dict          # level -> [{bus, v_pu, v_reached_pu, at_limit}]
    taps: dict               # level -> [{from_bus, to_bus, xfmr_id, ratio, position, ratio_side, parallel_group}]
    existing_steps: dict     # level -> [{shunt_id, bus, steps}]
    losses_before_mw: dict   # level -> MW (AC)
    losses_after_mw: dict    # level -> MW (AC-verified)
    losses_predicted_mw: dict  # level -> MW the linear model predicted for the final plan ({} if none)
    capital_cost: float
    objective_before: float
    objective_after: float
    violations: list         # list[Violation] of the final plan
    violations_before: list
    flows_before: dict = field(repr=False, default_factory=dict)   # level -> FlowResult
    flows_after: dict = field(repr=False, default_factory=dict)
    log: list = field(repr=False, default_factory=list)            # list[StepRecord]
    ac_flows: int = 0
    milp_solves: int = 0
    seconds: float = 0.0
    predicted_note: str = ""         # why losses_predicted_mw is empty, or which model made it
    bound: dict = field(default_factory=dict)   # lower bound and gap, see planner.optimize.bound
    time_limited: bool = False       # the emergency time limit fired somewhere: a re-run may differ
    stop_reason: str = ""            # why the outer loop stopped
    settings: object = field(repr=False, default=None)
    bands: dict = field(repr=False, default_factory=dict)   # level -> (v_min, v_max) per bus, compiled order
    security: object = None          # planner.contingency.secure.SecurityResult of an N-1-secured plan

    @property
    def verified(self) -> bool:
        """Final AC load flows converged at every level and every limit holds."""
        return self.status is PlanStatus.VERIFIED

    def __repr__(self) -> str:
        after = ", ".join(f"{n} {v:.4f} MW" for n, v in self.losses_after_mw.items())
        return (f"PlanResult(status={self.status.name}, banks={len(self.banks)}, losses after: {after}, "
                f"capital={self.capital_cost:.6g}, violations={len(self.violations)})")

    def to_dict(self) -> dict:
        """The plan as plain data (JSON-ready apart from numpy scalars): everything but the
        flows and the internal settings. Two runs of one plan give equal dicts apart from
        ``seconds``."""
        return {
            "success": bool(self.success), "status": self.status.value, "message": self.message,
            "stop_reason": self.stop_reason, "time_limited": bool(self.time_limited), "levels": list(self.levels),
            "banks": self.banks, "setpoints": self.setpoints, "taps": self.taps,
            "existing_steps": self.existing_steps, "losses_before_mw": self.losses_before_mw,
            "losses_after_mw": self.losses_after_mw, "losses_predicted_mw": self.losses_predicted_mw,
            "losses_predicted_note": self.predicted_note, "capital_cost": self.capital_cost,
            "objective_before": self.objective_before, "objective_after": self.objective_after,
            "bound": self.bound, "violations": [{**asdict(v), "text": v.text()} for v in self.violations],
            "iterations": [e.to_dict() for e in self.log], "ac_flows": self.ac_flows,
            "milp_solves": self.milp_solves, "seconds": self.seconds,
            **({"security": self.security.to_dict()} if self.security is not None else {}),
        }

    def to_frames(self) -> dict:
        """The plan as pandas tables: ``banks``, ``setpoints``, ``taps``, ``existing_steps``,
        ``violations`` and ``losses`` (one row per level)."""
        import pandas as pd

        banks = pd.DataFrame([{k: v for k, v in b.items() if not isinstance(v, dict)} for b in self.banks],
                             columns=["bus", "units", "fixed_units", "switched_units", "unit_mvar", "mvar"])

        def per_level(d, cols):
            rows = [{"level": n, **r} for n in self.levels for r in d.get(n, [])]
            return pd.DataFrame(rows, columns=["level", *cols])
        out = {
            "banks": banks,
            "setpoints": per_level(self.setpoints, ["bus", "v_pu", "v_reached_pu", "at_limit"]),
            "taps": per_level(self.taps, ["xfmr_id", "from_bus", "to_bus", "ratio", "position",
                                          "ratio_side", "parallel_group"]),
            "existing_steps": per_level(self.existing_steps, ["shunt_id", "bus", "steps"]),
            "violations": pd.DataFrame([asdict(v) for v in self.violations],
                                       columns=["level", "kind", "element", "value", "limit", "excess"]),
            "losses": pd.DataFrame({
                "level": self.levels,
                "losses_before_mw": [self.losses_before_mw.get(n, np.nan) for n in self.levels],
                "losses_after_mw": [self.losses_after_mw.get(n, np.nan) for n in self.levels],
                "losses_predicted_mw": [self.losses_predicted_mw.get(n, np.nan) for n in self.levels]}),
        }
        if self.security is not None:        # an N-1-secured plan: tracked outages, breaches left
            out.update(self.security.to_frames())
        return out
