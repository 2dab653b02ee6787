"""The simulation engine: scenario -> flat arrays -> compiled kernels -> integrated trajectory.

Nothing here parses files or knows of the dashboard. The public entry is :func:`solve`, which
:func:`barrierflow.simulate` wraps into a :class:`barrierflow.Result`.
"""

from .compiled import BarrierGrid, CompiledModel, ModelArrays, compile_scenario
from .exact import ExactIntegrator
from .grid import Grid
from .integrators import (
    INTEGRATORS,
    AutoIntegrator,
    Integration,
    Integrator,
    IntervalIntegrator,
    RunPlan,
    RunStats,
    ScipyIntegrator,
    integrator_from_name,
)
from .population import Population, simulate_many, simulate_population
from .rosenbrock import RosenbrockIntegrator
from .schedule import Event, EventArrays, build_schedule
from .solve import Trajectory, solve
from .split import SplitIntegrator

__all__ = [
    "INTEGRATORS",
    "AutoIntegrator",
    "BarrierGrid",
    "CompiledModel",
    "Event",
    "EventArrays",
    "ExactIntegrator",
    "Grid",
    "Integration",
    "Integrator",
    "IntervalIntegrator",
    "ModelArrays",
    "Population",
    "RosenbrockIntegrator",
    "RunPlan",
    "RunStats",
    "ScipyIntegrator",
    "SplitIntegrator",
    "Trajectory",
    "build_schedule",
    "compile_scenario",
    "integrator_from_name",
    "simulate_many",
    "simulate_population",
    "solve",
]
