"""Sensitivity: which inputs drive a metric, locally and over the variability.

- :func:`local_sensitivity`: the normalised coefficients d ln(metric) / d ln(parameter) at the
  scenario's values, by central differences in ln p with the step h = (3 eps)^(1/3), eps the
  relative accuracy of the path the engine takes (its rounding against the truncation error of
  the difference, which is O(h^2); the classic choice for a central difference, for example Press
  et al., Numerical Recipes, 3rd ed., 2007, section 5.7).
- :func:`sobol_indices`: first-order and total Sobol indices over the ``[[vary]]`` distributions,
  from the Saltelli design (a scrambled Sobol' sequence of N (d + 2) points, or N (2d + 2) with
  the second order) and the estimators of SALib (Saltelli et al., Comput. Phys. Commun. 181,
  2010, 259-270; Jansen's total index), with bootstrap intervals.
- :func:`morris_screening`: the Morris elementary effects (mu*, mu, sigma) for many parameters
  at the cost of r (d + 1) runs (Morris, Technometrics 33, 1991, 161-174; mu* of Campolongo,
  Cariboni and Saltelli, Environ. Model. Softw. 22, 2007, 1509-1518), from SALib.

The global methods sample the unit hypercube and carry each coordinate through the quantile
function of its parameter's distribution (:meth:`barrierflow.studies.distributions.Marginal.ppf`),
so the indices are those of the distributions of the scenario. They assume independent
parameters: a scenario with ``[[correlation]]`` tables is refused. :func:`sobol_of_function`
does the same for any vectorised function (the checks against published indices use it).

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review.
"""

from __future__ import annotations

import csv
import io
import math
import os
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..analysis.population import MetricTable
from ..caution import CAUTION
from ..errors import ScenarioError
from ..io import atomic_write
from ..model import Scenario, Variation
from ..model.paths import Param, parameter_paths, parse_param
from .distributions import Marginal, Variability, bare, with_variability
from .runner import evaluate, solver_accuracy

__all__ = ["DEFAULT_METRICS", "METHODS", "SensitivityResult", "local_sensitivity", "morris_screening",
           "sobol_indices", "sobol_of_function"]

METHODS = ("local", "sobol", "morris")

DEFAULT_METRICS = ("cmax", "auc", "permeated", "peak_flux", "lag_time")
"""The metrics a sensitivity analysis reports unless told otherwise (each compartment's Cmax and
AUC, each barrier's permeated amount, peak flux and lag time)."""

SMOOTH = frozenset({
    "cmax", "cmin", "cmax_interval", "auc", "auc_inf", "lambda_z", "half_life", "c_avg", "c_avg_interval",
    "time_above", "accumulation_ratio", "peak_flux", "permeated", "permeated_amount", "lag_time", "steady_flux",
    "fraction_absorbed", "content", "content_fraction", "auc_extrapolated_percent"})
"""Metrics that change smoothly with the parameters (not times read off the output grid or counts);
a sensitivity analysis takes only these (and the interval AUCs)."""

_UNIT_EDGE = 1e-12  # a quasi-random coordinate of exactly 0 or 1 would be an infinite quantile


