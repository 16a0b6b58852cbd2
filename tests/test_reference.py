"""Checks of the independent reference computations in tests/reference/.

Import layout: ``tests/`` is not a package; this file puts its own folder on
``sys.path`` and imports ``from reference.<module> import ...`` (works with
``python -m pytest`` from the repo root). Run with ``-s`` to see the reference optima.
"""
import os
import sys

import numpy as np
import pytest

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from reference.ac_opf import (feeder33_bank_sizing, feeder33_losses, ieee30_voltage_schedule,  # noqa: E402
                              newton_pf)
from reference.raw_cases import PV, SLACK, feeder33, ieee14, ieee30, read_cdf  # noqa: E402
from reference.sweep import enumerate_feeder33, sweep_feeder33  # noqa: E402


@pytest.fixture(scope="module")
def schedule30():
    return ieee30_voltage_schedule()


@pytest.fixture(scope="module")
def banks33():
    return feeder33_bank_sizing((14, 24, 30))


@pytest.fixture(scope="module")
def enum1():
    return enumerate_feeder33(sites=1)


@pytest.fixture(scope="module")
def enum2():
    return enumerate_feeder33(sites=2)


# --- parsers -------------------------------------------------------------------------------

def test_cdf_reader_counts_and_fields():
    c = ieee30()
    assert (c.n, len(c.f), c.base_mva) == (30, 41, 100.0)
    assert list(c.bus[c.btype == PV]) == [2, 5, 8, 11, 13] and c.bus[c.btype == SLACK][0] == 1
    # bus 10 and 24 carry shunt capacitors in the file; bus 2 limits 50/-40 Mvar
    assert c.bs[c.index(10)] == pytest.approx(0.19) and c.bs[c.index(24)] == pytest.approx(0.043)
    assert c.qmax[c.index(2)] == pytest.approx(0.5) and c.qmin[c.index(2)] == pytest.approx(-0.4)
    k = np.flatnonzero((c.bus[c.f] == 6) & (c.bus[c.t] == 9))[0]
    assert c.ratio[k] == pytest.approx(0.978) and c.x[k] == pytest.approx(0.208)


def test_cdf_reader_bad_field_names_line_and_field(tmp_path):
    # the input file is only read; the corrupted copy lives in tmp_path
    src = os.path.join(os.path.dirname(os.path.abspath(__file__)), "data", "ieee14cdf.txt")
    with open(src, newline="") as fh:
        lines = fh.read().split("\r\n")
    lines[4] = lines[4][:40] + "   abc   " + lines[4][49:]     # load MW of the 3rd bus
    bad = tmp_path / "bad.txt"
    bad.write_text("\r\n".join(lines), newline="")
    with pytest.raises(ValueError, match=r"line 5: field 'load MW'"):
        read_cdf(bad)


def test_feeder_reader_totals():
    # Baran and Wu 1989: total load 3715 kW + j2300 kvar
    c = feeder33(base_mva=10.0)
    assert c.pd.sum() * 10e3 == pytest.approx(3715.0) and c.qd.sum() * 10e3 == pytest.approx(2300.0)


# --- base cases ------------------------------------------------------------------------------

def test_feeder33_base_sweep_baran_wu_1989():
    r = sweep_feeder33()
    assert r.success and r.max_dv < 1e-10
    assert r.losses_kw[0] == pytest.approx(202.67, abs=0.05)      # Baran and Wu 1989
    assert r.vmin[0] == pytest.approx(0.9131, abs=5e-5) and r.vmin_bus[0] == 18


def test_feeder33_base_newton_baran_wu_1989():
    r = feeder33_losses()
    assert r.success
    assert r.losses_kw == pytest.approx(202.67, abs=0.05)         # Baran and Wu 1989
    assert r.vmin == pytest.approx(0.9131, abs=5e-5) and r.vmin_bus == 18
    # two different algorithms on the same data agree to solver tolerance
    assert np.max(np.abs(r.vm - np.abs(sweep_feeder33().v[0]))) < 1e-9


def test_feeder_base_independent_of_mva_base():
    a = newton_pf(feeder33(base_mva=10.0))
    b = newton_pf(feeder33(base_mva=1.0))
    assert a.losses * 10.0 == pytest.approx(b.losses * 1.0, rel=1e-10)


def test_ieee14_base_losses_from_memory_and_cdf_solution():
    c = ieee14()
    r = newton_pf(c)
    assert r.success
    assert r.losses * c.base_mva == pytest.approx(13.393, abs=0.01)   # from memory
    # CDF "final" columns (IEEE CDF file): 0.002 pu, 0.05 deg
    assert np.max(np.abs(r.vm - c.vfinal)) < 0.002
    assert np.max(np.abs(np.rad2deg(r.va) - c.afinal_deg)) < 0.05


def test_ieee30_base_losses_limits_ignored_from_memory():
    c = ieee30()
    r = newton_pf(c)
    assert r.success
    assert r.losses * c.base_mva == pytest.approx(17.557, abs=0.01)   # from memory


