"""The driver of a run: compile, pick the integrator, run the plan, check the result.

:func:`solve` is the one entry of the engine: it compiles the scenario, lists its events,
resolves the integrator (:mod:`barrierflow.engine.integrators` holds the contract every
integrator follows), runs it on a :class:`~barrierflow.engine.integrators.RunPlan`, applies the
events at the very end of the run to the last row, and checks the result
(:func:`~barrierflow.engine.ledger.check`, then
:func:`~barrierflow.engine.ledger.check_magnitudes`), computing a failed run again on :data:`ROBUST`.
"""

from __future__ import annotations

import dataclasses
import time as _time
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from numba import njit

from ..errors import Problem, ScenarioError, SolverError
from ..model import Scenario
from . import exact as _exact_m
from .arrays import working_copy
from .compiled import CompiledModel, compile_scenario
from .exact import ExactIntegrator, _mode_time, exact_balance_findings, exact_plan
from .exported import Rows
from .grid import DEFAULT_GRID, Grid
from .integrators import (
    EXACT_MEMORY,
    AutoIntegrator,
    Integrator,
    RunPlan,
    ScipyIntegrator,
    chain_rescue,
    rational_cheaper,
    resolve_integrator,
)
from .ledger import (
    busiest_part,
    check_magnitudes,
    check_rows,
    exact_rows_checks,
    observed_scale,
    present_amount,
    rows_relative_error,
)
from .rosenbrock import FLUX_FINDING, RosenbrockIntegrator
from .schedule import Event, apply_events, build_schedule, encode_events, start_events

__all__ = ["ROBUST", "ROBUST_VEHICLE", "Trajectory", "check_memory", "robust_for", "solve"]


@dataclass(frozen=True, eq=False)
class Trajectory:
    """What the engine computed: what a result exports at the output times, the event ledger,
    and every state on request.

    Attributes
    ----------
    model : CompiledModel
        The layout of ``states``.
    times : ndarray (n_t,), h
    rows : Rows
        The exported columns at each output time, the barriers' contents and the guard over
        every state (:class:`~barrierflow.engine.exported.Rows`); :meth:`column` reads them.
    states : ndarray (n_t, n_state)
        Every state, internal units (see :mod:`barrierflow.engine.compiled`): kept by the paths
        that compute them anyway, otherwise computed when first asked for by running the same
        path again with every state kept (deterministic: the same numbers as the rows).
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
    kept : ndarray (n_t, n_state) or None
        The full states when the path kept them.
    recompute : FullStates or None
        How to compute the full states when they were not kept.
    """

    model: CompiledModel
    times: np.ndarray
    rows: Rows
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
    kept: np.ndarray | None = None
    recompute: FullStates | None = None

    @cached_property
    def states(self) -> np.ndarray:
        """Every state at every output time (n_t, n_state), internal units (see the class docstring)."""
        if self.kept is not None:
            return self.kept
        if self.recompute is None:
            raise SolverError("the full states of this run were not kept and cannot be computed again")
        return self.recompute(len(self.times))

    def column(self, i: int) -> np.ndarray:
        """State ``i`` at every output time (from the rows when exported, else from :attr:`states`)."""
        col = self.rows.column(i)
        return col if col is not None else self.states[:, i]


@dataclass(frozen=True, eq=False)
class FullStates:
    """Computes a run's full states again: the same integrator on the same plan with every state
    kept (``RunPlan.full``), and the events at the very end applied to the last row, as the run
    that kept only its rows did. Deterministic, so the numbers are those of the rows."""

    model: CompiledModel
    integrator: Integrator
    plan: RunPlan
    at_end: tuple[Event, ...]

    def __call__(self, n_rows: int) -> np.ndarray:
        """The states of the first ``n_rows`` output rows (those the run reached)."""
        out = self.integrator.run(dataclasses.replace(self.plan, progress=None, full=True))
        states = out.states[:n_rows]
        if self.at_end and out.status == 0 and len(states) == len(self.plan.times):
            _apply_at_end(self.model, list(self.at_end), states, out.event_dosed.copy(), out.event_removed.copy(),
                          out.volumes)
        return states


