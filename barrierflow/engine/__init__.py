"""The simulation engine: scenario -> flat arrays -> compiled kernels -> integrated trajectory.

Nothing here parses files or knows of the dashboard. The public entry is :func:`solve`, which
:func:`barrierflow.simulate` wraps into a :class:`barrierflow.Result`.
"""

from .compiled import BarrierGrid, CompiledModel, compile_scenario
from .exact import ExactIntegrator
from .grid import Grid
from .integrators import INTEGRATORS, AutoIntegrator, RunStats, ScipyIntegrator, integrator_from_name
from .population import Population, simulate_many, simulate_population
from .rosenbrock import RosenbrockIntegrator
from .schedule import Event, build_schedule
from .solve import Trajectory, solve

__all__ = [
    "INTEGRATORS",
    "AutoIntegrator",
    "BarrierGrid",
    "CompiledModel",
    "Event",
    "ExactIntegrator",
    "Grid",
    "Population",
    "RosenbrockIntegrator",
    "RunStats",
    "ScipyIntegrator",
    "Trajectory",
    "build_schedule",
    "compile_scenario",
    "integrator_from_name",
    "simulate_many",
    "simulate_population",
    "solve",
]
