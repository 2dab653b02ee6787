"""The dosing regimen as a sorted list of events, and the intervals between them."""

from __future__ import annotations

from dataclasses import dataclass

from ..model import Scenario

__all__ = ["Event", "build_schedule", "closed_rows"]

# kinds that end something come first at a shared time, then the file's own events in order
_END_KINDS = ("infusion_end", "hold_end", "dry")


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
    import numpy as np

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
