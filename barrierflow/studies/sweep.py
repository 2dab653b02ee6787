"""Sweeps: what-if grids over one or two parameters, every metric at every point.

:func:`run_sweep` sets one or two parameters (:class:`Axis`: a path, a range and a number of
steps, linear or logarithmic) to every point of their grid, simulates the points (here or on a
cluster, :mod:`barrierflow.studies.runner`) and returns every metric of a single run at every
point (:class:`SweepResult`), as a CSV and, for two parameters, as a grid for a heatmap. The
scenario's ``[[vary]]`` tables play no part: every other value is the scenario's.

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review.
"""

from __future__ import annotations

import csv
import io
import math
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..analysis.population import MetricTable
from ..caution import CAUTION
from ..errors import ScenarioError, UnitsError
from ..io import atomic_write
from ..model import Scenario
from ..model.paths import Param, parse_param
from ..units import KINDS, unit_factor
from .distributions import bare
from .runner import evaluate

__all__ = ["SPACINGS", "Axis", "SweepResult", "run_sweep"]

SPACINGS = ("linear", "log")
MAX_POINTS = 100_000
"""Most points of a sweep (steps of one axis times those of the other)."""


@dataclass(frozen=True)
class Axis:
    """One swept parameter: ``steps`` values from ``low`` to ``high``, both included.

    Parameters
    ----------
    param : Param
        A parameter path or tied group (a quantity that does not shape the run).
    low, high : float, internal unit of the path
    steps : int
        At least 2.
    spacing : {"linear", "log"}
        Equal steps, or equal ratios (both ends > 0).
    """

    param: Param
    low: float
    high: float
    steps: int = 11
    spacing: str = "linear"

    def __post_init__(self) -> None:
        if isinstance(self.param, str):
            object.__setattr__(self, "param", parse_param(self.param, what="--over"))
        p = self.param
        label = f"--over {p.text}"
        if not p.numeric or p.kind == "count" or p.structural:
            raise ScenarioError.single("--over", repr(p.text), f"{p.label} cannot be swept: a sweep sets a rate, an "
                                       "amount, a volume or a property of a layer (not a count or a time that shapes "
                                       "the run)")
        if not (isinstance(self.steps, int) and not isinstance(self.steps, bool) and 2 <= self.steps <= 10_000):
            raise ScenarioError.single(f"{label} steps", repr(self.steps), "a whole number of points from 2 to 10000")
        if self.spacing not in SPACINGS:
            raise ScenarioError.single(f"{label} spacing", repr(self.spacing), "linear or log")
        for name in ("low", "high"):
            v = getattr(self, name)
            if not isinstance(v, int | float) or isinstance(v, bool) or not math.isfinite(v):
                raise ScenarioError.single(f"{label} {name}", repr(v), "a finite value")
        if self.low >= self.high:
            raise ScenarioError.single(f"{label}", f"{self.low:g}..{self.high:g}", "the low end must be below the high "
                                       "end")
        if self.spacing == "log" and self.low <= 0:
            raise ScenarioError.single(f"{label} spacing", "log", "log steps need both ends > 0; use linear steps or "
                                       "a low end > 0")

    @classmethod
    def parse(cls, text: str, scenario: Scenario | None = None, *, steps: int = 11,
              spacing: str = "linear") -> Axis:
        """Read ``PATH=LO..HI`` (values with their units: ``compartment.central.clearance=5 L/h..40 L/h``)."""
        path, eq, rng = str(text).partition("=")
        lo, dots, hi = rng.partition("..")
        if not eq or not dots or not path.strip() or not lo.strip() or not hi.strip():
            raise ScenarioError.single("--over", repr(text), "PATH=LO..HI, such as "
                                       "'compartment.central.clearance=5 L/h..40 L/h'")
        param = parse_param(path.strip(), scenario, what="--over")
        try:
            low, high = (param.read(x.strip(), scenario) for x in (lo, hi))
        except UnitsError as err:
            raise ScenarioError.single(f"--over {param.text}", err.value, err.expected) from None
        return cls(param, float(low), float(high), steps, spacing)

    @property
    def values(self) -> np.ndarray:
        """The points, internal units."""
        if self.spacing == "log":
            return np.geomspace(self.low, self.high, self.steps)
        return np.linspace(self.low, self.high, self.steps)


