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
from .integrators import RunStats, resolve_integrator
from .problem import IntervalProblem, IntervalSettings
from .schedule import Event, build_schedule

__all__ = ["Trajectory", "solve"]


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


def solve(
    scenario: Scenario,
    integrator=None,
    grid: Grid | None = None,
    *,
    raise_on_failure: bool = True,
    progress: Callable[[float], None] | None = None,
) -> Trajectory:
    """Simulate ``scenario`` and return the raw :class:`Trajectory`.

    Parameters
    ----------
    scenario : Scenario
        A validated scenario.
    integrator : object, optional
        An integrator object (default :class:`~barrierflow.engine.integrators.AutoIntegrator`: the
        exact solution for a linear model, the compiled RODAS4 integrator otherwise). One with a
        ``solve_schedule`` method runs the whole regimen itself.
    grid : Grid, optional
        Default grid of layers without ``cells``.
    raise_on_failure : bool
        Raise :class:`SolverError` when the integration fails (default); otherwise return the
        partial trajectory with ``status = -1``.
    progress : callable, optional
        Called with the fraction of the run done (0 to 1).

    Raises
    ------
    SolverError
        The message says where (time, dosing interval) and what to change.
    """
    start_clock = _time.perf_counter()
    grid = grid or Grid()
    model = compile_scenario(scenario, grid)
    integrator = resolve_integrator(integrator, model)
    all_events = build_schedule(scenario, model.comp_index)
    duration = scenario.duration
    # events at the very end act on nothing but the last row, which shows their after-state
    events = [e for e in all_events if e.time < duration]
    at_end = [e for e in all_events if e.time >= duration]
    marks = np.array(sorted({e.time for e in events} | {0.0, duration}))
    times = np.unique(_snap(np.array(scenario.output_grid(), dtype=float), marks, 1e-9 * max(duration, 1.0)))
    n_t, n_c = len(times), model.n_comp
    _check_memory(scenario, model, n_t)
    stats = RunStats()

    if hasattr(integrator, "solve_schedule"):
        result = integrator.solve_schedule(model, events, times, duration, stats, progress)
        states, ev_dosed, ev_removed, status, message = result
        if status != 0:
            if raise_on_failure:
                raise SolverError(message, time=float(times[min(len(states), n_t - 1)]),
                                  part=_busiest_part(model, states[-1] if len(states) else model.y0))
            times = times[: len(states)]
        else:
            _apply_at_end(model, at_end, states, ev_dosed, ev_removed)
        return Trajectory(model, times, states, ev_dosed, ev_removed, _present(model, model.y0), tuple(all_events),
                          stats.as_dict(), status, message, integrator.name, _time.perf_counter() - start_clock, grid,
                          _options(integrator))

    states = np.full((n_t, model.n_state), np.nan)
    ev_dosed = np.zeros((n_t, n_c))
    ev_removed = np.zeros((n_t, n_c))

    y = model.y0.copy()
    initial = _present(model, y)
    infusion = np.zeros(n_c)
    clamp = model.held.copy()
    holds = np.zeros(n_c, dtype=np.int64)
    dosed = np.zeros(n_c)
    removed = np.zeros(n_c)
    status, message = 0, "the run finished"
    row = 0
    ei = 0
    for k in range(len(marks) - 1):
        t0, t1 = marks[k], marks[k + 1]
        while ei < len(events) and events[ei].time <= t0:
            apply_event(events[ei], model, y, dosed, removed, clamp, holds, infusion)
            ei += 1
        last = k == len(marks) - 2
        sel_end = row
        while sel_end < n_t and (times[sel_end] < t1 or (last and times[sel_end] <= t1)):
            sel_end += 1
        t_local = times[row:sel_end] - t0
        problem = IntervalProblem(model, IntervalSettings(infusion.copy(), clamp.copy()))
        want = np.append(t_local, t1 - t0)
        try:
            ys = integrator.integrate(problem, y, t1 - t0, want, stats)
        except SolverError as err:
            status = -1
            part = _busiest_part(model, y)
            message = (f"the solution failed at t = {t0 + (err.time or 0.0):.6g} h (dosing interval "
                       f"{k + 1}, from {t0:.6g} h to {t1:.6g} h), near {part}: {err}. Try a tighter "
                       "tolerance, fewer cells in very thin layers, or check for extreme values "
                       "(diffusivity, clearance, partition) in that part of the network.")
            if raise_on_failure:
                raise SolverError(message, time=t0 + (err.time or 0.0), part=part) from None
            break
        if not np.all(np.isfinite(ys)):
            status = -1
            message = (f"the solution became non-finite between {t0:.6g} h and {t1:.6g} h; "
                       "check for extreme parameter values")
            if raise_on_failure:
                raise SolverError(message, time=t0)
            break
        ys[:, : model.n_comp][:, clamp] = y[: model.n_comp][clamp]  # clamped exactly, free of round-off
        stats.intervals += 1
        states[row:sel_end] = ys[:-1]
        ev_dosed[row:sel_end] = dosed
        ev_removed[row:sel_end] = removed
        row = sel_end
        y = ys[-1].copy()
        if progress is not None:
            progress(t1 / duration)
    if status != 0:
        times, states, ev_dosed, ev_removed = times[:row], states[:row], ev_dosed[:row], ev_removed[:row]
    else:
        _apply_at_end(model, at_end, states, ev_dosed, ev_removed)
    return Trajectory(model, times, states, ev_dosed, ev_removed, initial, tuple(all_events), stats.as_dict(),
                      status, message, integrator.name, _time.perf_counter() - start_clock, grid, _options(integrator))


