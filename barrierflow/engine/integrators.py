"""Time integrators: each a frozen object that checks its own options.

An integrator advances the state over one dosing interval (in the interval's own local time,
from 0) and returns the states at the requested output times. The event loop in
:mod:`barrierflow.engine.solve` calls :meth:`integrate` once per interval.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import ScenarioError, SolverError
from .problem import IntervalProblem

__all__ = ["INTEGRATORS", "AutoIntegrator", "RunStats", "ScipyIntegrator", "integrator_from_name",
           "resolve_integrator", "working_memory"]


@dataclass
class RunStats:
    """Counters of a run (mutable while the run goes on, frozen into the result)."""

    steps: int = 0
    rejected_steps: int = 0
    rhs_evaluations: int = 0
    jacobian_evaluations: int = 0
    lu_decompositions: int = 0
    intervals: int = 0

    def as_dict(self) -> dict[str, int]:
        """The counters as a plain dict."""
        return dict(self.__dict__)


_SCIPY = ("BDF", "Radau", "LSODA")  # scipy.integrate is imported when one runs (it is slow to import)


@dataclass(frozen=True)
class ScipyIntegrator:
    """An implicit scipy integrator with error control (BDF, Radau or LSODA).

    Parameters
    ----------
    method : {"BDF", "Radau", "LSODA"}
        BDF (variable order 1-5) is the default; Radau (order 5, L-stable) is the tight
        reference; LSODA switches between stiff and non-stiff methods.
    rtol : float
        Relative tolerance (default 1e-6).
    atol : float
        Absolute tolerance relative to each state's magnitude scale (default 1e-9): a state
        with scale S (its largest plausible value, see ``CompiledModel.scale``) gets an
        absolute tolerance ``atol * S``.
    max_step : float, h
        Largest step (default: no limit).
    """

    method: str = "BDF"
    rtol: float = 1e-6
    atol: float = 1e-9
    max_step: float = math.inf
    name: str = field(init=False, default="")

    def __post_init__(self) -> None:
        if self.method not in _SCIPY:
            raise ScenarioError.single("integrator method", repr(self.method), f"must be one of {', '.join(_SCIPY)}")
        for label, v in (("rtol", self.rtol), ("atol", self.atol)):
            if not (isinstance(v, float | int) and 0 < v < 1):
                raise ScenarioError.single(f"integrator {label}", v, "must be a number between 0 and 1")
        if not self.max_step > 0:
            raise ScenarioError.single("integrator max_step", self.max_step, "must be > 0")
        object.__setattr__(self, "name", f"scipy-{self.method}")

    def integrate(self, problem: IntervalProblem, y0: np.ndarray, t_end: float, t_out: np.ndarray,
                  stats: RunStats) -> np.ndarray:
        """Advance ``y0`` from local time 0 to ``t_end`` (h); return the states at ``t_out``.

        A problem with ``enter`` and ``leave`` (:class:`~barrierflow.engine.vehicle.VehicleProblem`)
        is integrated on its internal states: ``enter(y0)`` at the start, ``leave(w, t)`` at each
        output.

        Raises
        ------
        SolverError
            If the step size collapses or Newton iterations fail; ``time`` is the local time.
        """
        out = np.empty((len(t_out), len(y0)))
        i = 0
        while i < len(t_out) and t_out[i] <= 0.0:
            out[i] = y0
            i += 1
        if t_end <= 0 or i == len(t_out) and t_end <= 0:
            return out
        enter = getattr(problem, "enter", None)
        leave = getattr(problem, "leave", lambda w, t: w)
        scale = problem.model.scale if enter is None else enter(problem.model.scale)
        start = y0 if enter is None else enter(y0)
        if t_end < 1e-150:  # one explicit step (see rosenbrock.TINY_INTERVAL)
            f = problem.fun(0.0, start)
            while i < len(t_out):
                out[i] = leave(start + t_out[i] * f, t_out[i])
                i += 1
            return out
        atol = self.atol * scale
        jac = problem.jac_dense if self.method == "LSODA" else problem.jac
        import scipy.integrate

        solver = getattr(scipy.integrate, self.method)(
            problem.fun, 0.0, start, t_end, rtol=self.rtol, atol=atol, jac=jac, max_step=self.max_step,
            first_step=min(t_end, 1e-6 * max(t_end, 1.0)))
        while solver.status == "running":
            msg = solver.step()
            stats.steps += 1
            if solver.status == "failed":
                raise SolverError(f"the {self.method} integrator failed: {msg}", time=solver.t)
            t_now = solver.t
            if i < len(t_out) and t_out[i] <= t_now:
                dense = solver.dense_output()
                while i < len(t_out) and t_out[i] <= t_now:
                    out[i] = leave(dense(t_out[i]) if t_out[i] < t_now else solver.y, t_out[i])
                    i += 1
        while i < len(t_out):
            out[i] = leave(solver.y, t_out[i])
            i += 1
        stats.rhs_evaluations += solver.nfev
        stats.jacobian_evaluations += solver.njev
        stats.lu_decompositions += solver.nlu
        return out


@dataclass(frozen=True)
class AutoIntegrator:
    """The engine's choice: the exact solution for a linear model, compiled RODAS4 otherwise, and
    scipy's Radau (:data:`VEHICLE`) for a model with vehicle terms (evaporation, solubility limits,
    samples without replacement).

    Parameters
    ----------
    rtol, atol : float
        Tolerances of the compiled integrator (see :class:`~barrierflow.engine.rosenbrock.
        RosenbrockIntegrator`); the exact path needs none.
    """

    rtol: float = 3e-6
    atol: float = 3e-9
    name: str = field(init=False, default="auto")

    def resolve(self, model, longest: float | None = None):
        """The integrator that runs ``model``; ``longest`` (h) is the longest dosing interval."""
        from .exact import ExactIntegrator, exact_supported
        from .rosenbrock import RosenbrockIntegrator

        if model.vehicle_terms:
            return VEHICLE
        if exact_supported(model, longest):
            exact = ExactIntegrator()
            if working_memory(exact, model) <= EXACT_MEMORY:
                return exact
        return RosenbrockIntegrator(rtol=self.rtol, atol=self.atol)


VEHICLE = ScipyIntegrator("Radau", rtol=1e-7, atol=1e-10)
"""What the default runs a model with vehicle terms on (evaporation, solubility limits, samples
without replacement; see :mod:`barrierflow.engine.vehicle`): only the scipy integrators take
them. Radau (order 5, L-stable) steps over the kink where solid appears or dissolves with few
rejected steps."""

EXACT_MEMORY = 256 * 1024**2
"""The default takes an exact path only when its working arrays fit in this many bytes (larger
networks go to the compiled RODAS4 integrator, whose memory grows in proportion to the states)."""


def working_memory(integrator, model) -> int:
    """Bytes of working arrays that ``integrator`` needs for ``model`` (an estimate, besides the trajectory)."""
    from .exact import ExactIntegrator, exact_plan

    n = model.n_state
    nc = model.n_comp
    n_link = len(model.link_p)
    if isinstance(integrator, ExactIntegrator):
        plan, size = exact_plan(model, integrator.method)
        if plan == "chain":
            return 8 * size * size + 8 * 40 * n + 8 * 12 * n_link
        if plan == "modes":
            return 8 * (2 * n * n + 4 * size * size)
        return 8 * 10 * (n + 1) * (n + 1)
    if isinstance(integrator, ScipyIntegrator):
        if integrator.method == "LSODA":
            return 8 * 4 * n * n
        return 8 * (60 * n + 40 * n_link) + 8 * nc * nc * 4
    # the compiled RODAS4 integrator: O(n) vectors, the dense compartment block
    return 8 * (40 * n + 30 * n_link + 4 * nc * nc)


def resolve_integrator(integrator, model, longest: float | None = None):
    """``integrator`` itself, or what an :class:`AutoIntegrator` (the default, for None) picks for ``model``.

    ``longest`` (h) is the longest dosing interval of the run (the exact paths' conditions use it).
    """
    integrator = AutoIntegrator() if integrator is None else integrator
    return integrator.resolve(model, longest) if hasattr(integrator, "resolve") else integrator


def _rodas(**kw):
    from .rosenbrock import RosenbrockIntegrator

    return RosenbrockIntegrator(**kw)


def _exact(**kw):
    from .exact import ExactIntegrator

    return ExactIntegrator(**kw)


INTEGRATORS = {
    "auto": lambda **kw: AutoIntegrator(**kw),
    "rodas": _rodas,
    "exact": _exact,
    "bdf": lambda **kw: ScipyIntegrator("BDF", **kw),
    "radau": lambda **kw: ScipyIntegrator("Radau", **kw),
    "lsoda": lambda **kw: ScipyIntegrator("LSODA", **kw),
}
"""The one table mapping integrator names (command line, dashboard) to objects."""


def integrator_from_name(name: str, **options: float):
    """The integrator object for ``name`` (a key of :data:`INTEGRATORS`), with options."""
    try:
        make = INTEGRATORS[name.lower()]
    except KeyError:
        raise ScenarioError.single("integrator", repr(name), f"must be one of {', '.join(INTEGRATORS)}") from None
    return make(**options)
