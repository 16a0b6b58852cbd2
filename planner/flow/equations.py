"""The load-flow equations: loads, injections, mismatch and branch flows (per unit).

Shared by the Newton solver (:mod:`planner.flow.newton`), the result builder
(:mod:`planner.flow.result`) and the optimiser's sensitivities, so each formula is written
once and no module of the flow package imports another in a cycle.

Loads follow the ZIP model: ``S_load(|V|) = S_p + S_i |V| + S_z |V|^2``, each part scaled
by ``scale`` (the continuation multiplies load and generation by one factor).
"""
from __future__ import annotations

import numpy as np

from ..network.compile import Compiled


def load_power(c: Compiled, vm: np.ndarray, scale: float = 1.0) -> np.ndarray:
    """Complex load per bus at voltage magnitudes ``vm`` (ZIP model), times ``scale``.

    Without voltage-dependent parts (the common case) this is ``c.s_load_p`` itself, not a
    copy: callers never modify the array returned."""
    if not (c.s_load_i.any() or c.s_load_z.any()):     # two cheap tests instead of five passes
        return c.s_load_p if scale == 1.0 else scale * c.s_load_p
    s = c.s_load_p + c.s_load_i * vm + c.s_load_z * vm ** 2
    return s if scale == 1.0 else scale * s


def load_derivative(c: Compiled, vm: np.ndarray, scale: float = 1.0) -> np.ndarray:
    """d S_load / d|V| per bus (complex), times ``scale``."""
    d = c.s_load_i + 2.0 * c.s_load_z * vm
    return d if scale == 1.0 else scale * d


def injection(y, v: np.ndarray) -> np.ndarray:
    """Complex power leaving each bus into the network, ``V conj(Y V)`` (pu)."""
    return v * np.conj(y @ v)


def bus_mismatch(c: Compiled, y, v: np.ndarray, q_fixed: np.ndarray, scale: float = 1.0) -> np.ndarray:
    """Complex mismatch per bus: computed injection minus scheduled injection (pu).

    ``q_fixed`` is the reactive output (pu) of generators held at a limit (a physical limit,
    not scaled); ``scale`` multiplies scheduled generation and load alike.

    >>> from planner.network.model import Network, make_table
    >>> from planner.network.compile import compile_network
    >>> net = Network(buses=make_table("buses", [{"bus": 1, "base_kv": 110.0, "kind": "slack"},
    ...                                          {"bus": 2, "base_kv": 110.0, "kind": "PQ"}]),
    ...     generators=make_table("generators", [{"gen_id": "G1", "bus": 1, "mw": 0.0}]),
    ...     loads=make_table("loads", [{"load_id": "D2", "bus": 2, "mw": 50.0, "mvar": 0.0}]),
    ...     lines=make_table("lines", [{"line_id": "L1", "from_bus": 1, "to_bus": 2, "r_pu": 0.0, "x_pu": 0.1}]))
    >>> c = compile_network(net)
    >>> bus_mismatch(c, c.ybus(), np.ones(2, complex), np.zeros(2)).real.round(3).tolist()
    [0.0, 0.5]
    """
    vm = np.abs(v)
    s_spec = scale * c.s_gen + 1j * q_fixed - load_power(c, vm, scale)
    return injection(y, v) - s_spec


def branch_flows(c: Compiled, v: np.ndarray):
    """Complex power entering each branch at its from and to ends (pu)."""
    yff, yft, ytf, ytt = _branch_admittances(c)
    vf, vt = v[c.f], v[c.t]
    s_from = vf * np.conj(yff * vf + yft * vt)
    s_to = vt * np.conj(ytf * vf + ytt * vt)
    return s_from, s_to


def _branch_admittances(c: Compiled):
    """``c.branch_admittances()``, kept on ``c`` while the branch data it is made from holds
    (one load flow builds the result from them twice; repeated solves of one network reuse them)."""
    key = (c.ys, c.bc, c.ratio, c.shift, c.tap_from)
    hit = c._cache.get("flow_branch_admittances")
    if hit is not None and all(a.shape == b.shape and np.array_equal(a, b) for a, b in zip(hit[0], key)):
        return hit[1]
    out = c.branch_admittances()
    c._cache["flow_branch_admittances"] = (tuple(a.copy() for a in key), out)
    return out
