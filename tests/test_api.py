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
    verified, losses = lines[-1].split(" ", 1)
    assert verified == "True"
    after = float(re.search(r"[\d.]+", losses.split(":")[1]).group(0))
    assert 0.10 < after < 0.20267                       # banks cut the 0.2027 MW of the base case


def test_public_names_resolve_to_the_library_functions():
    from planner.flow.newton import solve_flow
    from planner.network.io import read_network, write_network
    from planner.study.run import run_study
    from planner.study.spec import read_study
    assert planner.solve_flow is solve_flow and planner.read_network is read_network
    assert planner.write_network is write_network and planner.read_study is read_study
    assert planner.run_study is run_study
    assert {"read_network", "write_network", "solve_flow", "read_study", "run_study", "plan"} <= set(planner.__all__)
    assert issubclass(planner.OutputError, planner.PlannerError)
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
