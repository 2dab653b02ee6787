"""The public simulation call."""

from __future__ import annotations

from collections.abc import Callable

from ..engine import Grid, Integrator, solve
from ..model import Scenario
from .result import Result

__all__ = ["simulate"]


def simulate(
    scenario: Scenario,
    *,
    integrator: Integrator | None = None,
    grid: Grid | None = None,
    raise_on_failure: bool = True,
    progress: Callable[[float], None] | None = None,
    fallback: bool = True,
) -> Result:
    """Simulate a scenario and return its :class:`Result`.

    Parameters
    ----------
    scenario : Scenario
        From :func:`barrierflow.load` or :meth:`Scenario.from_graph`.
    integrator : Integrator, optional
        An integrator from :mod:`barrierflow.engine` (:class:`~barrierflow.engine.Integrator`:
        ``AutoIntegrator``, ``ExactIntegrator``, ``RosenbrockIntegrator``, ``ScipyIntegrator``;
        default: the engine's choice).
    grid : Grid, optional
        Default grid of layers without ``cells``.
    raise_on_failure : bool
        Raise :class:`~barrierflow.SolverError` on a numerical failure (default); with False,
        return the partial result with ``status = -1`` (so a population run survives one failed
        subject).
    progress : callable, optional
        Called with the fraction of the run done, 0 to 1.
    fallback : bool
        Compute a run that failed its check (mass balance, finite and non-negative values) or
        whose integrator failed again on the robust integrator (default True); see
        :func:`barrierflow.engine.solve`.

    Returns
    -------
    Result
    """
    traj = solve(scenario, integrator, grid, raise_on_failure=raise_on_failure, progress=progress, fallback=fallback)
    return Result(scenario, traj)
