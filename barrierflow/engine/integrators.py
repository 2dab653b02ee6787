"""The solver contract: what an integrator receives, what it returns, how it counts its work.

Every integrator is an :class:`Integrator`: a frozen dataclass that checks its own options when
it is made (tolerances through :func:`check_tolerances`) and runs a whole regimen with
:meth:`Integrator.run`:

* it receives a :class:`RunPlan`: the compiled model (:class:`~barrierflow.engine.compiled.
  CompiledModel`, whose :class:`~barrierflow.engine.compiled.ModelArrays` the kernels take),
  the events (:class:`~barrierflow.engine.schedule.EventArrays`, applied by the one rule set
  :func:`~barrierflow.engine.schedule.apply_events`), the interval boundaries and the output
  times;
* it returns an :class:`Integration`: the states and the event ledger at the output rows it
  reached, what each event moved, the volumes where they change, a ``status`` (0 done, -1
  stopped early) with a ``message`` that says where and why, and its :class:`RunStats` (steps,
  rejected steps, evaluations, decompositions, intervals).

Numerical trouble is reported in the status, never raised (bad options or a plan the
integrator cannot run, such as the exact path on a nonlinear model, raise ``ScenarioError``).
The driver, :func:`barrierflow.engine.solve`, compiles the scenario, picks the integrator
(:meth:`Integrator.resolve`; :class:`AutoIntegrator` chooses by the model), checks the memory
(:meth:`Integrator.working_memory`), applies the events at the very end of the run and checks
every result (:mod:`barrierflow.engine.ledger`), computing a failed run again on the robust one.

An integrator that advances one dosing interval at a time from Python (the scipy methods)
derives from :class:`IntervalIntegrator` and writes only :meth:`IntervalIntegrator.integrate`;
the event loop is the base class's. The one table of names (command line, dashboard) is
:data:`INTEGRATORS`.
"""

from __future__ import annotations

import dataclasses
import math
from abc import ABC, abstractmethod
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from numba import njit

from ..errors import ScenarioError, SolverError
from .arrays import working_copy
from .compiled import CompiledModel
from .exported import Rows
from .ledger import busiest_part
from .problem import IntervalProblem, IntervalSettings
from .schedule import EventArrays, apply_events, rows_until, start_events
from .vehicle import VehicleProblem

__all__ = ["INTEGRATORS", "VEHICLE", "AutoIntegrator", "Integration", "IntervalIntegrator", "Integrator", "RunPlan",
           "RunStats", "ScipyIntegrator", "check_tolerances", "estimated_seconds", "integrator_from_name",
           "refuse_vehicle_terms", "resolve_integrator", "sharpness", "split_budget", "working_memory"]


@dataclass
class RunStats:
    """Counters of a run (mutable while the run goes on, copied into the result)."""

    steps: int = 0
    rejected_steps: int = 0
    rhs_evaluations: int = 0
    jacobian_evaluations: int = 0
    lu_decompositions: int = 0
    intervals: int = 0

    def as_dict(self) -> dict[str, int]:
        """The counters as a plain dict."""
        return dict(self.__dict__)

    def add(self, counts: np.ndarray) -> None:
        """Add the counters a compiled loop kept in an int array, in the order of the fields
        (steps, rejected steps, rates evaluations, Jacobians, decompositions, intervals)."""
        self.steps += int(counts[0])
        self.rejected_steps += int(counts[1])
        self.rhs_evaluations += int(counts[2])
        self.jacobian_evaluations += int(counts[3])
        self.lu_decompositions += int(counts[4])
        self.intervals += int(counts[5])


@dataclass(frozen=True, eq=False)
class RunPlan:
    """What an integrator is given: one run of one compiled model.

    Attributes
    ----------
    model : CompiledModel
    events : EventArrays
        The events before the end of the run, in the order they apply (those at the very end act
        on the last row only; the driver applies them).
    marks : ndarray, h
        The interval boundaries: 0, every distinct event time, the end of the run (increasing).
        Interval k runs from ``marks[k]`` to ``marks[k + 1]``; the events at ``marks[k]`` apply
        at its start.
    times : ndarray (n_t,), h
        Output times (increasing, from 0 to the end; a time at an event shows the state after it).
    progress : callable or None
        Called with the fraction of the run done (0 to 1), as often as the integrator can.
    full : bool
        Keep every state at every row (``Integration.states``). Without it an integrator may keep
        only what a result exports (``Integration.rows``, :mod:`barrierflow.engine.exported`);
        the driver asks for the full states again when they are wanted.
    """

    model: CompiledModel
    events: EventArrays
    marks: np.ndarray
    times: np.ndarray
    progress: Callable[[float], None] | None = None
    full: bool = False

    @property
    def duration(self) -> float:
        """End of the run, h."""
        return float(self.marks[-1])

    @property
    def longest(self) -> float:
        """The longest dosing interval, h."""
        return float(np.diff(self.marks).max(initial=0.0))

    @cached_property
    def mode_time(self) -> float:
        """The time from the start of an interval at which the exact chain path cuts its modes, h
        (:func:`~barrierflow.engine.exact.mode_time`; computed once per plan: the chooser and the
        chain and split paths read it)."""
        return _exact_m.mode_time(self.times, self.marks)


@dataclass(frozen=True, eq=False)
class Integration:
    """What an integrator returns.

    Attributes
    ----------
    states : ndarray (n_rows, n_state) or None
        The states at the output times reached (all of them when ``status`` is 0), internal
        units (see :mod:`barrierflow.engine.compiled`); None when the integrator kept only
        ``rows`` (a plan without ``full``).
    event_dosed, event_removed : ndarray (n_rows, n_comp), mg
        Cumulative amounts added and taken out by events up to each row.
    status : int
        0 when the run finished, -1 when it stopped early.
    message : str
        "the run finished", or where and why it stopped, in words a scientist can act on.
    stats : RunStats
    event_amounts : ndarray (n_events,), mg
        What each event of the plan moved (:attr:`~barrierflow.engine.schedule.EventState.moved`;
        0 for those not reached).
    volumes : ndarray (n_rows, n_comp) or None, mL
        The compartments' volumes at the output rows for a model whose volumes change (evaporation,
        samples without replacement); None when they stay the model's ``capacity``.
    failed_at : float or None, h
        Where a failed run stopped, when the integrator knows (the driver otherwise takes the
        first output time not reached).
    rows : Rows or None
        What a result exports at each row reached, with the guard over every state
        (:class:`~barrierflow.engine.exported.Rows`), when ``states`` is None.
    last : ndarray (n_state,) or None
        The full state of the last row, when ``states`` is None and the run finished.
    """

    states: np.ndarray | None
    event_dosed: np.ndarray
    event_removed: np.ndarray
    status: int
    message: str
    stats: RunStats
    event_amounts: np.ndarray
    volumes: np.ndarray | None = None
    failed_at: float | None = None
    rows: Rows | None = None
    last: np.ndarray | None = None

    @property
    def n_rows(self) -> int:
        """The output rows reached."""
        return len(self.states) if self.states is not None else len(self.rows.cols)


