"""The next experiment: sampling times that pin the parameters down best (D-optimal design).

:func:`design` takes a scenario (its values are the current best guess, such as a fitted
scenario), the parameters to be estimated and what will be measured, and chooses ``samples``
sampling times in a window that maximise the determinant of the Fisher information of the
estimated quantities (the logarithms of positive parameters, as :func:`barrierflow.studies.fit`
estimates them). It reports the expected coefficient of variation of each parameter for the
proposed schedule and, side by side, for the user's own.

The measurement model is the one :func:`~barrierflow.studies.fit.fit` assumes with weights
``1/y^2``: independent errors with standard deviation ``noise * max(f, floor)``, where f is the
predicted value and ``floor`` defaults to :data:`~barrierflow.studies.estimation.WEIGHT_FLOOR`
times the largest predicted value in the window (a value near 0, such as Q before the lag time,
is measured with an absolute error, not a relative one). Each of ``replicates`` cells is sampled
at every time. The information of a schedule is::

    M = replicates * sum_i s_i s_i^T / sigma_i^2,     s_i = d f(t_i) / d x

(x the estimated quantities, the derivatives by central differences of the engine), and the
expected covariance of x is M^-1 (the Cramer-Rao bound, which the least-squares estimates reach
for small errors; Bates and Watts, Nonlinear Regression Analysis and Its Applications, 1988,
ch. 2). For a logarithm, the CV of the parameter is sqrt(exp(var) - 1).

The times are chosen among ``candidates`` equally spaced times of the window, distinct, by a
greedy start and then exchanges of one time for another while the determinant grows (the
exchange algorithm of Fedorov, Theory of Optimal Experiments, 1972, in its simplest form). An
optimum is local; the greedy start makes it a good one in practice.

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..caution import CAUTION
from ..errors import ScenarioError, UnitsError
from ..model import Scenario
from ..model.paths import Param
from ..units import KINDS, convert, parse_quantity
from .estimation import WEIGHT_FLOOR, FreeParameter, Progress, from_x_all, to_x
from .predict import Predictor, check_observable

__all__ = ["DesignResult", "Schedule", "design", "read_times", "read_window"]


@dataclass(frozen=True)
class Schedule:
    """A sampling schedule and what it is expected to give.

    Attributes
    ----------
    times : tuple of float, h
    cv : tuple of float
        Expected coefficient of variation of each parameter (inf when the schedule cannot
        estimate it).
    log_det : float
        log det of the information matrix (higher is better; -inf when singular).
    """

    times: tuple[float, ...]
    cv: tuple[float, ...]
    log_det: float


@dataclass(frozen=True, eq=False)
class DesignResult:
    """What :func:`design` found. Values in the internal units (times in h).

    Attributes
    ----------
    scenario : Scenario
    params : tuple of Param
    values : tuple of float
        The parameter values the design assumes.
    observable : str
    window : (float, float), h
    noise : float
        Relative standard deviation of a measurement.
    floor : float
        Absolute floor of the noise model, internal unit of the observable.
    replicates : int
    proposed : Schedule
    user : Schedule or None
    """

    scenario: Scenario
    params: tuple[Param, ...]
    values: tuple[float, ...]
    observable: str
    window: tuple[float, float]
    noise: float
    floor: float
    replicates: int
    proposed: Schedule
    user: Schedule | None

    @property
    def efficiency(self) -> float | None:
        """(det M_user / det M_proposed)^(1/p): the user's schedule is worth this many proposed ones."""
        if self.user is None or not math.isfinite(self.proposed.log_det):
            return None
        if not math.isfinite(self.user.log_det):
            return 0.0
        return math.exp((self.user.log_det - self.proposed.log_det) / len(self.params))

    def _time_unit(self) -> str:
        return self.scenario.output_units.time

    def as_dict(self) -> dict[str, Any]:
        """The report as plain data: times in the scenario's output time unit, CVs as fractions."""
        tu = self._time_unit()

        def sched(s: Schedule | None) -> dict[str, Any] | None:
            if s is None:
                return None
            return {"times": [float(f"{convert(t, 'time', tu):.12g}") for t in s.times],
                    "cv": {p.text: (c if math.isfinite(c) else None) for p, c in zip(self.params, s.cv, strict=True)},
                    "log_det": s.log_det if math.isfinite(s.log_det) else None}

        return {"observable": self.observable, "time_unit": tu,
                "window": [convert(t, "time", tu) for t in self.window], "noise_cv": self.noise,
                "noise_floor": self.floor, "noise_floor_unit": KINDS[self._kind()].internal,
                "replicates": self.replicates,
                "parameters": {p.text: {"value": p.to_file_unit(v, self.scenario) if p.kind in KINDS else v,
                                        "unit": p.file_unit(self.scenario)}
                               for p, v in zip(self.params, self.values, strict=True)},
                "proposed": sched(self.proposed), "user": sched(self.user), "efficiency_of_user": self.efficiency,
                "caution": CAUTION}

    def to_json(self) -> str:
        """:meth:`as_dict` as JSON text."""
        return json.dumps(self.as_dict(), indent=2, allow_nan=False) + "\n"

    def to_text(self) -> str:
        """The printed report: the proposed times and the expected CVs side by side."""
        tu = self._time_unit()

        def times(s: Schedule) -> str:
            return ", ".join(f"{convert(t, 'time', tu):.4g}" for t in s.times) + f" {tu}"

        name = Path(self.scenario.source).name if self.scenario.source else self.scenario.name
        lines = [f"sampling design for {name}: {self.observable}, {len(self.proposed.times)} samples in "
                 f"{convert(self.window[0], 'time', tu):g} to {convert(self.window[1], 'time', tu):g} {tu}, "
                 f"{self.replicates} replicate{'s' if self.replicates != 1 else ''}, measurement error "
                 f"{100 * self.noise:g} % (floor {self.floor:.3g} {KINDS[self._kind()].internal})",
                 "", f"proposed times (D-optimal): {times(self.proposed)}"]
        if self.user is not None:
            lines.append(f"your times:                 {times(self.user)}")
        lines.append("")
        head = ["parameter", "value", "unit", "expected CV, proposed"] + (["expected CV, yours"] if self.user else [])
        rows = []
        for j, p in enumerate(self.params):
            v = self.values[j]
            shown = p.to_file_unit(v, self.scenario) if p.kind in KINDS else v
            row = [p.text, f"{shown:.4g}", p.file_unit(self.scenario) or "-", _pct(self.proposed.cv[j])]
            if self.user is not None:
                row.append(_pct(self.user.cv[j]))
            rows.append(row)
        widths = [max(len(str(r[i])) for r in [head, *rows]) for i in range(len(head))]
        fmt = "  ".join(f"{{:<{w}}}" for w in widths)
        lines += [fmt.format(*head).rstrip(), fmt.format(*["-" * w for w in widths]).rstrip()]
        lines += [fmt.format(*r).rstrip() for r in rows]
        eff = self.efficiency
        if eff is not None:
            lines += ["", f"your schedule has {100 * eff:.0f} % of the proposed one's efficiency (the p-th root of "
                          "the ratio of the information determinants)"]
        lines += ["", "The expected CVs assume the scenario's values are right and independent errors of the size "
                      "above; they are a guide for planning, not a promise.", "", CAUTION]
        return "\n".join(lines)

    def _kind(self) -> str:
        from ..model.experiment import OBSERVABLES

        return OBSERVABLES[self.observable.split(":")[0]].kind


