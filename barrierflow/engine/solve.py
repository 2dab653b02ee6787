"""The event loop: integrate interval by interval, apply doses exactly, keep the ledger."""

from __future__ import annotations

import dataclasses
import time as _time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from ..errors import Problem, ScenarioError, SolverError
from ..model import Scenario
from .compiled import CompiledModel, compile_scenario
from .grid import Grid
from .integrators import RunStats, ScipyIntegrator, resolve_integrator, working_memory
from .ledger import check
from .problem import IntervalProblem, IntervalSettings
from .rosenbrock import RosenbrockIntegrator, event_context
from .schedule import Event, build_schedule
from .vehicle import VehicleProblem

__all__ = ["ROBUST", "ROBUST_VEHICLE", "Trajectory", "check_memory", "robust_for", "solve"]


@dataclass(frozen=True, eq=False)
class Trajectory:
    """What the engine computed: states at the output times plus the event ledger.

    Attributes
    ----------
    model : CompiledModel
        The layout of ``states``.
    times : ndarray (n_t,), h
    states : ndarray (n_t, n_state)
        Internal units (see :mod:`barrierflow.engine.compiled`).
    event_dosed : ndarray (n_t, n_comp), mg
        Cumulative amounts added by instantaneous events (bolus, refills, hold starts).
    event_removed : ndarray (n_t, n_comp), mg
        Cumulative amounts taken out by replace and remove.
    initial_amount : float, mg
        Amount present at time 0 before any event.
    events : tuple of Event
        The events applied.
    stats : dict
        Counters (steps, rejected steps, evaluations, intervals).
    status : int
        0 on success, -1 when the run stopped early (the arrays then end where it stopped).
    message : str
    integrator : str
    wall_time : float, s
    grid : Grid
    integrator_options : dict
        The integrator's settings (its dataclass fields), for the record.
    failed_at : float or None, h
        Where a failed run stopped (None when it did not fail).
    event_amounts : ndarray (n_events,), mg
        What each event of ``events`` moved: a bolus its amount, a refill what it put in, a
        remove or a sample what it took (0 for the others).
    volumes : ndarray (n_t, n_comp) or None, mL
        The volume of each compartment at each output time, for a model whose volumes change
        (evaporation, samples without replacement); None when every volume stays the model's
        ``capacity``.
    """

    model: CompiledModel
    times: np.ndarray
    states: np.ndarray
    event_dosed: np.ndarray
    event_removed: np.ndarray
    initial_amount: float
    events: tuple[Event, ...]
    stats: dict
    status: int
    message: str
    integrator: str
    wall_time: float
    grid: Grid
    integrator_options: dict = field(default_factory=dict)
    failed_at: float | None = None
    event_amounts: np.ndarray = field(default_factory=lambda: np.zeros(0))
    volumes: np.ndarray | None = None


def _snap(times: np.ndarray, marks: np.ndarray, tol: float) -> np.ndarray:
    """Move output times within ``tol`` of an event time onto it (rows at events show the after-state)."""
    if len(marks) == 0:
        return times
    idx = np.searchsorted(marks, times)
    out = times.copy()
    for k in (idx - 1, idx):
        ok = (k >= 0) & (k < len(marks))
        kk = np.clip(k, 0, len(marks) - 1)
        close = ok & (np.abs(marks[kk] - times) <= tol)
        out[close] = marks[kk][close]
    return out


def _present(model: CompiledModel, y: np.ndarray) -> float:
    comp = y[: model.n_comp] * model.capacity[: model.n_comp]
    comp = np.where(model.has_volume, comp, 0.0)
    return float(comp.sum() + (y[model.n_comp: model.n_dyn] * model.capacity[model.n_comp: model.n_dyn]).sum())




ROBUST = RosenbrockIntegrator(rtol=1e-8, atol=1e-11)
"""The integrator a run that failed its check (or whose integrator failed) is computed again with."""

ROBUST_VEHICLE = ScipyIntegrator("Radau", rtol=1e-9, atol=1e-12)
"""The same for a model with vehicle terms (evaporation, solubility, shrinking samples), which
only the scipy integrators run."""


def robust_for(model: CompiledModel):
    """The integrator a failed run of ``model`` is computed again with."""
    return ROBUST_VEHICLE if model.vehicle_terms else ROBUST


