"""Populations: N subjects drawn from the scenario's variability, as percentile bands and distributions.

:func:`run_population` draws subject k (from 1) from its own random stream
(:mod:`barrierflow.studies.distributions`), simulates the subjects in chunks
(:mod:`barrierflow.studies.runner`, here or on a dask.distributed cluster), and keeps

- the percentile bands of every trace of the traces CSV at every output time, and the
  distribution of every metric of a single run, in quantile sketches
  (:mod:`barrierflow.analysis.sketch`: memory independent of N, each percentile within a
  relative 1 % of the exact one over the same subjects, bit-identical however the subjects were
  chunked);
- every subject's parameter values and metrics, streamed to ``SUBJECTS.csv`` as the chunks
  come (and kept in memory only when asked, for the dashboard), with the subject's notes (why a
  metric is blank, or a flag on one that needs care: the ``note`` column of a single run's
  metrics CSV, :meth:`~barrierflow.analysis.metrics.Metrics.note_texts`) and its status;
- the failed subjects: counted, listed with their parameter values and the reason, left out of
  the bands; a failure never stops the run.

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review.
"""

from __future__ import annotations

import csv
import io
import math
import os
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from ..analysis.population import MetricTable
from ..analysis.sketch import ACCURACY, BINS, QuantileSketch
from ..caution import CAUTION
from ..errors import ScenarioError
from ..io import atomic_stream, atomic_write
from ..model import Correlation, Scenario, Variation
from ..model.paths import Param
from ..units import KINDS, unit_factor
from .distributions import Variability, bare, with_variability
from .runner import ChunkOutcome, ChunkTask, chunk_size_for, run_tasks

__all__ = ["DEFAULT_PERCENTILES", "Failure", "PopulationResult", "SubjectTable", "run_population"]

DEFAULT_PERCENTILES = (5.0, 50.0, 95.0)
MAX_LISTED = 1000
"""Failed subjects kept in the result with their values (all are counted, and all are in SUBJECTS.csv)."""
INTEGRATORS = ("auto", "exact", "rodas")
"""The integrators a study can run on (the engine's compiled population paths)."""


@dataclass(frozen=True)
class Failure:
    """A subject whose run failed.

    Attributes
    ----------
    subject : int
        Its number (from 1).
    values : tuple of float
        Its parameter values, in the units the scenario file used for each (:attr:`PopulationResult.param_units`).
    message : str
        Why it failed.
    """

    subject: int
    values: tuple[float, ...]
    message: str


@dataclass(frozen=True, eq=False)
class SubjectTable:
    """Every subject's parameter values and metrics (kept when :func:`run_population` is asked to).

    Attributes
    ----------
    values : ndarray (n, n_params)
        In the units the scenario file used (:attr:`PopulationResult.param_units`).
    metrics : MetricTable
        In the scenario's ``[output]`` units.
    ok : ndarray of bool (n,)
    """

    values: np.ndarray
    metrics: MetricTable
    ok: np.ndarray


