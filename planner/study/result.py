"""The typed result of a loss-reduction study (:func:`planner.study.run.run_study`).

One :class:`StudyResult` holds everything the report, the JSON and the CSV files are made from:
the base case per load level (AC load flow with tables, the voltage band each bus was checked
against, the limits broken), and per alternative the optimiser's :class:`PlanResult`, its
economics and NPV sensitivities. The report reads it through one converter,
:func:`planner.report.convert.report_data`.
"""
from __future__ import annotations

import enum
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["StudyStatus", "InputFile", "BaseLevel", "AlternativeResult", "StudyResult"]


class StudyStatus(enum.Enum):
    """How a study run ended.

    VERIFIED       at least one alternative meets every limit in AC load flow at every level
    NONE_VERIFIED  every alternative still breaks a limit (or its AC load flow failed); the
                   least-violation plans are reported as findings
    BASE_FAILED    the base-case load flow did not converge at some level; nothing was optimised
    """
    VERIFIED = "verified"
    NONE_VERIFIED = "none verified"
    BASE_FAILED = "base case failed"


@dataclass(frozen=True)
class InputFile:
    """One input the study rests on, with its SHA-256 checksum (a reviewer re-runs from these)."""
    role: str         # "study", "network"
    path: str         # as given, relative to the study file where possible
    sha256: str


@dataclass
class BaseLevel:
    """The network as it is, at one load level."""
    name: str
    hours: float
    flow: object                 # FlowResult with tables
    v_min: np.ndarray            # per bus (compiled order): the band each bus was checked against
    v_max: np.ndarray
    violations: list             # optimize Violation objects (voltage, loading, reactive)

    @property
    def success(self) -> bool:
        return bool(getattr(self.flow, "converged", False))


@dataclass
class AlternativeResult:
    """One alternative: what the study asked for, the optimiser's plan, and what it is worth."""
    spec: object                 # AlternativeSpec
    plan: object                 # PlanResult
    economics: object | None     # EconomicResult, only for a plan that meets every limit
    sensitivity: list = field(default_factory=list)   # rows from economics.npv_sensitivity

    @property
    def name(self) -> str:
        return self.spec.name

    @property
    def verified(self) -> bool:
        return bool(self.plan.verified)


@dataclass
class StudyResult:
    """Outcome of :func:`planner.study.run.run_study` (see :class:`StudyStatus`)."""
    success: bool
    status: StudyStatus
    message: str
    spec: object                 # StudySpec
    network: object              # Network as read (loads unscaled)
    base: dict                   # level name -> BaseLevel
    alternatives: list           # list[AlternativeResult], in study-file order
    inputs: list                 # list[InputFile]
    tool_version: str
    created: str
    seconds: float
    jobs: int = 1

    def __repr__(self) -> str:
        ok = sum(a.verified for a in self.alternatives)
        return (f"StudyResult(status={self.status.name}, levels={list(self.base)}, "
                f"alternatives={len(self.alternatives)}, verified={ok}, seconds={self.seconds:.1f})")

    @property
    def best(self):
        """The verified alternative with the highest NPV (None when none is verified or priced)."""
        priced = [a for a in self.alternatives if a.verified and a.economics is not None]
        return max(priced, key=lambda a: a.economics.npv, default=None)

    def to_frames(self) -> dict:
        """Summary tables: ``alternatives`` (one row per alternative) and ``base`` (per level)."""
        base = pd.DataFrame([{"level": n, "converged": b.success, "losses_mw": b.flow.losses_mw,
                              "limits_broken": len(b.violations)} for n, b in self.base.items()])
        rows = []
        for a in self.alternatives:
            p = a.plan
            rows.append({"alternative": a.name, "verified": a.verified,
                         "limits_broken": len(p.violations),
                         "capital_cost": p.capital_cost if a.verified else None,
                         "npv": a.economics.npv if a.economics is not None else None,
                         **{f"losses_mw_{n}": p.losses_after_mw.get(n) for n in p.levels}})
        return {"base": base, "alternatives": pd.DataFrame(rows)}


def sha256_of(path: Path) -> str:
    import hashlib
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 16), b""):
            h.update(block)
    return h.hexdigest()