def refuse_vehicle_terms(model: CompiledModel, name: str) -> None:
    """Refuse, for integrator ``name``, a model whose volumes change or that holds solid (only the
    interval integrators run those, through :mod:`barrierflow.engine.vehicle`).

    Raises
    ------
    ScenarioError
        Naming what the model holds and the integrators that run it.
    """
    if not model.vehicle_terms:
        return
    what = []
    if np.any(model.evap_rate > 0):
        what.append("an evaporating vehicle")
    if np.any(model.shrinking):
        what.append("samples without replacement")
    if np.any(np.isfinite(model.solubility)):
        what.append("a compartment that may exceed the solubility")
    raise ScenarioError.single("integrator", repr(name),
                               f"cannot run {' and '.join(what)} (a volume that changes with time, or undissolved "
                               "solid); use auto, bdf, radau or lsoda")


def check_tolerances(rtol: float, atol: float) -> None:
    """Refuse tolerances that are not numbers between 0 and 1 (the one check of every integrator).

    Raises
    ------
    ScenarioError
        Naming ``integrator rtol`` or ``integrator atol``.
    """
    for label, v in (("rtol", rtol), ("atol", atol)):
        if not (isinstance(v, float | int) and not isinstance(v, bool) and 0 < v < 1):
            raise ScenarioError.single(f"integrator {label}", v, "must be a number between 0 and 1")


class Integrator(ABC):
    """An integrator of the engine (the solver contract; see the module docstring).

    A subclass is a frozen dataclass with a ``name`` (shown in results and messages) whose
    ``__post_init__`` refuses bad options with a ``ScenarioError`` naming the option. It
    implements :meth:`run` and :meth:`working_memory`; a chooser overrides :meth:`resolve`.
    """

    name: str

    @abstractmethod
    def run(self, plan: RunPlan) -> Integration:
        """Run the whole regimen of ``plan``.

        Returns
        -------
        Integration
            On failure ``status`` is -1 and the arrays end at the last output row reached.

        Raises
        ------
        ScenarioError
            If this integrator cannot run the plan's model at all (the message says which to use).
        """

    @abstractmethod
    def working_memory(self, model: CompiledModel) -> int:
        """Bytes of working arrays this integrator needs for ``model`` (an estimate, besides the
        trajectory), which the driver checks before it runs."""

    def resolve(self, model: CompiledModel, longest: float | None = None, rows: int | None = None,
                intervals: int | None = None, shortest: float | None = None, times: np.ndarray | None = None,
                marks: np.ndarray | None = None) -> Integrator:
        """The integrator that runs ``model``: this one (a chooser returns its choice).

        ``longest`` (h) is the longest dosing interval of the run, ``rows`` its output times,
        ``intervals`` its dosing intervals, ``shortest`` (h) the time from an interval's start
        at which the exact chain path cuts its modes (:func:`~barrierflow.engine.exact.mode_time`)
        and ``times`` and ``marks`` (h) its output times and the bounds of its dosing intervals;
        a chooser's estimates of cost use them when given.
        """
        return self

    @property
    def options(self) -> dict:
        """The settings, for the record (the dataclass fields)."""
        if not dataclasses.is_dataclass(self):
            return {}
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        # plain values as they are (what asdict gives them, without its deep copy); anything else
        # through asdict
        if all(v is None or isinstance(v, (bool, int, float, str)) for v in out.values()):
            return out
        return dataclasses.asdict(self)


