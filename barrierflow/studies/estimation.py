"""The estimation machinery of studies: free parameters, weights, weighted least squares, profiles, MCMC.

Used by :func:`barrierflow.studies.fit.fit` (and the sensitivities of
:func:`barrierflow.studies.design.design`); see the module docstring of
:mod:`barrierflow.studies.fit` for the methods and their sources. Everything works on the
*estimated quantities* x: the logarithm of a parameter that must be > 0, the parameter itself
otherwise (:func:`to_x`, :func:`from_x`).
"""

from __future__ import annotations

import logging
import math
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import optimize

from ..errors import ScenarioError, SolverError, UnitsError
from ..model import Scenario
from ..model.experiment import Experiment
from ..model.paths import Param, ParamPath, Tied, parse_param
from ..units import KINDS
from .predict import Predictor

__all__ = ["WEIGHTS", "WEIGHT_FLOOR", "FreeParameter", "LeastSquares", "ObservedData", "Posterior", "correlation",
           "covariance", "from_x", "from_x_all", "inside", "prediction_jacobian", "sample_posterior", "to_x"]

WEIGHTS = ("none", "1/y", "1/y^2", "replicate")
"""The weighting schemes (see :mod:`barrierflow.studies.fit`)."""

WEIGHT_FLOOR = 0.01
"""Weights use max(|y|, WEIGHT_FLOOR * the largest |y| of the observable) (see :mod:`barrierflow.studies.fit`)."""

PROFILE_SPAN = 25.0
"""How far (in the logarithm) a profile searches for the end of an interval before calling it open."""

Progress = Callable[[str, float], None]
"""Called with the stage (``"fit"``, ``"profile"``, ``"replicates"``, ``"posterior"``, ...) and the fraction done."""


# ============================================================================ free parameters
@dataclass(frozen=True)
class FreeParameter:
    """A parameter to estimate, with optional bounds.

    Parameters
    ----------
    param : ParamPath or Tied
    lower, upper : float or None
        Bounds in the internal unit (None: none; a positive quantity is always > 0).
    """

    param: Param
    lower: float | None = None
    upper: float | None = None

    @property
    def log(self) -> bool:
        """True when the logarithm is estimated (the quantity must be > 0)."""
        return self.param.positive

    @property
    def text(self) -> str:
        """The path's text."""
        return self.param.text

    @classmethod
    def parse(cls, text: str | Param | FreeParameter, scenario: Scenario, *, what: str = "--free") -> FreeParameter:
        """Read ``PATH``, ``PATH=LO:HI``, ``PATH=LO:`` or ``PATH=:HI``, and check it against ``scenario``.

        A bound with a unit (``1e-10 cm^2/s``) is read in that unit; a bare number in the unit the
        scenario file used for that field (:meth:`ParamPath.file_unit`). Several paths joined by
        commas are one tied parameter.

        Raises
        ------
        ScenarioError
            For an unknown path, a field that is not a quantity, shapes the run (a dose time, a
            cell count) or is not set; unreadable bounds; LO >= HI; a bound outside the field's range.
        """
        if isinstance(text, FreeParameter):
            param, lower, upper, shown = text.param, text.lower, text.upper, text.text
            parse_param(param, scenario, what=what)
        elif isinstance(text, ParamPath | Tied):
            param, lower, upper, shown = parse_param(text, scenario, what=what), None, None, text.text
        else:
            if not isinstance(text, str):
                raise ScenarioError.single(what, repr(text), "must be a parameter path such as "
                                           "'barrier.skin.layer.1.diffusivity', optionally with bounds '=LO:HI'")
            shown = text
            path_text, eq, bounds = text.partition("=")
            param = parse_param(path_text.strip(), scenario, what=what)
            lower = upper = None
            if eq:
                lo_text, colon, hi_text = bounds.partition(":")
                if not colon:
                    raise ScenarioError.single(what, repr(text), "bounds are written PATH=LO:HI (either side may be "
                                               "left empty), such as 'barrier.skin.layer.1.partition=1:100'")
                lower = _bound(param, lo_text, scenario, what, text)
                upper = _bound(param, hi_text, scenario, what, text)
        label = repr(shown)
        if not param.numeric or param.kind == "count":
            raise ScenarioError.single(what, label, f"{param.label} is not a quantity that can be estimated; free a "
                                       "diffusivity, a partition coefficient, a thickness, a volume, a rate, ...")
        if param.structural:
            raise ScenarioError.single(what, label, f"{param.label} shapes the run (the dosing or output times, the "
                                       "grid), which a fit keeps fixed; free a rate, an amount, a volume or a property "
                                       "of a layer")
        if param.get(scenario) is None:
            raise ScenarioError.single(what, label, f"{param.label} is not set in the scenario; give it a value (the "
                                       "fit needs one to start from and to know its unit)")
        for side, value in (("lower", lower), ("upper", upper)):
            if value is None:
                continue
            if not math.isfinite(value) or (param.positive and value <= 0) or (param.bound == ">= 0" and value < 0):
                rng = "> 0" if param.positive else ">= 0" if param.bound == ">= 0" else "finite"
                raise ScenarioError.single(what, label, f"the {side} bound must be {rng}, as {param.label} itself")
        if lower is not None and upper is not None and not lower < upper:
            raise ScenarioError.single(what, label, "the lower bound must be below the upper bound")
        return cls(param, lower, upper)