def solve(
    scenario: Scenario,
    integrator=None,
    grid: Grid | None = None,
    *,
    raise_on_failure: bool = True,
    progress: Callable[[float], None] | None = None,
    fallback: bool = True,
) -> Trajectory:
    """Simulate ``scenario`` and return the raw :class:`Trajectory`, checked.

    Every run passes :func:`~barrierflow.engine.ledger.check` (finite values, a mass balance
    closed to 1e-6, no concentration below zero beyond round-off) before it is returned. A run
    that fails the check, or whose integrator fails, is computed again on the robust integrator
    (:data:`ROBUST`: compiled RODAS4 at rtol 1e-8, atol 1e-11 of each state's scale); the
    trajectory's ``message`` and ``stats["fallbacks"]`` say so. If that run fails too, the
    failure is reported (``SolverError``, or a trajectory with status -1).

    Parameters
    ----------
    scenario : Scenario
        A validated scenario.
    integrator : object, optional
        An integrator object (default :class:`~barrierflow.engine.integrators.AutoIntegrator`: the
        exact solution for a linear model where it is exact, the compiled RODAS4 integrator
        otherwise). One with a ``solve_schedule`` method runs the whole regimen itself.
    grid : Grid, optional
        Default grid of layers without ``cells``.
    raise_on_failure : bool
        Raise :class:`SolverError` when the solution fails (default); otherwise return the
        failed trajectory with ``status = -1`` (partial when the integrator stopped early).
    progress : callable, optional
        Called with the fraction of the run done (0 to 1).
    fallback : bool
        Recompute a failed run on the robust integrator (default True).

    Raises
    ------
    SolverError
        The message says where (time, dosing interval, part of the network) and what to change.
    """
    start_clock = _time.perf_counter()
    grid = grid or Grid()
    model = compile_scenario(scenario, grid)
    all_events = build_schedule(scenario, model.comp_index)
    duration = scenario.duration
    # events at the very end act on nothing but the last row, which shows their after-state
    events = [e for e in all_events if e.time < duration]
    at_end = [e for e in all_events if e.time >= duration]
    marks = np.array(sorted({e.time for e in events} | {0.0, duration}))
    chosen = resolve_integrator(integrator, model, float(np.diff(marks).max()))
    times = np.unique(_snap(np.array(scenario.output_grid(), dtype=float), marks, 1e-9 * max(duration, 1.0)))
    check_memory(scenario, model, len(times), chosen)
    attempts = [chosen]
    robust = robust_for(model)
    if fallback and not _same_integrator(chosen, robust):
        attempts.append(robust)
    notes: list[str] = []
    traj = None
    for k, integ in enumerate(attempts):
        if k:
            check_memory(scenario, model, len(times), integ)
        traj = _run(model, integ, events, at_end, all_events, marks, times, duration, grid,
                    progress if k == 0 else None)
        if traj.status == 0:
            found = check(model, traj.states, traj.event_dosed, traj.event_removed, traj.initial_amount,
                          volumes=traj.volumes)
            if not found:
                stats = {**traj.stats, "fallbacks": k}
                message = traj.message if not notes else f"{traj.message}; " + "; ".join(notes)
                return dataclasses.replace(traj, stats=stats, message=message,
                                           wall_time=_time.perf_counter() - start_clock)
            note = f"the {traj.integrator} result failed its check ({'; '.join(found)})"
        else:
            note = f"the {traj.integrator} run failed ({traj.message})"
        notes.append(note + (f", so it was computed again with {attempts[k + 1].name} at tighter tolerances"
                             if k + 1 < len(attempts) else ""))
    assert traj is not None
    part = _busiest_part(model, traj.states[-1] if len(traj.states) else model.y0)
    message = ("the solution could not be trusted: " + "; ".join(notes) + ". "
               "Check the network for extreme values near that part (a very thin or very fast layer beside a very "
               "slow one, a huge clearance or flow, a partition far from the others); give its layers fewer cells, "
               "or a coarser output step; or run it with another integrator (--integrator radau) to compare.")
    if raise_on_failure:
        when = traj.failed_at if traj.failed_at is not None else float(traj.times[-1]) if len(traj.times) else 0.0
        raise SolverError(message, time=when, part=part)
    stats = {**traj.stats, "fallbacks": len(attempts) - 1}
    return dataclasses.replace(traj, status=-1, message=message, stats=stats,
                               wall_time=_time.perf_counter() - start_clock)


def _same_integrator(a, b) -> bool:
    return type(a) is type(b) and _options(a) == _options(b)


