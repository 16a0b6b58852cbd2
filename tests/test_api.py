"""The public API: ``planner``'s flat names, the README's "From Python" example, light imports."""
from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest

import planner

ROOT = Path(__file__).resolve().parent.parent


def readme_example() -> str:
    text = (ROOT / "README.md").read_text()
    section = text[text.index("## From Python"):]
    m = re.search(r"```python\n(.*?)```", section, re.S)
    assert m, "README has no python block under 'From Python'"
    return m.group(1)


def test_readme_from_python_example_runs_and_prints_the_reference_figures():
    code = readme_example()
    assert len([ln for ln in code.splitlines() if ln.strip()]) <= 12          # a short example
    p = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert p.returncode == 0, p.stderr
    lines = p.stdout.splitlines()
    assert lines[0] == "[]"
    assert lines[1] == "True 0.2027 MW"                 # Baran and Wu 1989: 202.67 kW
    assert lines[2].split() == ["bus", "v_pu"]
    assert lines[3].split()[0] == "18" and float(lines[3].split()[1]) == pytest.approx(0.9131, abs=1e-4)
    k = next(i for i, ln in enumerate(lines) if ln.startswith("VERIFIED "))
    after = float(lines[k].split()[1])
    assert 0.10 < after < 0.20267                       # banks cut the 0.2027 MW of the base case
    banks = [ln.split() for ln in lines[k + 2:]]
    assert lines[k + 1].split() == ["bus", "units"] and 1 <= len(banks) <= 2      # max_new_sites = 2
    assert all(int(b) in (18, 30, 33) and 1 <= int(u) <= 10 for b, u in banks)
    # the plan's losses are those of an AC load flow with exactly these banks (Mvar at 1.0 pu)
    net = planner.read_network(ROOT / "tests" / "data" / "feeder33_tables").copy()
    for b, u in banks:
        net.buses.loc[net.buses.bus == int(b), "shunt_supply_mvar"] += 0.15 * int(u)
    assert planner.solve_flow(net).losses_mw == pytest.approx(after, abs=1e-4)


def test_public_names_resolve_to_the_library_functions():
    from planner.flow.newton import solve_flow
    from planner.network.io import read_network, write_network
    from planner.study.run import run_study
    from planner.study.spec import read_study
    assert planner.solve_flow is solve_flow and planner.read_network is read_network
    assert planner.write_network is write_network and planner.read_study is read_study
    assert planner.run_study is run_study
    assert {"read_network", "write_network", "solve_flow", "read_study", "run_study", "plan"} <= set(planner.__all__)
    from planner.optimize import plan
    assert planner.plan is plan and planner.PlanStatus.VERIFIED.name == "VERIFIED"
    assert issubclass(planner.OutputError, planner.PlannerError)
    from planner.contingency.secure import SecurityRequest, SecurityStatus
    assert planner.SecurityRequest is SecurityRequest and planner.SecurityStatus is SecurityStatus
    with pytest.raises(AttributeError, match="no attribute 'nonesuch'"):
        planner.nonesuch      # noqa: B018


@pytest.mark.parametrize("code", [
    "import planner",
    "import planner; planner.solve_flow(planner.read_network('tests/data/ieee14cdf.txt'))",
    "import planner.cli; planner.cli.main(['flow', 'tests/data/ieee14cdf.txt', '-q'])",
])
def test_pyomo_not_imported_by_the_package_or_the_flow(code):
    p = subprocess.run([sys.executable, "-c", code + "; import sys; print('pyomo' in sys.modules)"],
                       cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr
    assert p.stdout.strip().splitlines()[-1] == "False"


def test_a_plan_does_not_load_the_scipy_parts_pyomo_would_import_eagerly():
    # Pyomo imports scipy.stats, scipy.integrate and scipy.spatial at once when SciPy is already
    # loaded (about 0.8 s); planner.optimize.milp.keep_scipy_deferred keeps them deferred. The
    # plan must still come out right and SciPy must stay one module object.
    code = ("import sys, scipy, planner\n"
            "from planner.optimize import LevelCase, Levers, Limits\n"
            "net = planner.read_network('tests/data/ieee30cdf.txt')\n"
            "p = planner.plan([LevelCase('base', net)], Levers(gen_v_range={'*': (0.95, 1.10)}),\n"
            "                 Limits(v_min=0.95, v_max=1.05))\n"
            "print(sys.modules['scipy'] is scipy, 'scipy.stats' in sys.modules, 'pyomo' in sys.modules,\n"
            "      p.status.name, round(p.losses_after_mw['base'], 4))\n")
    p = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr
    # the optimum equals the SLSQP reference of tests/test_optimize.py (16.5959 MW)
    assert p.stdout.split() == ["True", "False", "True", "VERIFIED", "16.5959"]