@dataclass(frozen=True, eq=False)
class PopulationResult:
    """Percentile bands of every trace and the distribution of every metric over a population.

    Attributes
    ----------
    scenario : Scenario
        With the variability that was drawn from.
    n, seed : int
    percentiles : tuple of float
    params : tuple of Param
        The varied parameters.
    param_units : tuple of str
        The unit each parameter's values are reported in (the scenario file's).
    time_header : str
        ``time [h]`` (the traces CSV's).
    times : ndarray (n_t,)
        Output times, in the ``[output]`` time unit.
    trace_names : tuple of str
        The traces CSV's headers (``conc:central [ug/L]``).
    bands : ndarray (n_traces, n_percentiles, n_t)
        In the ``[output]`` units; NaN at a time where no subject finished.
    floored : ndarray of bool, same shape
        Where a band fell more than the sketch's range below the largest value at that time
        (reported at the floor of the range: an upper bound).
    metrics : MetricTable
        ``names`` and ``units`` of the metrics; ``values`` (n_metrics, n_percentiles) their
        percentiles over the subjects that finished.
    metric_sketch : QuantileSketch
        The metrics' histograms (one cell per metric).
    n_failed : int
    failures : tuple of Failure
        The first :data:`MAX_LISTED` failed subjects.
    accuracy : float
        Relative accuracy of every percentile.
    subjects : SubjectTable or None
    wall_time : float, s
    where : str
        Where it ran (``"here"`` or the scheduler's address).
    chunk : int
        Subjects per chunk.
    """

    scenario: Scenario
    n: int
    seed: int
    percentiles: tuple[float, ...]
    params: tuple[Param, ...]
    param_units: tuple[str, ...]
    time_header: str
    times: np.ndarray
    trace_names: tuple[str, ...]
    bands: np.ndarray
    floored: np.ndarray
    metrics: MetricTable
    metric_sketch: QuantileSketch = field(repr=False)
    n_failed: int = 0
    failures: tuple[Failure, ...] = ()
    accuracy: float = ACCURACY
    subjects: SubjectTable | None = field(default=None, repr=False)
    wall_time: float = 0.0
    where: str = "here"
    chunk: int = 0

    @property
    def n_ok(self) -> int:
        """Subjects whose run finished."""
        return self.n - self.n_failed

    def band(self, trace: str, q: float) -> np.ndarray:
        """The percentile ``q`` of a trace at every output time.

        Parameters
        ----------
        trace : str
            A trace header (``"conc:central [ug/L]"``) or its name without the unit (``"conc:central"``).
        q : float
            One of :attr:`percentiles`.
        """
        i = _find(self.trace_names, trace, "trace")
        try:
            j = self.percentiles.index(float(q))
        except ValueError:
            raise KeyError(f"percentile {q} was not computed; computed: {list(self.percentiles)}") from None
        return self.bands[i, j]

    def metric(self, name: str) -> dict[float, float]:
        """The percentiles of one metric (``"auc:central"``), by percentile."""
        i = _find(self.metrics.names, name, "metric")
        return dict(zip(self.percentiles, self.metrics.values[i].tolist(), strict=True))

    # ---------------------------------------------------------------- exports
    def band_headers(self) -> list[str]:
        """The columns of BANDS.csv: the time, then each trace at each percentile, ``conc:central p50 [ug/L]``."""
        out = [self.time_header]
        for name in self.trace_names:
            head, unit = _split_unit(name)
            out += [f"{head} p{_q(q)}{unit}" for q in self.percentiles]
        return out

    def bands_csv(self) -> str:
        """BANDS.csv as text (extensions contract): one row per output time."""
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(self.band_headers())
        cols = [self.times] + [self.bands[i, j] for i in range(len(self.trace_names))
                               for j in range(len(self.percentiles))]
        data = np.column_stack(cols)
        for row in data:
            w.writerow([_fmt(x) for x in row])
        return buf.getvalue()

    def to_csv(self, path: str | os.PathLike[str]) -> Path:
        """Write BANDS.csv atomically."""
        return atomic_write(path, self.bands_csv())

    def summary(self, metrics: Sequence[str] | None = None) -> str:
        """The printed summary: who was drawn, what failed, and the distribution of the metrics.

        Parameters
        ----------
        metrics : sequence of str, optional
            Metric names to show (default: Cmax, AUC and Cavg of each compartment; the permeated
            amount, peak flux and lag time of each barrier).
        """
        lines = [f"population of {self.n:,} subjects of '{self.scenario.name}', seed {self.seed} "
                 f"({self.wall_time:.3g} s, {self.where})"]
        for v in self.scenario.vary:
            lines.append(f"  {v.path.text}: {v.label}")
        for c in self.scenario.correlations:
            lines.append(f"  rank correlation {c.rank:g} between {c.between[0].text} and {c.between[1].text}")
        lines.append(f"finished: {self.n_ok:,}; failed: {self.n_failed:,}")
        for f in self.failures[:10]:
            shown = ", ".join(f"{p.text} = {v:.6g}{' ' + u if u else ''}"
                              for p, v, u in zip(self.params, f.values, self.param_units, strict=True))
            lines.append(f"  subject {f.subject} failed ({shown}): {f.message}")
        if self.n_failed > 10:
            lines.append(f"  ... and {self.n_failed - 10:,} more (every subject is in the subjects CSV)")
        chosen = list(metrics) if metrics else _headline(self.metrics.names)
        rows = []
        for name in chosen:
            i = _find(self.metrics.names, name, "metric")
            unit = self.metrics.units[i]
            rows.append([f"{self.metrics.names[i]}" + (f" [{unit}]" if unit else "")]
                        + [_show(x) for x in self.metrics.values[i]])
        heads = ["metric"] + [f"p{_q(q)}" for q in self.percentiles]
        if rows:
            widths = [max(len(r[k]) for r in [heads] + rows) for k in range(len(heads))]
            lines.append("")
            for r in [heads] + rows:
                lines.append("  ".join(x.ljust(widths[k]) if k == 0 else x.rjust(widths[k]) for k, x in enumerate(r)))
        lines.append("")
        lines.append(f"percentiles of the subjects that finished, each within {100 * self.accuracy:g} % "
                     "(relative) of the exact one")
        return "\n".join(lines)

    def as_dict(self) -> dict[str, Any]:
        """A JSON-able summary (bands not included: they are in BANDS.csv)."""
        return {
            "caution": CAUTION,
            "scenario": self.scenario.name, "n": self.n, "seed": self.seed, "failed": self.n_failed,
            "percentiles": list(self.percentiles), "accuracy": self.accuracy,
            "variability": [v.to_table() for v in self.scenario.vary],
            "correlations": [c.to_table() for c in self.scenario.correlations],
            "metrics": {name: {"unit": unit, **{f"p{_q(q)}": _json(x) for q, x in zip(self.percentiles, row,
                                                                                     strict=True)}}
                        for name, unit, row in zip(self.metrics.names, self.metrics.units,
                                                   self.metrics.values.tolist(), strict=True)},
            "failures": [{"subject": f.subject, "values": list(f.values), "message": f.message}
                         for f in self.failures],
        }