def _bound(param: Param, text: str, scenario: Scenario, what: str, whole: str) -> float | None:
    text = text.strip()
    if not text:
        return None
    try:
        if re.search(r"[A-Za-z\u00b5\u03bc%]", re.sub(r"[eE][-+]?\d", "", text)) and param.kind in KINDS:
            return float(param.read(text, scenario))
        return float(param.from_file_unit(float(text), scenario))
    except (ValueError, UnitsError) as err:
        unit = param.file_unit(scenario) if param.kind in KINDS else ""
        detail = err.expected if isinstance(err, UnitsError) else "not a number"
        raise ScenarioError.single(what, repr(whole), f"cannot read the bound {text!r} ({detail}); write a number"
                                   f"{' in ' + unit + ' or a value with its unit' if unit else ''}") from None


@dataclass(frozen=True, eq=False)
class Posterior:
    """An ensemble-MCMC posterior (emcee) and its posterior-predictive band.

    Attributes
    ----------
    samples : ndarray (n_samples, p)
        Parameter values (internal units) after burn-in, thinned.
    acceptance : float
        Mean acceptance fraction of the walkers.
    autocorrelation : tuple of float
        Integrated autocorrelation time per parameter (steps; NaN when the chain is too short to tell).
    walkers, steps : int
    times : ndarray, h
        Times of the band.
    band : dict of str to ndarray (5, n_t)
        Per observable, internal units: the 2.5, 50, 97.5 percentiles of the predicted curve,
        then the 2.5 and 97.5 percentiles of a new measurement (the curve plus the residual error
        of the weighting's error model).
    """

    samples: np.ndarray
    acceptance: float
    autocorrelation: tuple[float, ...]
    walkers: int
    steps: int
    times: np.ndarray
    band: dict[str, np.ndarray]


