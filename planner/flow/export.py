"""Load-flow results as plain data: JSON-ready dicts and CSV tables."""
from __future__ import annotations

from .result import FlowResult


def flow_to_dict(res: FlowResult) -> dict:
    """Everything a person or program needs from a load flow, in engineering units."""
    d = {
        "converged": bool(res.success), "success": bool(res.success), "status": int(res.status),
        "status_name": res.status.name, "message": res.message,
        "equations_solved": bool(res.equations_solved), "strategy": res.strategy,
        "continuation_steps": int(res.continuation_steps),
        "oscillating_buses": list(res.oscillating_buses),
        "iterations": int(res.iterations), "losses_mw": float(res.losses_mw),
        "losses_mvar": float(res.losses_mvar), "solve_seconds": float(res.solve_seconds),
        "worst_bus": res.worst_bus, "worst_mismatch_mva": float(res.worst_mismatch_mva),
        "mismatch_history_mva": [float(x) for x in res.mismatch_history],
        "limited_buses": list(res.limited_buses),
    }
    if res.buses is not None:
        d["buses"] = res.buses.to_dict(orient="records")
        d["generators"] = res.generators.to_dict(orient="records")
        d["branches"] = res.branches.to_dict(orient="records")
    return d


def flow_tables(res: FlowResult) -> dict:
    """CSV text of the bus, generator and branch tables."""
    return {"buses.csv": res.buses.to_csv(index=False), "generators.csv": res.generators.to_csv(index=False),
            "branches.csv": res.branches.to_csv(index=False)}
