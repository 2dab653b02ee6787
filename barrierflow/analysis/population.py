"""Statistics of a population, by the rules of a single run.

:func:`population_exposure` gives each subject's Cmax, tmax and AUC in one compartment with the
rules of :mod:`barrierflow.analysis.metrics`: the AUC by the linear-up / log-down trapezoidal
rule, and at the row of an instantaneous dose the value just before it estimated from the rows
before (so the jump is not smeared over a segment). A subject's figures are therefore those of
the same scenario run alone (:func:`barrierflow.analysis.metrics.compute_metrics`).
:func:`percentile_bands` gives percentiles over the subjects at each output time.

The engine (:mod:`barrierflow.engine.population`) only runs the subjects; what is computed from
their traces lives here.

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from ..model.cohort import Diverging, stacked
from .metrics import auc, compute_metrics, jump_times
from .result import trace_columns

if TYPE_CHECKING:
    from ..engine.population import Population
    from ..model import Scenario

__all__ = ["MetricTable", "PopulationExposure", "metric_layout", "percentile_bands", "population_columns",
           "population_exposure", "population_metrics", "subject_exposure"]


@dataclass(frozen=True, eq=False)
class PopulationExposure:
    """Exposure of each subject in one compartment.

    Attributes
    ----------
    id : str
        The compartment.
    cmax : ndarray (n_subjects,), mg/mL
        Highest concentration over the output times.
    tmax : ndarray (n_subjects,), h
        Output time of the highest concentration (the first, when it is reached more than once).
    auc : ndarray (n_subjects,), mg h/mL
        Area under the concentration curve over the run, linear-up / log-down; NaN for a
        subject whose run failed (its trace is incomplete).
    """

    id: str
    cmax: np.ndarray
    tmax: np.ndarray
    auc: np.ndarray


def subject_exposure(t: Sequence[float], c: np.ndarray,
                     jumps: Sequence[float] = ()) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Cmax, tmax and AUC of each row of ``c``, by the rules of a single run.

    Parameters
    ----------
    t : array (n_t,), h
        Increasing output times, shared by the rows.
    c : array (n_subjects, n_t), mg/mL
        One concentration trace per row; NaN after the time a subject's run failed.
    jumps : sequence of float, h
        Times of instantaneous events on this compartment, shared by the rows (see
        :func:`barrierflow.analysis.metrics.left_limits`).

    Returns
    -------
    cmax : ndarray (n_subjects,), mg/mL
        Over the rows' finite values.
    tmax : ndarray (n_subjects,), h
    auc : ndarray (n_subjects,), mg h/mL
        :func:`barrierflow.analysis.metrics.auc` of each row; NaN for a row holding NaN.

    Examples
    --------
    Two subjects of 10 exp(-k t), k = 0.5 and 0.25 1/h, sampled every 2 h to 48 h: the log-down
    rule is exact on an exponential decline, AUC = (10/k) (1 - exp(-48 k)):

    >>> import numpy as np
    >>> t = np.arange(0.0, 49.0, 2.0)
    >>> c = 10.0 * np.exp(-np.outer([0.5, 0.25], t))
    >>> np.round(subject_exposure(t, c)[2], 6)
    array([20.      , 39.999754])
    """
    t = np.asarray(t, dtype=float)
    c = np.atleast_2d(np.asarray(c, dtype=float))
    n = c.shape[0]
    cmax = np.full(n, np.nan)
    tmax = np.full(n, np.nan)
    area = np.full(n, np.nan)
    for i in range(n):
        row = c[i]
        finite = ~np.isnan(row)
        if not finite.any():
            continue
        k = int(np.argmax(np.where(finite, row, -np.inf)))
        cmax[i], tmax[i] = row[k], t[k]
        if finite.all():
            area[i] = auc(t, row, jumps)
    return cmax, tmax, area