@dataclass(frozen=True, eq=False)
class SensitivityResult:
    """The sensitivity indices of each parameter for each metric.

    Attributes
    ----------
    method : {"local", "sobol", "morris"}
    scenario : Scenario
    params : tuple of Param
    metrics : tuple of str
        Metric names (``"auc:central"``).
    units : tuple of str
        Their ``[output]`` units.
    indices : dict of str to ndarray (n_params, n_metrics)
        ``local``: ``coefficient``; ``sobol``: ``first_order``, ``first_order_ci95``, ``total``,
        ``total_ci95`` (half-widths of the bootstrap intervals); ``morris``: ``mu_star``,
        ``mu_star_ci95``, ``mu``, ``sigma`` (in metric units per the span of a distribution).
    runs : int
        Simulations made.
    failed : int
        Runs that failed (a metric with a failed run has NaN indices for the global methods).
    messages : tuple of str
        Why the first failed runs failed.
    settings : dict
        ``step`` (local), ``n``, ``seed``, ``second_order``, ``levels``, ...
    base_values : ndarray (n_metrics,) or None
        The metrics at the scenario's values (local).
    """

    method: str
    scenario: Scenario
    params: tuple[Param, ...]
    metrics: tuple[str, ...]
    units: tuple[str, ...]
    indices: dict[str, np.ndarray]
    runs: int
    failed: int = 0
    messages: tuple[str, ...] = ()
    settings: dict[str, Any] = field(default_factory=dict)
    base_values: np.ndarray | None = None

    @property
    def main(self) -> str:
        """The index that ranks the parameters: ``coefficient`` (by size), ``total`` or ``mu_star``."""
        return {"local": "coefficient", "sobol": "total", "morris": "mu_star"}[self.method]

    def ranking(self, metric: str) -> list[tuple[str, float]]:
        """The parameters by influence on ``metric``, the largest first: (path text, index)."""
        j = _index(self.metrics, metric)
        values = self.indices[self.main][:, j]
        order = sorted(range(len(self.params)), key=lambda i: -abs(values[i]) if math.isfinite(values[i]) else 1.0)
        return [(self.params[i].text, float(values[i])) for i in order]

    def rows(self) -> list[dict[str, Any]]:
        """One row per parameter and metric: the indices of the method."""
        out = []
        for i, p in enumerate(self.params):
            for j, m in enumerate(self.metrics):
                row: dict[str, Any] = {"parameter": p.text, "metric": m, "unit": self.units[j]}
                row.update({k: float(v[i, j]) for k, v in self.indices.items()})
                out.append(row)
        return out

    def csv_text(self) -> str:
        """CSV: ``parameter, metric, unit`` and the indices of the method, one row per pair."""
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        keys = list(self.indices)
        w.writerow(["parameter", "metric", "unit", *keys])
        for r in self.rows():
            w.writerow([r["parameter"], r["metric"], r["unit"]] + ["" if math.isnan(r[k]) else format(r[k], ".6g")
                                                                  for k in keys])
        return buf.getvalue()

    def to_csv(self, path: str | os.PathLike[str]) -> Path:
        """Write the CSV atomically."""
        return atomic_write(path, self.csv_text())

    def summary(self) -> str:
        """The printed table: every parameter against every metric, by the ranking index."""
        words = {"local": "d ln(metric) / d ln(parameter) at the scenario's values",
                 "sobol": "Sobol indices: total (first order), over the [[vary]] distributions",
                 "morris": "Morris mu* (metric units per span of the distribution), over the [[vary]] distributions"}
        lines = [f"{self.method} sensitivity of '{self.scenario.name}': {words[self.method]}",
                 f"{self.runs:,} runs, {self.failed:,} failed" + "".join(f", {k} {v}" for k, v in
                                                                          self.settings.items())]
        for m in self.messages[:5]:
            lines.append(f"  a run failed: {m}")
        heads = ["parameter"] + list(self.metrics)
        rows = []
        for i, p in enumerate(self.params):
            row = [p.text]
            for j in range(len(self.metrics)):
                v = self.indices[self.main][i, j]
                cell = "-" if not math.isfinite(v) else format(v, ".3g")
                if self.method == "sobol" and math.isfinite(self.indices["first_order"][i, j]):
                    cell += f" ({self.indices['first_order'][i, j]:.3g})"
                row.append(cell)
            rows.append(row)
        widths = [max(len(r[k]) for r in [heads] + rows) for k in range(len(heads))]
        for r in [heads] + rows:
            lines.append("  ".join(x.ljust(widths[k]) if k == 0 else x.rjust(widths[k]) for k, x in enumerate(r)))
        return "\n".join(lines)

    def as_dict(self) -> dict[str, Any]:
        """A JSON-able form."""
        return {"caution": CAUTION, "method": self.method, "scenario": self.scenario.name, "runs": self.runs,
                "failed": self.failed, "settings": dict(self.settings),
                "rows": [{k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in r.items()}
                         for r in self.rows()]}