# ---------------------------------------------------------------- the study
def run_population(scenario: Scenario, n: int, seed: int = 0, *, vary: Sequence[Variation | str] = (),
                   correlate: Sequence[Correlation | tuple[str, str, float]] = (),
                   percentiles: Sequence[float] = DEFAULT_PERCENTILES,
                   subjects_csv: str | os.PathLike[str] | None = None, keep_subjects: bool = False,
                   scheduler: object | None = None, chunk: int | None = None,
                   integrator: str | None = None, accuracy: float = ACCURACY, bins: int = BINS,
                   progress: Callable[[int, int], None] | None = None) -> PopulationResult:
    """Simulate ``n`` subjects drawn from the scenario's variability.

    Parameters
    ----------
    scenario : Scenario
        With ``[[vary]]`` (and ``[[correlation]]``) tables, or given them by ``vary`` / ``correlate``.
    n : int
        Number of subjects.
    seed : int
        Seed of the draws; subject k (from 1) draws from ``SeedSequence(seed, spawn_key=(k,))``.
    vary : sequence of Variation or str
        More variations (the command line's ``PATH=SPEC``); one on a path the scenario varies
        replaces the scenario's.
    correlate : sequence of Correlation or (path, path, rank)
    percentiles : sequence of float
        Of the bands and the metrics (default 5, 50, 95).
    subjects_csv : path-like, optional
        Write every subject's values and metrics there (atomically, row by row as the chunks come),
        then its notes (why a metric is blank) and its status (``ok`` or why it failed).
    keep_subjects : bool
        Keep every subject's values and metrics in the result (memory grows with ``n``).
    scheduler : str or distributed.Client, optional
        Run on a dask.distributed cluster (identical results).
    chunk : int, optional
        Subjects per chunk (default: chosen from the size of the traces; no effect on the results).
    integrator : {"auto", "exact", "rodas"}, optional
    accuracy, bins
        Of the quantile sketches (:mod:`barrierflow.analysis.sketch`).
    progress : callable, optional
        Called with (subjects done, n) after each chunk.

    Returns
    -------
    PopulationResult

    Raises
    ------
    ScenarioError
        For a bad size, seed, percentile, variability or integrator (before anything runs).

    Examples
    --------
    >>> import barrierflow as bf                                                      # doctest: +SKIP
    >>> from barrierflow.studies import run_population                                # doctest: +SKIP
    >>> s = bf.load("scenarios/daily_patch.toml")                                     # doctest: +SKIP
    >>> pop = run_population(s, 1000, seed=1, vary=["compartment.central.clearance=lognormal:cv=0.3"])  # doctest: +SKIP
    >>> pop.band("conc:central", 50).shape                                            # doctest: +SKIP
    (2017,)
    """
    start = time.perf_counter()
    plan = _plan(scenario, n, seed, vary, correlate, percentiles, chunk, integrator)
    full, variability, qs, size = plan
    base = bare(full)
    params = variability.params
    units = tuple(p.file_unit(full) for p in params)
    to_file = np.array([_file_factor(p, full) for p in params], dtype=float)
    traces: list[QuantileSketch] = []
    names: tuple[str, ...] = ()
    metric_sketch: QuantileSketch | None = None
    metric_meta: tuple[tuple[str, ...], tuple[str, ...]] = ((), ())
    times = np.zeros(0)
    time_header = ""
    n_failed = 0
    failures: list[Failure] = []
    kept_values: list[np.ndarray] = []
    kept_metrics: list[np.ndarray] = []
    kept_notes: list[np.ndarray] = []
    kept_ok: list[np.ndarray] = []
    drawn: dict[int, np.ndarray] = {}  # the values of the chunks in flight, by first subject
    done = 0

    def tasks() -> Iterator[ChunkTask]:
        for first in range(1, n + 1, size):
            count = min(size, n + 1 - first)
            drawn[first] = variability.draw(seed, first, count)
            yield ChunkTask(base, params, first, drawn[first], True, accuracy, bins,
                            None if integrator in (None, "auto") else integrator)

    writer = _SubjectsWriter(subjects_csv, params, units) if subjects_csv is not None else None
    with writer or _nothing():
        for out in run_tasks(tasks(), scheduler=scheduler):
            if metric_sketch is None:
                metric_meta = (out.metrics.names, out.metrics.units)
                metric_sketch = QuantileSketch(len(out.metrics.names), accuracy, bins)
                times, time_header = out.times, out.time_header
            if out.trace_names and not names:
                names = out.trace_names
                traces = [QuantileSketch(len(out.times), accuracy, bins) for _ in names]
                times, time_header = out.times, out.time_header
            for sk, counts in zip(traces, out.trace_counts, strict=False):
                sk.add(counts)
            metric_sketch.add(out.metric_counts)
            file_values = drawn.pop(out.first) * to_file[None, :]
            for i in np.flatnonzero(~out.ok):
                n_failed += 1
                if len(failures) < MAX_LISTED:
                    failures.append(Failure(out.first + int(i), tuple(file_values[i].tolist()), out.messages[i]))
            if writer is not None:
                writer.write(out, file_values)
            if keep_subjects:
                kept_values.append(file_values)
                kept_metrics.append(out.metrics.values)
                kept_notes.append(out.metrics.notes)
                kept_ok.append(out.ok)
            done += out.count
            if progress is not None:
                progress(done, n)
    assert metric_sketch is not None
    both = [sk.percentiles_and_floored(qs) for sk in traces]
    bands = np.stack([b[0] for b in both]) if traces else np.zeros((0, len(qs), len(times)))
    floored = np.stack([b[1] for b in both]) if traces else np.zeros(bands.shape, dtype=bool)
    metric_values = metric_sketch.percentiles(qs).T
    subjects = None
    if keep_subjects:
        subjects = SubjectTable(np.concatenate(kept_values),
                                MetricTable(metric_meta[0], metric_meta[1], np.concatenate(kept_metrics),
                                            np.concatenate(kept_notes)),
                                np.concatenate(kept_ok))
    return PopulationResult(
        scenario=full, n=n, seed=seed, percentiles=tuple(qs), params=params, param_units=units,
        time_header=time_header, times=times, trace_names=names, bands=bands, floored=floored,
        metrics=MetricTable(metric_meta[0], metric_meta[1], metric_values), metric_sketch=metric_sketch,
        n_failed=n_failed, failures=tuple(failures), accuracy=accuracy, subjects=subjects,
        wall_time=time.perf_counter() - start, where=_where(scheduler), chunk=size)