@dataclass(frozen=True, eq=False)
class SweepResult:
    """Every metric at every point of a sweep.

    Attributes
    ----------
    scenario : Scenario
    axes : tuple of Axis
    points : ndarray (n_points, n_axes)
        The parameters' values, internal units; with two axes the first varies slowest.
    metrics : MetricTable
        One row per point, in the ``[output]`` units; NaN where the point failed.
    ok : ndarray of bool
    messages : tuple of str
    units : tuple of str
        The unit the file used for each swept parameter (the CSV's).
    """

    scenario: Scenario
    axes: tuple[Axis, ...]
    points: np.ndarray
    metrics: MetricTable
    ok: np.ndarray
    messages: tuple[str, ...] = field(repr=False)
    units: tuple[str, ...] = ()

    @property
    def shape(self) -> tuple[int, ...]:
        """Steps of each axis."""
        return tuple(a.steps for a in self.axes)

    def axis_values(self, i: int) -> np.ndarray:
        """The values of axis ``i`` in the unit the file used."""
        return self.axes[i].values * _factor(self.axes[i].param, self.scenario)

    def grid(self, metric: str) -> np.ndarray:
        """One metric over the grid: shape (steps,) or (steps of axis 1, steps of axis 2)."""
        return self.metrics.column(_name(self.metrics.names, metric)).reshape(self.shape)

    def csv_text(self) -> str:
        """The sweep as CSV: the swept parameters (file units), every metric (``[output]`` units), status."""
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        heads = [f"{a.param.text} [{u}]" if u else a.param.text for a, u in zip(self.axes, self.units, strict=True)]
        heads += [f"{n} [{u}]" if u else n for n, u in zip(self.metrics.names, self.metrics.units, strict=True)]
        w.writerow(heads + ["status"])
        factors = np.array([_factor(a.param, self.scenario) for a in self.axes])
        for i in range(len(self.points)):
            row = [format(float(x), ".10g") for x in self.points[i] * factors]
            row += ["" if math.isnan(x) else format(float(x), ".10g") for x in self.metrics.values[i]]
            row.append("ok" if self.ok[i] else f"failed: {self.messages[i]}")
            w.writerow(row)
        return buf.getvalue()

    def to_csv(self, path: str | os.PathLike[str]) -> Path:
        """Write the CSV atomically."""
        return atomic_write(path, self.csv_text())

    def summary(self, metrics: Sequence[str] | None = None) -> str:
        """A printed table of a few metrics at every point (all points up to 60)."""
        chosen = [_name(self.metrics.names, m) for m in metrics] if metrics else [
            n for n in self.metrics.names if n.split(":", 1)[0] in ("cmax", "auc", "permeated", "lag_time")]
        idx = [self.metrics.names.index(n) for n in chosen]
        heads = [f"{a.param.text} [{u}]" if u else a.param.text for a, u in zip(self.axes, self.units, strict=True)]
        heads += [f"{self.metrics.names[j]} [{self.metrics.units[j]}]" if self.metrics.units[j]
                  else self.metrics.names[j] for j in idx]
        factors = np.array([_factor(a.param, self.scenario) for a in self.axes])
        rows = []
        for i in range(min(len(self.points), 60)):
            row = [format(float(x), ".4g") for x in self.points[i] * factors]
            row += ["-" if not self.ok[i] or math.isnan(self.metrics.values[i, j])
                    else format(float(self.metrics.values[i, j]), ".4g") for j in idx]
            rows.append(row)
        widths = [max(len(r[k]) for r in [heads] + rows) for k in range(len(heads))]
        lines = [f"sweep of '{self.scenario.name}': {' x '.join(str(s) for s in self.shape)} points, "
                 f"{int((~self.ok).sum())} failed"]
        for r in [heads] + rows:
            lines.append("  ".join(x.rjust(widths[k]) for k, x in enumerate(r)))
        if len(self.points) > 60:
            lines.append(f"... {len(self.points) - 60} more points in the CSV")
        for i in np.flatnonzero(~self.ok)[:5]:
            lines.append(f"point {i + 1} failed: {self.messages[i]}")
        return "\n".join(lines)

    def as_dict(self) -> dict[str, Any]:
        """A JSON-able form (values in the file's and the ``[output]`` units)."""
        return {"caution": CAUTION, "scenario": self.scenario.name,
                "axes": [{"path": a.param.text, "unit": u, "values": self.axis_values(i).tolist(),
                          "spacing": a.spacing} for i, (a, u) in enumerate(zip(self.axes, self.units, strict=True))],
                "metrics": {n: {"unit": u, "values": [None if math.isnan(x) else x for x in self.metrics.column(n)]}
                            for n, u in zip(self.metrics.names, self.metrics.units, strict=True)},
                "failed": [{"point": int(i) + 1, "message": self.messages[i]} for i in np.flatnonzero(~self.ok)]}