# ---------------------------------------------------------------- local
def local_sensitivity(scenario: Scenario, params: Sequence[Param | str] | None = None,
                      metrics: Sequence[str] | None = None, *, step: float | None = None,
                      scheduler: object | None = None, progress: Callable[[int, int], None] | None = None,
                      integrator: str | None = None) -> SensitivityResult:
    """Normalised local sensitivity coefficients d ln(metric) / d ln(parameter).

    Parameters
    ----------
    scenario : Scenario
    params : sequence of Param or str, optional
        Default: every quantity of the network and the doses that holds a value > 0 and does not
        shape the run (:func:`barrierflow.model.paths.parameter_paths`, the substance left out).
    metrics : sequence of str, optional
        Metric names (``"auc:central"``); default: :data:`DEFAULT_METRICS` of every compartment
        and barrier.
    step : float, optional
        The step in ln p (default (3 eps)^(1/3), see the module notes).
    scheduler, progress, integrator
        As for :func:`barrierflow.studies.run_sweep`.

    Returns
    -------
    SensitivityResult
        ``coefficient`` (NaN where the metric is not > 0 at the three points), and the metrics at
        the scenario's values in :attr:`SensitivityResult.base_values`.
    """
    base = bare(scenario)
    chosen = _local_params(base, params)
    if step is None:
        step = (3.0 * solver_accuracy(base, integrator)) ** (1.0 / 3.0)
    if not (isinstance(step, float | int) and 0 < step < 1):
        raise ScenarioError.single("step", repr(step), "a step in ln(parameter) between 0 and 1, such as 0.01")
    centre = np.array([float(p.get(base)) for p in chosen])
    d = len(chosen)
    values = np.tile(centre, (2 * d + 1, 1))
    for i in range(d):
        values[1 + 2 * i, i] = centre[i] * math.exp(step)
        values[2 + 2 * i, i] = centre[i] * math.exp(-step)
    out = evaluate(base, chosen, values, scheduler=scheduler, progress=progress, integrator=_engine(integrator))
    names, units, cols = _pick(out.metrics, metrics)
    y = out.metrics.values[:, cols]
    with np.errstate(divide="ignore", invalid="ignore"):
        ln = np.where(y > 0, np.log(np.where(y > 0, y, 1.0)), np.nan)
    coef = np.full((d, len(cols)), np.nan)
    for i in range(d):
        coef[i] = (ln[1 + 2 * i] - ln[2 + 2 * i]) / (2.0 * step)
    failed = int((~out.ok).sum())
    return SensitivityResult("local", scenario, tuple(chosen), names, units, {"coefficient": coef}, len(values),
                             failed, tuple(m for m in out.messages if m)[:20], {"step": float(step)},
                             y[0].copy())


def _local_params(base: Scenario, params: Sequence[Param | str] | None) -> list[Param]:
    if params is None:
        out = []
        for p in parameter_paths(base, structural=False):
            if p.table == "substance" or p.kind == "count":
                continue
            v = p.get(base)
            if isinstance(v, float) and v > 0:
                out.append(p)
        return out
    chosen = []
    for text in params:
        p = parse_param(text, base, what="--param")
        if not p.numeric or p.kind == "count" or p.structural:
            raise ScenarioError.single("--param", repr(p.text), f"{p.label} is not a quantity that a sensitivity "
                                       "analysis can change (not a count or a time that shapes the run)")
        v = p.get(base)
        if v is None or not v > 0:
            raise ScenarioError.single("--param", repr(p.text), f"{p.label} is {v!r} in the scenario; "
                                       "d ln(metric) / d ln(parameter) needs a value > 0")
        chosen.append(p)
    if not chosen:
        raise ScenarioError.single("--param", "none", "name at least one parameter")
    return chosen


# ---------------------------------------------------------------- global
def sobol_indices(scenario: Scenario, n: int = 1024, metrics: Sequence[str] | None = None, *, seed: int = 0,
                  vary: Sequence[Variation | str] = (), second_order: bool = False, resamples: int = 100,
                  scheduler: object | None = None, progress: Callable[[int, int], None] | None = None,
                  integrator: str | None = None) -> SensitivityResult:
    """First-order and total Sobol indices of each metric over the ``[[vary]]`` distributions.

    Parameters
    ----------
    scenario : Scenario
    n : int
        Base samples, a power of 2 (the Saltelli design has n (d + 2) points, n (2d + 2) with
        ``second_order``).
    metrics : sequence of str, optional
        As for :func:`local_sensitivity`.
    seed : int
        Of the scrambling of the Sobol' sequence and of the bootstrap.
    vary : sequence of Variation or str
        More variations (the ``--vary`` options).
    second_order : bool
        Also sample for the second-order indices (reported by SALib, not in the result).
    resamples : int
        Bootstrap resamples of the intervals.

    Returns
    -------
    SensitivityResult
        ``first_order``, ``first_order_ci95``, ``total``, ``total_ci95``.
    """
    variability, full = _global_variability(scenario, vary)
    _power_of_two(n)
    d = variability.size
    unit = _saltelli_unit(d, n, seed, second_order)
    values = variability.from_unit(unit)
    out = evaluate(bare(full), variability.params, values, scheduler=scheduler, progress=progress,
                   integrator=_engine(integrator))
    names, units, cols = _pick(out.metrics, metrics)
    idx = _sobol_from(out.metrics.values[:, cols], d, second_order, resamples, seed)
    failed = int((~out.ok).sum())
    return SensitivityResult("sobol", full, variability.params, names, units, idx, len(values), failed,
                             tuple(m for m in out.messages if m)[:20],
                             {"n": n, "seed": seed, "second_order": second_order, "resamples": resamples})