def _plan(scenario: Scenario, n: int, seed: int, vary, correlate, percentiles, chunk, integrator):
    """Check the options and resolve the variability, before anything runs."""
    if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 1:
        raise ScenarioError.single("population size", repr(n), "a whole number of subjects >= 1, such as 1000")
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise ScenarioError.single("seed", repr(seed), "a whole number >= 0")
    qs = _percentiles(percentiles)
    if chunk is not None and (isinstance(chunk, bool) or not isinstance(chunk, int) or chunk < 1):
        raise ScenarioError.single("chunk", repr(chunk), "a whole number of subjects per chunk >= 1")
    if integrator is not None and integrator not in INTEGRATORS:
        raise ScenarioError.single("integrator", repr(integrator),
                                   f"a population runs on {', '.join(INTEGRATORS)} (the compiled paths)")
    full = with_variability(scenario, vary, correlate)
    if not full.vary:
        raise ScenarioError.single("variability", "no [[vary]] table and no --vary option",
                                   "give at least one parameter a distribution, such as "
                                   "--vary compartment.central.clearance=lognormal:cv=0.3")
    variability = Variability.from_scenario(full)
    size = chunk or chunk_size_for(full, n)
    return full, variability, qs, int(size)


def _percentiles(percentiles: Sequence[float]) -> tuple[float, ...]:
    try:
        qs = tuple(float(q) for q in percentiles)
    except (TypeError, ValueError):
        raise ScenarioError.single("percentiles", repr(percentiles), "numbers from 0 to 100, such as 5 50 95") from None
    if not qs or any(not math.isfinite(q) or not 0 <= q <= 100 for q in qs):
        raise ScenarioError.single("percentiles", " ".join(f"{q:g}" for q in qs) or "none",
                                   "numbers from 0 to 100, such as 5 50 95")
    if len(set(qs)) != len(qs):
        raise ScenarioError.single("percentiles", " ".join(f"{q:g}" for q in qs), "each percentile once")
    return qs