# ============================================================================ data and weights
class ObservedData:
    """The measured values of an experiment as flat arrays (blank cells left out), with their weights.

    Parameters
    ----------
    experiment : Experiment
    weights : {"none", "1/y", "1/y^2", "replicate"}

    Attributes
    ----------
    t : ndarray, h
    y : ndarray
        Internal units of each value's kind.
    observable, replicate : ndarray of str
    time_index : ndarray of int
        Row of the experiment each value comes from.
    w : ndarray
        The weights (see :mod:`barrierflow.studies.fit`).
    n : int
    all : ndarray of bool
        A mask selecting every value.

    Raises
    ------
    ScenarioError
        For replicate weights when no time has two differing replicates.
    """

    def __init__(self, experiment: Experiment, weights: str) -> None:
        times = experiment.time_array
        t, y, o, rep, ti = [], [], [], [], []
        for s in experiment.series:
            v = s.array
            ok = np.isfinite(v)
            idx = np.nonzero(ok)[0]
            t += times[idx].tolist()
            y += v[idx].tolist()
            o += [s.observable] * len(idx)
            rep += [s.replicate] * len(idx)
            ti += idx.tolist()
        self.t = np.array(t)
        self.y = np.array(y)
        self.observable = np.array(o, dtype=object)
        self.replicate = np.array(rep, dtype=object)
        self.time_index = np.array(ti, dtype=int)
        self.n = len(self.y)
        self.all = np.ones(self.n, dtype=bool)
        self.w = self._weights(weights)

    def replicate_mask(self, tag: str) -> np.ndarray:
        """A mask selecting one replicate's values."""
        return self.replicate == tag

    def _weights(self, scheme: str) -> np.ndarray:
        w = np.ones(self.n)
        if scheme == "none":
            return w
        for o in dict.fromkeys(self.observable.tolist()):
            m = self.observable == o
            y = np.abs(self.y[m])
            floor = WEIGHT_FLOOR * y.max() if y.max() > 0 else 1.0
            if scheme == "1/y":
                w[m] = 1.0 / np.maximum(y, floor)
            elif scheme == "1/y^2":
                w[m] = 1.0 / np.maximum(y, floor) ** 2
            else:  # replicate variance at each time
                ti = self.time_index[m]
                var = {}
                for k in np.unique(ti):
                    vals = self.y[m][ti == k]
                    if len(vals) >= 2:
                        var[k] = float(np.var(vals, ddof=1))
                positive = [v for v in var.values() if v > 0]
                if not positive:
                    raise ScenarioError.single("weights", "'replicate'", f"{o}: the replicates never differ at a time "
                                               "(or no time has two replicates), so their variance cannot weight "
                                               "the fit; choose another weighting")
                med = float(np.median(positive))
                lo = WEIGHT_FLOOR**2 * med
                w[m] = np.array([1.0 / max(var.get(k, med), lo) for k in ti])
        return w


# ============================================================================ transforms
def to_x(value: float, log: bool) -> float:
    """The estimated quantity of a parameter value: its logarithm when ``log``, else itself."""
    return math.log(value) if log else float(value)


def from_x(x: float, log: bool) -> float:
    """The parameter value of an estimated quantity (the inverse of :func:`to_x`)."""
    return math.exp(x) if log else float(x)


def from_x_all(x: np.ndarray, logs: Sequence[bool]) -> list[float]:
    """:func:`from_x` for every parameter."""
    return [from_x(v, lg) for v, lg in zip(x, logs, strict=True)]