def _pct(cv: float) -> str:
    return f"{100 * cv:.3g} %" if math.isfinite(cv) else "not estimable"


# ============================================================================ reading options
def read_window(text: str, what: str = "--window") -> tuple[float, float]:
    """``"0:24h"`` or ``"30 min:2 d"`` as (start, end) in h; a bare number takes the other end's unit.

    Raises
    ------
    ScenarioError
        Naming the option, the text and the form expected.
    """
    lo, colon, hi = str(text).partition(":")
    if not colon:
        raise ScenarioError.single(what, repr(text), "write the window as START:END with a time unit, such as '0:24h'")
    unit = _unit_of(hi) or _unit_of(lo)
    start, end = (_time(part, unit, what, text) for part in (lo, hi))
    if not (0 <= start < end):
        raise ScenarioError.single(what, repr(text), "the window must start at 0 or later and end after it starts")
    return start, end


def read_times(text: str, what: str = "--schedule") -> tuple[float, ...]:
    """``"0.5, 1, 2, 4, 8, 24 h"`` (a unit after the last or after each) as times in h, increasing.

    Raises
    ------
    ScenarioError
        Naming the option, the text and the form expected.
    """
    parts = [p.strip() for p in str(text).split(",") if p.strip()]
    if not parts:
        raise ScenarioError.single(what, repr(text), "list times separated by commas, such as '0.5,1,2,4,8,24 h'")
    unit = _unit_of(parts[-1])
    times = tuple(_time(p, unit, what, text) for p in parts)
    if any(t < 0 for t in times) or any(b <= a for a, b in zip(times, times[1:], strict=False)):
        raise ScenarioError.single(what, repr(text), "the times must be >= 0 and increase")
    return times