def _snap(times: np.ndarray, marks: np.ndarray, tol: float, merge: bool = False) -> np.ndarray:
    """Move output times within ``tol`` of an event time onto it (rows at events show the after-state);
    with ``merge``, times snapped onto one event merge."""
    if len(marks) == 0:
        return times
    out, increasing = _snapped(np.ascontiguousarray(times, dtype=np.float64),
                               np.ascontiguousarray(marks, dtype=np.float64), float(tol))
    return out if increasing or not merge else np.unique(out)


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def _snapped(times, marks, tol):
    """:func:`_snap` in one compiled pass (``marks`` not empty): the times, and whether they
    increase strictly (else some merged)."""
    out = times.copy()
    n_m = marks.shape[0]
    last = n_m - 1
    increasing = True
    idx = 0
    for i in range(times.shape[0]):
        t = times[i]
        # np.searchsorted(marks, t): the first mark not below t; on sorted times (the usual grid) a
        # pointer that moves forward, otherwise a search from the start
        if i and t < times[i - 1]:
            idx = 0
        while idx < n_m and marks[idx] < t:
            idx += 1
        # the event before, then the one after (which wins when both are that close); an index off
        # either end names the end event, which is then the other neighbour too
        before = marks[max(idx - 1, 0)]
        if abs(before - t) <= tol:
            out[i] = before
        after = marks[min(idx, last)]
        if abs(after - t) <= tol:
            out[i] = after
        if i and not out[i] > out[i - 1]:
            increasing = False
    return out, increasing






@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def _set_up(times, marks, tol, rr):
    """A run's set-up from its output times and its interval bounds ``marks`` (two or more,
    increasing): the times snapped onto the events (:func:`_snapped`, with ``tol``), whether they
    still increase, the chain path's mode time of the snapped times
    (:func:`~barrierflow.engine.exact.mode_time`, ``rr`` its rational rows; 0 where they do not
    increase: they merge first) and the longest interval, h (:attr:`RunPlan.longest`)."""
    out, increasing = _snapped(times, marks, tol)
    cut = _mode_time(out, marks, rr) if increasing else 0.0
    longest = marks[1] - marks[0] if marks.shape[0] > 1 else 0.0
    for k in range(1, marks.shape[0] - 1):
        longest = max(longest, marks[k + 1] - marks[k])
    return out, increasing, cut, longest


ROBUST = RosenbrockIntegrator(rtol=1e-8, atol=1e-11)
"""The integrator a run that failed its check (or whose integrator failed) is computed again with."""

ROBUST_VEHICLE = ScipyIntegrator("Radau", rtol=1e-9, atol=1e-12)
"""The same for a model with vehicle terms (evaporation, solubility, shrinking samples), which
only the scipy integrators run."""


def robust_for(model: CompiledModel) -> Integrator:
    """The integrator a failed run of ``model`` is computed again with."""
    return ROBUST_VEHICLE if model.vehicle_terms else ROBUST


