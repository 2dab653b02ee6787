"""The simulation engine: scenario -> flat arrays -> compiled kernels -> integrated trajectory.

Nothing here parses files or knows of the dashboard. The public entry is :func:`solve`, which
:func:`barrierflow.simulate` wraps into a :class:`barrierflow.Result`.
"""

from .compiled import BarrierGrid, CompiledModel, compile_scenario
from .grid import Grid
from .integrators import INTEGRATORS, RunStats, ScipyIntegrator, integrator_from_name
from .schedule import Event, build_schedule
from .solve import Trajectory, solve

__all__ = [
    "INTEGRATORS",
    "BarrierGrid",
    "CompiledModel",
    "Event",
    "Grid",
    "RunStats",
    "ScipyIntegrator",
    "Trajectory",
    "build_schedule",
    "compile_scenario",
    "integrator_from_name",
    "solve",
]
