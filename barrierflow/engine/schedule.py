"""The dosing regimen: its events, and the one set of rules that applies them.

Everything the engine knows about a dose kind is here. :func:`build_schedule` turns the doses
of a scenario into a sorted list of :class:`Event`; :func:`encode_events` into the
:class:`EventArrays` the kernels take; :func:`apply_events` is the one home of what an event
does to the state, to the run's volumes and links, and to the :class:`EventState` (the ledger of
dosed and removed amounts, clamps, infusions, closed faces, what each event moved);
:func:`regimen_bounds` says what the doses can bring, for the magnitude scales of the states;
:func:`closed_rows` when the faces are closed, for the fluxes reported.
Every path applies events through it: the compiled RODAS4 and exact-chain loops call it in
compiled code, the Python event loop of the interval integrators and the modes and
matrix-exponential paths call it from Python.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from numba import njit

from ..model import Scenario
from .arrays import INNER

__all__ = ["KIND_CODE", "Event", "EventArrays", "EventState", "apply_events", "build_schedule", "closed_rows",
           "RegimenBounds", "encode_events", "new_event_state", "regimen_bounds", "rows_until", "start_events"]

# kinds that end something come first at a shared time, then the file's own events in order
_END_KINDS = ("infusion_end", "hold_end", "dry")

# event kinds, as integers for compiled code
(EV_BOLUS, EV_REPLACE, EV_REMOVE, EV_HOLD_START, EV_HOLD_END, EV_INF_START, EV_INF_END, EV_SAMPLE, EV_SAMPLE_KEEP,
 EV_CLOSE, EV_DRY) = range(11)
KIND_CODE = {"bolus": EV_BOLUS, "replace": EV_REPLACE, "remove": EV_REMOVE, "hold_start": EV_HOLD_START,
             "hold_end": EV_HOLD_END, "infusion_start": EV_INF_START, "infusion_end": EV_INF_END,
             "sample": EV_SAMPLE, "sample_keep": EV_SAMPLE_KEEP, "close": EV_CLOSE, "dry": EV_DRY}
"""Event kind to its code in :class:`EventArrays` (the kinds :func:`apply_events` knows)."""


@dataclass(frozen=True)
class Event:
    """One change at one time.

    Attributes
    ----------
    time : float, h
    kind : str
        ``bolus``, ``replace``, ``remove``, ``hold_start``, ``hold_end``, ``infusion_start``,
        ``infusion_end``, ``sample`` (with replacement), ``sample_keep`` (without: the volume
        shrinks), ``close`` (after a remove that ends contact: the compartment's barrier faces
        become no-flux), ``dry`` (an evaporating compartment reaches its residual volume: a mark
        where the volume stops shrinking).
    comp : int
        Index of the compartment.
    value : float
        Amount (mg) for a bolus, concentration (mg/mL) for replace and hold, rate (mg/h) for an
        infusion, the aliquot (mL) for a sample, the fraction removed for a remove; 0 otherwise.
    dose : int
        1-based position of the dose in the file.
    """

    time: float
    kind: str
    comp: int
    value: float
    dose: int

    @property
    def sort_key(self) -> tuple[float, int, int]:
        """Time, then ends before starts, then the file's order."""
        return (self.time, 0 if self.kind in _END_KINDS else 1, self.dose)


def build_schedule(scenario: Scenario, comp_index: dict[str, int]) -> list[Event]:
    """All events of the regimen up to the end of the run, in the order they apply.

    An infusion or hold whose end falls after the end of the run is simply cut there.
    """
    events: list[Event] = []
    end = scenario.duration
    for n, d in enumerate(scenario.doses, start=1):
        p = comp_index[d.target]
        for t in d.start_times(end):
            if d.kind == "bolus":
                events.append(Event(t, "bolus", p, d.amount, n))
            elif d.kind == "replace":
                events.append(Event(t, "replace", p, d.concentration, n))
            elif d.kind == "remove":
                events.append(Event(t, "remove", p, d.removed_fraction, n))
                if d.closes:
                    events.append(Event(t, "close", p, 0.0, n))
            elif d.kind == "sample":
                events.append(Event(t, "sample" if d.replaces_medium else "sample_keep", p, d.volume, n))
            elif d.kind == "infusion":
                events.append(Event(t, "infusion_start", p, d.rate, n))
                if t + d.duration < end:
                    events.append(Event(t + d.duration, "infusion_end", p, d.rate, n))
            elif d.kind == "hold":
                events.append(Event(t, "hold_start", p, d.concentration, n))
                if t + d.duration < end:
                    events.append(Event(t + d.duration, "hold_end", p, d.concentration, n))
    events.extend(_dry_events(scenario, comp_index, end))
    events.sort(key=lambda e: e.sort_key)
    return events


