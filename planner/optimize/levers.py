"""What the optimiser may change, what it must respect, and what it minimises.

Plain dataclasses: the study file reader fills them and :func:`planner.optimize.engine.plan`
reads them.
"""
from __future__ import annotations

from dataclasses import dataclass, field


@dataclass
class BankSite:
    """A candidate bus for a new shunt capacitor bank.

    A bank is a whole number of identical units; its rating is Mvar at 1.0 pu voltage, so it
    injects ``rating * V^2``. ``kinds`` says which bank types may be installed there: fixed
    units are in service at every load level, switched units may be switched per level.
    """
    bus: int
    unit_mvar: float
    max_units: int
    fixed_cost: float = 0.0             # money per site used
    cost_per_mvar: float = 0.0          # money per Mvar installed
    switched_cost_per_mvar: float = 0.0  # extra money per switched Mvar
    switched_fixed_cost: float = 0.0    # extra money per site with switched units
    kinds: tuple = ("fixed", "switched")
    continuous: bool = False            # size freely in [0, max_units * unit_mvar] (sizing studies)


@dataclass
class Levers:
    """The levers of one optimisation."""
    sites: list = field(default_factory=list)        # list[BankSite]
    max_new_sites: int | None = None
    budget: float | None = None                      # money; None = no cap
    existing_shunts: bool = True                     # switchable banks in the model move by steps
    gen_v_range: dict | None = None                  # bus -> (lo, hi); None = setpoints fixed
    taps: bool = False                               # adjustable transformers move in their steps
    setpoints_per_level: bool = True                 # setpoints (and taps) may differ between levels
    parallel_taps_together: bool = True             # transformers in parallel (same buses) share one tap lever


@dataclass
class Limits:
    """Operating limits every AC-verified plan must respect.

    Load-bus voltages: ``v_min``/``v_max`` when given, else each bus's own limits from the
    network, then ``per_bus`` overrides ``{bus: (lo, hi)}``. Generator-bus voltages are held
    to the setpoint range when setpoints are levers. Generator reactive output within the
    generators' limits. Branch loading within rating where one is given (``ratings``).
    """
    v_min: float | None = None
    v_max: float | None = None
    per_bus: dict = field(default_factory=dict)
    ratings: bool = True
    q_limits: bool = True


@dataclass
class Objective:
    """``"losses"``: minimise the (weighted) losses in MW. ``"cost"``: minimise the value of
    the losses (``loss_value_per_mw`` money per MW of loss held for one weight unit, e.g.
    money per MW-year at one level's hours) plus the capital cost times ``capital_factor``
    (for example a capital recovery factor, to compare per year)."""
    kind: str = "losses"
    loss_value_per_mw: float = 1.0
    capital_factor: float = 1.0


@dataclass
class Options:
    """Knobs of the outer loop (defaults suit most cases)."""
    max_iterations: int = 30
    loss_tolerance_mw: float = 1e-5       # stop when an accepted step changes AC losses less
    merit_rel_tolerance: float = 1e-7     # ... or improves the objective by less than this fraction
    voltage_radius_pu: float = 0.05       # initial trust radius of setpoints
    tap_radius_steps: int = 4
    min_voltage_radius_pu: float = 1e-4
    tangent_points: int = 12              # cuts per squared term of the loss model
    penalty: float = 1e4                  # MW of losses (at the heaviest level) per pu of violation
    polish: bool = True                   # the model-screened, AC-checked final search after the loop
    max_polish_flows: int = 400           # AC load flows the final search may run
    search_checks: int = 6                # moves AC-checked per batch of the final search (best first)
    mip_gap: float = 5e-4
    # after the first step (which places the banks from the whole range): at most this many
    # sites opened or closed per step (None: no limit; a move of one bank is 2); none once a
    # step free to move sites kept them; halved when a step is rejected
    site_radius: int | None = 2
    max_nodes: int = 500                  # HiGHS branch-and-bound nodes per MILP solve: the work bound
    time_limit_s: float = 120.0           # emergency stop per MILP solve; when it fires the result says so
    bound: bool = True                    # compute the relaxation bound and gap of the final plan
    jobs: int = 1                         # worker processes for the AC checks of the levels (1 = serial; see ac_check)
    blas_threads: int = 1                 # BLAS threads inside a plan (needs threadpoolctl; 0 = leave alone)