def test_power_balance_branch_by_branch():
    # physics: sum of injections = series losses + shunt consumption, from per-branch flows
    c = ieee30()
    r = newton_pf(c)
    v = r.vm * np.exp(1j * r.va)
    y = 1 / (c.r + 1j * c.x)
    a = c.ratio * np.exp(1j * np.deg2rad(c.shift_deg))
    vf, vt = v[c.f], v[c.t]
    s_from = vf * np.conj((y / abs(a) ** 2 + 0.5j * c.b) * vf - y / np.conj(a) * vt)
    s_to = vt * np.conj((y + 0.5j * c.b) * vt - y / a * vf)
    shunt = (c.gs + 1j * c.bs) * abs(v) ** 2
    bus_s = np.zeros(c.n, complex)
    np.add.at(bus_s, c.f, s_from)
    np.add.at(bus_s, c.t, s_to)
    bus_s += np.conj(shunt)
    assert np.max(np.abs(bus_s - (r.p + 1j * r.q))) < 1e-10
    assert np.max(np.abs(r.p - (c.pg - c.pd))[c.btype != SLACK]) < 1e-10
    assert (s_from + s_to).real.sum() + (c.gs * abs(v) ** 2).sum() == pytest.approx(r.losses, abs=1e-10)


# --- optima ----------------------------------------------------------------------------------

def test_ieee30_voltage_schedule_consistent(schedule30):
    r = schedule30
    c = ieee30()
    assert r.success and r.max_mismatch < 1e-8
    assert r.losses_mw < r.base_losses_mw - 0.5
    vlo, vhi, qlo, qhi = r.bounds
    assert np.all(r.vm >= vlo - 1e-6) and np.all(r.vm <= vhi + 1e-6)
    pv = c.btype == PV
    assert np.all(r.qg_mvar[pv] >= qlo[pv] - 1e-6) and np.all(r.qg_mvar[pv] <= qhi[pv] + 1e-6)
    # AC verification: a Newton load flow at the optimal setpoints reproduces the optimum
    gen = np.isin(c.btype, (PV, SLACK))
    f = newton_pf(c, vset=np.where(gen, r.vm, 1.0))
    assert f.success
    assert f.losses * c.base_mva == pytest.approx(r.losses_mw, abs=1e-5)
    assert np.max(np.abs(f.vm - r.vm)) < 1e-6
    # all starts that converged reach the same optimum (no worse local optimum kept)
    finals = [val for val, ok in r.starts.values() if ok]
    assert max(finals) - min(finals) < 1e-6
    print(f"\nIEEE30 voltage schedule: losses {r.losses_mw:.4f} MW (base {r.base_losses_mw:.4f} MW), "
          f"{r.time_s:.2f} s, best start '{r.start}'")
    print("  generator setpoints: " + ", ".join(f"{b}:{v:.4f}" for b, v in zip(c.bus[gen], r.vm[gen])))


def test_feeder33_bank_sizing_consistent(banks33):
    r = banks33
    assert r.success and r.max_mismatch < 1e-8
    q = r.ratings_mvar
    assert set(q) == {14, 24, 30} and all(v >= -1e-9 for v in q.values())
    assert r.losses_kw < r.base_losses_kw - 50.0
    # AC verification by the independent sweep
    case = feeder33()
    cols = [case.index(b) for b in q]
    qv = np.zeros((1, case.n))
    qv[0, cols] = list(q.values())
    assert sweep_feeder33(qv).losses_kw[0] == pytest.approx(r.losses_kw, abs=1e-4)
    # local optimality: no +/-10 kvar step on any bank lowers the losses
    steps = np.repeat(qv, 6, axis=0)
    for k, col in enumerate(cols):
        steps[2 * k, col] += 0.01
        steps[2 * k + 1, col] = max(steps[2 * k + 1, col] - 0.01, 0.0)
    assert np.all(sweep_feeder33(steps).losses_kw >= r.losses_kw - 1e-6)
    print(f"\nfeeder33 bank sizing at 14/24/30: losses {r.losses_kw:.3f} kW (base {r.base_losses_kw:.3f}), "
          "ratings " + ", ".join(f"{b}:{v:.4f} Mvar" for b, v in q.items())
          + f", vmin {r.vmin:.4f} at bus {r.vmin_bus}, {r.time_s:.2f} s")


def test_enumeration_one_site_matches_scalar_newton(enum1):
    r = enum1
    assert r.cases == 32 * 11
    # brute force with the scalar Newton load flow on every bus and unit count
    best = min((feeder33_losses({b: u * 0.15}).losses_kw, b, u) for b in range(2, 34) for u in range(11))
    assert r.losses_kw == pytest.approx(best[0], abs=1e-6)
    assert r.units == (best[2],) and (best[2] == 0 or r.buses == (best[1],))
    print(f"\nenumeration 1 site: bus {r.buses[0]}, {r.units[0]} units, {r.losses_kw:.3f} kW, "
          f"vmin {r.vmin:.4f}, {r.cases} cases, {r.time_s:.3f} s")


def test_enumeration_two_sites(enum1, enum2):
    r = enum2
    assert r.cases == 32 * 31 // 2 * 121
    assert r.losses_kw <= enum1.losses_kw + 1e-9
    assert feeder33_losses({b: u * 0.15 for b, u in zip(r.buses, r.units)}).losses_kw == \
        pytest.approx(r.losses_kw, abs=1e-6)
    print(f"\nenumeration 2 sites: buses {r.buses}, units {r.units}, {r.losses_kw:.3f} kW, "
          f"vmin {r.vmin:.4f}, {r.cases} cases, {r.time_s:.3f} s")