_OPENING = ("bolus", "replace", "hold_start", "infusion_start")


def closed_rows(events, times, n_comp: int):
    """Whether each compartment's barrier faces are closed at each output time (after the events
    at that time), as the event rules set them: a ``close`` closes them, a new application (a
    bolus, refill, hold or infusion) opens them again.

    Parameters
    ----------
    events : sequence of Event
        The run's events, in the order they apply.
    times : array, h
        Output times.
    n_comp : int

    Returns
    -------
    ndarray of bool (n_t, n_comp)
    """
    times = np.asarray(times, dtype=float)
    out = np.zeros((len(times), n_comp), dtype=bool)
    state = np.zeros(n_comp, dtype=bool)
    changes = [(e.time, e.comp, e.kind == "close") for e in events
               if e.kind == "close" or e.kind in _OPENING]
    if not any(c for _, _, c in changes):
        return out
    k = 0
    for r, t in enumerate(times):
        while k < len(changes) and changes[k][0] <= t:
            _, p, close = changes[k]
            if close or state[p]:
                state[p] = close
            k += 1
        out[r] = state
    return out


def _dry_events(scenario: Scenario, comp_index: dict[str, int], end: float) -> list[Event]:
    """When each evaporating compartment reaches its residual volume: from time 0 and from every
    refill (a replace restores the full volume), if before the next refill and the end of the run."""
    out = []
    for c in scenario.compartments:
        if not c.evaporates:
            continue
        refills = sorted({t for d in scenario.doses if d.target == c.id and d.kind == "replace"
                          for t in d.start_times(end)})
        starts = sorted({0.0, *refills})
        span = (c.volume - c.residual_volume) / c.evaporation_rate
        for i, t0 in enumerate(starts):
            t_dry = t0 + span
            stop = starts[i + 1] if i + 1 < len(starts) else end
            if t_dry < stop:
                out.append(Event(t_dry, "dry", comp_index[c.id], 0.0, 0))
    return out


class RegimenBounds(NamedTuple):
    """What the doses of a scenario can bring into the network (for the magnitude scales of the
    states and the compartments that may reach the solubility; see :func:`regimen_bounds`).

    Attributes
    ----------
    added : list of (str, float)
        Compartment id and the amount (mg) each dose adds over the run, in the file's order.
    clamps : list of (str, float, float)
        Compartment id, concentration (mg/mL) and time held (h) of each level a dose holds.
    fed : set of str
        Compartments that doses feed with amounts (boluses, infusions).
    levels : list of (str, float, bool)
        Compartment id, each concentration (mg/mL) a dose sets directly (refills, holds) and
        whether it is held there (a hold).
    shrink : dict of str to float
        Volume (mL) samples without replacement take from each compartment over the run.
    """

    added: list
    clamps: list
    fed: set
    levels: list
    shrink: dict


def regimen_bounds(scenario: Scenario) -> RegimenBounds:
    """What the doses of ``scenario`` can bring, dose kind by dose kind (:class:`RegimenBounds`)."""
    comps = {c.id: c for c in scenario.compartments}
    out = RegimenBounds([], [], set(), [], {})
    for d in scenario.doses:
        n = len(d.start_times(scenario.duration))
        vol = comps[d.target].volume
        vol = 0.0 if vol is None else vol
        if d.kind == "bolus":
            out.added.append((d.target, n * d.amount))
            out.fed.add(d.target)
        elif d.kind == "infusion":
            out.added.append((d.target, n * d.rate * d.duration))
            out.fed.add(d.target)
        elif d.kind == "replace":
            out.added.append((d.target, n * d.concentration * vol))
            out.levels.append((d.target, d.concentration, False))
        elif d.kind == "hold":
            out.added.append((d.target, n * d.concentration * vol))
            out.levels.append((d.target, d.concentration, True))
            out.clamps.extend([(d.target, d.concentration, min(d.duration, scenario.duration))] * n)
        elif d.kind == "sample" and not d.replaces_medium:
            out.shrink[d.target] = out.shrink.get(d.target, 0.0) + n * d.volume
    return out