def morris_screening(scenario: Scenario, trajectories: int = 20, metrics: Sequence[str] | None = None, *,
                     levels: int = 4, seed: int = 0, vary: Sequence[Variation | str] = (), resamples: int = 100,
                     scheduler: object | None = None, progress: Callable[[int, int], None] | None = None,
                     integrator: str | None = None) -> SensitivityResult:
    """Morris elementary effects of each parameter over the ``[[vary]]`` distributions.

    The p levels of each parameter are the quantiles of its distribution at the centres of p
    equal-probability strata ((2k + 1) / 2p, k = 0 .. p - 1), so the screening spans the bulk of
    every distribution without its infinite tails.

    Parameters
    ----------
    trajectories : int
        r, the number of trajectories (r (d + 1) runs).
    levels : int
        p, even, at least 4.

    Returns
    -------
    SensitivityResult
        ``mu_star``, ``mu_star_ci95``, ``mu``, ``sigma``.
    """
    from SALib.analyze import morris as morris_analyze
    from SALib.sample import morris as morris_sample

    variability, full = _global_variability(scenario, vary)
    if not (isinstance(trajectories, int) and trajectories >= 2):
        raise ScenarioError.single("-n", repr(trajectories), "a number of trajectories >= 2, such as 20")
    if not (isinstance(levels, int) and levels >= 4 and levels % 2 == 0):
        raise ScenarioError.single("--levels", repr(levels), "an even number of levels >= 4")
    d = variability.size
    problem = {"num_vars": d, "names": [p.text for p in variability.params], "bounds": [[0.0, 1.0]] * d}
    grid = morris_sample.sample(problem, trajectories, num_levels=levels, seed=seed)
    unit = (grid * (levels - 1) + 0.5) / levels  # the centres of the p strata
    values = variability.from_unit(unit)
    out = evaluate(bare(full), variability.params, values, scheduler=scheduler, progress=progress,
                   integrator=_engine(integrator))
    names, units, cols = _pick(out.metrics, metrics)
    y = out.metrics.values[:, cols]
    keys = ("mu_star", "mu_star_ci95", "mu", "sigma")
    idx = {k: np.full((d, len(cols)), np.nan) for k in keys}
    for j in range(len(cols)):
        if not np.all(np.isfinite(y[:, j])):
            continue
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = morris_analyze.analyze(problem, grid, y[:, j], num_resamples=resamples, num_levels=levels,
                                         seed=seed)
        for k, src in zip(keys, ("mu_star", "mu_star_conf", "mu", "sigma"), strict=True):
            idx[k][:, j] = np.asarray(res[src], dtype=float)
    failed = int((~out.ok).sum())
    return SensitivityResult("morris", full, variability.params, names, units, idx, len(values), failed,
                             tuple(m for m in out.messages if m)[:20],
                             {"trajectories": trajectories, "levels": levels, "seed": seed})


def sobol_of_function(function: Callable[[np.ndarray], np.ndarray], marginals: Sequence[Marginal], n: int = 1024, *,
                      seed: int = 0, second_order: bool = False, resamples: int = 100) -> dict[str, np.ndarray]:
    """Sobol indices of a vectorised function of independent parameters, by the same design and estimators.

    Parameters
    ----------
    function : callable
        Maps an array (n_points, d) of parameter values to (n_points,) or (n_points, k).
    marginals : sequence of Marginal
        The parameters' distributions.
    n : int
        Base samples, a power of 2.

    Returns
    -------
    dict
        ``first_order``, ``first_order_ci95``, ``total``, ``total_ci95``, each (d, k).
    """
    _power_of_two(n)
    d = len(marginals)
    unit = _saltelli_unit(d, n, seed, second_order)
    x = np.column_stack([m.ppf(unit[:, j]) for j, m in enumerate(marginals)])
    y = np.asarray(function(x), dtype=float)
    return _sobol_from(y.reshape(len(x), -1), d, second_order, resamples, seed)