def population_exposure(population: Population, cid: str) -> PopulationExposure:
    """Cmax, tmax and AUC of every subject in compartment ``cid`` (see :func:`subject_exposure`).

    The dose times come from :attr:`Population.scenario` (shared by the subjects).
    """
    jumps = jump_times(population.scenario, cid) if population.scenario is not None else ()
    cmax, tmax, area = subject_exposure(population.times, population.concentration(cid), jumps)
    return PopulationExposure(id=cid, cmax=cmax, tmax=tmax, auc=area)


def percentile_bands(values: np.ndarray, q: Sequence[float] = (5, 50, 95)) -> np.ndarray:
    """Percentiles over the subjects at each output time, ignoring NaN (failed subjects' ends).

    Parameters
    ----------
    values : array (n_subjects, n_t)
        A trace of every subject, for example ``population.concentration("central")``.
    q : sequence of float
        Percentiles from 0 to 100 (numpy's default linear interpolation between order statistics).

    Returns
    -------
    ndarray (len(q), n_t)
        In the unit of ``values``.
    """
    return np.nanpercentile(np.asarray(values, dtype=float), q, axis=0)


def population_columns(population: Population, scenario: Scenario) -> list[tuple[str, np.ndarray]]:
    """The trace columns of the CSV export (:func:`barrierflow.analysis.result.trace_columns`), one
    row per subject: ``(header, array (n_subjects, n_t))`` in the ``[output]`` units, time first
    (a 1-D array)."""
    return trace_columns(population, scenario)


class _Block:
    """Subjects of a population as one run with a subject axis: the trace methods
    :func:`compute_metrics` reads, each giving (n_subjects, n_t) (the population's own arrays
    when the block is every subject in order)."""

    def __init__(self, traces: _Traces, rows: np.ndarray, scenario: Scenario):
        self._t, self.scenario = traces, scenario
        every = len(rows) == traces.population.n_subjects and np.array_equal(rows, np.arange(len(rows)))
        self._rows = slice(None) if every else rows
        self.times = traces.population.times

    def concentration(self, cid: str) -> np.ndarray:
        return self._t.get("concentration", cid)[self._rows]

    def flux(self, bid: str) -> np.ndarray:
        return self._t.get("flux", bid)[self._rows]

    def permeated(self, bid: str) -> np.ndarray:
        return self._t.get("permeated", bid)[self._rows]

    def content(self, bid: str) -> np.ndarray:
        return self._t.get("content", bid)[self._rows]

    def dosed(self, cid: str) -> np.ndarray:
        return self._t.get("dosed", cid)[self._rows]

    def amount(self, cid: str) -> np.ndarray:
        return self._t.get("amount", cid)[self._rows]

    def dose_parts(self, cid: str) -> tuple[np.ndarray, ...]:
        return tuple(part[self._rows] for part in self._t.get("dose_parts", cid))


class _Traces:
    """The population's traces, each made once for all subjects."""

    def __init__(self, population: Population):
        self.population = population
        self._made: dict[tuple[str, str], Any] = {}

    def get(self, what: str, ident: str) -> Any:
        key = (what, ident)
        if key not in self._made:
            self._made[key] = getattr(self.population, what)(ident)
        return self._made[key]


@dataclass(frozen=True, eq=False)
class MetricTable:
    """Every metric of a single run, for each subject of a population.

    Attributes
    ----------
    names : tuple of str
        ``"<metric>:<id>"``, such as ``"cmax:central"`` or ``"lag_time:skin"``: the metric names
        of :meth:`barrierflow.analysis.metrics.Metrics.to_rows` with the compartment or barrier id.
    units : tuple of str
        The unit of each, in the scenario's ``[output]`` units (``""`` for a number).
    values : ndarray (n_subjects, n_metrics)
        In those units; NaN where a metric has no value (booleans as 1 and 0), by the rules of a
        single run, and where a metric does not apply to a subject: the columns are the same for
        every subject of a population (:func:`metric_layout`), so a subject whose run has fewer
        dosing intervals than another (nothing loaded at time 0) is blank in the last
        ``auc_interval_<n>`` columns, the metrics its own run does not have.
    notes : ndarray of str (n_subjects,) or None
        Each subject's notes: why a metric is blank, or a flag on one that needs care
        (:meth:`barrierflow.analysis.metrics.Metrics.note_texts`; ``""`` for none); None where
        not kept (the percentiles of a population).
    """

    names: tuple[str, ...]
    units: tuple[str, ...]
    values: np.ndarray
    notes: np.ndarray | None = None

    def column(self, name: str) -> np.ndarray:
        """The values of one metric, by name."""
        try:
            return self.values[:, self.names.index(name)]
        except ValueError:
            raise KeyError(f"no metric {name!r}; known: {', '.join(self.names)}") from None


