"""The optimiser: capacitor banks, generator voltage setpoints and transformer taps chosen by
successive mixed-integer steps, every accepted point verified by AC load flow.

Public names: :func:`plan`, :class:`PlanResult`, :class:`PlanStatus`, :class:`LevelCase`, and
the lever types :class:`BankSite`, :class:`Levers`, :class:`Limits`, :class:`Objective`,
:class:`Options`. Importing this package does not import Pyomo; a plan does.
"""
from .engine import LevelCase, PlanResult, PlanStatus, StepRecord, Violation, plan
from .levers import BankSite, Levers, Limits, Objective, Options

__all__ = ["plan", "PlanResult", "PlanStatus", "StepRecord", "Violation", "LevelCase",
           "BankSite", "Levers", "Limits", "Objective", "Options"]
