"""Independent reference computations for the tests.

Nothing here imports ``planner``: the parsers, the Newton load flow, the full-AC
optimisations and the batched radial sweep are written from the raw data files
with plain dense numpy complex arithmetic, so that the tool's results can be
compared against something that shares none of its code.

Import layout: ``tests/`` is not a package. ``tests/test_reference.py`` puts
``tests/`` on ``sys.path`` and imports ``from reference.ac_opf import ...``; the
modules use relative imports between themselves, so ``from tests.reference
import ...`` (repo root on ``sys.path``, as with ``python -m pytest``) also works.

Modules
-------
raw_cases  -- IEEE CDF and 33-bus feeder readers, dense Ybus.
ac_opf     -- polar power-flow equations with analytic Jacobians, a Newton load
              flow, and full-AC loss minimisation with scipy.optimize.
sweep      -- batched backward/forward sweep on the radial feeder and exhaustive
              enumeration of capacitor units at one or two sites.
"""