def run_sweep(scenario: Scenario, axes: Sequence[Axis | str], *, steps: int | Sequence[int] = 11,
              spacing: str | Sequence[str] = "linear", scheduler: object | None = None,
              progress: Callable[[int, int], None] | None = None, integrator: str | None = None) -> SweepResult:
    """Simulate every point of a grid over one or two parameters.

    Parameters
    ----------
    scenario : Scenario
    axes : sequence of Axis or str
        One or two; a text is ``PATH=LO..HI`` (read with ``steps`` and ``spacing``).
    steps : int or sequence of int
        Points per axis (for the axes given as text; default 11).
    spacing : str or sequence of str
        ``"linear"`` or ``"log"`` per axis (for the axes given as text).
    scheduler : str or distributed.Client, optional
        Run on a dask.distributed cluster.
    progress : callable, optional
        Called with (points done, points).
    integrator : {"auto", "exact", "rodas"}, optional

    Returns
    -------
    SweepResult
    """
    if isinstance(axes, str | Axis):
        axes = [axes]
    if not 1 <= len(axes) <= 2:
        raise ScenarioError.single("--over", f"{len(axes)} parameters", "a sweep goes over one or two parameters")
    n_text = len(axes)
    steps_l = [steps] * n_text if isinstance(steps, int) else list(steps)
    spacing_l = [spacing] * n_text if isinstance(spacing, str) else list(spacing)
    if len(steps_l) not in (1, n_text) or len(spacing_l) not in (1, n_text):
        raise ScenarioError.single("--steps", " ".join(map(str, steps_l)), "one number for every axis, or one per axis")
    steps_l = steps_l * n_text if len(steps_l) == 1 else steps_l
    spacing_l = spacing_l * n_text if len(spacing_l) == 1 else spacing_l
    parsed = tuple(a if isinstance(a, Axis) else Axis.parse(a, scenario, steps=st, spacing=sp)
                   for a, st, sp in zip(axes, steps_l, spacing_l, strict=True))
    for a in parsed:
        for p in a.param.paths:
            if not p.exists(scenario):
                parse_param(p.text, scenario, what="--over")  # raises with "did you mean"
    if len(parsed) == 2 and set(parsed[0].param.paths) & set(parsed[1].param.paths):
        raise ScenarioError.single("--over", parsed[1].param.text, "sweep two different parameters")
    grids = np.meshgrid(*[a.values for a in parsed], indexing="ij")
    points = np.column_stack([g.ravel() for g in grids])
    if len(points) > MAX_POINTS:
        raise ScenarioError.single("--steps", f"{len(points):,} points", f"at most {MAX_POINTS:,}")
    if integrator is not None and integrator not in ("auto", "exact", "rodas"):
        raise ScenarioError.single("integrator", repr(integrator), "a sweep runs on auto, exact or rodas")
    base = bare(scenario)
    out = evaluate(base, [a.param for a in parsed], points, scheduler=scheduler, progress=progress,
                   integrator=None if integrator in (None, "auto") else integrator)
    units = tuple(a.param.file_unit(scenario) for a in parsed)
    return SweepResult(scenario, parsed, points, out.metrics, out.ok, out.messages, units)


def _factor(p: Param, scenario: Scenario) -> float:
    if p.kind not in KINDS:
        return 1.0
    return unit_factor(p.kind, p.file_unit(scenario), scenario.substance.molar_mass)


def _name(names: Sequence[str], metric: str) -> str:
    if metric in names:
        return metric
    raise ScenarioError.single("--metric", repr(metric), f"one of the metrics: {', '.join(names)}")