def _run(model: CompiledModel, integrator, events: list[Event], at_end: list[Event], all_events: list[Event],
         marks: np.ndarray, times: np.ndarray, duration: float, grid: Grid,
         progress: Callable[[float], None] | None) -> Trajectory:
    """One run on one integrator: the whole regimen; status -1 (and the rows reached) on failure."""
    start_clock = _time.perf_counter()
    n_t, n_c = len(times), model.n_comp
    stats = RunStats()
    live = Live(model, len(all_events))
    if hasattr(integrator, "solve_schedule"):
        states, ev_dosed, ev_removed, status, message, moved = integrator.solve_schedule(
            model, events, times, duration, stats, progress)
        live.moved[:len(events)] = moved
        failed_at = None
        if status != 0:
            failed_at = float(times[min(len(states), n_t - 1)])
            times = times[: len(states)]
        else:
            _apply_at_end(model, at_end, states, ev_dosed, ev_removed, live, len(events))
        return Trajectory(model, times, states, ev_dosed, ev_removed, _present(model, model.y0), tuple(all_events),
                          stats.as_dict(), status, message, integrator.name, _time.perf_counter() - start_clock, grid,
                          _options(integrator), failed_at, live.moved.copy())

    states = np.full((n_t, model.n_state), np.nan)
    ev_dosed = np.zeros((n_t, n_c))
    ev_removed = np.zeros((n_t, n_c))
    volumes = np.full((n_t, n_c), np.nan) if model.vehicle_terms else None

    y = model.y0.copy()
    initial = _present(model, y)
    infusion = np.zeros(n_c)
    clamp = model.held.copy()
    holds = np.zeros(n_c, dtype=np.int64)
    dosed = np.zeros(n_c)
    removed = np.zeros(n_c)
    status, message = 0, "the run finished"
    failed_at = None
    row = 0
    ei = 0
    for k in range(len(marks) - 1):
        t0, t1 = marks[k], marks[k + 1]
        while ei < len(events) and events[ei].time <= t0:
            apply_event(events[ei], model, y, dosed, removed, clamp, holds, infusion, live, ei)
            ei += 1
        last = k == len(marks) - 2
        sel_end = row
        while sel_end < n_t and (times[sel_end] < t1 or (last and times[sel_end] <= t1)):
            sel_end += 1
        t_local = times[row:sel_end] - t0
        settings = IntervalSettings(infusion.copy(), clamp.copy())
        if model.vehicle_terms:
            problem = VehicleProblem(live.model(), settings, live.evaporation())
        else:
            problem = IntervalProblem(live.model(), settings)
        want = np.append(t_local, t1 - t0)
        try:
            ys = integrator.integrate(problem, y, t1 - t0, want, stats)
        except SolverError as err:
            status = -1
            failed_at = float(t0 + (err.time or 0.0))
            part = _busiest_part(model, y)
            message = (f"the solution failed at t = {t0 + (err.time or 0.0):.6g} h (dosing interval "
                       f"{k + 1}, from {t0:.6g} h to {t1:.6g} h), near {part}: {err}. Try a tighter "
                       "tolerance, fewer cells in very thin layers, or check for extreme values "
                       "(diffusivity, clearance, partition) in that part of the network.")
            break
        if not np.all(np.isfinite(ys)):
            status = -1
            failed_at = float(t0)
            message = (f"the solution became non-finite between {t0:.6g} h and {t1:.6g} h; "
                       "check for extreme parameter values")
            break
        ys[:, : model.n_comp][:, clamp] = y[: model.n_comp][clamp]  # clamped exactly, free of round-off
        stats.intervals += 1
        states[row:sel_end] = ys[:-1]
        ev_dosed[row:sel_end] = dosed
        ev_removed[row:sel_end] = removed
        if volumes is not None:
            volumes[row:sel_end] = live.volumes_at(want[:-1])
        live.advance(t1 - t0)
        row = sel_end
        y = ys[-1].copy()
        if progress is not None:
            progress(t1 / duration)
    if status != 0:
        times, states, ev_dosed, ev_removed = times[:row], states[:row], ev_dosed[:row], ev_removed[:row]
        volumes = volumes[:row] if volumes is not None else None
    else:
        _apply_at_end(model, at_end, states, ev_dosed, ev_removed, live, len(events))
        if volumes is not None and len(states):
            volumes[-1] = live.cap[:n_c]
    return Trajectory(model, times, states, ev_dosed, ev_removed, initial, tuple(all_events), stats.as_dict(),
                      status, message, integrator.name, _time.perf_counter() - start_clock, grid, _options(integrator),
                      failed_at, live.moved.copy(), volumes)


