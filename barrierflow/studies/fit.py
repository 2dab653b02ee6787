"""Fitting barrier parameters to a lab's replicate data, with honest uncertainty.

:func:`fit` estimates the freed parameters of a scenario (any parameter path, or a tied group,
with optional bounds) from an experiment (:class:`barrierflow.model.experiment.Experiment`,
read by :func:`barrierflow.io.load_experiment`): bounded nonlinear least squares
(:func:`scipy.optimize.least_squares`, trust-region reflective) with the engine as the model.

How it works
------------
1. **Parameters.** A quantity that must be > 0 (diffusivity, partition, thickness, ...) is
   estimated as its logarithm, so the search never leaves the valid range and a relative
   change is one step everywhere; a quantity that may be 0 (clearance, degradation rate) as
   itself, bounded below by 0. Bounds ``PATH=LO:HI`` bound the same quantity.
2. **Starting values** come from the classic time-lag method on the data themselves
   (:mod:`barrierflow.analysis.timelag`): the late straight line of Q(t) gives J_ss and t_lag,
   so D = L^2/(6 t_lag) and K = J_ss L/(D C). The freed diffusivities of the observed barrier's
   layers are scaled by the ratio of the model's lag time to the measured one, then its freed
   partition coefficients by the ratio of the fluxes (exactly D and K for a one-layer membrane);
   other parameters start from the scenario. Q(t) is read from ``permeated`` data, or from
   receptor ``amount`` or ``conc`` data through the sampling correction
   (:func:`barrierflow.analysis.sampling.cumulative_from_samples`).
3. **Weighting** (residual r = sqrt(w) (y - f)): ``"none"`` (w = 1), ``"1/y"`` (w = 1/y),
   ``"1/y^2"`` (w = 1/y^2, a constant relative error), ``"replicate"`` (w = 1/s_t^2, the variance
   of the replicates at that time). The weights use the observed y, held above a floor of
   :data:`WEIGHT_FLOOR` times the largest value of that observable (a value at or near 0,
   such as Q at time 0, has no relative error); the replicate variance is held above
   :data:`WEIGHT_FLOOR` ^2 times its median, and a time with fewer than two replicates takes the
   median variance.
4. **Uncertainty.** The residual variance s^2 = wRSS/(n - p) scales the Gauss-Newton covariance
   s^2 (J^T J)^-1 of the estimated quantities (logarithms for positive ones); standard errors
   and 95 % intervals (Student t, n - p degrees of freedom) follow, an interval of a logarithm
   mapped back (so it is not symmetric). Profile-likelihood intervals: each parameter is moved
   away from its estimate, the others re-fitted, until wRSS exceeds
   wRSS_min (1 + F(0.95; 1, n - p)/(n - p)), the profile-t form of Bates and Watts (Nonlinear
   Regression Analysis and Its Applications, 1988, ch. 6), which is exact for a model linear in
   the parameter. On request, an ensemble MCMC posterior (emcee; flat priors on the estimated
   quantities within the bounds, the residual variance integrated out under a 1/sigma prior, so
   the posterior is proportional to wRSS^(-n/2)) with a posterior-predictive band.
5. **Warnings** a scientist can act on: a nearly singular information matrix (naming the
   combination of parameters the data cannot fix), an estimate or an interval at a bound,
   |correlation| > 0.95 between a pair, a parameter known to worse than 50 %, data that end
   before steady state for the time-lag estimates.
6. **Goodness of fit**: residuals, wRSS, R^2 (1 - RSS/TSS on the observed scale), and
   AIC = n ln(wRSS/n) + 2k, BIC = n ln(wRSS/n) + k ln n with k = p + 1 (the residual variance
   counted; Burnham and Anderson, Model Selection and Multimodel Inference, 2nd ed., 2002,
   sec. 2.2, the least-squares form).

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import time as _time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from scipy import stats

from ..analysis.timelag import TimeLag
from ..caution import CAUTION
from ..errors import BarrierflowError, ScenarioError
from ..io import load_experiment
from ..model import Scenario
from ..model.experiment import Experiment
from ..model.paths import Param, ParamPath, parse_param, with_values
from ..units import KINDS, convert
from .estimation import (
    WEIGHT_FLOOR,
    WEIGHTS,
    FreeParameter,
    LeastSquares,
    ObservedData,
    Posterior,
    Progress,
    clip_interval,
    correlation,
    covariance,
    from_x,
    from_x_all,
    inside,
    prediction_jacobian,
    sample_posterior,
    to_x,
)
from .predict import Predictor, check_observable
from .starting import lag_values, start_values, time_lags_of

__all__ = ["WEIGHTS", "WEIGHT_FLOOR", "FitResult", "FreeParameter", "Observation", "ParameterEstimate",
           "Posterior", "fit"]

CORRELATION_LIMIT = 0.95
"""Pairs of estimates correlated more than this (in absolute value) are named in a warning."""

CONDITION_LIMIT = 1e8
"""An information matrix (scaled to unit diagonal) with a larger condition number is called nearly singular."""

POOR_CV = 0.5
"""A parameter whose standard error exceeds this fraction of its estimate is called poorly determined."""


# ============================================================================ result types
@dataclass(frozen=True)
class ParameterEstimate:
    """One estimated parameter, in the internal unit (:attr:`unit`); reports convert to :attr:`file_unit`.

    Attributes
    ----------
    param : ParamPath or Tied
    estimate : float
    unit : str
        The internal unit (``cm^2/h``).
    file_unit : str
        The unit the scenario file used (``cm^2/s``); the report is written in it.
    se : float or None
        Standard error (for a logarithm estimated, estimate x SE of the logarithm).
    ci95 : (float, float) or None
        From the Jacobian.
    profile_ci95 : (float or None, float or None) or None
        Profile-likelihood interval; a None end: the data do not bound the parameter on that side
        within its bounds.
    start : float
        The starting value.
    lower, upper : float or None
        The bounds.
    log : bool
        True when the logarithm was estimated.
    time_lag : float or None
        The time-lag method's value of this parameter, when the method gives one (D or K of a
        one-layer barrier).
    replicates : tuple of float
        The estimate from each replicate alone (empty when not fitted).
    posterior : (float, float, float) or None
        Posterior median, 2.5 and 97.5 percentiles.
    """

    param: Param
    estimate: float
    unit: str
    file_unit: str
    se: float | None
    ci95: tuple[float, float] | None
    profile_ci95: tuple[float | None, float | None] | None
    start: float
    lower: float | None
    upper: float | None
    log: bool
    time_lag: float | None = None
    replicates: tuple[float, ...] = ()
    posterior: tuple[float, float, float] | None = None

    @property
    def text(self) -> str:
        """The path."""
        return self.param.text

    @property
    def cv(self) -> float | None:
        """SE / estimate."""
        return self.se / abs(self.estimate) if self.se is not None and self.estimate else None

    @property
    def replicate_mean(self) -> float | None:
        """Mean of the per-replicate estimates."""
        return float(np.mean(self.replicates)) if self.replicates else None

    @property
    def replicate_sd(self) -> float | None:
        """Sample SD of the per-replicate estimates (None with fewer than two)."""
        return float(np.std(self.replicates, ddof=1)) if len(self.replicates) > 1 else None

    @property
    def replicate_cv(self) -> float | None:
        """SD / mean of the per-replicate estimates."""
        m, s = self.replicate_mean, self.replicate_sd
        return s / abs(m) if s is not None and m else None


@dataclass(frozen=True)
class Observation:
    """One measured value and its prediction (internal units of its kind)."""

    time: float
    observable: str
    replicate: str
    observed: float
    predicted: float
    weight: float

    @property
    def residual(self) -> float:
        """observed - predicted."""
        return self.observed - self.predicted

    @property
    def weighted_residual(self) -> float:
        """sqrt(weight) (observed - predicted)."""
        return math.sqrt(self.weight) * self.residual


@dataclass(frozen=True, eq=False)
class FitResult:
    """What :func:`fit` found. Frozen; pickles (for worker processes).

    Attributes
    ----------
    scenario : Scenario
        The fitted scenario: the original with the estimates set (6 significant digits in the
        file's units), its description saying so; ready to simulate other regimens.
    original : Scenario
    experiment : Experiment
    parameters : tuple of ParameterEstimate
    correlation : ndarray (p, p)
        Of the estimated quantities (logarithms for positive ones).
    covariance : ndarray (p, p)
        Of the estimated quantities.
    converged : bool
    message : str
    evaluations : int
        Engine runs, all stages.
    weights : str
    observations : tuple of Observation
    wrss, rss : float
        Weighted and plain residual sums of squares (internal units).
    residual_sd : float
        s = sqrt(wRSS/(n - p)), in the weighted scale.
    aic, bic, r_squared : float
    r_squared_by_observable : dict of str to float
    time_lags : dict of str to dict of str to TimeLag
        Per barrier id, per replicate tag (and ``"pooled"``).
    posterior : Posterior or None
    warnings : tuple of str
    timings : dict of str to float, s
    """

    scenario: Scenario
    original: Scenario
    experiment: Experiment
    parameters: tuple[ParameterEstimate, ...]
    correlation: np.ndarray
    covariance: np.ndarray
    converged: bool
    message: str
    evaluations: int
    weights: str
    observations: tuple[Observation, ...]
    wrss: float
    rss: float
    residual_sd: float
    aic: float
    bic: float
    r_squared: float
    r_squared_by_observable: dict[str, float]
    time_lags: dict[str, dict[str, TimeLag]]
    posterior: Posterior | None
    warnings: tuple[str, ...]
    timings: dict[str, float]

    @property
    def n_observations(self) -> int:
        """Measured values used."""
        return len(self.observations)

    @property
    def estimates(self) -> dict[str, float]:
        """``{path: estimate}`` (internal units)."""
        return {p.text: p.estimate for p in self.parameters}

    def __getitem__(self, path: str) -> ParameterEstimate:
        for p in self.parameters:
            if p.text == path or p.param == parse_param(path):
                return p
        raise KeyError(f"no estimated parameter {path!r}; estimated: {', '.join(p.text for p in self.parameters)}")

    # ------------------------------------------------------------------ curves
    def curves(self, times: Sequence[float] | None = None, *, points: int = 200) -> dict[str, np.ndarray]:
        """The fitted curve of each observable with its 95 % confidence band (delta method).

        Parameters
        ----------
        times : array_like, optional, h
            Default: ``points`` times from 0 to the last measured time.

        Returns
        -------
        dict of str to ndarray (4, n_t)
            Per observable: times (h), prediction, lower and upper 95 % limits (internal units).
        """
        t = (np.linspace(0.0, max(self.experiment.times), points) if times is None
             else np.asarray(times, dtype=float))
        params = tuple(p.param for p in self.parameters)
        x = np.array([to_x(p.estimate, p.log) for p in self.parameters])
        pred = Predictor(self.original, params, self.experiment.observables, t)
        logs = [p.log for p in self.parameters]
        f0 = pred(from_x_all(x, logs))
        out: dict[str, np.ndarray] = {}
        if self.parameters and np.all(np.isfinite(self.covariance)):
            jac = prediction_jacobian(pred, x, logs, f0, [p.lower for p in self.parameters],
                                 [p.upper for p in self.parameters])
            q = stats.t.ppf(0.975, max(self.n_observations - len(x), 1))
            for o, f in f0.items():
                g = jac[o]  # (n_t, p)
                sd = np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", g, self.covariance, g), 0.0))
                out[o] = np.vstack([t, f, np.maximum(f - q * sd, 0.0), f + q * sd])
        else:
            for o, f in f0.items():
                out[o] = np.vstack([t, f, f, f])
        return out

    # ------------------------------------------------------------------ reports
    def as_dict(self) -> dict[str, Any]:
        """The report as plain data (REPORT.json): values in the units the scenario file used."""
        s = self.original
        params: dict[str, Any] = {}
        for p in self.parameters:
            unit = p.file_unit

            def conv(v: float | None, p: ParameterEstimate = p) -> float | None:
                return None if v is None or not math.isfinite(v) else _in_unit(p.param, v, p.file_unit, s)

            entry: dict[str, Any] = {"estimate": conv(p.estimate), "unit": unit, "se": conv(p.se),
                                     "cv": p.cv, "ci95": [conv(v) for v in p.ci95] if p.ci95 else None,
                                     "profile_ci95": [conv(v) for v in p.profile_ci95] if p.profile_ci95 else None,
                                     "start": conv(p.start), "bounds": [conv(p.lower), conv(p.upper)],
                                     "estimated_as": "logarithm" if p.log else "value",
                                     "time_lag": conv(p.time_lag)}
            if p.replicates:
                entry["replicates"] = {"values": [conv(v) for v in p.replicates], "mean": conv(p.replicate_mean),
                                       "sd": conv(p.replicate_sd), "cv": p.replicate_cv}
            if p.posterior is not None:
                entry["posterior"] = {"median": conv(p.posterior[0]), "ci95": [conv(p.posterior[1]),
                                                                               conv(p.posterior[2])]}
            params[p.text] = entry
        lags: dict[str, Any] = {}
        for bid, by_rep in self.time_lags.items():
            lags[bid] = {rep: _lag_dict(lag, s) for rep, lag in by_rep.items()}
        doc: dict[str, Any] = {
            "parameters": params,
            "converged": self.converged,
            "message": self.message,
            "aic": self.aic,
            "bic": self.bic,
            "n_observations": self.n_observations,
            "n_parameters": len(self.parameters),
            "weights": self.weights,
            "weighted_rss": self.wrss,
            "residual_sd": self.residual_sd,
            "r_squared": self.r_squared,
            "r_squared_by_observable": self.r_squared_by_observable,
            "correlation": {"parameters": [p.text for p in self.parameters],
                            "matrix": [[_finite(v) for v in row] for row in self.correlation.tolist()]},
            "time_lag": lags,
            "warnings": list(self.warnings),
            "evaluations": self.evaluations,
            "timings_s": self.timings,
            "scenario": s.source,
            "data": self.experiment.source,
            "caution": CAUTION,
        }
        if self.posterior is not None:
            doc["posterior"] = {"walkers": self.posterior.walkers, "steps": self.posterior.steps,
                                "samples": int(self.posterior.samples.shape[0]),
                                "acceptance": self.posterior.acceptance,
                                "autocorrelation_steps": [_finite(v) for v in self.posterior.autocorrelation],
                                "band": self._band()}
        return doc

    def _band(self) -> dict[str, Any]:
        """The posterior-predictive band in the data file's units (times in its time unit)."""
        po = self.posterior
        e = self.experiment
        mm = self.original.substance.molar_mass
        out: dict[str, Any] = {"time_unit": e.time_unit,
                               "times": [convert(float(t), "time", e.time_unit) for t in po.times]}
        for o, band in po.band.items():
            ser = e.of(o)[0]
            f = convert(1.0, ser.kind, ser.unit, mm)
            out[o] = {"unit": ser.unit, **{k: [float(v) * f for v in band[i]] for i, k in enumerate(
                ("curve_p2.5", "curve_p50", "curve_p97.5", "new_measurement_p2.5", "new_measurement_p97.5"))}}
        return out

    def to_json(self) -> str:
        """:meth:`as_dict` as JSON text."""
        return json.dumps(self.as_dict(), indent=2, allow_nan=False) + "\n"

    def residuals_csv(self) -> str:
        """The observed-vs-predicted table: one row per measured value, in the data file's units."""
        s = self.original
        units = {ser.observable: ser.unit for ser in self.experiment.series}
        kinds = {ser.observable: ser.kind for ser in self.experiment.series}
        tu = self.experiment.time_unit
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow([f"time [{tu}]", "observable", "replicate", "unit", "observed", "predicted", "residual",
                    "weighted_residual"])
        mm = s.substance.molar_mass
        for o in self.observations:
            f = convert(1.0, kinds[o.observable], units[o.observable], mm)
            w.writerow([_g(convert(o.time, "time", tu)), o.observable, o.replicate, units[o.observable],
                        _g(o.observed * f), _g(o.predicted * f), _g(o.residual * f), _g(o.weighted_residual)])
        return buf.getvalue()

    def to_text(self) -> str:
        """The printed report: parameters, replicates, correlation, goodness of fit, time-lag, warnings."""
        s = self.original
        e = self.experiment
        lines = [f"fit of {Path(s.source).name if s.source else s.name} to "
                 f"{Path(e.source).name if e.source else 'the data'}: {self.n_observations} values, "
                 f"{len(e.replicates)} replicate{'s' if len(e.replicates) != 1 else ''}, weights {self.weights}",
                 f"{'converged' if self.converged else 'NOT CONVERGED'}: {self.message} ({self.evaluations} runs)", ""]
        head = ["parameter", "estimate", "unit", "SE", "CV %", "95% CI (Jacobian)", "95% CI (profile)", "time-lag"]
        rows = []
        for p in self.parameters:
            def c(v, p=p):
                return "" if v is None else _num(_in_unit(p.param, v, p.file_unit, s))
            ci = f"{c(p.ci95[0])} to {c(p.ci95[1])}" if p.ci95 else ""
            pci = ""
            if p.profile_ci95:
                lo, hi = p.profile_ci95
                pci = f"{c(lo) if lo is not None else 'open'} to {c(hi) if hi is not None else 'open'}"
            rows.append([p.text, c(p.estimate), p.file_unit or "-", c(p.se),
                         f"{100 * p.cv:.3g}" if p.cv is not None else "", ci, pci, c(p.time_lag)])
        lines += _table(head, rows)
        reps = [p for p in self.parameters if len(p.replicates) > 1]
        if reps:
            lines += ["", f"replicates fitted one by one ({len(reps[0].replicates)}): mean, SD, CV"]
            rows = []
            for p in reps:
                def c(v, p=p):
                    return "" if v is None else _num(_in_unit(p.param, v, p.file_unit, s))
                rows.append([p.text, c(p.replicate_mean), c(p.replicate_sd),
                             f"{100 * p.replicate_cv:.3g} %" if p.replicate_cv is not None else "",
                             ", ".join(c(v) for v in p.replicates)])
            lines += _table(["parameter", "mean", "SD", "CV", "per replicate"], rows)
        if len(self.parameters) > 1:
            lines += ["", "correlation of the estimates"]
            names = [f"({i + 1})" for i in range(len(self.parameters))]
            rows = [[f"({i + 1}) {p.text}"] + [f"{v:+.3f}" for v in self.correlation[i]]
                    for i, p in enumerate(self.parameters)]
            lines += _table(["", *names], rows)
        lines += ["", f"goodness of fit: weighted RSS {self.wrss:.4g}, residual SD {self.residual_sd:.4g} (weighted "
                      f"scale), R^2 {self.r_squared:.4f}, AIC {self.aic:.2f}, BIC {self.bic:.2f}"]
        for bid, by_rep in self.time_lags.items():
            lag = by_rep.get("pooled")
            if lag is None:
                continue
            lines += ["", f"time-lag method, barrier '{bid}' (pooled replicates, the barrier as one membrane): "
                          + _lag_text(lag, s)]
        if self.posterior is not None:
            po = self.posterior
            lines += ["", f"posterior (emcee, {po.walkers} walkers x {po.steps} steps, acceptance "
                          f"{po.acceptance:.2f}): median and 95 % credible interval"]
            rows = []
            for p in self.parameters:
                if p.posterior is not None:
                    m, lo, hi = (_num(_in_unit(p.param, v, p.file_unit, s)) for v in p.posterior)
                    rows.append([p.text, m, f"{lo} to {hi}", p.file_unit or "-"])
            lines += _table(["parameter", "median", "95% credible", "unit"], rows)
        if self.warnings:
            lines += [""] + [f"warning: {w}" for w in self.warnings]
        lines += ["", CAUTION]
        return "\n".join(lines)

    def write(self, *, scenario: str | os.PathLike[str] | None = None, report: str | os.PathLike[str] | None = None,
              residuals: str | os.PathLike[str] | None = None) -> list[Path]:
        """Write the fitted scenario (TOML), the report (JSON) and the observed-vs-predicted CSV, each atomically.

        Every text is made before the first file is written.
        """
        from ..io import atomic_write

        texts = []
        if scenario is not None:
            texts.append((scenario, self.scenario.to_toml()))
        if report is not None:
            texts.append((report, self.to_json()))
        if residuals is not None:
            texts.append((residuals, self.residuals_csv()))
        return [atomic_write(path, text) for path, text in texts]


# ============================================================================ the fit
def fit(scenario: Scenario, data: Experiment | str | os.PathLike[str], free: Sequence[str | Param | FreeParameter], *,
        weights: str = "none", start: str = "time-lag", profile: bool = True, replicates: bool = True,
        mcmc: int = 0, walkers: int | None = None, seed: int = 0, integrator=None,
        progress: Progress | None = None) -> FitResult:
    """Estimate parameters of ``scenario`` from measured data.

    Parameters
    ----------
    scenario : Scenario
    data : Experiment or path-like
        The measurements (a path is read with :func:`barrierflow.io.load_experiment`, molar units
        with the scenario's molar mass).
    free : sequence of str, ParamPath, Tied or FreeParameter
        The parameters to estimate: ``"barrier.skin.layer.1.diffusivity"``, with optional bounds
        ``"barrier.skin.layer.1.partition=1:100"`` (see :meth:`FreeParameter.parse`); paths joined
        by commas are one tied parameter.
    weights : {"none", "1/y", "1/y^2", "replicate"}
    start : {"time-lag", "scenario"}
        Starting values from the time-lag method on the data (default) or the scenario's values.
    profile : bool
        Compute profile-likelihood intervals (default True).
    replicates : bool
        Also fit each replicate alone (default True, with two replicates or more).
    mcmc : int
        Steps of an ensemble MCMC posterior (emcee); 0 (default) for none.
    walkers : int, optional
        MCMC walkers (default: max(8, 4 p), even).
    seed : int
        Seed of the MCMC draws.
    integrator : object, optional
        Default :data:`barrierflow.studies.predict.FIT_INTEGRATOR`.
    progress : callable, optional
        ``progress(stage, fraction)``.

    Returns
    -------
    FitResult

    Raises
    ------
    ScenarioError
        For a path or bound that cannot be used, an observable the scenario does not have,
        fewer measured values than parameters, an unknown weighting.
    DataError
        For a data file that cannot be read.
    SolverError
        When the model cannot be run at the starting values.

    Examples
    --------
    >>> import barrierflow as bf                                                    # doctest: +SKIP
    >>> s = bf.load("scenarios/diffusion_cell.toml")                                # doctest: +SKIP
    >>> r = bf.fit(s, "data/diffusion_cell_replicates.csv",                         # doctest: +SKIP
    ...            ["barrier.membrane.layer.1.diffusivity", "barrier.membrane.layer.1.partition"],
    ...            weights="1/y^2")
    >>> print(r.to_text())                                                          # doctest: +SKIP
    """
    clock = {"start": _time.perf_counter()}
    timings: dict[str, float] = {}
    if weights not in WEIGHTS:
        raise ScenarioError.single("weights", repr(weights), f"must be one of {', '.join(WEIGHTS)}")
    if start not in ("time-lag", "scenario"):
        raise ScenarioError.single("start", repr(start), "must be 'time-lag' or 'scenario'")
    if isinstance(mcmc, bool) or not isinstance(mcmc, int) or mcmc < 0:
        raise ScenarioError.single("mcmc steps", repr(mcmc), "must be a whole number >= 0")
    experiment = data if isinstance(data, Experiment) else load_experiment(
        data, molar_mass=scenario.substance.molar_mass)
    frees = [FreeParameter.parse(f, scenario) for f in free]
    if not frees:
        raise ScenarioError.single("--free", "no parameters", "name at least one parameter to estimate")
    seen: dict[ParamPath, str] = {}
    for f in frees:
        for p in f.param.paths:
            if p in seen:
                raise ScenarioError.single("--free", repr(f.text), f"{p.text} is already freed (in {seen[p]!r})")
            seen[p] = f.text
    for o in experiment.observables:
        check_observable(scenario, o, what=f"{experiment.source or 'data'}: column")
    obs = ObservedData(experiment, weights)
    p = len(frees)
    if obs.n <= p:
        raise ScenarioError.single("data", f"{obs.n} measured values", f"a fit of {p} parameters needs more values "
                                   "than parameters")
    # ---- time-lag estimates and starting values
    lags = time_lags_of(scenario, experiment)
    problem = LeastSquares(scenario, frees, experiment, obs, integrator)
    notes: list[str] = []
    starts = start_values(scenario, frees, {})
    if start == "time-lag" and lags:
        # the time-lag start, unless the scenario's values fit the data better (a few late points
        # clustered in time give a poor line)
        from_lag = start_values(scenario, frees, lags)
        if from_lag != starts:
            def misfit(values: list[float]) -> float:
                x = inside(np.array([to_x(v, f.log) for v, f in zip(values, frees, strict=True)]), problem.lo,
                           problem.hi)
                r = problem.residuals(x, obs.all)
                return float(r @ r)

            if misfit(from_lag) <= misfit(starts):
                starts = from_lag
            else:
                notes.append("the scenario's values fit the data better than the time-lag estimates, so the search "
                             "started from them")
    x0 = inside(np.array([to_x(v, f.log) for v, f in zip(starts, frees, strict=True)]), problem.lo, problem.hi)
    # ---- the fit
    if progress:
        progress("fit", 0.0)
    sol = problem.solve(x0, obs.all)
    x_hat = sol.x
    timings["fit_s"] = _time.perf_counter() - clock["start"]
    if progress:
        progress("fit", 1.0)
    r = problem.residuals(x_hat, obs.all)
    wrss = float(r @ r)
    n = obs.n
    dof = n - p
    s2 = wrss / dof
    jac = problem.jacobian(x_hat, obs.all)
    cov, cond, weakest = covariance(jac, s2)
    se_x = np.sqrt(np.maximum(np.diag(cov), 0.0)) if np.all(np.isfinite(cov)) else np.full(p, np.nan)
    corr = correlation(cov)
    q = float(stats.t.ppf(0.975, dof))
    # ---- profiles
    profiles: list[tuple[float | None, float | None] | None] = [None] * p
    t0 = _time.perf_counter()
    if profile:
        threshold = wrss * (1.0 + float(stats.f.ppf(0.95, 1, dof)) / dof)
        for j in range(p):
            profiles[j] = problem.profile(j, x_hat, se_x[j], wrss, threshold, obs.all)
            if progress:
                progress("profile", (j + 1) / p)
    timings["profile_s"] = _time.perf_counter() - t0
    # ---- replicates one by one
    per_rep: dict[str, np.ndarray] = {}
    t0 = _time.perf_counter()
    reps = experiment.replicates
    if replicates and len(reps) > 1:
        for k, tag in enumerate(reps):
            sel = obs.replicate_mask(tag)
            if sel.sum() > p:
                rs = problem.solve(x_hat, sel)
                per_rep[tag] = rs.x
                if not rs.success:
                    notes.append(f"the fit of replicate {tag} alone did not converge ({_stop_reason(rs)})")
            if progress:
                progress("replicates", (k + 1) / len(reps))
    timings["replicates_s"] = _time.perf_counter() - t0
    # ---- posterior
    posterior = None
    post_x = None
    t0 = _time.perf_counter()
    if mcmc:
        posterior, post_x = sample_posterior(problem, x_hat, cov, obs, mcmc, walkers, seed, s2, progress)
    timings["posterior_s"] = _time.perf_counter() - t0
    # ---- assemble
    est = []
    by_lag = lag_values(scenario, frees, lags)
    for j, f in enumerate(frees):
        theta = from_x(x_hat[j], f.log)
        se = None
        ci = None
        if math.isfinite(se_x[j]):
            se = theta * se_x[j] if f.log else se_x[j]
            lo_x, hi_x = clip_interval(x_hat[j] - q * se_x[j], x_hat[j] + q * se_x[j], problem.lo[j], problem.hi[j])
            ci = (from_x(lo_x, f.log), from_x(hi_x, f.log))
        prof = profiles[j]
        prof_theta = None
        if prof is not None:
            prof_theta = tuple(None if v is None else from_x(v, f.log) for v in prof)
        post = None
        if post_x is not None:
            vals = np.array([from_x(v, f.log) for v in post_x[:, j]])
            post = (float(np.median(vals)), float(np.percentile(vals, 2.5)), float(np.percentile(vals, 97.5)))
        est.append(ParameterEstimate(
            param=f.param, estimate=theta, unit=f.param.unit, file_unit=f.param.file_unit(scenario), se=se, ci95=ci,
            profile_ci95=prof_theta, start=starts[j], lower=f.lower, upper=f.upper, log=f.log,
            time_lag=by_lag[j], replicates=tuple(from_x(v[j], f.log) for v in per_rep.values()),
            posterior=post))
    pred = problem.predict(x_hat, obs.all)
    y = obs.y
    rss = float(np.sum((y - pred) ** 2))
    tss = float(np.sum((y - y.mean()) ** 2))
    r2 = 1.0 - rss / tss if tss > 0 else math.nan
    r2_by = {}
    for o in experiment.observables:
        m = obs.observable == o
        tss_o = float(np.sum((y[m] - y[m].mean()) ** 2))
        r2_by[o] = 1.0 - float(np.sum((y[m] - pred[m]) ** 2)) / tss_o if tss_o > 0 else math.nan
    k = p + 1
    aic = n * math.log(wrss / n) + 2 * k if wrss > 0 else -math.inf
    bic = n * math.log(wrss / n) + k * math.log(n) if wrss > 0 else -math.inf
    observations = tuple(Observation(float(obs.t[i]), obs.observable[i], obs.replicate[i], float(y[i]),
                                     float(pred[i]), float(obs.w[i])) for i in range(n))
    warns = _warnings(frees, est, x_hat, problem, corr, cond, weakest, sol, lags, posterior) + notes
    fitted = _fitted_scenario(scenario, est, experiment, weights)
    timings["total_s"] = _time.perf_counter() - clock["start"]
    return FitResult(
        scenario=fitted, original=scenario, experiment=experiment, parameters=tuple(est), correlation=corr,
        covariance=cov, converged=bool(sol.success), message=_stop_reason(sol), evaluations=problem.predictor.runs,
        weights=weights, observations=observations, wrss=wrss, rss=rss, residual_sd=math.sqrt(s2), aic=aic, bic=bic,
        r_squared=r2, r_squared_by_observable=r2_by, time_lags=lags, posterior=posterior, warnings=tuple(warns),
        timings=timings)


# ============================================================================ warnings
def _warnings(frees, est, x_hat, problem, corr, cond, weakest, sol, lags, posterior) -> list[str]:
    out: list[str] = []
    names = [f.param.label for f in frees]
    if not sol.success:
        out.append(f"the search did not converge ({_stop_reason(sol)}); the estimates are where it stopped")
    if problem.failures:
        out.append(f"the model could not be run at {problem.failures} trial values during the search (they were "
                   "treated as a very poor fit)")
    if cond > CONDITION_LIMIT and weakest is not None:
        parts = [f"{abs(c):.2f} x {'ln ' if frees[i].log else ''}{names[i]}" for i, c in enumerate(weakest)
                 if abs(c) > 0.2]
        signs = [np.sign(c) for c in weakest if abs(c) > 0.2]
        joined = (" and ".join(parts) if len(parts) <= 2 else ", ".join(parts))
        how = "together" if len(set(signs)) == 1 else "against each other"
        out.append(f"the data hardly inform the combination of {joined} (moved {how}; the information matrix is "
                   f"nearly singular, condition number {cond:.2g}): these parameters cannot be estimated separately "
                   "from these data; fix one of them or measure what separates them")
    for i in range(len(frees)):
        for j in range(i + 1, len(frees)):
            r = corr[i, j]
            if math.isfinite(r) and abs(r) > CORRELATION_LIMIT:
                hint = ""
                kinds = {frees[i].param.kind, frees[j].param.spec.key, frees[j].param.kind, frees[i].param.spec.key}
                if "diffusivity" in kinds and "partition" in kinds:
                    hint = (" (the data fix their product, the permeability, better than each; values during the "
                            "rise, around the lag time, separate D from K)")
                out.append(f"{names[i]} and {names[j]} are strongly correlated (r = {r:+.3f}): the data determine a "
                           f"combination of the two much better than either{hint}")
    for j, (f, e) in enumerate(zip(frees, est, strict=True)):
        at = []
        if math.isfinite(problem.lo[j]) and abs(x_hat[j] - problem.lo[j]) <= 1e-6 * max(1.0, abs(problem.lo[j])):
            at.append("lower")
        if math.isfinite(problem.hi[j]) and abs(x_hat[j] - problem.hi[j]) <= 1e-6 * max(1.0, abs(problem.hi[j])):
            at.append("upper")
        if at:
            out.append(f"the estimate of {names[j]} sits at its {at[0]} bound: the data push it further; widen the "
                       "bounds or fix the parameter (its intervals are not meaningful)")
            continue
        if e.ci95 is not None:
            for side, v, b in (("lower", e.ci95[0], f.lower), ("upper", e.ci95[1], f.upper)):
                if b is not None and v == b:
                    out.append(f"the 95 % interval of {names[j]} reaches its {side} bound: the data do not bound it "
                               "within the range allowed")
        if e.profile_ci95 is not None:
            for side, v in zip(("lower", "upper"), e.profile_ci95, strict=True):
                if v is None:
                    out.append(f"the profile-likelihood interval of {names[j]} is open on its {side} side: within "
                               "the range allowed, the data do not rule out any value that way")
        if e.cv is not None and e.cv > POOR_CV:
            out.append(f"{names[j]} is poorly determined by these data (SE {100 * e.cv:.0f} % of the estimate)")
    if posterior is not None:
        burned = posterior.steps - posterior.steps // 2
        tau = [t for t in posterior.autocorrelation if math.isfinite(t)]
        if not tau or burned < 50 * max(tau):
            longest = f"{max(tau):.0f} steps" if tau else "not measurable from so short a chain"
            out.append(f"the MCMC chain is short for a reliable posterior ({burned} steps kept; the autocorrelation "
                       f"time is {longest}; aim for 50 times that): run more steps")
    for bid, by_rep in lags.items():
        lag = by_rep.get("pooled")
        if lag is not None and not lag.steady:
            out.append(f"time-lag method, barrier '{bid}': {lag.message}")
    return out


# ============================================================================ the fitted scenario
def _fitted_scenario(scenario: Scenario, est: Sequence[ParameterEstimate], experiment: Experiment,
                     weights: str) -> Scenario:
    """The scenario with the estimates (6 significant digits in the file's unit), described as fitted."""
    values = {}
    shown = []
    for e in est:
        unit = e.file_unit
        number = float(f"{_in_unit(e.param, e.estimate, unit, scenario):.6g}")
        values[e.param] = e.param.from_unit(number, unit, scenario) if e.param.kind in KINDS else number
        shown.append(f"{e.text} = {number:g}{' ' + unit if unit else ''}")
    note = (f"Parameters fitted by barrierflow fit to {Path(experiment.source).name if experiment.source else 'data'} "
            f"(weights {weights}): {'; '.join(shown)}.")
    description = f"{scenario.description.rstrip()}\n\n{note}" if scenario.description else note
    values["scenario.description"] = description
    try:
        return with_values(scenario, values)
    except BarrierflowError:  # pragma: no cover - estimates lie in the model's ranges
        raise


# ============================================================================ formatting
_STOPS = {
    0: "the search used its allowed evaluations without settling",
    1: "the slope of the weighted sum of squares vanished",
    2: "the weighted sum of squares stopped changing",
    3: "the estimates stopped changing",
    4: "the weighted sum of squares and the estimates stopped changing",
}


def _stop_reason(sol) -> str:
    """Why the search stopped, in words (scipy's status codes of least_squares)."""
    return _STOPS.get(int(getattr(sol, "status", -1)), str(getattr(sol, "message", "")))


def _in_unit(param: Param, value: float, unit: str, scenario: Scenario) -> float:
    return param.to_unit(value, unit, scenario) if param.kind in KINDS else value


def _finite(v: float) -> float | None:
    return float(v) if math.isfinite(v) else None


def _num(x: float) -> str:
    return f"{x:.4g}"


def _g(x: float) -> str:
    return format(float(x), ".8g")


def _lag_dict(lag: TimeLag, s: Scenario) -> dict[str, Any]:
    """A time-lag estimate in readable units: flux in the data's amount per area per h, D in cm^2/s."""
    d = lag.as_dict()
    return {"flux_mg_per_cm2_h": d["flux"], "lag_time_h": d["lag_time"], "first_time_h": d["first_time"],
            "n_points": d["n_points"], "r_squared": _finite(d["r_squared"]), "steady": d["steady"],
            "diffusivity_cm2_per_s": None if d["diffusivity"] is None else d["diffusivity"] / 3600.0,
            "partition": d["partition"],
            "permeability_cm_per_h": d["permeability"], "message": d["message"]}


def _lag_text(lag: TimeLag, s: Scenario) -> str:
    parts = [f"J_ss {lag.flux * 1e3:.4g} ug/(cm^2*h)", f"t_lag {lag.lag_time:.4g} h"]
    if lag.permeability is not None:
        parts.append(f"P {lag.permeability:.4g} cm/h")
    if lag.diffusivity is not None:
        parts.append(f"D {lag.diffusivity / 3600.0:.4g} cm^2/s")
    if lag.partition is not None:
        parts.append(f"K {lag.partition:.4g}")
    return ", ".join(parts) + f" ({lag.message})"


def _table(head: list[str], rows: list[list[str]]) -> list[str]:
    widths = [max(len(str(r[i])) for r in [head, *rows]) for i in range(len(head))]
    fmt = "  ".join(f"{{:<{w}}}" for w in widths)
    return [fmt.format(*head).rstrip(), fmt.format(*["-" * w for w in widths]).rstrip()] + \
        [fmt.format(*r).rstrip() for r in rows]
