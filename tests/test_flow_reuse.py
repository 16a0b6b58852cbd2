"""What the load flow keeps between iterations and solves, and the process settings it makes.

The kept things (admittance matrix, branch admittances, the Jacobian refilled in place, the DC
loss estimate) must never go stale: each test changes what a cache depends on and compares the
answer with a fresh computation. The process settings (one BLAS thread, freed memory kept) must
hold while a solve runs and undo what they should.
"""
from __future__ import annotations

import resource
import sys
from pathlib import Path

import numpy as np
import pytest

from planner.flow import newton as nm
from planner.flow.jacobian import JacobianPattern, SymbolicCache
from planner.flow.newton import solve_flow
from planner.flow.runtime import keep_freed_memory, one_blas_thread
from planner.network.cdf import read_cdf
from planner.network.compile import PQ, SLACK, compile_network, replace
from planner.network.synthetic import ring_copies

DATA = Path(__file__).resolve().parent / "data"


@pytest.fixture(scope="module")
def ieee30():
    return read_cdf(DATA / "ieee30cdf.txt")


def test_jacobian_refilled_in_place_equals_the_pattern_jacobian_with_zip_loads(ieee30):
    net = ieee30.copy()
    # voltage-dependent shares, so the load derivative enters the |V| diagonal
    net.loads["p_share_i"], net.loads["q_share_z"] = 0.3, 0.5
    c = compile_network(net)
    res = solve_flow(compiled=c, enforce_q_limits=False)
    assert res.success
    y = c.ybus()
    free = np.flatnonzero((c.kind != SLACK) & c.alive)
    pq = np.flatnonzero((res.kind == PQ) & c.alive)
    vm = np.abs(res.v)
    dload = c.s_load_i + 2.0 * c.s_load_z * vm
    ref = JacobianPattern(y, free, pq).matrix(res.v, dload).toarray()
    cache = SymbolicCache()
    system = cache.get(y, free).system(y, (res.kind == PQ) & c.alive)
    rhs = np.linspace(-1.0, 1.0, ref.shape[0])
    system.solve(res.v, dload, rhs)                  # first use: orders
    for v in (res.v, res.v * 1.01):                  # later uses refill one matrix in place
        x = system.solve(v, dload, rhs)
        jac, perm = system.matrix(v, dload)
        want = JacobianPattern(y, free, pq).matrix(v, dload).toarray()
        np.testing.assert_allclose(jac.toarray(), want[np.ix_(perm, perm)], rtol=1e-13, atol=1e-12)
        np.testing.assert_allclose(want @ x, rhs, atol=1e-9)
    assert abs(ref).max() > 1.0                      # a real Jacobian, not zeros


def test_solve_after_changing_shunts_and_taps_in_place_matches_a_fresh_compile(ieee30):
    c = compile_network(ieee30)
    first = solve_flow(compiled=c)
    # the same Compiled edited in place: every kept value must notice
    c.ysh[5] += 0.3j
    c.ratio[-1] *= 1.02
    again = solve_flow(compiled=c)
    fresh = solve_flow(compiled=compile_network(ieee30), build_tables=False)
    c2 = compile_network(ieee30)
    c2.ysh[5] += 0.3j
    c2.ratio[-1] *= 1.02
    ref = solve_flow(compiled=c2)
    assert again.success and ref.success
    np.testing.assert_allclose(again.v, ref.v, atol=1e-10)
    assert abs(again.losses_mw - ref.losses_mw) < 1e-8
    assert np.abs(again.v - first.v).max() > 1e-3     # the edit moved the solution
    assert np.abs(fresh.v - first.v).max() < 1e-10


def test_dc_loss_estimate_follows_load_changes_with_one_cache(ieee30):
    c = compile_network(ieee30)
    cache = SymbolicCache()
    base = nm._dc_loss_estimate(c, cache)
    heavy = replace(c, s_load_p=1.5 * c.s_load_p, s_gen=1.5 * c.s_gen)
    est_heavy = nm._dc_loss_estimate(heavy, cache)
    assert est_heavy == pytest.approx(nm._dc_loss_estimate(heavy, None), rel=1e-12)
    # flows scale by 1.5, losses r P^2 by 2.25
    assert est_heavy == pytest.approx(2.25 * base, rel=1e-9)
    assert nm._dc_loss_estimate(c, cache) == pytest.approx(base, rel=1e-12)


def test_one_blas_thread_holds_blas_to_one_thread_and_restores_it():
    threadpoolctl = pytest.importorskip("threadpoolctl")
    before = [i["num_threads"] for i in threadpoolctl.threadpool_info() if i["user_api"] == "blas"]
    if not before:
        pytest.skip("no BLAS library that threadpoolctl can see")
    with one_blas_thread():
        inside = [i["num_threads"] for i in threadpoolctl.threadpool_info() if i["user_api"] == "blas"]
    after = [i["num_threads"] for i in threadpoolctl.threadpool_info() if i["user_api"] == "blas"]
    assert inside == [1] * len(before)
    assert after == before


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="page-fault counts: Linux only")
def test_repeated_solves_of_a_large_network_reuse_memory():
    if not keep_freed_memory():
        pytest.skip("allocator settings left to the environment or not glibc")
    base = read_cdf(DATA / "ieee14cdf.txt")
    single = solve_flow(base)
    slack_mw = float(single.generators.mw[single.compiled.kind[single.compiled.gen_bus] == SLACK].sum())
    c = compile_network(ring_copies(base, 360, slack_mw=slack_mw, ties_per_link=2))   # 5,040 buses
    cache = SymbolicCache()
    res = solve_flow(compiled=c, build_tables=False, symbolic=cache)
    assert res.success
    solve_flow(compiled=c, build_tables=False, symbolic=cache)
    start = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    for _ in range(3):
        solve_flow(compiled=c, build_tables=False, symbolic=cache)
    per_solve = (resource.getrusage(resource.RUSAGE_SELF).ru_minflt - start) / 3
    # measured: about 2,100 page faults per solve with the allocator's defaults, none with them kept
    assert per_solve < 300, per_solve