class Live:
    """What the events of a run change besides the state, for the event loop in Python.

    The volumes (samples without replacement shrink one, evaporation between events, a refill
    restores an evaporated vehicle), the link coefficients (a remove that ends contact closes a
    compartment's barrier faces, a new application opens them; as in
    :func:`~barrierflow.engine.rosenbrock.event_context`), which compartments still evaporate,
    and what each event moved.
    """

    def __init__(self, model: CompiledModel, n_events: int):
        self.base = model
        self.cap = model.capacity.copy()
        self.margs, self.ctx = event_context(model, n_events)
        self.evaporating = model.evap_rate > 0
        self._models: dict[bytes, CompiledModel] = {}

    @property
    def moved(self) -> np.ndarray:
        """What each event moved, mg."""
        return self.ctx[7]

    def model(self) -> CompiledModel:
        """The model with the volumes and links as they are now."""
        closed = self.ctx[6]
        if not closed.any() and np.array_equal(self.cap, self.base.capacity):
            return self.base
        key = self.cap.tobytes() + closed.tobytes()
        m = self._models.get(key)
        if m is None:
            la, lb, lc, ld = (a.copy() for a in self.margs[6:10])
            m = dataclasses.replace(self.base, capacity=self.cap.copy(), link_a=la, link_b=lb, link_c=lc, link_d=ld)
            self._models = {key: m}  # volumes rarely repeat: keep the last one only
        return m

    def evaporation(self) -> np.ndarray:
        """The rate at which each volume shrinks in the coming interval, mL/h."""
        return np.where(self.evaporating, self.base.evap_rate, 0.0)

    def volumes_at(self, tau: np.ndarray) -> np.ndarray:
        """The compartments' volumes at local times ``tau`` of the coming interval, mL (n, n_comp)."""
        nc = self.base.n_comp
        return self.cap[None, :nc] - self.evaporation()[None, :] * np.asarray(tau, dtype=float)[:, None]

    def advance(self, dt: float) -> None:
        """Move the evaporating volumes on by ``dt`` hours (never below the residue)."""
        nc = self.base.n_comp
        e = self.evaporation()
        self.cap[:nc] = np.where(e > 0, np.maximum(self.cap[:nc] - e * dt, self.base.residual), self.cap[:nc])


def apply_event(e: Event, model: CompiledModel, y: np.ndarray, dosed: np.ndarray, removed: np.ndarray,
                clamp: np.ndarray, holds: np.ndarray, infusion: np.ndarray, live: Live | None = None,
                index: int | None = None) -> None:
    """Apply one instantaneous change to the state ``y`` and the ledger, in place.

    The rules of the compiled :func:`~barrierflow.engine.rosenbrock.apply_events`, and those of
    the models that only this loop runs: a sample takes its aliquot at the dissolved
    concentration; one without replacement shrinks the volume; a refill restores an evaporating
    vehicle's full volume; a ``dry`` event stops its evaporation at the residue.

    Parameters
    ----------
    e : Event
    model : CompiledModel
    y : ndarray
        The full state (concentrations in mg/mL).
    dosed, removed : ndarray, mg
        Cumulative amounts added and taken out by events, per compartment.
    clamp : ndarray of bool
        Compartments held constant in the coming interval.
    holds : ndarray of int
        Number of running hold doses per compartment.
    infusion : ndarray, mg/h
        Running infusion rate per compartment.
    live : Live, optional
        The volumes, links and ledger of moved amounts the run carries (a new one: the model's).
    index : int, optional
        The position of ``e`` among the run's events (where what it moved is booked).
    """
    live = live or Live(model, 1 if index is None else index + 1)
    p = e.comp
    cap = live.cap
    v = e.value
    moved = 0.0
    kind = e.kind
    if kind == "bolus":
        y[p] += v / cap[p]
        dosed[p] += v
        moved = v
    elif kind == "replace":
        removed[p] += cap[p] * y[p]
        if live.base.evap_rate[p] > 0:  # a fresh vehicle: the full volume again
            cap[p] = live.base.capacity[p]
            live.evaporating[p] = True
        y[p] = v
        dosed[p] += cap[p] * v
        moved = cap[p] * v
    elif kind == "remove":
        moved = v * cap[p] * y[p]
        removed[p] += moved
        y[p] = 0.0 if v >= 1.0 else y[p] * (1.0 - v)
    elif kind in ("sample", "sample_keep"):
        moved = v * min(y[p], model.solubility[p])  # the aliquot is solution
        amount = cap[p] * y[p] - moved
        if kind == "sample_keep":
            cap[p] -= v
        y[p] = amount / cap[p]
        y[model.q_sampled + p] += moved
    elif kind == "hold_start":
        dosed[p] += cap[p] * (v - y[p])
        y[p] = v
        holds[p] += 1
        clamp[p] = True
    elif kind == "hold_end":
        holds[p] -= 1
        clamp[p] = model.held[p] or holds[p] > 0
    elif kind == "infusion_start":
        infusion[p] += v
    elif kind == "infusion_end":
        infusion[p] -= v
        if abs(infusion[p]) < 1e-12 * v:
            infusion[p] = 0.0
    elif kind == "dry":
        cap[p] = live.base.residual[p]
        live.evaporating[p] = False
    elif kind != "close":  # pragma: no cover - the schedule makes only the kinds above
        raise ValueError(f"unknown event kind {kind!r}")
    closed = live.ctx[6]
    if kind == "close" or (closed[p] and kind in ("bolus", "replace", "hold_start", "infusion_start")):
        closed[p] = kind == "close"
        _contact(p, live)
    if index is not None:
        live.moved[index] = moved