class EventArrays(NamedTuple):
    """Events as arrays, in the order they apply (what :func:`apply_events` takes).

    Attributes
    ----------
    time : ndarray (n_ev,), h
    kind : ndarray of int (n_ev,)
        The codes of :data:`KIND_CODE`.
    comp : ndarray of int (n_ev,)
        Index of the compartment.
    value : ndarray (n_ev,)
        As :attr:`Event.value` (mg, mg/mL or mg/h).
    """

    time: np.ndarray
    kind: np.ndarray
    comp: np.ndarray
    value: np.ndarray


def encode_events(events) -> EventArrays:
    """:class:`EventArrays` of a list of :class:`Event` (already in order)."""
    n = len(events)
    return EventArrays(np.array([e.time for e in events], dtype=np.float64).reshape(n),
                       np.array([KIND_CODE[e.kind] for e in events], dtype=np.int64).reshape(n),
                       np.array([e.comp for e in events], dtype=np.int64).reshape(n),
                       np.array([e.value for e in events], dtype=np.float64).reshape(n))


class EventState(NamedTuple):
    """What the events of a run carry besides the state, changed in place by :func:`apply_events`.

    Attributes
    ----------
    infusion : ndarray (n_comp,), mg/h
        Running infusion rate per compartment.
    clamp : ndarray of bool (n_comp,)
        Compartments held constant in the coming interval (held, or under a hold dose).
    holds : ndarray of int (n_comp,)
        Number of running hold doses per compartment.
    dosed, removed : ndarray (n_comp,), mg
        Cumulative amounts added and taken out by events, per compartment.
    closed : ndarray of bool (n_comp,)
        Compartments whose barrier faces a remove that ends contact has closed.
    evaporating : ndarray of bool (n_comp,)
        Compartments whose volatile vehicle still evaporates (a ``dry`` event stops it, a refill
        starts it again).
    moved : ndarray (n_events,), mg
        What each event moved: a bolus its amount, a refill what it put in, a remove or a sample
        what it took (0 for the others).
    """

    infusion: np.ndarray
    clamp: np.ndarray
    holds: np.ndarray
    dosed: np.ndarray
    removed: np.ndarray
    closed: np.ndarray
    evaporating: np.ndarray
    moved: np.ndarray


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def new_event_state(m, n_events):
    """The :class:`EventState` at the start of a run of ``m`` (ModelArrays) with ``n_events`` events."""
    nc = m.n_comp
    evaporating = np.zeros(nc, dtype=np.bool_)
    for p in range(nc):
        evaporating[p] = m.evap_rate[p] > 0.0
    return EventState(np.zeros(nc), m.held.copy(), np.zeros(nc, dtype=np.int64), np.zeros(nc), np.zeros(nc),
                      np.zeros(nc, dtype=np.bool_), evaporating, np.zeros(n_events))


def start_events(m, n_events) -> EventState:
    """:func:`new_event_state` called from Python: the same rule, run by the interpreter (a
    compiled call boxes the named tuple it returns, which costs more than the rule itself)."""
    return _NEW_EVENT_STATE(m, n_events)