def _unit_of(part: str) -> str:
    m = re.match(r"\s*[-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?\s*(.*)$", part)
    return m.group(1).strip() if m else ""


def _time(part: str, unit: str, what: str, whole: str) -> float:
    part = part.strip()
    if not _unit_of(part) and unit:
        part = f"{part} {unit}"
    try:
        return parse_quantity(part, "time", what)
    except UnitsError as err:
        raise ScenarioError.single(what, repr(whole), f"cannot read {part!r} as a time ({err.expected})") from None


# ============================================================================ the design
def design(scenario: Scenario, free: Sequence[str | Param | FreeParameter], *, observable: str | None = None,
           samples: int = 8, window: tuple[float, float] | None = None, schedule: Sequence[float] | None = None,
           noise: float = 0.05, floor: float | None = None, replicates: int = 1, candidates: int = 200,
           min_gap: float = 0.0, progress: Progress | None = None) -> DesignResult:
    """Choose D-optimal sampling times and compare the expected CVs with the user's schedule.

    Parameters
    ----------
    scenario : Scenario
        Its values are the assumed truth (use a fitted scenario, or the best guess).
    free : sequence of str, ParamPath, Tied or FreeParameter
        The parameters the experiment is to estimate (as for :func:`barrierflow.studies.fit.fit`;
        bounds are ignored).
    observable : str, optional
        What is measured, such as ``"permeated:skin"`` or ``"conc:receptor"`` (default: the
        permeated amount of the scenario's one barrier).
    samples : int
        Number of sampling times to choose (at least the number of parameters).
    window : (float, float), optional, h
        Where the times may lie (default: 0 to the scenario's duration).
    schedule : sequence of float, optional, h
        The user's own times, evaluated side by side.
    noise : float
        Relative standard deviation of one measurement (0.05 for 5 %).
    floor : float, optional
        Absolute floor of the error, in the internal unit of the observable (default: the
        WEIGHT_FLOOR of the fit times the largest predicted value in the window).
    replicates : int
        Cells sampled at every time.
    candidates : int
        About this many equally spaced candidate times in the window, at a round step in the
        scenario's output time unit (1, 2, 2.5 or 5 times a power of ten), so that the proposed
        times are times a lab can keep.
    min_gap : float, h
        Least time between two proposed samples (default 0: the pure D-optimal choice, which
        often gathers the samples in a few clusters, each as good as replicates at one time;
        a gap spreads them, at some cost in information).
    progress : callable, optional
        ``progress(stage, fraction)`` with the stages ``"sensitivities"`` and ``"design"``.

    Returns
    -------
    DesignResult

    Raises
    ------
    ScenarioError
        For a path that cannot be estimated, an unknown observable, fewer samples than
        parameters, a bad window or schedule.

    Examples
    --------
    >>> import barrierflow as bf                                                    # doctest: +SKIP
    >>> s = bf.load("scenarios/diffusion_cell.toml")                                # doctest: +SKIP
    >>> d = bf.design(s, ["barrier.membrane.layer.1.diffusivity",                   # doctest: +SKIP
    ...                   "barrier.membrane.layer.1.partition"], samples=8, window=(0, 24))
    >>> print(d.to_text())                                                          # doctest: +SKIP
    """
    frees = [FreeParameter.parse(f, scenario) for f in free]
    if not frees:
        raise ScenarioError.single("--free", "no parameters", "name at least one parameter to estimate")
    params = tuple(f.param for f in frees)
    p = len(params)
    if observable is None:
        if len(scenario.barriers) != 1:
            ids = ", ".join(b.id for b in scenario.barriers) or "none"
            raise ScenarioError.single("--observe", "not given", "name what is measured, such as "
                                       f"'permeated:<barrier>' or 'conc:<compartment>' (barriers: {ids})")
        observable = f"permeated:{scenario.barriers[0].id}"
    check_observable(scenario, observable, what="--observe")
    for name, value, low in (("--samples", samples, p), ("--replicates", replicates, 1), ("candidates", candidates, 2)):
        if isinstance(value, bool) or not isinstance(value, int) or value < low:
            raise ScenarioError.single(name, repr(value), f"must be a whole number >= {low}"
                                       + (f" (one sample per parameter at least: {p} parameters)"
                                          if name == "--samples" else ""))
    if not (isinstance(noise, float | int) and 0 < noise < 10):
        raise ScenarioError.single("--noise", repr(noise), "must be a relative error > 0, such as 0.05 for 5 %")
    start, end = window if window is not None else (0.0, float(scenario.duration))
    if not (0 <= start < end and math.isfinite(end)):
        raise ScenarioError.single("--window", f"{start:g} h to {end:g} h", "must start at 0 or later and end after "
                                   "it starts")
    grid = _candidates(start, end, candidates, scenario.output_units.time)
    if samples > candidates:
        raise ScenarioError.single("--samples", repr(samples), f"at most {candidates} (the candidate times)")
    user = tuple(float(t) for t in schedule) if schedule is not None else None
    times = np.unique(np.concatenate([grid, np.array(user or (), dtype=float)]))
    values = np.array([float(f.param.get(scenario)) for f in frees])
    logs = [f.log for f in frees]
    x = np.array([to_x(v, lg) for v, lg in zip(values, logs, strict=True)])
    pred = Predictor(scenario, params, (observable,), times)
    f0 = pred(values)[observable]
    sens = np.empty((len(times), p))
    h = 1e-5 if pred.exact else 1e-4
    for j in range(p):
        step = h if logs[j] else h * max(1.0, abs(x[j]))
        up, down = x.copy(), x.copy()
        up[j] += step
        down[j] -= step
        if not logs[j] and frees[j].param.bound == ">= 0" and down[j] < 0:
            down[j] = x[j]
        fu = pred(from_x_all(up, logs))[observable]
        fd = pred(from_x_all(down, logs))[observable]
        sens[:, j] = (fu - fd) / (up[j] - down[j])
        if progress:
            progress("sensitivities", (j + 1) / p)
    in_window = (times >= start) & (times <= end)
    level = float(np.max(np.abs(f0[in_window]))) if in_window.any() else 0.0
    if floor is None:
        floor = WEIGHT_FLOOR * level if level > 0 else 1.0
    sigma = noise * np.maximum(np.abs(f0), floor)
    scaled = sens / sigma[:, None]
    info = replicates * np.einsum("ij,ik->ijk", scaled, scaled)   # (n_t, p, p)
    cand = np.nonzero(np.isin(times, grid))[0]
    if not (isinstance(min_gap, float | int) and 0 <= min_gap and math.isfinite(min_gap)):
        raise ScenarioError.single("--min-gap", repr(min_gap), "must be a time >= 0")
    if min_gap * (samples - 1) > end - start:
        raise ScenarioError.single("--min-gap", f"{min_gap:g} h", f"{samples} samples at least {min_gap:g} h apart do "
                                   f"not fit in the window of {end - start:g} h")
    chosen = _exchange(info, cand, samples, times, float(min_gap), progress)
    proposed = _schedule(times[chosen], info[chosen], x, logs)
    user_sched = None
    if user is not None:
        idx = np.searchsorted(times, np.array(user))
        user_sched = _schedule(times[idx], info[idx], x, logs)
    return DesignResult(scenario=scenario, params=params, values=tuple(float(v) for v in values), observable=observable,
                        window=(float(start), float(end)), noise=float(noise), floor=float(floor),
                        replicates=replicates, proposed=proposed, user=user_sched)