def _saltelli_unit(d: int, n: int, seed: int, second_order: bool) -> np.ndarray:
    from SALib.sample import sobol as sobol_sample

    problem = {"num_vars": d, "names": [f"x{i}" for i in range(d)], "bounds": [[0.0, 1.0]] * d}
    unit = sobol_sample.sample(problem, n, calc_second_order=second_order, scramble=True, seed=seed)
    return np.clip(unit, _UNIT_EDGE, 1.0 - _UNIT_EDGE)


def _sobol_from(y: np.ndarray, d: int, second_order: bool, resamples: int, seed: int) -> dict[str, np.ndarray]:
    from SALib.analyze import sobol as sobol_analyze

    problem = {"num_vars": d, "names": [f"x{i}" for i in range(d)], "bounds": [[0.0, 1.0]] * d}
    keys = ("first_order", "first_order_ci95", "total", "total_ci95")
    out = {k: np.full((d, y.shape[1]), np.nan) for k in keys}
    for j in range(y.shape[1]):
        col = y[:, j]
        if not np.all(np.isfinite(col)) or np.ptp(col) == 0:
            continue  # a failed run, or a metric that does not vary
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = sobol_analyze.analyze(problem, col, calc_second_order=second_order, num_resamples=resamples,
                                        conf_level=0.95, seed=seed)
        for k, src in zip(keys, ("S1", "S1_conf", "ST", "ST_conf"), strict=True):
            out[k][:, j] = np.asarray(res[src], dtype=float)
    return out


def _global_variability(scenario: Scenario, vary: Sequence[Variation | str]) -> tuple[Variability, Scenario]:
    full = with_variability(scenario, vary)
    if not full.vary:
        raise ScenarioError.single("variability", "no [[vary]] table and no --vary option",
                                   "a global sensitivity analysis needs the parameters' distributions, such as "
                                   "--vary compartment.central.clearance=lognormal:cv=0.3")
    if full.correlations:
        raise ScenarioError.single("correlation", f"{len(full.correlations)} [[correlation]] table(s)",
                                   "Sobol indices and Morris effects assume independent parameters; drop the "
                                   "correlations for this analysis (a population keeps them)")
    return Variability.from_scenario(full), full


def _power_of_two(n: int) -> None:
    if not (isinstance(n, int) and not isinstance(n, bool) and n >= 2 and n & (n - 1) == 0):
        raise ScenarioError.single("-n", repr(n), "a power of 2 of base samples, such as 512, 1024 or 2048 (the "
                                   "balance of the Sobol' sequence)")


def _engine(integrator: str | None) -> str | None:
    if integrator is not None and integrator not in ("auto", "exact", "rodas"):
        raise ScenarioError.single("integrator", repr(integrator), "a study runs on auto, exact or rodas")
    return None if integrator in (None, "auto") else integrator


def _pick(table: MetricTable, metrics: Sequence[str] | None) -> tuple[tuple[str, ...], tuple[str, ...], list[int]]:
    """The metrics asked for (default: :data:`DEFAULT_METRICS` of every id), as names, units, columns."""
    if metrics:
        cols = [_index(table.names, m) for m in metrics]
        for j in cols:
            head = table.names[j].split(":", 1)[0]
            if head not in SMOOTH and not head.startswith("auc_interval_"):
                raise ScenarioError.single("--metric", repr(table.names[j]), "a metric that changes smoothly with the "
                                           f"parameters: {', '.join(sorted(SMOOTH))} or auc_interval_<n> (not a time "
                                           "read off the output grid, a count or a yes/no)")
    else:
        cols = [j for j, n in enumerate(table.names) if n.split(":", 1)[0] in DEFAULT_METRICS]
    return tuple(table.names[j] for j in cols), tuple(table.units[j] for j in cols), cols


def _index(names: Sequence[str], metric: str) -> int:
    try:
        return list(names).index(metric)
    except ValueError:
        raise ScenarioError.single("--metric", repr(metric), f"one of the metrics: {', '.join(names)}") from None

