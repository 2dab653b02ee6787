"""The dosing regimen as a sorted list of events, and the intervals between them."""

from __future__ import annotations

from dataclasses import dataclass

from ..model import Scenario

__all__ = ["Event", "build_schedule"]

# kinds that end something come first at a shared time, then the file's own events in order
_END_KINDS = ("infusion_end", "hold_end")


@dataclass(frozen=True)
class Event:
    """One change at one time.

    Attributes
    ----------
    time : float, h
    kind : str
        ``bolus``, ``replace``, ``remove``, ``hold_start``, ``hold_end``, ``infusion_start``,
        ``infusion_end``.
    comp : int
        Index of the compartment.
    value : float
        Amount (mg) for a bolus, concentration (mg/mL) for replace and hold, rate (mg/h) for an
        infusion; 0 otherwise.
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
                events.append(Event(t, "remove", p, 0.0, n))
            elif d.kind == "infusion":
                events.append(Event(t, "infusion_start", p, d.rate, n))
                if t + d.duration < end:
                    events.append(Event(t + d.duration, "infusion_end", p, d.rate, n))
            elif d.kind == "hold":
                events.append(Event(t, "hold_start", p, d.concentration, n))
                if t + d.duration < end:
                    events.append(Event(t + d.duration, "hold_end", p, d.concentration, n))
    events.sort(key=lambda e: e.sort_key)
    return events