class IntervalIntegrator(Integrator):
    """An integrator that advances one dosing interval at a time, called from Python.

    :meth:`run` is the event loop: it applies the events at the start of each interval
    (:func:`~barrierflow.engine.schedule.apply_events`, on the run's own copy of the volumes and
    links), hands :meth:`integrate` the interval's problem (an
    :class:`~barrierflow.engine.problem.IntervalProblem`, or for a model whose volumes change or
    that holds solid a :class:`~barrierflow.engine.vehicle.VehicleProblem`) and keeps the ledger,
    the volumes and what each event moved. These are the only integrators that run models with
    vehicle terms.
    """

    @abstractmethod
    def integrate(self, problem: IntervalProblem, y0: np.ndarray, t_end: float, t_out: np.ndarray,
                  stats: RunStats) -> np.ndarray:
        """Advance ``y0`` from local time 0 to ``t_end`` (h); return the states at ``t_out``
        (local times, increasing; the last is ``t_end``).

        The problem's own states are ``problem.enter(y0)`` at the start and a state ``w`` at local
        time t is ``problem.leave(w, t)`` (both the identity but for a vehicle's amounts).

        Raises
        ------
        SolverError
            When the method fails; ``time`` is the local time where it stopped.
        """

    def run(self, plan: RunPlan) -> Integration:
        """The event loop over the dosing intervals (see the class docstring)."""
        model, times, marks = plan.model, plan.times, plan.marks
        base = model.arrays
        m = working_copy(base)
        s = start_events(base, len(plan.events.time))
        n_t, n_c = len(times), model.n_comp
        stats = RunStats()
        states = np.full((n_t, model.n_state), np.nan)
        ev_dosed = np.zeros((n_t, n_c))
        ev_removed = np.zeros((n_t, n_c))
        vehicle = model.vehicle_terms
        volumes = np.full((n_t, n_c), np.nan) if vehicle else None
        y = base.y0.copy()
        status, message, failed_at = 0, "the run finished", None
        row = 0
        ei = 0
        n_int = len(marks) - 1
        for k in range(n_int):
            t0, t1 = marks[k], marks[k + 1]
            ei = apply_events(t0, ei, plan.events, m, base, y, s)
            sel_end = rows_until(times, row, t1, k == n_int - 1)
            t_local = times[row:sel_end] - t0
            settings = IntervalSettings(s.infusion.copy(), s.clamp.copy())
            if vehicle:
                evaporation = np.where(s.evaporating, base.evap_rate, 0.0)
                problem = VehicleProblem(model, settings, evaporation, m)
            else:
                problem = IntervalProblem(model, settings, m)
            want = np.append(t_local, t1 - t0)
            try:
                ys = self.integrate(problem, y, t1 - t0, want, stats)
            except SolverError as err:
                status = -1
                failed_at = float(t0 + (err.time or 0.0))
                message = (f"the solution failed at t = {t0 + (err.time or 0.0):.6g} h (dosing interval "
                           f"{k + 1}, from {t0:.6g} h to {t1:.6g} h), near {busiest_part(model, y)}: {err}. Try a "
                           "tighter tolerance, fewer cells in very thin layers, or check for extreme values "
                           "(diffusivity, clearance, partition) in that part of the network.")
                break
            if not np.all(np.isfinite(ys)):
                status = -1
                failed_at = float(t0)
                message = (f"the solution became non-finite between {t0:.6g} h and {t1:.6g} h; "
                           "check for extreme parameter values")
                break
            clamp = settings.clamp
            ys[:, :n_c][:, clamp] = y[:n_c][clamp]  # clamped exactly, free of round-off
            stats.intervals += 1
            states[row:sel_end] = ys[:-1]
            ev_dosed[row:sel_end] = s.dosed
            ev_removed[row:sel_end] = s.removed
            if vehicle:
                # the volumes at the rows, then moved on to the end of the interval (never below the residue)
                volumes[row:sel_end] = m.capacity[None, :n_c] - evaporation[None, :] * t_local[:, None]
                shrunk = np.maximum(m.capacity[:n_c] - evaporation * (t1 - t0), base.residual)
                m.capacity[:n_c] = np.where(evaporation > 0, shrunk, m.capacity[:n_c])
                m.inv_capacity[:n_c] = 1.0 / m.capacity[:n_c]
            row = sel_end
            y = ys[-1].copy()
            if plan.progress is not None:
                plan.progress(t1 / plan.duration)
        if status != 0:
            states, ev_dosed, ev_removed = states[:row], ev_dosed[:row], ev_removed[:row]
            volumes = volumes[:row] if volumes is not None else None
        return Integration(states, ev_dosed, ev_removed, status, message, stats, s.moved.copy(), volumes, failed_at)


_SCIPY = ("BDF", "Radau", "LSODA")  # scipy.integrate is imported when one runs (it is slow to import)