def _contact(p: int, live: Live) -> None:
    """The faces of compartment ``p`` as :func:`~barrierflow.engine.rosenbrock.apply_events` sets them."""
    m = live.base
    face_ptr, face_link, la0, lb0, lc0, ld0, closed, _ = live.ctx
    coef = live.margs[6:10]
    for j in face_link[face_ptr[p]:face_ptr[p + 1]]:
        other = m.link_q[j] if m.link_p[j] == p else m.link_p[j]
        off = closed[p] or (other < m.n_comp and closed[other])
        for arr, orig in zip(coef, (la0, lb0, lc0, ld0), strict=True):
            arr[j] = 0.0 if off else orig[j]


def _apply_at_end(model: CompiledModel, events: list[Event], states: np.ndarray, ev_dosed: np.ndarray,
                  ev_removed: np.ndarray, live: Live | None = None, first: int = 0) -> None:
    """Apply the events that fall exactly at the end of the run to the last row (its after-state).

    ``live`` carries the run's volumes and books what the events moved (``first``: the position
    of the first of ``events`` among the run's events).
    """
    if not events or not len(states):
        return
    n_c = model.n_comp
    y = states[-1].copy()
    dosed, removed = ev_dosed[-1].copy(), ev_removed[-1].copy()
    clamp, holds, infusion = model.held.copy(), np.zeros(n_c, dtype=np.int64), np.zeros(n_c)
    for k, e in enumerate(events):
        apply_event(e, model, y, dosed, removed, clamp, holds, infusion, live, first + k if live else None)
    states[-1], ev_dosed[-1], ev_removed[-1] = y, dosed, removed


MEMORY_BUDGET_BYTES = 2 * 1024**3
"""Largest memory a run may take: the trajectory (output rows x states x 8 bytes) and the chosen
integrator's working arrays (:func:`~barrierflow.engine.integrators.working_memory`)."""


def check_memory(scenario: Scenario, model: CompiledModel, n_rows: int, integrator) -> None:
    """Refuse, before computing, a run whose memory would exceed :data:`MEMORY_BUDGET_BYTES`.

    Raises
    ------
    ScenarioError
        Naming the output times or the grid, what they need and the limit.
    """
    traj = n_rows * (model.n_state + 2 * model.n_comp) * 8
    work = working_memory(integrator, model)
    if traj + work <= MEMORY_BUDGET_BYTES:
        return
    limit = f"more than the {MEMORY_BUDGET_BYTES / 1e9:.3g} GB allowed"
    if traj >= work:
        field = "scenario output_times" if scenario.output_times is not None else "scenario output_step"
        value = (f"{n_rows} output times" if scenario.output_times is not None or scenario.output_step is None
                 else f"{scenario.output_step:g} h")
        raise ScenarioError([Problem(
            field, value,
            f"{n_rows} rows x {model.n_state} states need {(traj + work) / 1e9:.3g} GB of memory, {limit} "
            "(a grid too large for memory); choose a coarser output step or fewer cells", scenario.source)])
    raise ScenarioError([Problem(
        "barrier layer cells", f"{model.n_cells} cells in all",
        f"the {integrator.name} integrator needs {work / 1e9:.3g} GB of memory for {model.n_state} states, {limit} "
        "(a grid too large for memory); give the layers fewer cells, or use the rodas integrator, whose memory "
        "grows only in proportion to the cells", scenario.source)])


def _options(integrator) -> dict:
    return dataclasses.asdict(integrator) if dataclasses.is_dataclass(integrator) else {}


def _busiest_part(model: CompiledModel, y: np.ndarray) -> str:
    """The compartment or barrier holding the largest scaled state (a hint for messages)."""
    z = np.abs(y[: model.n_dyn]) / model.scale[: model.n_dyn]
    i = int(np.argmax(z)) if len(z) else 0
    if i < model.n_comp:
        return f"compartment '{model.comp_ids[i]}'"
    for g in model.grids:
        if g.start <= i < g.stop:
            return f"barrier '{g.barrier_id}'"
    return "the network"
