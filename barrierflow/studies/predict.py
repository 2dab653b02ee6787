"""The engine as a function of a few parameters: what fit and design evaluate thousands of times.

A :class:`Predictor` is built once from a scenario, the parameters that vary (parameter paths
or tied groups) and the observables and times wanted. The structure is fixed once: the run's
output times become the times wanted (the run is extended to the last of them) and every other
setting stays the scenario's. Each call then sets the values with
:func:`barrierflow.model.paths.with_values` (the model checks them once, about 25 us) and runs
:func:`barrierflow.simulate` (the exact solution for a linear network: a few tenths of a
millisecond for a diffusion cell with 60 cells; the compiled RODAS4 integrator otherwise).

Observables are the quantities of :data:`barrierflow.model.experiment.OBSERVABLES`. A
concentration or an amount measured at the time of an event on its compartment (a sample that
withdraws an aliquot, a refill) is the state just *before* the event: the sample is drawn first.
The run is read there 1e-6 of its duration earlier (an output time closer to an event than 1e-9
of the duration would show the state after it).
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from ..analysis import Result, simulate
from ..engine import AutoIntegrator, Grid
from ..errors import ScenarioError
from ..model import Scenario
from ..model.experiment import OBSERVABLES, parse_observable
from ..model.paths import Param, with_values

__all__ = ["FIT_INTEGRATOR", "Predictor", "check_observable", "observe"]

FIT_INTEGRATOR = AutoIntegrator(rtol=1e-8, atol=1e-11)
"""The integrator of studies: the exact path for linear networks (tolerances unused), otherwise
RODAS4 with tolerances tight enough for finite-difference derivatives."""

BEFORE_EVENT = 1e-6
"""How much earlier (as a fraction of the run's duration) a compartment is read at an event."""


def check_observable(scenario: Scenario, name: str, what: str = "observable") -> tuple[str, str]:
    """``(quantity, target)`` of an observable such as ``"permeated:skin"``, checked against the scenario.

    Raises
    ------
    ScenarioError
        For an unknown quantity, or a target that is no barrier or compartment of the scenario
        (with the closest id).
    """
    try:
        quantity, target, _ = parse_observable(name)
    except ValueError as err:
        raise ScenarioError.single(what, repr(name), str(err)) from None
    owner = OBSERVABLES[quantity].owner
    ids = [b.id for b in scenario.barriers] if owner == "barrier" else [c.id for c in scenario.compartments]
    if target not in ids:
        close = difflib.get_close_matches(target, ids, n=1, cutoff=0.6)
        hint = f"did you mean '{quantity}:{close[0]}'? " if close else ""
        raise ScenarioError.single(what, repr(name), f"{hint}'{quantity}' is observed on a {owner}, and the scenario "
                                   f"has no {owner} '{target}' ({owner} ids: {', '.join(ids) or 'none'})",
                                   scenario.source)
    return quantity, target


def observe(result: Result, quantity: str, target: str) -> np.ndarray:
    """The trace of one observable in a result, internal units, one value per output time."""
    if quantity == "conc":
        return result.concentration(target)
    if quantity == "amount":
        return result.amount(target)
    if quantity == "permeated":
        return result.permeated(target)
    if quantity == "flux":
        return result.flux(target)
    raise KeyError(quantity)  # pragma: no cover - OBSERVABLES lists the four


@dataclass(eq=False)
class Predictor:
    """Predicted observables at fixed times, as a function of the values of some parameters.

    Parameters
    ----------
    scenario : Scenario
    params : sequence of Param
        The parameters set by each call, in the order of the values.
    observables : sequence of str
        ``"permeated:skin"``, ``"conc:receptor"``, ...
    times : array_like, h
        The times wanted (>= 0).
    integrator : object, optional
        Default :data:`FIT_INTEGRATOR`.
    grid : Grid, optional

    Attributes
    ----------
    runs : int
        Simulations run so far.
    exact : bool
        True when the engine uses the exact solution (derivatives by differences are then
        accurate to round-off).
    """

    scenario: Scenario
    params: tuple[Param, ...]
    observables: tuple[str, ...]
    times: np.ndarray
    integrator: object = None
    grid: Grid | None = None
    runs: int = 0
    exact: bool = False
    _base: Scenario = field(init=False, repr=False)
    _rows: dict[str, np.ndarray] = field(init=False, repr=False)
    _targets: dict[str, tuple[str, str]] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        self.params = tuple(self.params)
        self.observables = tuple(self.observables)
        self.times = np.asarray(self.times, dtype=float)
        if self.integrator is None:
            self.integrator = FIT_INTEGRATOR
        self._targets = {o: check_observable(self.scenario, o) for o in self.observables}
        t = self.times
        if t.size == 0 or not np.all(np.isfinite(t)) or np.any(t < 0):
            raise ScenarioError.single("times", repr(t.tolist()[:5]), "need finite times >= 0")
        duration = max(float(self.scenario.duration), float(t.max()))
        structure = {"scenario.duration": duration, "scenario.output_step": None,
                     "scenario.output_times": tuple(sorted({0.0, *t.tolist()}))}
        first = with_values(self.scenario, structure)
        # the events of the scenario, to read compartments just before an event at a wanted time
        probe = simulate(first, integrator=self.integrator, grid=self.grid)
        self.exact = probe.integrator.startswith("exact")
        events: dict[str, set[float]] = {}
        for time, comp, _ in probe.dose_times:
            events.setdefault(comp, set()).add(float(time))
        shift = BEFORE_EVENT * duration
        wanted: dict[str, np.ndarray] = {}
        for o, (quantity, target) in self._targets.items():
            at = t.copy()
            if OBSERVABLES[quantity].owner == "compartment" and target in events:
                marks = np.array(sorted(events[target]))
                near = np.abs(at[:, None] - marks[None, :]).min(axis=1) <= 1e-9 * max(duration, 1.0)
                at = np.where(near & (at > shift), at - shift, at)
            wanted[o] = at
        times_all = np.unique(np.concatenate([[0.0], *wanted.values()]))
        self._base = with_values(first, {"scenario.output_times": tuple(times_all.tolist())})
        run_times = simulate(self._base, integrator=self.integrator, grid=self.grid).times
        self._rows = {o: _rows_of(run_times, at, duration) for o, at in wanted.items()}
        self.runs = 2

    def scenario_with(self, values: Sequence[float]) -> Scenario:
        """The scenario of the run (output times as wanted) with the parameters set to ``values``."""
        return with_values(self._base, dict(zip(self.params, (float(v) for v in values), strict=True)))

    def __call__(self, values: Sequence[float]) -> dict[str, np.ndarray]:
        """The observables at the wanted times for these parameter values (internal units).

        Raises
        ------
        ScenarioError
            When the model refuses a value.
        SolverError
            When the run fails.
        """
        result = simulate(self.scenario_with(values), integrator=self.integrator, grid=self.grid)
        self.runs += 1
        return {o: observe(result, *self._targets[o])[self._rows[o]] for o in self.observables}

    def many(self, values: Sequence[Sequence[float]]) -> list[dict[str, np.ndarray]]:
        """:meth:`__call__` for several parameter vectors."""
        return [self(v) for v in values]


def _rows_of(run_times: np.ndarray, wanted: np.ndarray, duration: float) -> np.ndarray:
    """The row of the run for each wanted time (the run may have moved a time onto a nearby event)."""
    idx = np.clip(np.searchsorted(run_times, wanted), 0, len(run_times) - 1)
    prev = np.clip(idx - 1, 0, len(run_times) - 1)
    pick = np.where(np.abs(run_times[prev] - wanted) < np.abs(run_times[idx] - wanted), prev, idx)
    if np.any(np.abs(run_times[pick] - wanted) > 1e-8 * max(duration, 1.0)):
        raise AssertionError("an output time of the run is missing")  # pragma: no cover - the run keeps them
    return pick


def values_of(params: Sequence[Param], scenario: Scenario) -> np.ndarray:
    """The current values of ``params`` in ``scenario`` (internal units)."""
    return np.array([float(p.get(scenario)) for p in params])


def mapping(params: Sequence[Param], values: Sequence[float]) -> Mapping[Param, float]:
    """``{param: value}`` for :func:`with_values`."""
    return dict(zip(params, (float(v) for v in values), strict=True))