def population_metrics(population: Population, scenarios: Sequence[Scenario],
                       rows: Sequence[int] | None = None,
                       layout: tuple[tuple[str, ...], tuple[str, ...]] | None = None) -> MetricTable:
    """The metrics of each subject, by the rules of a single run (:func:`compute_metrics`).

    The subjects are measured all at once: :func:`compute_metrics` on their traces with a subject
    axis and their stacked scenario (the rules are written element-wise over the subjects, so
    subject i's values are those of its own run). Subjects on which the rules decide differently
    (:class:`~barrierflow.model.cohort.Diverging`) are measured in parts.

    Parameters
    ----------
    population : Population
    scenarios : sequence of Scenario
        Each subject's own scenario (the applied dose reads its volumes and amounts). A sequence
        with a method ``stacked(rows)`` (:class:`barrierflow.studies.runner.Subjects`) gives the
        stacked scenario of those subjects (:func:`barrierflow.model.cohort.stacked`) and no
        scenario per subject is built; for a plain sequence each subject is measured alone.
    rows : sequence of int, optional
        The subjects to take (default all); a failed subject gives NaN.
    layout : (names, units), optional
        The columns of the table (:func:`metric_layout` of the population's scenario and varied
        parameters, so that every chunk of a population has the same columns); default: the
        union of the subjects' own metrics, in the order of :func:`metric_layout`. A subject is
        blank (NaN) in a column its own run does not have.

    Returns
    -------
    MetricTable
        Values in the ``[output]`` units of the first scenario.
    """
    traces = _Traces(population)
    rows = np.arange(population.n_subjects) if rows is None else np.asarray(rows, dtype=np.int64).reshape(-1)
    stack = getattr(scenarios, "stacked", None)
    parts: list[tuple[np.ndarray, tuple[str, ...], tuple[str, ...], np.ndarray, np.ndarray]] = []
    # positions in ``rows`` still to measure, as a work list (a recursive closure would hold the
    # traces in a reference cycle until the collector runs)
    pending = [np.flatnonzero(population.status[rows] == 0)]
    while pending:
        at = pending.pop()
        if not len(at):
            continue
        subjects = rows[at]
        if stack is None:
            for k, i in zip(at.tolist(), subjects.tolist(), strict=True):
                one = compute_metrics(_Block(traces, np.array([i]), scenarios[i]))
                parts.append((np.array([k]), *one.columns(), one.note_texts()))
            continue
        try:
            table = compute_metrics(_Block(traces, subjects, stack(subjects)))
        except Diverging as split:
            pending += [at[~split.mask], at[split.mask]]
            continue
        parts.append((at, *table.columns(), table.note_texts()))
    if layout is not None:
        names, units = tuple(layout[0]), tuple(layout[1])
    elif parts:
        names, units = _union([p[1] for p in parts], [p[2] for p in parts])
    else:
        names, units = metric_names(scenarios[0] if len(scenarios) else population.scenario)
    for _, part_names, part_units, _, _ in parts:  # a column no layout foresaw still gets its place
        extra = [(n, u) for n, u in zip(part_names, part_units, strict=True) if n not in names]
        names, units = names + tuple(n for n, _ in extra), units + tuple(u for _, u in extra)
    column = {name: k for k, name in enumerate(names)}
    values = np.full((len(rows), len(names)), np.nan)
    notes = np.full(len(rows), "", dtype=object)
    for at, part_names, _, block, texts in parts:
        values[np.ix_(at, [column[n] for n in part_names])] = block
        notes[at] = texts
    return MetricTable(names, units, values, notes)