@dataclass(frozen=True)
class ScipyIntegrator(IntervalIntegrator):
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
        check_tolerances(self.rtol, self.atol)
        if not self.max_step > 0:
            raise ScenarioError.single("integrator max_step", self.max_step, "must be > 0")
        object.__setattr__(self, "name", f"scipy-{self.method}")

    def working_memory(self, model: CompiledModel) -> int:
        """Bytes of working arrays (LSODA's dense Jacobian; the sparse factorisations otherwise)."""
        n, nc = model.n_state, model.n_comp
        if self.method == "LSODA":
            return 8 * 4 * n * n
        return 8 * (60 * n + 40 * len(model.link_p)) + 8 * nc * nc * 4

    def integrate(self, problem: IntervalProblem, y0: np.ndarray, t_end: float, t_out: np.ndarray,
                  stats: RunStats) -> np.ndarray:
        """Advance ``y0`` from local time 0 to ``t_end`` (h); return the states at ``t_out``.

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
        leave = problem.leave
        scale = problem.enter(problem.model.scale)
        start = problem.enter(y0)
        if t_end < 1e-150:  # one explicit step (see rosenbrock.TINY_INTERVAL)
            f = problem.fun(0.0, start)
            while i < len(t_out):
                out[i] = leave(start + t_out[i] * f, t_out[i])
                i += 1
            return out
        atol, rtol = compartment_tolerances(self.atol * scale, self.rtol, problem.model.n_comp)
        jac = problem.jac_dense if self.method == "LSODA" else problem.jac
        import scipy.integrate

        # LSODA takes a tolerance per state as it is; BDF and Radau take one relative tolerance
        # when they are made (their Newton tolerance derives from it) and apply it state by state
        # in each step (atol + rtol |y|): they get it once made (see compartment_tolerances)
        solver = getattr(scipy.integrate, self.method)(
            problem.fun, 0.0, start, t_end, rtol=rtol if self.method == "LSODA" else self.rtol, atol=atol, jac=jac,
            max_step=self.max_step, first_step=min(t_end, 1e-6 * max(t_end, 1.0)))
        if self.method != "LSODA":
            if isinstance(getattr(solver, "rtol", None), float):
                solver.rtol = rtol
            else:  # a scipy that keeps it elsewhere: every state as tight as the compartments
                solver = getattr(scipy.integrate, self.method)(
                    problem.fun, 0.0, start, t_end, rtol=float(rtol.min()), atol=atol, jac=jac,
                    max_step=self.max_step, first_step=min(t_end, 1e-6 * max(t_end, 1.0)))
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


def compartment_tolerances(atol: np.ndarray, rtol: float, n_comp: int) -> tuple[np.ndarray, np.ndarray]:
    """Tolerances per state for scipy's integrators: the compartments' (the first ``n_comp``
    states) divided by sqrt(n) for n states, the others as given.

    scipy measures a step's error as the root mean square over all states of
    error / (atol + rtol |y|): one compartment fed by the thousands of cells of many barriers
    would count as one state in thousands, and its error could grow sqrt(n) times past the
    tolerance unseen. With its tolerances divided by sqrt(n), its term of the mean square alone
    reaches 1 when its own error reaches its tolerance, so the step's error is at least the
    largest of the compartments' (as RODAS4's error is: the larger of the root mean square and
    the largest over the compartments), and at most sqrt(1 + n_comp) times the larger of the two.
    (A change of variables, the compartments integrated multiplied by a weight, would serve only
    the absolute part: a relative error is the same in any unit.)

    Parameters
    ----------
    atol : ndarray (n,)
        Absolute tolerance of each state (in its own unit).
    rtol : float
        Relative tolerance.
    n_comp : int
        Compartments (the first states).

    Returns
    -------
    atol, rtol : ndarray (n,)
    """
    n = len(atol)
    w = math.sqrt(n)
    atol = np.array(atol, dtype=float)
    rtols = np.full(n, float(rtol))
    atol[:n_comp] /= w
    # (no tighter than scipy's floor, 100 machine epsilons, unless asked for)
    rtols[:n_comp] = max(rtol / w, min(rtol, 100 * np.finfo(float).eps))
    return atol, rtols


@dataclass(frozen=True)
class AutoIntegrator(Integrator):
    """The engine's choice, by the structure of the model and the estimated cost of each path.

    * a model with vehicle terms (evaporation, solubility limits, samples without replacement):
      scipy's Radau (:data:`VEHICLE`), the only integrators that run them;
    * a linear chain network (:func:`~barrierflow.engine.exact_chain.chain_order`) up to
      :data:`~barrierflow.engine.exact.CHAIN_STATES` states: the exact chain path, O(k n) per
      output row for k slow modes, cheaper than any step of an integrator;
    * another linear network that the exact modes or matrix-exponential path may take
      (:func:`~barrierflow.engine.exact.exact_supported`: not too stiff for them, within memory)
      when its estimated cost (:func:`estimated_seconds`) is below RODAS4's: their cost grows
      with the cube of the states (a decomposition, or an exponential per step length) and with
      the square per output row, so only small networks take them;
    * a chain network with the saturable elimination of one compartment
      (:func:`~barrierflow.engine.split.linear_part`) when :data:`SPLIT_BY_DEFAULT` allows it and
      its estimated cost is below RODAS4's (an estimate that knows how sharp the elimination is
      over a dosing interval, :data:`SPLIT_SHARPNESS`): the split path (the linear part exact, the
      slow modes by RODAS4), which computes the run on RODAS4 itself when its conditions fail on
      the way or when it needs more steps than its budget (:func:`split_budget`);
    * everything else (other saturable elimination, larger networks, stars of many barriers): the
      compiled RODAS4 integrator, O(n) per step.

    Parameters
    ----------
    rtol, atol : float
        Tolerances of the compiled integrator (see :class:`~barrierflow.engine.rosenbrock.
        RosenbrockIntegrator`); the exact path needs none.
    """

    rtol: float = 3e-6
    atol: float = 3e-9
    name: str = field(init=False, default="auto")

    def __post_init__(self) -> None:
        check_tolerances(self.rtol, self.atol)

    def resolve(self, model: CompiledModel, longest: float | None = None, rows: int | None = None,
                intervals: int | None = None, shortest: float | None = None, times: np.ndarray | None = None,
                marks: np.ndarray | None = None) -> Integrator:
        """The integrator that runs ``model`` (see the class docstring); ``longest`` (h) is the
        longest dosing interval, ``rows`` and ``intervals`` the run's output times and dosing
        intervals (500 and 1 when not given), ``shortest`` (h) the time at which the chain's modes
        are cut (:func:`~barrierflow.engine.exact.mode_time`; the split's set-up and the chain's
        estimate), ``times`` and ``marks`` (h) the output times and the bounds of the dosing
        intervals (the chain's rows computed by its rational approximation, :func:`chain_rows`;
        none when not given)."""
        if model.vehicle_terms:
            return VEHICLE
        if _split_m.linear_part(model) is not None:
            n_rows, n_int = rows or 500, intervals or 1
            if SPLIT_BY_DEFAULT and (estimated_seconds("split", model, n_rows, n_int, longest, shortest)
                                     < estimated_seconds("rodas", model, n_rows, n_int)):
                return _split_m.SplitIntegrator(rtol=self.rtol, atol=self.atol, step_budget=split_budget(n_int))
            return _rodas_m.RosenbrockIntegrator(rtol=self.rtol, atol=self.atol)
        if _exact_m.exact_supported(model, longest):
            exact = _exact_m.DEFAULT_EXACT
            if exact.working_memory(model) <= EXACT_MEMORY:
                plan, _size = _exact_m.exact_plan(model)
                n_rows, n_int = rows or 500, intervals or 1
                if plan == "chain":
                    cut = 1.0 if shortest is None else shortest
                    modes, early = _chain_counts(model, 60.0 / cut, _NO_TIMES if times is None else times,
                                                 _NO_TIMES if marks is None else marks, cut, -1.0)
                    own = estimated_seconds("chain", model, n_rows, n_int, shortest=cut, early=early, modes=modes)
                else:
                    own = estimated_seconds(plan, model, n_rows, n_int)
                # exact to rounding: taken while no more than EXACT_PREFERENCE times RODAS4's estimate
                if own <= EXACT_PREFERENCE * estimated_seconds("rodas", model, n_rows, n_int):
                    return exact
        return _rodas_m.RosenbrockIntegrator(rtol=self.rtol, atol=self.atol)

    def run(self, plan: RunPlan) -> Integration:
        """Run ``plan`` on the integrator :meth:`resolve` picks."""
        return self.resolve(plan.model, plan.longest, len(plan.times), len(plan.marks) - 1,
                            plan.mode_time, plan.times, plan.marks).run(plan)

    def working_memory(self, model: CompiledModel) -> int:
        """What the integrator :meth:`resolve` picks needs."""
        return self.resolve(model).working_memory(model)


SPLIT_BY_DEFAULT = True
"""Whether the default may take the split path (:mod:`~barrierflow.engine.split`) for a chain
network with saturable elimination (where its estimate is below RODAS4's). It was off while, on
random networks (the generator of tests/test_properties_refined.py), the split returned two wrong
results without failing its checks: the eliminated amount of a saturable compartment linked to
nothing, counted again at each event (5x its content after four holds elsewhere), and a sharp
elimination (km 3.4e-5 mg/mL against concentrations up to 250) 2.6 % from Radau, a step taken on
a Jacobian that no longer held. Both are fixed (the compartment's own state, ``split.DRIFT``);
on 303 networks of that generator the split applies to (seeds 0-9000), none of the 170 it kept
was more than 1.4e-6 of a state's scale from scipy's Radau, the others went to RODAS4 by its
conditions or the result check (tests/test_split_random.py holds both networks and 30 seeded
ones). Turn it off to send every saturable model to RODAS4 by default."""

EXACT_PREFERENCE = 1.0
"""The default takes the modes or matrix-exponential path while its estimated cost is at most this
many times RODAS4's. No preference beyond the estimate: both are accurate within the benchmark's
contract, the default should lose no more than 1.3x to the fastest path on any network, and the
estimates are off by about 10 % at the median (at 1.5, with the earlier constants, the default
took the modes on the benchmark's star of 4 barriers, 1.26x slower than RODAS4)."""

RODAS_STEPS = (61.0, 49.5)
"""Steps that :func:`estimated_seconds` expects of RODAS4 at the default tolerances: the first
number once per run, the second per dosing interval (a least-squares line through 288 runs of
stars of 2 to 12 barriers of 2 to 8 cells a layer over 1 to 14 dosing intervals, 106 to 1,020
steps each)."""


CHAIN_COST = (2.6e-4, 4.5e-10, 1.16e-8, 3.7e-11, 5e-7)
"""The constants of the exact chain path's estimated cost (:func:`estimated_seconds`, ``"chain"``):
seconds once per run, per state and square of the modes computed, per interval, state and mode,
per output row, state and mode, and per state of each row computed by the rational
approximation (:func:`chain_rows`; about 60 ns per state and pole, 8 poles). A least-squares fit
(weighted by 1/time) to the shortest of 5 runs of the chain path on 64 linear chain networks
(tests/benchmarks/chain_sweep.py: the benchmark's chain variants, the patch with output every
minute and replaced every 2 h, rows of 2 to 8 barriers, 50 random networks of the property tests'
generator made linear; median error 10 %). The rational rows are what made the chain path slow
on random networks: a short run (0.5 to 7 h) through layers whose slowest modes take days has
100 to 320 modes not decayed at its output times, more than the path computes
(:data:`~barrierflow.engine.exact_chain.MAX_MODES`), so every row goes through 8 complex
tridiagonal solves (6 to 10 ms at 400 to 500 states and 30 to 40 rows against RODAS4's 1 to 4
ms); the default, which took the chain path on every chain network, was 3x to 6x slower than
RODAS4 on those, and now runs them on RODAS4."""


SPLIT_RATIO = (0.65, -0.2)
"""The split path's estimated cost as a ratio to RODAS4's on the same network: ``SPLIT_RATIO[0] *
intervals ** SPLIT_RATIO[1] * (1 + (sharpness / SPLIT_SHARPNESS[0]) ** SPLIT_SHARPNESS[1])``
(:func:`sharpness`: the elimination's rate below km, vmax / (km V), times the longest dosing
interval and the part of it the split's slow modes feel), for a single interval at least
:data:`SPLIT_SINGLE`. The split's steps grow more slowly with the dosing intervals than RODAS4's,
and very much faster with the sharpness: where a concentration meets a km far below its scale, the
split's step check (:data:`~barrierflow.engine.split.DRIFT`) holds each step short (40,116 steps
against RODAS4's 647 on the benchmark's patch with km 1e-7 of central's concentration scale). The
constants are those of a search over a grid that keeps the most of 263 timed pairs (the shortest of
5 or 7 runs of each path, load 4-6) within 1.3x of the faster path:
tests/benchmarks/saturable_sweep.py (the benchmark's patch at 10 and 50 cells a layer with km from
1e-7 to 1e2 of the scale, three strengths of vmax, two dose sizes, one application or the daily
replacements; the benchmark's saturable variant with 1 to 14 applications; 22 random networks of
the property tests' generator) and tests/benchmarks/split_choice.py (the saturable variant at 2 to
200 cells a layer). By it, 258 of the 263 (all 241 but the random networks, the worst 1.26x); by
the earlier ratio 1.28 * intervals ** -0.375, which did not know the sharpness, 223 (the worst
30x). The five others are random networks: four whose split spends most of its time setting up each
interval's modes (1.9x to 5.4x slower than RODAS4 at 220 to 500 states, with 8 to 60 steps), which
no term of the estimate sees, and one on RODAS4 that the split runs in 0.65 of its time (network
72, which takes the split since the sharpness counts only what the slow modes feel beside its far
faster clearance). (A robust least-squares fit of the same form put the patches with sharpness
about 1,000 on the split, 1.5x to 1.8x slower than RODAS4.)"""

SPLIT_SHARPNESS = (100.0, 2.0)
"""The sharpness (:func:`sharpness`) at which the split's estimated cost doubles, and the power of
its growth beyond (see :data:`SPLIT_RATIO`): in effect the split only up to a sharpness of about
100 (the patches at 96 were within 1.05x either way, those at 960 1.5x to 1.8x slower on the
split)."""

SPLIT_SINGLE = 1.35
"""The split path's estimated cost as a ratio to RODAS4's for a single dosing interval (at least;
the larger of this and :data:`SPLIT_RATIO`'s form): the median of the 98 single-interval pairs of
the sweeps (the smallest 0.79): the same number of steps or more, each dearer, and the split's
set-up besides; the default runs RODAS4."""

SPLIT_SETUP = 1e-8
"""Seconds of the split path's set-up per interval, per state and per mode of the chain
(:func:`chain_modes`; :func:`estimated_seconds`): the low end of what random networks of the
property tests' generator took beyond :data:`SPLIT_RATIO`'s part (1e-8 to 6e-8 s on seven of them
at 220 to 500 states, 2 to 5 intervals and 140 to 250 modes, where the split, with 8 to 144
steps, was 1.9x to 6x slower than RODAS4; the benchmark's saturable variant: 7 intervals, 170
states, about 19 modes, 0.23 ms of its 2.5 ms)."""

SPLIT_BUDGET = 4.0
"""The default gives the split path a step budget of this many times the steps RODAS4 is expected
to take (:data:`RODAS_STEPS`; :func:`split_budget`): :data:`~barrierflow.engine.split.BUDGET_START`
of it from the start, the rest in proportion to the simulated time. Past it, the run is computed
on RODAS4: a split that needs far more steps than the estimate allowed for costs a bounded share
of work before it gives up (the sharp elimination of tests/test_split_random.py, three intervals:
3,672 steps in full; with its budget of 838 it gives up after 197). Not lower: RODAS4's steps run
to twice :data:`RODAS_STEPS` on the benchmark's patch (647 to 1,386 for 7 applications), and at
twice them a split of 892 steps that would have been 1.15x slower than RODAS4 gave up near its
end, 3.3x slower. The benchmark's saturable variant takes 370 steps against its budget of 1,630
(it would give up with a budget of 300, not of 400)."""


def split_budget(intervals: int) -> float:
    """The step budget the default gives the split path (:attr:`~barrierflow.engine.split.
    SplitIntegrator.step_budget`) for a run of ``intervals`` dosing intervals: :data:`SPLIT_BUDGET`
    times the steps RODAS4 is expected to take (:data:`RODAS_STEPS`)."""
    return SPLIT_BUDGET * (RODAS_STEPS[0] + RODAS_STEPS[1] * intervals)


def sharpness(model: CompiledModel, longest: float) -> float:
    """How sharp the saturable elimination of ``model`` (its first) is over a dosing interval:
    its rate below km, k = vmax / (km V) (1/h), times the longest interval ``longest`` (h), times
    the part of it the split's slow modes feel, 1 - w (1 - k / (k + k_lin)); 0 for a model without
    one. k_lin is the compartment's first-order losses (clearance, loss to the air; 1/h), and w =
    k_lin / (k_lin + CUT_SLOW) how far its own relaxation lies among the modes the split does not
    integrate (:data:`~barrierflow.engine.split.CUT_SLOW`).

    What holds the split's steps short is the change of the removal's slope as the concentration
    crosses km (:data:`~barrierflow.engine.split.DRIFT`). A compartment that relaxes more slowly
    than the cut carries that change in its own dynamics, at the full rate k. One whose clearance
    is far faster follows the slow modes at once (their static response), and they feel the
    elimination only through the share of the inflow it removes, from k / (k + k_lin) below km to
    none far above it: random network 72 of the property tests' generator, k 8.9e3 /h beside a
    clearance of 2.6e6 /h, takes 8 split steps in 0.65 of RODAS4's time, where the rate alone made
    the split's estimate 1,400 times RODAS4's. (The share alone, without w, sent extreme patch 339
    of the adversarial sweep to the split, 4.6 times slower than RODAS4: k 0.85 /h beside a
    clearance of 2 /h, both far below the cut.)"""
    if not len(model.mm_state):
        return 0.0
    ic = int(model.mm_state[0])
    k = float(model.mm_vmax[0] / (model.mm_km[0] * model.capacity[ic]))
    k_lin = _first_order_loss(model, ic)
    w = k_lin / (k_lin + _split_m.CUT_SLOW)
    return k * longest * (1.0 - w * k_lin / (k + k_lin))


def _first_order_loss(model: CompiledModel, ic: int) -> float:
    """The first-order losses of compartment state ``ic`` of ``model``, 1/h: its loss rate (the
    clearance over the volume, or the loss to the air) and its loss links (a clearance written
    as a link from the compartment to itself, rate a u = a y / K)."""
    own = (model.link_p == ic) & (model.link_q == ic)
    return float(model.loss_rate[ic]) + float(model.link_a[own].sum()) * float(model.inv_partition[ic]) \
        / float(model.capacity[ic])


def chain_modes(model: CompiledModel, rate: float) -> float:
    """About how many modes of the chain of ``model``'s free states decay no faster than ``rate``
    (1/h): each state counts the share of a uniform diffusion's modes below that rate,
    (2 / pi) asin(min(1, sqrt(rate / (2 r)))), r its conductances over its capacity M = V K (the
    largest rate of a uniform chain is 2 r; its modes' rates are 2 r (1 - cos(j pi / m)), j < m;
    a count of this kind is common practice, from memory), summed over the states. The cost of
    computing the modes, which the split path does at every event, grows with it."""
    return _chain_counts(model, rate, _NO_TIMES, _NO_TIMES, 1.0, -1.0)[0]


def chain_rows(model: CompiledModel, times: np.ndarray, marks: np.ndarray, shortest: float,
               modes: float | None = None) -> int:
    """About how many of the run's output rows and interval ends the exact chain path computes by
    the rational approximation (:func:`~barrierflow.engine.exact_chain._rational_row`, a few
    complex tridiagonal solves per row, O(n) each) rather than from its modes: those at local
    times (from the start of their interval, h) before the cut of the modes. The cut is the mode
    time ``shortest`` (h, :func:`~barrierflow.engine.exact.mode_time`) while at most
    :data:`~barrierflow.engine.exact_chain.MAX_MODES` modes decay more slowly than ``60 /
    shortest`` (:func:`chain_modes`); beyond, the path computes only that many modes and the cut
    moves later: a diffusion's modes below a rate number about its square root, so to ``shortest
    (k / MAX_MODES)^2`` for k modes. ``times`` and ``marks`` (h) are the run's output times and
    the bounds of its dosing intervals; ``modes`` is ``chain_modes(model, 60 / shortest)`` when
    known."""
    return _chain_counts(model, 60.0 / shortest, times, marks, shortest, -1.0 if modes is None else modes)[1]


_NO_TIMES = np.zeros(0)


def _chain_counts(model: CompiledModel, rate: float, times: np.ndarray, marks: np.ndarray, shortest: float,
                  modes: float) -> tuple[float, int]:
    """(:func:`chain_modes` at ``rate``, unless ``modes`` >= 0 gives it; :func:`chain_rows` of
    ``times`` and ``marks`` at the cut ``shortest``, 0 when ``marks`` bound no interval) in one
    compiled pass (a stage of every default run on a chain network)."""
    return _counts(model.n_dyn, model.link_p, model.link_q, model.link_b, model.link_c, model.inv_partition,
                   model.capacity, float(rate), np.ascontiguousarray(times, dtype=np.float64),
                   np.ascontiguousarray(marks, dtype=np.float64), float(shortest), float(modes),
                   float(_chain_m.MAX_MODES))


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def _counts(nd, p, q, b, c, inv_k, cap, rate, times, marks, shortest, modes, max_modes):
    """:func:`_chain_counts`: the conductances of each free state from its links (to another state
    or not: the same sums as two bincounts, the links' 'from' ends, then their 'to' ends), each
    state's share of modes, then the rows before the cut, two sorted searches per interval."""
    if modes < 0.0:
        g_from = np.zeros(nd)
        g_to = np.zeros(nd)
        for j in range(p.shape[0]):
            w = 0.5 * (b[j] + c[j])
            if p[j] < nd:
                g_from[p[j]] += w
            if q[j] < nd and q[j] != p[j]:
                g_to[q[j]] += w
        modes = 0.0
        for i in range(nd):
            r = (g_from[i] + g_to[i]) * inv_k[i] / cap[i]
            modes += (2.0 / math.pi) * math.asin(min(1.0, math.sqrt(rate / (2.0 * r)))) if r > 0 else 1.0
    early = 0
    if marks.shape[0] > 1:
        thr = shortest * max(1.0, modes / max_modes) ** 2
        for k in range(marks.shape[0] - 1):
            start, stop = marks[k], marks[k + 1]
            early += (np.searchsorted(times, min(start + thr, stop)) - np.searchsorted(times, start, side="right"))
            if stop - start < thr:
                early += 1
    return modes, early


def estimated_seconds(path: str, model: CompiledModel, rows: int, intervals: int,
                      longest: float | None = None, shortest: float | None = None, early: int = 0,
                      modes: float | None = None) -> float:
    """A rough estimate of the seconds a path takes for ``model``, to choose between paths.

    ``path`` is ``"rodas"`` (a set-up, then per step O(n) and per output row O(n), the steps as
    :data:`RODAS_STEPS`), ``"split"`` (RODAS4's estimate times a ratio fitted to timed pairs,
    :data:`SPLIT_RATIO`: the split's steps grow more slowly with the dosing intervals, and faster
    with the sharpness of the elimination over the longest dosing interval ``longest`` (h),
    :data:`SPLIT_SHARPNESS`, without ``longest`` taken as 0; a single interval :data:`SPLIT_SINGLE`;
    plus its set-up at each interval, :data:`SPLIT_SETUP` per state and per mode of the chain
    (:func:`chain_modes`) no faster than the larger of the split's cut and the rate the chain
    path's cut at ``shortest`` (h, :func:`~barrierflow.engine.exact.mode_time`) asks for),
    ``"modes"`` (a set-up, a dense symmetric decomposition, O(n^3), and per output row the modes
    not decayed, O(n min(n, 40))) or ``"expm"`` (a set-up, about three exponentials of
    the augmented matrix per interval, O(n^3) each, and per output row about 2 us and a product,
    O(n^2)). Only the
    ratios between paths matter. The constants of ``rodas`` and ``modes`` are a least-squares
    fit (weighted by 1/time) to the shortest of 11 runs of each path on 288 stars of barriers
    (2 to 12 barriers, 2 to 8 cells a layer, 1 to 14 dosing intervals, 169 to 4,033 output
    rows; median error of the fit 9-10 %, 95th percentile 28 %); on those, choosing by them puts
    the default within 1.3x of the faster path on 286 of the 288 (with the constants they
    replace, on 229). ``expm``'s cost per output row was measured on 22 stars with a transfer
    (1,009 rows; RODAS4 1.4 to 300 times faster) and a patch on a two-compartment body with a
    transfer (49 rows; expm 0.55 ms, RODAS4 0.68 ms).
    """
    n, nd = model.n_state, model.n_dyn
    if path == "rodas":
        steps = RODAS_STEPS[0] + RODAS_STEPS[1] * intervals
        return 6.2e-4 + steps * (2.1e-6 + 1.54e-8 * n) + 2e-9 * rows * n
    if path == "split":
        sharp = 0.0 if longest is None else sharpness(model, longest)
        ratio = SPLIT_RATIO[0] * intervals ** SPLIT_RATIO[1]
        ratio *= 1.0 + (sharp / SPLIT_SHARPNESS[0]) ** SPLIT_SHARPNESS[1]
        if intervals < 2:
            ratio = max(ratio, SPLIT_SINGLE)
        rate = _split_m.CUT_SLOW if shortest is None else max(_split_m.CUT_SLOW, -_exact_m._FAST / shortest)
        setup = SPLIT_SETUP * intervals * model.n_state * chain_modes(model, rate)
        return ratio * estimated_seconds("rodas", model, rows, intervals) + setup
    if path == "chain":
        if modes is None:
            modes = chain_modes(model, 60.0 / (1.0 if shortest is None else shortest))
        k = min(modes, _chain_m.MAX_MODES)
        return (CHAIN_COST[0] + CHAIN_COST[1] * nd * k * k + CHAIN_COST[2] * intervals * nd * (k + 4)
                + CHAIN_COST[3] * rows * (n + nd * (k + 4)) + CHAIN_COST[4] * early * nd)
    if path == "modes":
        return 8.6e-4 + 3.8e-5 * intervals + 3e-10 * nd ** 3 + 8.1e-10 * rows * nd * min(nd, 40)
    if path == "expm":
        return 3e-4 + 1.5e-4 * intervals + 3e-9 * intervals * (n + 1) ** 3 + rows * (2e-6 + 1e-9 * n * n)
    raise ValueError(f"unknown path {path!r}")


def rational_cheaper(model: CompiledModel, rows: int, intervals: int) -> bool:
    """Whether the exact chain path with every row through its rational approximation (no modes:
    ``ExactIntegrator(rational_rows=True)``) is estimated (:func:`estimated_seconds`) no dearer than
    RODAS4 for a run of ``model`` with ``rows`` output rows and ``intervals`` dosing intervals: then
    the default, whose chain path declined its modes, computes the run again there rather than on
    RODAS4 at its own tolerances (:func:`~barrierflow.engine.solve.solve`)."""
    every = rows + intervals  # each row and each interval's end through the approximation
    return (estimated_seconds("chain", model, rows, intervals, early=every, modes=0.0)
            <= estimated_seconds("rodas", model, rows, intervals))


CHAIN_RESCUE = 5.0
"""The default's RODAS4 result that lets a kept quantity through its absolute tolerances
(:func:`~barrierflow.engine.ledger.check_magnitudes`) on a linear chain network is computed again
on the exact chain path where that path's estimated cost (:func:`estimated_seconds`) is at most
this many times RODAS4's (:func:`chain_rescue`), instead of on the robust integrator at scales from
what the run reached, which took 10 to 20 times RODAS4's estimate on the random networks of
tests/benchmarks/chain_sweep.py that met it (rtol 1e-8, 500 to 1,100 steps against 120 to 220 at
the default's tolerances; chain cases 19, 21, 186, 444: 22 to 30 ms against the chain path's 3 to
8 ms)."""


def chain_rescue(model: CompiledModel, rows: int, intervals: int, longest: float, shortest: float,
                 times: np.ndarray, marks: np.ndarray) -> Integrator | None:
    """The exact chain path for a run of ``model`` that the default computed on RODAS4 and whose
    result let a kept quantity through its absolute tolerances, where the default may take that
    path (a linear chain within :data:`EXACT_MEMORY`, :func:`~barrierflow.engine.exact.exact_supported`
    for the longest dosing interval ``longest``, h) and its estimated cost is at most
    :data:`CHAIN_RESCUE` times RODAS4's; else None. Of the path on its modes
    (:data:`~barrierflow.engine.exact.DEFAULT_EXACT`, the cut at the mode time ``shortest``, h) and
    on rational rows (every row and interval end through the rational approximation, no modes to
    compute or decline: where most rows lie before the cut anyway), the one estimated cheaper.
    ``rows``, ``intervals``, ``times`` and ``marks`` (h) as :meth:`AutoIntegrator.resolve` takes
    them."""
    if not _exact_m.exact_supported(model, longest) or _exact_m.exact_plan(model)[0] != "chain":
        return None
    exact = _exact_m.DEFAULT_EXACT
    if exact.working_memory(model) > EXACT_MEMORY:
        return None
    modes, early = _chain_counts(model, 60.0 / shortest, times, marks, shortest, -1.0)
    on_modes = estimated_seconds("chain", model, rows, intervals, shortest=shortest, early=early, modes=modes)
    rational = estimated_seconds("chain", model, rows, intervals, early=rows + intervals, modes=0.0)
    if min(on_modes, rational) > CHAIN_RESCUE * estimated_seconds("rodas", model, rows, intervals):
        return None
    return exact if on_modes < rational else dataclasses.replace(exact, rational_rows=True)


VEHICLE = ScipyIntegrator("Radau", rtol=1e-7, atol=1e-10)
"""What the default runs a model with vehicle terms on (evaporation, solubility limits, samples
without replacement; see :mod:`barrierflow.engine.vehicle`): only the scipy integrators take
them. Radau (order 5, L-stable) steps over the kink where solid appears or dissolves with few
rejected steps."""

EXACT_MEMORY = 256 * 1024**2
"""The default takes an exact path only when its working arrays fit in this many bytes (larger
networks go to the compiled RODAS4 integrator, whose memory grows in proportion to the states)."""


def working_memory(integrator: Integrator, model: CompiledModel) -> int:
    """Bytes of working arrays that ``integrator`` needs for ``model`` (see :meth:`Integrator.working_memory`)."""
    return integrator.working_memory(model)


def resolve_integrator(integrator: Integrator | None, model: CompiledModel, longest: float | None = None,
                       rows: int | None = None, intervals: int | None = None,
                       shortest: float | None = None, times: np.ndarray | None = None,
                       marks: np.ndarray | None = None) -> Integrator:
    """``integrator`` itself, or what an :class:`AutoIntegrator` (the default, for None) picks for ``model``.

    ``longest`` (h) is the longest dosing interval of the run (the exact paths' conditions use it),
    ``rows`` and ``intervals`` its output times and dosing intervals and ``shortest`` (h) the time
    at which the chain's modes are cut (:func:`~barrierflow.engine.exact.mode_time`), ``times``
    and ``marks`` (h) the output times and the bounds of the dosing intervals (the estimates of
    cost).
    """
    return (AutoIntegrator() if integrator is None else integrator).resolve(model, longest, rows, intervals,
                                                                            shortest, times, marks)


def _rodas(**kw) -> Integrator:
    from .rosenbrock import RosenbrockIntegrator

    return RosenbrockIntegrator(**kw)


def _exact(**kw) -> Integrator:
    from .exact import ExactIntegrator

    return ExactIntegrator(**kw)


def _split(**kw) -> Integrator:
    from .split import SplitIntegrator

    return SplitIntegrator(**kw)


INTEGRATORS: dict[str, Callable[..., Integrator]] = {
    "auto": lambda **kw: AutoIntegrator(**kw),
    "rodas": _rodas,
    "exact": _exact,
    "split": _split,
    "bdf": lambda **kw: ScipyIntegrator("BDF", **kw),
    "radau": lambda **kw: ScipyIntegrator("Radau", **kw),
    "lsoda": lambda **kw: ScipyIntegrator("LSODA", **kw),
}
"""The one table mapping integrator names (command line, dashboard) to objects."""


def integrator_from_name(name: str, **options: float) -> Integrator:
    """The integrator object for ``name`` (a key of :data:`INTEGRATORS`), with options."""
    try:
        make = INTEGRATORS[name.lower()]
    except KeyError:
        raise ScenarioError.single("integrator", repr(name), f"must be one of {', '.join(INTEGRATORS)}") from None
    return make(**options)


# The paths the chooser names, as module references (each of them imports this module for the
# contract, so they are bound here, at the end, where every name above is defined; their
# attributes are read at call time).
from . import exact as _exact_m  # noqa: E402
from . import exact_chain as _chain_m  # noqa: E402
from . import rosenbrock as _rodas_m  # noqa: E402
from . import split as _split_m  # noqa: E402