def solve(
    scenario: Scenario,
    integrator: Integrator | None = None,
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
    trajectory's ``message`` and ``stats["fallbacks"]`` say so. A run that passes it then passes
    :func:`~barrierflow.engine.ledger.check_magnitudes` (no kept quantity far below the scale its
    absolute tolerance came from, no one-way cumulative amount below zero); one that does not is
    computed again on the robust integrator with scales from the magnitudes it reached
    (:func:`~barrierflow.engine.ledger.observed_scale`), at most :data:`MAX_RESCALES` times; the
    default's RODAS4 run on a linear chain network with such a finding, or whose flux estimate
    failed, goes first to the exact chain path where :func:`~barrierflow.engine.integrators.chain_rescue`
    estimates it cheap enough, then, if that fails its check or declines, there. The
    default's chain path whose result fails its check goes first to the chain path on rational
    rows; an exact path the default chose that declines goes there where
    :func:`~barrierflow.engine.integrators.rational_cheaper`, else to RODAS4 at the default's
    tolerances; then to the robust integrator. If
    the last run fails too, the failure is reported (``SolverError``, or a trajectory with status
    -1).

    Parameters
    ----------
    scenario : Scenario
        A validated scenario.
    integrator : Integrator, optional
        Default :class:`~barrierflow.engine.integrators.AutoIntegrator`: the exact solution for a
        linear model where it is exact, the compiled RODAS4 integrator otherwise.
    grid : Grid, optional
        Default grid of layers without ``cells``.
    raise_on_failure : bool
        Raise :class:`SolverError` when the solution fails (default); otherwise return the
        failed trajectory with ``status = -1`` (partial when the integrator stopped early).
    progress : callable, optional
        Called with the fraction of the run done (0 to 1).
    fallback : bool
        Recompute a failed run on the robust integrator (default True). Without (tests of one
        path), a run that fails :func:`~barrierflow.engine.ledger.check` is refused and
        :func:`~barrierflow.engine.ledger.check_magnitudes`, whose remedy is that second run, is
        not applied.

    Raises
    ------
    SolverError
        The message says where (time, dosing interval, part of the network) and what to change.
    """
    start_clock = _time.perf_counter()
    grid = grid or DEFAULT_GRID
    model = compile_scenario(scenario, grid)
    all_events = build_schedule(scenario, model.comp_index)
    duration = scenario.duration
    # events at the very end act on nothing but the last row, which shows their after-state
    events = [e for e in all_events if e.time < duration]
    at_end = [e for e in all_events if e.time >= duration]
    marks = np.array(sorted({e.time for e in events} | {0.0, duration}), dtype=np.float64)
    # the output times snapped onto the events, the chain's mode time and the longest dosing
    # interval in one compiled pass (the rules of _snap, exact.mode_time and RunPlan.longest)
    times, increasing, cut, longest = _set_up(scenario.output_array(), marks, 1e-9 * max(duration, 1.0),
                                              np.int64(_exact_m.RATIONAL_ROWS))
    if not increasing:  # times snapped onto one event merge
        times = np.unique(times)
    plan = RunPlan(model, encode_events(events), marks, times, progress)
    if increasing:
        plan.__dict__["mode_time"] = cut  # what RunPlan.mode_time computes from these times
    chosen = resolve_integrator(integrator, model, longest, len(times), len(marks) - 1, plan.mode_time, times,
                                marks)
    check_memory(scenario, model, len(times), chosen)
    robust = robust_for(model)
    notes: list[str] = []
    traj = None
    integ, run_model, rescaled = chosen, model, 0
    plain_robust = _same_integrator(chosen, robust)  # the robust integrator on the model's own scales tried
    # RODAS4 at the default's tolerances, where the default's exact path declined (None: taken, or
    # an integrator asked for by name)
    default_rodas = _default_rodas(integrator) if isinstance(chosen, ExactIntegrator) else None
    # the default's RODAS4 run whose small quantity failed its check may go to the exact chain path
    # (integrators.chain_rescue); rescued_from holds that RODAS4 run while the chain path's run is computed
    rescuable = (isinstance(chosen, RosenbrockIntegrator) and _default_rodas(integrator) is not None
                 and len(times) * (model.n_state + 2 * model.n_comp) * 8 + EXACT_MEMORY <= MEMORY_BUDGET_BYTES)
    rescued_from = None
    # the run, (the chain path on rational rows,) (the default's RODAS4,) robust, rescaled
    for k in range(4 + MAX_RESCALES):
        if k:
            check_memory(scenario, model, len(times), integ)
        run_plan = plan if k == 0 else dataclasses.replace(plan, model=run_model, progress=None)
        traj = _run(run_model, integ, run_plan, at_end, all_events, grid)
        small = exact_off = flux_off = False
        if traj.status == 0:
            exact = isinstance(integ, ExactIntegrator) and len(traj.rows.cols) > 0
            # an exact run's ledger and the signs of its rows in one compiled pass where it can
            both = exact_rows_checks(run_model, traj.rows, traj.event_dosed, traj.event_removed,
                                     traj.initial_amount) if exact and traj.volumes is None else None
            signs = both[1] if both is not None else None
            rel = both[0] if both is not None else rows_relative_error(
                run_model, traj.rows, traj.event_dosed, traj.event_removed, traj.initial_amount,
                traj.volumes) if exact else None
            found = check_rows(run_model, traj.rows, traj.event_dosed, traj.event_removed, traj.initial_amount,
                               traj.volumes, lambda traj=traj: traj.states, rel)
            if not found and exact:
                found = exact_balance_findings(rel)
                exact_off = bool(found)
            if not found and fallback:  # its remedy is the second attempt
                found = check_magnitudes(run_model, traj.rows, traj.initial_amount, traj.event_dosed,
                                         traj.event_removed, getattr(integ, "atol", None), duration,
                                         rescaled < MAX_RESCALES, signs)
                small = bool(found)
            if not found:
                stats = {**traj.stats, "fallbacks": k}
                message = traj.message if not notes else f"{traj.message}; " + "; ".join(notes)
                return _amended(traj, model=model, stats=stats, message=message,
                                wall_time=_time.perf_counter() - start_clock)
            note = f"the {traj.integrator} result failed its check ({'; '.join(found)})"
        else:
            note = f"the {traj.integrator} run failed ({traj.message})"
            flux_off = FLUX_FINDING in traj.message and len(traj.times) == len(times)
        nxt = None
        # (not on the exact chain path, which has no tolerances but rounds at about 1e-7 of each
        # state's scale: no better for a quantity far below its scale. Extreme patch 806 of the
        # adversarial sweep, its eliminated amount flagged at 5.64 times its promise, came back
        # from the chain path 52.6 times the contract off scipy Radau; RODAS4 rescaled refuses it,
        # and computes within the contract the 11 sweep runs the chain path got right)
        on_modes = (isinstance(integ, ExactIntegrator) and not integ.rational_rows
                    and exact_plan(model, integ.method)[0] == "chain")  # the chain path, by its modes
        declined = traj.status != 0 and isinstance(integ, ExactIntegrator)
        if rescued_from is not None and rescued_from.status != 0:
            # the exact chain path after RODAS4's flux estimate failed, and it failed its own check
            # or declined: the robust integrator, where that failure sends it
            nxt = (robust, model, "at tighter tolerances")
            plain_robust = True
            rescued_from = None
        elif rescued_from is not None:
            # the exact chain path after RODAS4's finding failed its own check or declined: the run
            # goes where that finding sends it, at scales from what the RODAS4 run reached
            nxt = (robust, _at_reached_scales(model, rescued_from),
                   "at tighter tolerances, with absolute tolerances from the magnitudes the rodas4 run reached")
            rescued_from = None
            rescaled += 1
        elif (k == 0 and fallback and rescuable and rescaled < MAX_RESCALES and (small or flux_off)
              and (rescue := chain_rescue(model, len(times), len(marks) - 1, longest, plan.mode_time, times,
                                          marks)) is not None):
            # a quantity far below its scale, or a flux RODAS4 could not resolve, on a linear chain
            # network: the exact chain path, which has no tolerances (its rounding shows in its
            # ledger, exact.EXACT_BALANCE_LIMIT), where its estimate is at most
            # integrators.CHAIN_RESCUE times RODAS4's: the robust integrator took 10 to 20 times
            # RODAS4's estimate on the random networks of tests/benchmarks/chain_sweep.py that met
            # this (chain cases 19, 21, 186, 257, 305, 469, ...)
            nxt = (rescue, model, "on the exact chain path, which has no tolerances" + (
                ", every row through the rational approximation of the exponential" if rescue.rational_rows else ""))
            rescued_from = traj
        elif on_modes and (exact_off or (fallback and not small and default_rodas is not None and (
                not declined or rational_cheaper(model, len(times), len(marks) - 1)))):
            # the chain path again, every row through the rational approximation (not the modes):
            # its ledger beyond the exact limit; or the default's chain path declined its modes (the
            # first where estimated no dearer than the default's RODAS4) or its result failed its check
            nxt = (dataclasses.replace(integ, rational_rows=True), run_model,
                   "with every row through the rational approximation of the exponential")
        elif fallback and default_rodas is not None and declined:
            # the default's exact path declined (a clean refusal, no result): the run goes where the
            # default goes without it, checked the same way. Not after a result that failed its
            # check: that marks a network hard for every path (extreme patch 1882 of the sweep, its
            # chain ledger off on both kinds of rows, was 1.35 times the contract off Radau on
            # RODAS4 at the default's tolerances, 7e-3 on the robust integrator)
            nxt = (default_rodas, model, "at the default's tolerances")
            default_rodas = None
        elif fallback and small and rescaled < MAX_RESCALES:
            # absolute tolerances from what the run reached, on the robust integrator
            nxt = (robust, _at_reached_scales(run_model, traj),
                   "at tighter tolerances, with absolute tolerances from the magnitudes it reached")
            rescaled += 1
        elif fallback and not small and not plain_robust:
            nxt = (robust, model, "at tighter tolerances")
            plain_robust = True
        elif fallback and flux_off and rescaled < MAX_RESCALES:
            # a flux still unresolved at the robust tolerances: its face states' scales far above
            # what they reached (extreme patch 217 of the adversarial sweep, a face cell holding
            # 2e-5 of its scale after a bolus), so at scales from what the run reached
            nxt = (robust, _at_reached_scales(run_model, traj),
                   "with absolute tolerances from the magnitudes it reached")
            rescaled += 1
        notes.append(note + (f", so it was computed again with {nxt[0].name} {nxt[2]}" if nxt else ""))
        if nxt is None:
            break
        integ, run_model = nxt[0], nxt[1]
    assert traj is not None
    part = busiest_part(model, traj.states[-1] if len(traj.times) else model.y0)
    message = ("the solution could not be trusted: " + "; ".join(notes) + ". "
               "Check the network for extreme values near that part (a very thin or very fast layer beside a very "
               "slow one, a huge clearance or flow, a partition far from the others); give its layers fewer cells, "
               "or a coarser output step; or run it with another integrator (--integrator radau) to compare.")
    if raise_on_failure:
        when = traj.failed_at if traj.failed_at is not None else float(traj.times[-1]) if len(traj.times) else 0.0
        raise SolverError(message, time=when, part=part)
    stats = {**traj.stats, "fallbacks": len(notes) - 1}
    return dataclasses.replace(traj, status=-1, message=message, stats=stats,
                               wall_time=_time.perf_counter() - start_clock)


MAX_RESCALES = 2
"""How many times a run whose absolute tolerances let a small quantity through
(:func:`~barrierflow.engine.ledger.check_magnitudes`) is computed again with scales from the
magnitudes it reached (:func:`~barrierflow.engine.ledger.observed_scale`) before it is refused."""


def _amended(traj: Trajectory, **changes) -> Trajectory:
    """``traj`` with the fields ``changes`` changed: :func:`dataclasses.replace` without its
    machinery per field (a copy of the instance's dictionary; a Trajectory has no ``__post_init__``),
    about 10 us less on a cold run."""
    new = object.__new__(type(traj))
    d = new.__dict__
    d.update(traj.__dict__)
    d.update(changes)
    return new


def _at_reached_scales(model: CompiledModel, traj: Trajectory) -> CompiledModel:
    """``model`` with the scales of its absolute tolerances from the magnitudes ``traj`` reached
    (:func:`~barrierflow.engine.ledger.observed_scale`)."""
    scale = observed_scale(model, traj.states, traj.initial_amount, traj.event_dosed, traj.event_removed)
    return model.with_arrays(model.arrays._replace(scale=scale))


def _default_rodas(integrator: Integrator | None) -> Integrator | None:
    """RODAS4 at the tolerances of the default (``integrator`` None or an
    :class:`~barrierflow.engine.integrators.AutoIntegrator`), what it runs a linear network on
    when the exact path does not serve; None for an integrator asked for by name (its failure goes
    to the robust integrator, as any other's)."""
    if integrator is None:
        return RosenbrockIntegrator(rtol=AutoIntegrator.rtol, atol=AutoIntegrator.atol)
    if isinstance(integrator, AutoIntegrator):
        return RosenbrockIntegrator(rtol=integrator.rtol, atol=integrator.atol)
    return None


def _same_integrator(a: Integrator, b: Integrator) -> bool:
    return type(a) is type(b) and a.options == b.options


def _run(model: CompiledModel, integrator: Integrator, plan: RunPlan, at_end: list[Event], all_events: list[Event],
         grid: Grid) -> Trajectory:
    """One run of ``plan`` (on ``model``) on one integrator; status -1 (and the rows reached) on failure."""
    start_clock = _time.perf_counter()
    times = plan.times
    out = integrator.run(plan)
    states, ev_dosed, ev_removed, volumes = out.states, out.event_dosed, out.event_removed, out.volumes
    n_rows = out.n_rows
    failed_at = None
    amounts = np.concatenate([out.event_amounts, np.zeros(len(at_end))]) if at_end else out.event_amounts
    if out.status != 0:
        failed_at = out.failed_at if out.failed_at is not None else float(times[min(n_rows, len(times) - 1)])
        times = times[:n_rows]
    elif at_end and n_rows:
        last = states if states is not None else out.last[None, :]  # the last row, changed in place
        amounts[len(out.event_amounts):] = _apply_at_end(model, at_end, last, ev_dosed, ev_removed, volumes)
    if states is not None:
        rows, recompute = Rows.from_states(model, states), None
    else:
        rows = out.rows.finished(model, out.last) if out.status == 0 and n_rows else out.rows
        recompute = FullStates(model, integrator, plan, tuple(at_end))
    return _trajectory(model, times, rows, ev_dosed, ev_removed, present_amount(model, model.y0), tuple(all_events),
                       out.stats.as_dict(), out.status, out.message, integrator.name,
                       _time.perf_counter() - start_clock, grid, integrator.options, failed_at, amounts, volumes,
                       states, recompute)


_TRAJECTORY_FIELDS = tuple(f.name for f in dataclasses.fields(Trajectory))


def _trajectory(*values) -> Trajectory:
    """``Trajectory(*values)`` (every field, in order) without a frozen dataclass's setattr call per
    field (19 of them: some 6 us of a cold run), as :func:`_amended` does."""
    new = object.__new__(Trajectory)
    new.__dict__.update(zip(_TRAJECTORY_FIELDS, values, strict=True))
    return new


def _apply_at_end(model: CompiledModel, events: list[Event], states: np.ndarray, ev_dosed: np.ndarray,
                  ev_removed: np.ndarray, volumes: np.ndarray | None = None) -> np.ndarray:
    """Apply the events that fall exactly at the end of the run to the last row (its after-state),
    by the rules of every path; returns what each moved, mg. ``volumes`` (a model whose volumes
    change): the volumes at the last row, then after the events."""
    base = model.arrays
    m = working_copy(base)
    n_c = model.n_comp
    if volumes is not None:
        m.capacity[:n_c] = volumes[-1]
        m.inv_capacity[:n_c] = 1.0 / volumes[-1]
    y = states[-1].copy()
    s = start_events(base, len(events))
    s.dosed[:], s.removed[:] = ev_dosed[-1], ev_removed[-1]
    apply_events(np.inf, 0, encode_events(events), m, base, y, s)
    states[-1], ev_dosed[-1], ev_removed[-1] = y, s.dosed, s.removed
    if volumes is not None:
        volumes[-1] = m.capacity[:n_c]
    return s.moved


MEMORY_BUDGET_BYTES = 2 * 1024**3
"""Largest memory a run may take: the trajectory (output rows x states x 8 bytes) and the chosen
integrator's working arrays (:meth:`~barrierflow.engine.integrators.Integrator.working_memory`)."""


def check_memory(scenario: Scenario, model: CompiledModel, n_rows: int, integrator: Integrator) -> None:
    """Refuse, before computing, a run whose memory would exceed :data:`MEMORY_BUDGET_BYTES`.

    Raises
    ------
    ScenarioError
        Naming the output times or the grid, what they need and the limit.
    """
    traj = n_rows * (model.n_state + 2 * model.n_comp) * 8
    work = integrator.working_memory(model)
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