def _candidates(start: float, end: float, n: int, unit: str) -> np.ndarray:
    """About ``n`` times from ``start`` to ``end`` (h) at a round step in ``unit``, both ends included."""
    per = convert(1.0, "time", unit)             # unit per h
    a, b = start * per, end * per
    raw = (b - a) / max(n - 1, 1)
    power = 10.0 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1.0, 2.0, 2.5, 5.0, 10.0) if m * power >= raw * (1 - 1e-12))
    first = math.ceil(a / step - 1e-9) * step
    grid = np.arange(first, b - 1e-9 * step, step)
    grid = np.unique(np.round(np.concatenate([[a], grid, [b]]) / step, 6) * step)
    return np.clip(grid / per, start, end)


def _log_det(m: np.ndarray) -> float:
    sign, value = np.linalg.slogdet(m)
    return float(value) if sign > 0 else -math.inf


def _exchange(info: np.ndarray, cand: np.ndarray, n: int, times: np.ndarray, gap: float,
              progress: Progress | None) -> np.ndarray:
    """Indices (into ``info``) of ``n`` distinct candidates, at least ``gap`` apart, with a large det of
    their summed information."""
    p = info.shape[1]
    ridge = 1e-12 * float(np.trace(info[cand].sum(axis=0))) / p * np.eye(p)
    tol = 1e-9 * max(1.0, float(times[-1]))

    def free(keep: list[int]) -> list[int]:
        return [int(c) for c in cand if c not in keep and all(abs(times[c] - times[k]) >= gap - tol for k in keep)]

    chosen: list[int] = []
    total = np.zeros((p, p))
    for _ in range(n):      # greedy start (the ridge lets it begin below p points)
        options = free(chosen)
        if not options:
            raise ScenarioError.single("--min-gap", f"{gap:g} h", "leaves too few candidate times for the samples; "
                                       "choose a smaller gap")
        best = max(options, key=lambda c: _log_det(total + info[c] + ridge))
        chosen.append(int(best))
        total = total + info[best]
    current = _log_det(total + ridge)
    for sweep in range(100):   # exchanges while the determinant grows
        improved = False
        for k in range(n):
            base = total - info[chosen[k]]
            others = free(chosen[:k] + chosen[k + 1:])
            others = [c for c in others if c != chosen[k]]
            if not others:
                break
            scores = [_log_det(base + info[c] + ridge) for c in others]
            j = int(np.argmax(scores))
            if scores[j] > current + 1e-10 * max(1.0, abs(current)):
                total = base + info[others[j]]
                chosen[k] = int(others[j])
                current = scores[j]
                improved = True
        if progress:
            progress("design", min(1.0, (sweep + 1) / 10))
        if not improved:
            break
    if progress:
        progress("design", 1.0)
    return np.array(sorted(chosen))


def _schedule(times: np.ndarray, info: np.ndarray, x: np.ndarray, logs: Sequence[bool]) -> Schedule:
    m = info.sum(axis=0)
    log_det = _log_det(m)
    if math.isfinite(log_det):
        cov = np.linalg.inv(m)
        var = np.maximum(np.diag(cov), 0.0)
        cv = tuple(math.sqrt(math.expm1(v)) if lg else (math.sqrt(v) / abs(xv) if xv else math.inf)
                   for v, xv, lg in zip(var, x, logs, strict=True))
    else:
        cv = tuple(math.inf for _ in logs)
    return Schedule(tuple(float(t) for t in times), cv, log_det)
