"""Numerical kernels of the Newton loop checked against direct formulas.

* The phasor rotation by a sine / cosine series (with halving and squaring for large steps)
  against numpy's complex exponential.
* The branch-angle screen of the plausibility check (a cosine test on ``V_f conj(V_t)``) against
  the wrapped angles across each branch, phase shifts included.
* The kept ordering: no bus's |V| unknown right after its own angle (so SuperLU forms no
  two-column supernode of the pair), with the same fill as the ordering SuperLU chose.
* The Newton step solved in the kept order with ln |V| unknowns against a direct solve of the
  Jacobian of :class:`JacobianPattern` (IEEE 30, tests/data/ieee30cdf.txt).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.sparse.linalg as spla

from planner.flow import newton as nm
from planner.flow.jacobian import JacobianPattern, SymbolicCache, factorize
from planner.network.cdf import read_cdf
from planner.network.compile import PQ, SLACK, compile_network
from planner.network.synthetic import ring_copies

DATA = Path(__file__).resolve().parent / "data"


@pytest.fixture(scope="module")
def ieee30():
    return read_cdf(DATA / "ieee30cdf.txt")


@pytest.mark.parametrize("span, halvings", [(0.05, 0), (0.2, 0), (0.3, 1), (1.0, 3), (3.0, 4)])
def test_rotation_series_matches_the_complex_exponential(span, halvings):
    d = np.random.default_rng(7).uniform(-span, span, 20_000)
    assert nm._halvings(d) == halvings
    got = nm._rotation(d, halvings)
    np.testing.assert_allclose(got, np.exp(-1j * d), rtol=0, atol=2e-15)
    assert np.abs(np.abs(got) - 1.0).max() < 2e-15


@pytest.mark.parametrize("span", [3.3, 20.0, 45.0, 200.0, 1e4])
def test_rotation_by_table_matches_the_complex_exponential_for_large_steps(span):
    d = np.random.default_rng(5).uniform(-span, span, 20_000)
    d[:4] = [span, -span, 0.0, nm._TURN * 0.5]             # the ends, no turn, a half step of the table
    got = nm._turn_phasors(d, span)
    # the nearest table multiple k q carries a rounding error of about |d| x 1e-16 rad
    np.testing.assert_allclose(got, np.exp(-1j * d), rtol=0, atol=2e-15 + 2e-16 * span)
    assert np.abs(np.abs(got) - 1.0).max() < 2e-15


@pytest.mark.parametrize("span", [1e-5, 1.3e-4, 1e-3, 4.6e-3, 0.01, 2.9e-2, 0.05, 9.3e-2, 0.15, 0.2])
def test_rotation_with_fewer_series_terms_for_small_steps_stays_exact(span):
    d = np.random.default_rng(11).uniform(-span, span, 20_000)
    d[0] = span                                            # the bound itself
    terms = nm._series_terms(span)
    got = nm._rotation(d, 0, terms)
    np.testing.assert_allclose(got, np.exp(-1j * d), rtol=0, atol=2.5e-16)
    np.testing.assert_allclose(got, nm._rotation(d, 0), rtol=0, atol=2.5e-16)


def test_rotation_falls_back_beyond_its_range_and_for_non_finite_steps():
    d = np.array([2e4, -1.0])
    np.testing.assert_allclose(nm._turn_phasors(d, 2e4), np.exp(-1j * d), rtol=0, atol=1e-15)
    assert np.isnan(nm._turn_phasors(np.array([np.nan, 0.1]), np.nan)[0])
    assert nm._halvings(np.array([3.3])) is None           # 0.2 * 2**4 = 3.2 is the last in range
    assert nm._halvings(np.array([0.1, np.nan])) is None
    assert nm._halvings(np.array([])) == 0


def test_branch_angle_screen_agrees_with_wrapped_angles_including_phase_shifts(ieee30):
    c = compile_network(ieee30)
    rng = np.random.default_rng(3)
    nb = len(c.f)
    c.shift[:] = rng.uniform(-0.6, 0.6, nb) * (rng.random(nb) < 0.3)
    c.tap_from[:] = rng.random(nb) < 0.5
    limit, ok, cos_limit, turn = nm._transfer_angles(c, None)
    on_f = np.where(c.tap_from, c.shift, 0.0)
    on_t = np.where(c.tap_from, 0.0, c.shift)
    flagged = 0
    for spread in (0.3, 1.0, 2.0, 3.0):
        for _ in range(20):
            v = rng.uniform(0.8, 1.1, c.n) * np.exp(1j * rng.uniform(-spread, spread, c.n))
            ang = np.angle(v)
            delta = np.remainder((ang[c.f] - on_f) - (ang[c.t] - on_t) + np.pi, 2 * np.pi) - np.pi
            exact = ok & (np.abs(delta) > limit)
            z = v[c.f] * np.conj(v[c.t]) * turn
            screen = ok & (z.real < cos_limit * np.abs(z))
            near = np.abs(np.abs(delta) - limit) < 1e-9
            assert np.array_equal(exact[~near], screen[~near])
            flagged += int(exact.sum())
    assert flagged > 100                                  # the test met branches on both sides


def test_kept_order_splits_each_bus_pair_with_the_fill_superlu_chose(ieee30):
    net = ring_copies(ieee30, 6, ties_per_link=2)
    c = compile_network(net)
    res = nm.solve_flow(compiled=c, enforce_q_limits=False, build_tables=False, symbolic=SymbolicCache())
    assert res.success
    y = c.ybus()
    free = np.flatnonzero((c.kind != SLACK) & c.alive)
    pq_mask = (res.kind == PQ) & c.alive
    cache = SymbolicCache()
    sym = cache.get(y, free)
    system = sym.system(y, pq_mask)
    rhs = np.ones(len(free) + int(pq_mask.sum()))
    system.solve(res.v, None, rhs)                       # first LU: SuperLU's ordering, kept
    m = sym.m
    pos = np.empty(2 * m, np.int64)
    pos[sym.order] = np.arange(2 * m)
    assert np.all(pos[m:] != pos[:m] + 1)                # no |V| right after its own angle
    assert np.all(pos[m:] > pos[:m])                     # ... but after it
    jac, _ = system.matrix(res.v)
    kept = spla.splu(jac, permc_spec="NATURAL", diag_pivot_thresh=0.1, options=dict(SymmetricMode=True))
    pattern = JacobianPattern(y, free, np.flatnonzero(pq_mask))
    chosen = factorize(pattern.matrix(res.v))
    assert kept.L.nnz + kept.U.nnz <= 1.02 * (chosen.L.nnz + chosen.U.nnz)


def test_ordered_step_with_log_magnitudes_solves_the_jacobian(ieee30):
    net = ieee30.copy()
    net.loads["p_share_z"] = 0.4                          # a voltage-dependent load on the diagonal
    c = compile_network(net)
    res = nm.solve_flow(compiled=c)
    assert res.success
    y = c.ybus()
    free = np.flatnonzero((c.kind != SLACK) & c.alive)
    pq = np.flatnonzero((res.kind == PQ) & c.alive)
    v = res.v * np.exp(0.05j) * 0.98
    dload = c.s_load_i + 2.0 * c.s_load_z * np.abs(v)
    system = SymbolicCache().get(y, free).system(y, (res.kind == PQ) & c.alive)
    rhs = np.linspace(-1.0, 2.0, len(free) + len(pq))
    system.solve(v, dload, rhs)                           # orders
    assert system.ordered
    x_p = system.solve_ordered(v, dload, rhs[system.perm])
    x = np.empty_like(x_p)
    x[system.perm] = x_p
    x[len(free):] *= np.abs(v[pq])                        # ln |V| steps to |V| steps
    want = spla.spsolve(JacobianPattern(y, free, pq).matrix(v, dload).tocsc(), rhs)
    np.testing.assert_allclose(x, want, rtol=1e-9, atol=1e-11)
    assert np.abs(want).max() > 0.1