_NEW_EVENT_STATE = getattr(new_event_state, "py_func", new_event_state)  # (plain Python with the compiler off)


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)  # also called from Python
def apply_events(t0, ei, ev, m, base, y, s):
    """Apply every event from index ``ei`` with time <= ``t0``; returns the next event index.

    The one set of rules of every path: a bolus adds its amount; replace and remove count the
    content as removed (replace then refills, and restores an evaporated vehicle's full volume;
    a remove takes its fraction); a sample takes its aliquot of solution (the dissolved part),
    booked as sampled, and keeps the volume with fresh medium or shrinks it without; a hold start
    sets the concentration and clamps it, booking the difference as dosed; a hold end releases
    the clamp unless the compartment is held or another hold runs; an infusion adds its rate
    until its end; ``dry`` puts an evaporating vehicle at its residue and stops it; ``close``
    sets the compartment's barrier faces to no flux, which a new application (bolus, refill,
    hold, infusion) restores.

    Parameters
    ----------
    t0 : float, h
    ei : int
    ev : EventArrays
    m : ModelArrays
        The run's arrays (:func:`~barrierflow.engine.arrays.working_copy`): its volumes and links
        change in place.
    base : ModelArrays
        The model's own arrays, which the rules restore from.
    y : ndarray (n_state,)
        The state, changed in place (concentrations, mg/mL).
    s : EventState
        Changed in place.
    """
    cap = m.capacity
    icap = m.inv_capacity
    held = m.held
    q_sampled = m.q_sampled
    ev_time = ev.time
    ev_kind = ev.kind
    ev_comp = ev.comp
    ev_value = ev.value
    infusion = s.infusion
    clamp = s.clamp
    holds = s.holds
    dosed = s.dosed
    removed = s.removed
    closed = s.closed
    n_ev = ev_time.shape[0]
    while ei < n_ev and ev_time[ei] <= t0:
        p = ev_comp[ei]
        kind = ev_kind[ei]
        v = ev_value[ei]
        moved = 0.0
        if kind == EV_BOLUS:
            y[p] += v / cap[p]
            dosed[p] += v
            moved = v
        elif kind == EV_REPLACE:
            removed[p] += cap[p] * y[p]
            if m.evap_rate[p] > 0.0:  # a fresh vehicle: the full volume again
                cap[p] = base.capacity[p]
                icap[p] = base.inv_capacity[p]
                s.evaporating[p] = True
            y[p] = v
            dosed[p] += cap[p] * v
            moved = cap[p] * v
        elif kind == EV_REMOVE:
            moved = v * cap[p] * y[p]
            removed[p] += moved
            y[p] = 0.0 if v >= 1.0 else y[p] * (1.0 - v)
        elif kind == EV_SAMPLE or kind == EV_SAMPLE_KEEP:
            moved = v * min(y[p], m.solubility[p])  # the aliquot is solution
            amount = cap[p] * y[p] - moved
            if kind == EV_SAMPLE_KEEP:
                cap[p] -= v
                icap[p] = 1.0 / cap[p]
            y[p] = amount / cap[p]
            y[q_sampled + p] += moved
        elif kind == EV_HOLD_START:
            dosed[p] += cap[p] * (v - y[p])
            y[p] = v
            holds[p] += 1
            clamp[p] = True
        elif kind == EV_HOLD_END:
            holds[p] -= 1
            clamp[p] = held[p] or holds[p] > 0
        elif kind == EV_INF_START:
            infusion[p] += v
        elif kind == EV_INF_END:
            infusion[p] -= v
            if abs(infusion[p]) < 1e-12 * v:
                infusion[p] = 0.0
        elif kind == EV_DRY:
            cap[p] = m.residual[p]
            icap[p] = 1.0 / cap[p]
            s.evaporating[p] = False
        if kind == EV_CLOSE or (closed[p] and (kind == EV_BOLUS or kind == EV_REPLACE or kind == EV_HOLD_START
                                               or kind == EV_INF_START)):
            closed[p] = kind == EV_CLOSE
            _contact(p, m, base, closed)
        s.moved[ei] = moved
        ei += 1
    return ei


@njit(**INNER)
def _contact(p, m, base, closed):
    """Set the barrier faces of compartment ``p``: no flux while it (or the compartment at the
    other end of a steady barrier) is closed, the original coefficients otherwise."""
    nc = m.n_comp
    lp = m.link_p
    lq = m.link_q
    la = m.link_a
    lb = m.link_b
    lc = m.link_c
    ld = m.link_d
    for f in range(m.face_ptr[p], m.face_ptr[p + 1]):
        j = m.face_link[f]
        other = lq[j] if lp[j] == p else lp[j]
        off = closed[p] or (other < nc and closed[other])
        la[j] = 0.0 if off else base.link_a[j]
        lb[j] = 0.0 if off else base.link_b[j]
        lc[j] = 0.0 if off else base.link_c[j]
        ld[j] = 0.0 if off else base.link_d[j]


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)  # also called from Python
def rows_until(times, row, t1, last):
    """End of the output rows of the interval that ends at ``t1`` (the last one includes ``t1``)."""
    n_t = times.shape[0]
    sel_end = row
    while sel_end < n_t and (times[sel_end] < t1 or (last and times[sel_end] <= t1)):
        sel_end += 1
    return sel_end