def inside(x: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """``x`` moved strictly inside the bounds (least_squares needs a feasible start)."""
    span = np.where(np.isfinite(hi - lo), hi - lo, 1.0)
    eps = 1e-9 * np.maximum(span, 1.0)
    return np.minimum(np.maximum(x, lo + eps), hi - eps)


def clip_interval(a: float, b: float, lo: float, hi: float) -> tuple[float, float]:
    """The interval (a, b) cut to the bounds (lo, hi)."""
    return max(a, lo), min(b, hi)


# ============================================================================ the least-squares problem
class LeastSquares:
    """Weighted residuals r = sqrt(w) (y - f(x)) as a function of the estimated quantities x.

    Holds the :class:`~barrierflow.studies.predict.Predictor` (built once), the bounds in x
    (``lo``, ``hi``; a quantity that may be 0 is bounded below by 0) and the step of the central
    differences. Every method takes a mask of the values it works on (all of them, or one
    replicate's). A value the model cannot run (a failed run, a value the model refuses) gives a
    large residual, counted in ``failures``, so the search turns back.
    """

    def __init__(self, scenario: Scenario, frees: Sequence[FreeParameter], experiment: Experiment, obs: ObservedData,
                 integrator) -> None:
        self.frees = list(frees)
        self.logs = [f.log for f in frees]
        self.obs = obs
        times = experiment.time_array
        self.predictor = Predictor(scenario, tuple(f.param for f in frees), experiment.observables, times,
                                   integrator=integrator)
        self.sqrt_w = np.sqrt(obs.w)
        lo, hi = [], []
        for f in frees:
            lo.append(to_x(f.lower, f.log) if f.lower is not None and (f.lower > 0 or not f.log) else
                      (0.0 if (not f.log and f.param.bound == ">= 0") else -np.inf))
            hi.append(to_x(f.upper, f.log) if f.upper is not None else np.inf)
        self.lo = np.array(lo, dtype=float)
        self.hi = np.array(hi, dtype=float)
        self.step = 1e-5 if self.predictor.exact else 1e-4
        self._cache: tuple[bytes, np.ndarray] | None = None
        self.failures = 0

    def predict(self, x: np.ndarray, mask: np.ndarray) -> np.ndarray:
        """The predictions at the masked values (the last x's run is kept, as least_squares asks twice)."""
        key = np.asarray(x, dtype=float).tobytes()
        if self._cache is not None and self._cache[0] == key:
            full = self._cache[1]
        else:
            pred = self.predictor(from_x_all(x, self.logs))
            o = self.obs
            full = np.empty(o.n)
            for name, values in pred.items():
                m = o.observable == name
                full[m] = values[o.time_index[m]]
            self._cache = (key, full)
        return full[mask]

    def residuals(self, x: np.ndarray, mask: np.ndarray) -> np.ndarray:
        """sqrt(w) (y - f(x)) at the masked values."""
        try:
            f = self.predict(x, mask)
        except (SolverError, ScenarioError):
            # a value the model cannot run: a large residual sends the search back
            self.failures += 1
            return 1e3 * self.sqrt_w[mask] * (np.abs(self.obs.y[mask]) + np.abs(self.obs.y[mask]).max() + 1.0)
        return self.sqrt_w[mask] * (self.obs.y[mask] - f)

    def jacobian(self, x: np.ndarray, mask: np.ndarray, cols: Sequence[int] | None = None) -> np.ndarray:
        """d residuals / d x by central differences (one-sided at a bound)."""
        cols = list(range(len(x))) if cols is None else list(cols)
        out = np.empty((int(mask.sum()), len(cols)))
        for k, j in enumerate(cols):
            h = self.step * max(1.0, abs(x[j])) if not self.logs[j] else self.step
            up, down = x.copy(), x.copy()
            up[j] = min(x[j] + h, self.hi[j])
            down[j] = max(x[j] - h, self.lo[j])
            out[:, k] = (self.residuals(up, mask) - self.residuals(down, mask)) / (up[j] - down[j])
        return out

    def solve(self, x0: np.ndarray, mask: np.ndarray, fixed: Mapping[int, float] | None = None):
        """Least squares over the parameters not in ``fixed``, starting at ``x0``."""
        fixed = dict(fixed or {})
        free = [j for j in range(len(x0)) if j not in fixed]
        base = np.array(x0, dtype=float)
        for j, v in fixed.items():
            base[j] = v

        def full(z):
            x = base.copy()
            x[free] = z
            return x

        if not free:
            r = self.residuals(base, mask)
            return optimize.OptimizeResult(x=base, fun=r, success=True, message="nothing to fit", nfev=1)
        z0 = inside(base[free], self.lo[free], self.hi[free])
        sol = optimize.least_squares(
            lambda z: self.residuals(full(z), mask), z0,
            jac=lambda z: self.jacobian(full(z), mask, free),
            bounds=(self.lo[free], self.hi[free]), method="trf", x_scale="jac",
            ftol=1e-10, xtol=1e-10, gtol=1e-10, max_nfev=200)
        sol.x = full(sol.x)
        return sol

    def profile(self, j: int, x_hat: np.ndarray, se: float, wrss: float, threshold: float,
                mask: np.ndarray) -> tuple[float | None, float | None]:
        """The profile-likelihood interval of parameter j in x (a None end: not reached within the bounds)."""
        step0 = se if math.isfinite(se) and se > 0 else 0.1 * max(abs(x_hat[j]), 1.0)
        step0 = min(step0, 2.0) if self.logs[j] else step0
        ends: list[float | None] = []
        for direction in (-1.0, 1.0):
            bound = self.lo[j] if direction < 0 else self.hi[j]
            inside_x, inside_others = x_hat[j], x_hat.copy()
            step = step0
            found = None
            for _ in range(40):
                trial = x_hat[j] + direction * abs(inside_x - x_hat[j]) + direction * step
                if direction * (trial - bound) >= 0:
                    trial = bound
                if self.logs[j] and abs(trial - x_hat[j]) > PROFILE_SPAN:
                    break  # a factor e^25 from the estimate and still inside: open on this side
                value, others = self._profile_value(j, trial, inside_others, mask)
                if value > threshold:
                    found = (inside_x, trial, inside_others)
                    break
                if trial == bound:
                    break
                inside_x, inside_others = trial, others
                step *= 2.0
            if found is None:
                ends.append(None)
                continue
            a, b, guess = found
            cache = {"x": guess}

            def g(c, cache=cache):
                v, oth = self._profile_value(j, c, cache["x"], mask)
                if v <= threshold:
                    cache["x"] = oth
                return v - threshold

            tol = 1e-3 * (se if math.isfinite(se) and se > 0 else step0)
            ends.append(float(optimize.brentq(g, min(a, b), max(a, b), xtol=tol)))
        return ends[0], ends[1]

    def _profile_value(self, j: int, value: float, start: np.ndarray, mask: np.ndarray) -> tuple[float, np.ndarray]:
        x0 = start.copy()
        x0[j] = value
        sol = self.solve(x0, mask, fixed={j: value})
        r = self.residuals(sol.x, mask)
        return float(r @ r), sol.x


def covariance(jac: np.ndarray, s2: float) -> tuple[np.ndarray, float, np.ndarray | None]:
    """s^2 (J^T J)^-1 (pseudo-inverse), the condition number of J^T J scaled to unit diagonal, and the
    direction (in scaled units) the data inform least."""
    p = jac.shape[1]
    jtj = jac.T @ jac
    d = np.sqrt(np.diag(jtj))
    if np.any(d == 0) or not np.all(np.isfinite(jtj)):
        return np.full((p, p), np.nan), math.inf, None
    scaled = jtj / np.outer(d, d)
    evals, evecs = np.linalg.eigh(scaled)
    cond = float(evals[-1] / evals[0]) if evals[0] > 0 else math.inf
    inv = np.linalg.pinv(scaled, rcond=1e-14, hermitian=True) / np.outer(d, d)
    return s2 * inv, cond, evecs[:, 0]


def correlation(cov: np.ndarray) -> np.ndarray:
    d = np.sqrt(np.diag(cov))
    with np.errstate(invalid="ignore", divide="ignore"):
        c = cov / np.outer(d, d)
    return np.clip(c, -1.0, 1.0)


def prediction_jacobian(pred: Predictor, x: np.ndarray, logs: Sequence[bool], f0: dict[str, np.ndarray],
                   lower: Sequence[float | None], upper: Sequence[float | None]) -> dict[str, np.ndarray]:
    """d prediction / d x for each observable (central differences)."""
    h = 1e-5 if pred.exact else 1e-4
    cols: dict[str, list[np.ndarray]] = {o: [] for o in f0}
    for j in range(len(x)):
        step = h if logs[j] else h * max(1.0, abs(x[j]))
        up, down = x.copy(), x.copy()
        up[j] += step
        down[j] -= step
        if not logs[j] and lower[j] is not None and down[j] < lower[j]:
            down[j] = x[j]
        fu, fd = pred(from_x_all(up, logs)), pred(from_x_all(down, logs))
        for o in f0:
            cols[o].append((fu[o] - fd[o]) / (up[j] - down[j]))
    return {o: np.column_stack(c) for o, c in cols.items()}


# ============================================================================ posterior
def sample_posterior(problem: LeastSquares, x_hat: np.ndarray, cov: np.ndarray, obs: ObservedData, steps: int,
                     walkers: int | None, seed: int, s2: float,
                     progress: Progress | None) -> tuple[Posterior, np.ndarray]:
    import emcee

    p = len(x_hat)
    n = obs.n
    nw = walkers or max(8, 4 * p)
    nw += nw % 2
    if nw < 2 * p:
        raise ScenarioError.single("mcmc walkers", nw, f"need at least {2 * p} walkers for {p} parameters")

    def log_prob(x):
        if np.any(x < problem.lo) or np.any(x > problem.hi):
            return -np.inf
        r = problem.residuals(x, obs.all)
        return -0.5 * n * math.log(float(r @ r))

    rng = np.random.default_rng(seed)
    spread = np.sqrt(np.maximum(np.diag(cov), 0.0)) if np.all(np.isfinite(cov)) else np.full(p, 0.01)
    spread = np.where(spread > 0, spread, 0.01)
    start = x_hat + 0.1 * spread * rng.standard_normal((nw, p))
    start = np.array([inside(s, problem.lo, problem.hi) for s in start])
    sampler = emcee.EnsembleSampler(nw, p, log_prob)
    sampler.random_state = np.random.RandomState(seed).get_state()  # emcee draws from a seeded RandomState
    done = 0
    for _ in sampler.sample(start, iterations=steps):
        done += 1
        if progress and done % max(1, steps // 50) == 0:
            progress("posterior", done / steps)
    burn = steps // 2
    chain = sampler.get_chain(discard=burn, flat=True)
    if len(chain) > 4000:
        chain = chain[np.linspace(0, len(chain) - 1, 4000).astype(int)]
    quiet = logging.getLogger("emcee")
    level = quiet.level
    quiet.setLevel(logging.ERROR)  # a short chain is reported in the fit's warnings instead
    try:
        tau = tuple(float(v) for v in sampler.get_autocorr_time(discard=burn, quiet=True))
    except Exception:  # emcee raises when the chain is far too short to tell
        tau = tuple(math.nan for _ in range(p))
    finally:
        quiet.setLevel(level)
    # the posterior-predictive band over the measured span
    t_band = np.linspace(0.0, float(obs.t.max()), 60)
    pred = Predictor(problem.predictor.scenario, problem.predictor.params, problem.predictor.observables, t_band,
                     integrator=problem.predictor.integrator)
    draws = chain[rng.choice(len(chain), size=min(200, len(chain)), replace=False)]
    curves: dict[str, list[np.ndarray]] = {o: [] for o in pred.observables}
    noisy: dict[str, list[np.ndarray]] = {o: [] for o in pred.observables}
    for x in draws:
        f = pred(from_x_all(x, problem.logs))
        for o, v in f.items():
            curves[o].append(v)
            noisy[o].append(v + _noise(v, o, obs, s2, rng))
    band = {}
    for o in pred.observables:
        c = np.array(curves[o])
        z = np.array(noisy[o])
        band[o] = np.vstack([np.percentile(c, 2.5, axis=0), np.percentile(c, 50, axis=0),
                             np.percentile(c, 97.5, axis=0), np.percentile(z, 2.5, axis=0),
                             np.percentile(z, 97.5, axis=0)])
    post = Posterior(samples=np.array([[from_x(v, lg) for v, lg in zip(x, problem.logs, strict=True)]
                                       for x in chain]),
                     acceptance=float(np.mean(sampler.acceptance_fraction)), autocorrelation=tau, walkers=nw,
                     steps=steps, times=t_band, band=band)
    return post, chain


def _noise(f: np.ndarray, observable: str, obs: ObservedData, s2: float, rng: np.random.Generator) -> np.ndarray:
    """A draw of the residual error at predicted values f, under the weighting's error model (sd = s / sqrt(w))."""
    m = obs.observable == observable
    ymax = float(np.abs(obs.y[m]).max()) if m.any() else 1.0
    floor = WEIGHT_FLOOR * ymax if ymax > 0 else 1.0
    w_obs = obs.w[m]
    if np.allclose(w_obs, 1.0):
        sd = np.full_like(f, math.sqrt(s2))
    elif np.allclose(w_obs, 1.0 / np.maximum(np.abs(obs.y[m]), floor)):
        sd = np.sqrt(s2 * np.maximum(np.abs(f), floor))
    elif np.allclose(w_obs, 1.0 / np.maximum(np.abs(obs.y[m]), floor) ** 2):
        sd = math.sqrt(s2) * np.maximum(np.abs(f), floor)
    else:  # replicate variance: the median variance
        sd = np.full_like(f, math.sqrt(s2 * float(np.median(1.0 / w_obs))))
    return sd * rng.standard_normal(len(f))