def _file_factor(p: Param, scenario: Scenario) -> float:
    """Internal unit -> the unit the file wrote the parameter in."""
    if p.kind not in KINDS:
        return 1.0
    return unit_factor(p.kind, p.file_unit(scenario), scenario.substance.molar_mass)


def _where(scheduler: object | None) -> str:
    if scheduler is None:
        import numba

        return f"here, {numba.get_num_threads()} threads"
    return f"cluster {scheduler}" if isinstance(scheduler, str) else "cluster"


class _nothing:
    def __enter__(self):
        return None

    def __exit__(self, *exc):
        return False


class _SubjectsWriter:
    """SUBJECTS.csv, written row by row into a temporary file and renamed into place at the end."""

    def __init__(self, path: str | os.PathLike[str], params: Sequence[Param], units: Sequence[str]):
        self.path = path
        self.params = params
        self.units = units
        self._cm = atomic_stream(path)
        self._fh: TextIO | None = None
        self._w = None

    def __enter__(self) -> _SubjectsWriter:
        self._fh = self._cm.__enter__()
        self._w = csv.writer(self._fh, lineterminator="\n")
        return self

    def __exit__(self, *exc) -> bool:
        return bool(self._cm.__exit__(*exc))

    def write(self, out: ChunkOutcome, values: np.ndarray) -> None:
        w = self._w
        if out.first == 1:
            heads = ["subject"] + [f"{p.text} [{u}]" if u else p.text for p, u in zip(self.params, self.units,
                                                                                        strict=True)]
            heads += [f"{n} [{u}]" if u else n for n, u in zip(out.metrics.names, out.metrics.units, strict=True)]
            heads += ["notes", "status"]
            w.writerow(heads)
        notes = out.metrics.notes
        for i in range(out.count):
            row = [str(out.first + i)] + [format(float(x), ".10g") for x in values[i]]
            row += [_fmt(x) for x in out.metrics.values[i]]
            row.append("" if notes is None else notes[i])
            row.append("ok" if out.ok[i] else f"failed: {out.messages[i]}")
            w.writerow(row)


# ---------------------------------------------------------------- small helpers
def _find(names: Sequence[str], name: str, what: str) -> int:
    for i, full in enumerate(names):
        if full == name or _split_unit(full)[0] == name:
            return i
    raise KeyError(f"no {what} {name!r}; known: {', '.join(_split_unit(x)[0] for x in names)}")


def _split_unit(header: str) -> tuple[str, str]:
    """``"conc:central [ug/L]"`` -> (``"conc:central"``, ``" [ug/L]"``)."""
    i = header.rfind(" [")
    return (header, "") if i < 0 else (header[:i], header[i:])


def _q(q: float) -> str:
    return format(q, "g")


def _fmt(x: float) -> str:
    return "" if x is None or (isinstance(x, float) and math.isnan(x)) or (
        isinstance(x, np.floating) and np.isnan(x)) else format(float(x), ".10g")


def _show(x: float) -> str:
    return "-" if x is None or not math.isfinite(x) else format(float(x), ".4g")


def _json(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _headline(names: Sequence[str]) -> list[str]:
    keep = ("cmax", "auc", "c_avg", "permeated", "peak_flux", "lag_time")
    return [n for n in names if n.split(":", 1)[0] in keep]