def _union(names: Sequence[tuple[str, ...]],
           units: Sequence[tuple[str, ...]]) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """Every name of the parts once: those of the part with most dosing intervals (whose names
    hold those of the others), in its order, then any other in the order met."""
    widest = max(range(len(names)), key=lambda k: (len(names[k]), -k))
    out_n, out_u = list(names[widest]), list(units[widest])
    seen = set(out_n)
    for part_n, part_u in zip(names, units, strict=True):
        for n, u in zip(part_n, part_u, strict=True):
            if n not in seen:
                seen.add(n)
                out_n.append(n)
                out_u.append(u)
    return tuple(out_n), tuple(out_u)


def metric_layout(scenario: Scenario, params: Sequence[Any] = ()) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """The metric columns of every subject of a population: names and units, fixed by the scenario
    and the varied parameters alone (not by the values drawn, nor by how the subjects are chunked).

    A subject's own metrics differ from another's only in the number of dosing intervals (one
    ``auc_interval_<n>`` each): a subject with nothing loaded at time 0 has no interval from 0.
    When a varied parameter decides whether something is loaded at time 0 (a starting
    concentration), the layout is that of a run loaded at time 0, which holds every interval a
    subject can have; otherwise it is the scenario's own (:func:`metric_names`).

    Parameters
    ----------
    scenario : Scenario
        What every subject shares (its variability tables are not read).
    params : sequence of Param
        The parameters varied per subject.
    """
    from .metrics import loaded_at_start

    loaded = False
    if params:
        # each parameter in turn at a positive value, the others at the scenario's: loaded at
        # time 0 for one of them means a subject may be
        base = np.array([[float(p.get(scenario) or 0.0) for p in params]])
        probe = np.repeat(base, len(params), axis=0)
        probe[np.arange(len(params)), np.arange(len(params))] = 1.0
        loaded = bool(np.any(loaded_at_start(stacked(scenario, params, probe))))
    return metric_names(scenario, loaded_at_zero=loaded)


def metric_names(scenario: Scenario, *, loaded_at_zero: bool = False) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """The metric names and units of a scenario's runs, without running it (when every subject
    failed); with ``loaded_at_zero``, those of a run with an application at time 0 as well."""
    from dataclasses import fields

    from .metrics import BarrierMetrics, CompartmentMetrics, Metrics, application_times, dosing_intervals

    nan = float("nan")
    times = scenario.output_grid()
    apps = application_times(scenario, times[-1])
    if loaded_at_zero and 0.0 not in apps:
        apps = (0.0, *apps)
    n_int = len(dosing_intervals(apps, times[-1]) or ((0.0, times[-1]),))
    shaped = {"interval": (nan, nan), "interval_aucs": (nan,) * n_int, "lag_window": (nan, nan),
              "terminal_points": 0, "lag_points": 0, "threshold": None, "time_above": None,
              "steady_state_reached": None, "notes": {}}

    def blank(cls: type, ident: str) -> Any:
        return cls(**{f.name: ident if f.name == "id" else shaped.get(f.name, nan) for f in fields(cls)})

    table = Metrics(tuple(blank(CompartmentMetrics, c.id) for c in scenario.compartments),
                    tuple(blank(BarrierMetrics, b.id) for b in scenario.barriers), tuple(apps), (), times[-1],
                    scenario.output_units, scenario.substance.molar_mass).to_rows()
    return tuple(f"{m}:{i}" for _, i, m, *_ in table), tuple(row[4] for row in table)