def apply_event(e: Event, model: CompiledModel, y: np.ndarray, dosed: np.ndarray, removed: np.ndarray,
                clamp: np.ndarray, holds: np.ndarray, infusion: np.ndarray) -> None:
    """Apply one instantaneous change to the state ``y`` and the ledger, in place.

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
    """
    p = e.comp
    cap = model.capacity
    if e.kind == "bolus":
        y[p] += e.value / cap[p]
        dosed[p] += e.value
    elif e.kind == "replace":
        removed[p] += cap[p] * y[p]
        y[p] = e.value
        dosed[p] += cap[p] * e.value
    elif e.kind == "remove":
        removed[p] += cap[p] * y[p]
        y[p] = 0.0
    elif e.kind == "hold_start":
        dosed[p] += cap[p] * (e.value - y[p])
        y[p] = e.value
        holds[p] += 1
        clamp[p] = True
    elif e.kind == "hold_end":
        holds[p] -= 1
        clamp[p] = model.held[p] or holds[p] > 0
    elif e.kind == "infusion_start":
        infusion[p] += e.value
    elif e.kind == "infusion_end":
        infusion[p] -= e.value
        if abs(infusion[p]) < 1e-12 * e.value:
            infusion[p] = 0.0
    else:  # pragma: no cover - the schedule makes only the kinds above
        raise ValueError(f"unknown event kind {e.kind!r}")


def _apply_at_end(model: CompiledModel, events: list[Event], states: np.ndarray, ev_dosed: np.ndarray,
                  ev_removed: np.ndarray) -> None:
    """Apply the events that fall exactly at the end of the run to the last row (its after-state)."""
    if not events or not len(states):
        return
    n_c = model.n_comp
    y = states[-1].copy()
    dosed, removed = ev_dosed[-1].copy(), ev_removed[-1].copy()
    clamp, holds, infusion = model.held.copy(), np.zeros(n_c, dtype=np.int64), np.zeros(n_c)
    for e in events:
        apply_event(e, model, y, dosed, removed, clamp, holds, infusion)
    states[-1], ev_dosed[-1], ev_removed[-1] = y, dosed, removed


MEMORY_BUDGET_BYTES = 2 * 1024**3
"""Largest trajectory (output rows x states x 8 bytes) a run may hold in memory."""


def _check_memory(scenario: Scenario, model: CompiledModel, n_rows: int) -> None:
    need = n_rows * model.n_state * 8
    if need > MEMORY_BUDGET_BYTES:
        field = "scenario output_times" if scenario.output_times is not None else "scenario output_step"
        value = (f"{n_rows} output times" if scenario.output_times is not None or scenario.output_step is None
                 else f"{scenario.output_step:g} h")
        raise ScenarioError([Problem(
            field, value,
            f"{n_rows} rows x {model.n_state} states need {need / 1e9:.3g} GB of memory, more than the "
            f"{MEMORY_BUDGET_BYTES / 1e9:.3g} GB allowed (a grid too large for memory); choose a coarser "
            "output step or fewer cells", scenario.source)])


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
