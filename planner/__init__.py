"""Loss-reduction planning for power networks.

The public API, flat (everything else is internal and may change):

========================  ===================================================================
``read_network(path)``    a network from an IEEE CDF file, CSV folder or .xlsx, validated
``write_network(n, p)``   write a network as tables, .xlsx or ``format="cdf"``, atomically
``solve_flow(net)``       AC load flow by Newton-Raphson: a :class:`FlowResult`
``read_study(path)``      a study file (TOML), checked: a :class:`StudySpec`
``run_study(spec)``       every alternative of a study optimised, verified and priced
``plan(...)``             the optimiser: banks, setpoints and taps, verified by AC load flow
``model_warnings(net)``   legal but suspicious features of a network, one line each
========================  ===================================================================

plus the types :class:`Network`, :class:`FlowResult` / :class:`FlowStatus`, :class:`PlanResult` /
:class:`PlanStatus`, the optimiser's inputs (:class:`LevelCase`, :class:`Levers`, :class:`BankSite`,
:class:`Limits`, :class:`Objective`, :class:`Options`), N-1 security as a constraint
(:class:`SecurityRequest`, passed as ``plan(..., security=...)``, and :class:`SecurityResult` /
:class:`SecurityStatus` in the plan's ``security`` field), :class:`StudySpec` and the errors :class:`PlannerError`, :class:`InputError`, :class:`NetworkError`,
:class:`OutputError`.

Names are imported on first use, so ``import planner`` stays light and the optimiser (Pyomo)
is loaded only by code that plans:

>>> import pathlib, planner
>>> case = pathlib.Path(planner.__file__).parents[1] / "tests" / "data" / "ieee14cdf.txt"
>>> res = planner.solve_flow(planner.read_network(case))
>>> res.converged, round(res.losses_mw, 2)          # 13.39 MW: from memory, IEEE 14-bus case
(True, 13.39)
"""
from __future__ import annotations

import importlib
from typing import TYPE_CHECKING

__version__ = "0.1.0"

# public name -> (module, attribute); resolved lazily by __getattr__
_EXPORTS = {
    "read_network": ("planner.network.io", "read_network"),
    "write_network": ("planner.network.io", "write_network"),
    "solve_flow": ("planner.flow.newton", "solve_flow"),
    "read_study": ("planner.study.spec", "read_study"),
    "run_study": ("planner.study.run", "run_study"),
    "plan": ("planner.optimize", "plan"),
    "model_warnings": ("planner.network.validate", "model_warnings"),
    "Network": ("planner.network.model", "Network"),
    "FlowResult": ("planner.flow.result", "FlowResult"),
    "FlowStatus": ("planner.flow.result", "FlowStatus"),
    "PlanResult": ("planner.optimize", "PlanResult"),
    "PlanStatus": ("planner.optimize", "PlanStatus"),
    "LevelCase": ("planner.optimize", "LevelCase"),
    "Levers": ("planner.optimize", "Levers"),
    "BankSite": ("planner.optimize", "BankSite"),
    "Limits": ("planner.optimize", "Limits"),
    "Objective": ("planner.optimize", "Objective"),
    "Options": ("planner.optimize", "Options"),
    "SecurityRequest": ("planner.contingency.secure", "SecurityRequest"),
    "SecurityResult": ("planner.contingency.secure", "SecurityResult"),
    "SecurityStatus": ("planner.contingency.secure", "SecurityStatus"),
    "StudySpec": ("planner.study.spec", "StudySpec"),
    "StudyResult": ("planner.study.result", "StudyResult"),
    "StudyStatus": ("planner.study.result", "StudyStatus"),
    "PlannerError": ("planner.errors", "PlannerError"),
    "InputError": ("planner.errors", "InputError"),
    "NetworkError": ("planner.errors", "NetworkError"),
    "OutputError": ("planner.errors", "OutputError"),
}

__all__ = ["__version__", *_EXPORTS]


def __getattr__(name: str):
    try:
        module, attr = _EXPORTS[name]
    except KeyError:
        raise AttributeError(f"module 'planner' has no attribute {name!r}") from None
    value = getattr(importlib.import_module(module), attr)
    globals()[name] = value          # later look-ups do not come back here
    return value


def __dir__():
    return sorted(set(globals()) | set(_EXPORTS))


if TYPE_CHECKING:        # for type checkers and editors; never run
    from .errors import InputError, NetworkError, OutputError, PlannerError  # noqa: F401
    from .flow.newton import solve_flow  # noqa: F401
    from .flow.result import FlowResult  # noqa: F401
    from .network.io import read_network, write_network  # noqa: F401
    from .network.model import Network  # noqa: F401
    from .network.validate import model_warnings  # noqa: F401
    from .flow.result import FlowStatus  # noqa: F401
    from .optimize import (BankSite, LevelCase, Levers, Limits, Objective, Options, PlanResult,  # noqa: F401
                           PlanStatus, plan)
    from .contingency.secure import SecurityRequest, SecurityResult, SecurityStatus  # noqa: F401
    from .study.run import run_study  # noqa: F401
    from .study.spec import StudySpec, read_study  # noqa: F401
