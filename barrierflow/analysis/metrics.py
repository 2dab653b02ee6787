"""Exposure and barrier metrics from a simulated run, computed from the traces.

Per compartment: Cmax, tmax, Cmin and Cmax over a dosing interval, AUC over the run (linear-up /
log-down trapezoidal rule), AUC extrapolated to infinity with the terminal slope, average
concentration, time above a threshold, and for repeated dosing the AUC of every interval, the
accumulation ratio and whether steady state was reached. Per barrier: peak flux and its time,
the amount permeated, the apparent lag time and steady flux of the classic time-lag method, the
fraction of the applied dose absorbed and the amount left in the barrier.

The functions on plain arrays (:func:`auc`, :func:`terminal_fit`, :func:`time_above`,
:func:`dosing_intervals`, :func:`time_lag_fit`, :func:`exposure_metrics`,
:func:`barrier_metrics`) do the work; :func:`compute_metrics` applies them to a
:class:`~barrierflow.analysis.result.Result`.

Rules (common practice in non-compartmental analysis, as for example in Gabrielsson & Weiner,
Pharmacokinetic and Pharmacodynamic Data Analysis, 4th ed., 2006, ch. 2; Gibaldi & Perrier,
Pharmacokinetics, 2nd ed., 1982, appendix on the trapezoidal rule):

- **AUC**: linear trapezoid on segments where the concentration rises or stays, logarithmic
  trapezoid (C1 - C2) dt / ln(C1/C2) where it falls and both values are > 0.
- **Terminal slope** lambda_z: least-squares line of ln C on t through the last n points after
  Cmax (n >= 3, C > 0); n is the one with the largest adjusted R^2, and among those within a
  tolerance of the best, the largest n (1e-4 is common for measured data; the default here is
  1e-8, see :data:`ADJ_R2_TOLERANCE`). AUC_inf = AUC_last + C_last / lambda_z.
- **Dosing intervals**: between consecutive application times (the starts of bolus, infusion,
  hold and replace doses, and time 0 when a compartment starts loaded), plus one more after the
  last application when the run covers a whole interval after it.
- **Accumulation ratio**: AUC of the last interval over AUC of the first; steady state counts
  as reached when the last two intervals' AUC differ by at most 5 % of the last.
- **Time-lag method**: within the first interval, the window of output times around the peak
  flux where the flux stays within ``lag_tolerance`` (2 %) of the peak (the cumulative curve is
  straight there); the least-squares line of the cumulative amount on t gives the apparent
  steady flux (slope) and lag time (its time-axis intercept, counted from the first
  application).

A row of the traces at the time of an instantaneous event (bolus, replace, remove, start of a
hold) shows the state just after it (scenario format). For the segment that ends at such a row,
the value just before the event is estimated from the two rows before (log-linear when they
fall, linear otherwise), so the jump is not smeared over the segment.

Values are in the internal units (h, mg, mL, cm; concentration mg/mL, AUC mg h/mL); rows for the
CSV and the printed table are converted to the scenario's ``[output]`` units.
"""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, fields
from typing import Any

import numpy as np

from ..model import OutputUnits, Scenario
from ..units import unit_factor

__all__ = [
    "BarrierMetrics",
    "CompartmentMetrics",
    "LagFit",
    "Metrics",
    "TerminalFit",
    "application_times",
    "auc",
    "barrier_metrics",
    "compute_metrics",
    "dosing_intervals",
    "exposure_metrics",
    "jump_times",
    "terminal_fit",
    "time_above",
    "time_lag_fit",
]

NAN = float("nan")
STEADY_STATE_TOLERANCE = 0.05
"""Last two intervals' AUC within this fraction of the last: steady state reached."""
LAG_TOLERANCE = 0.02
"""Time-lag window: flux within this fraction of the peak flux of the first interval."""
PEAK_TOLERANCE = 1e-6
"""Peak flux time: the first output time where the flux is within this fraction of its peak."""
ADJ_R2_TOLERANCE = 1e-8
"""Terminal fit: adjusted R^2 within this of the best counts as equally good (more points win).

For measured data 1e-4 is common practice; a simulated trace has no measurement noise, so any
loss of adjusted R^2 comes from the curvature of an earlier phase, and 1e-4 would take in enough
of it to bias lambda_z by a few tenths of a percent on a biexponential curve. Hence the stricter
default; pass ``adj_r2_tolerance=1e-4`` to follow the measured-data practice."""
CSV_COLUMNS = ("kind", "id", "metric", "value", "unit")
"""Columns of the metrics CSV (``barrierflow run --metrics OUT.csv``)."""

_ADDING = ("bolus", "infusion", "hold", "replace")
_JUMPING = ("bolus", "replace", "remove", "hold")


# ----------------------------------------------------------------------------- small helpers
def _asarray(x: Sequence[float] | np.ndarray) -> np.ndarray:
    return np.asarray(x, dtype=float)


def _rows_at(t: np.ndarray, times: Sequence[float]) -> list[int]:
    """Indices of the rows whose time equals one of ``times`` (to 1e-9 of the run)."""
    if len(t) == 0:
        return []
    tol = 1e-9 * max(abs(float(t[-1])), 1.0)
    out = []
    for s in times:
        j = int(np.searchsorted(t, s - tol))
        if j < len(t) and abs(t[j] - s) <= tol:
            out.append(j)
    return sorted(set(out))


def left_limits(t: Sequence[float], c: Sequence[float], jumps: Sequence[float] = ()) -> np.ndarray:
    """Concentration just before each output time, h and mg/mL.

    Equal to ``c`` except at rows whose time is in ``jumps`` (an instantaneous event that
    changed the compartment; the row shows the state after it). There the value before is
    estimated from the two rows before: log-linear when they fall and are > 0, linear otherwise
    (never below 0); with only one row before, that row's value.

    Parameters
    ----------
    t : array, h
    c : array, mg/mL
    jumps : sequence of float, h
        Times of instantaneous events on this compartment.

    Returns
    -------
    ndarray, mg/mL
    """
    t, c = _asarray(t), _asarray(c)
    cl = c.copy()
    rows = _rows_at(t, jumps)
    jumpset = set(rows)
    for j in rows:
        if j == 0:
            continue
        c1 = c[j - 1]
        if j >= 2 and (j - 1) not in jumpset:
            c0 = c[j - 2]
            ratio = (t[j] - t[j - 1]) / (t[j - 1] - t[j - 2])
            if c0 > c1 > 0:
                cl[j] = c1 * (c1 / c0) ** ratio
            else:
                cl[j] = max(c1 + (c1 - c0) * ratio, 0.0)
        else:
            cl[j] = c1
    return cl


def _segment_areas(t: np.ndarray, c: np.ndarray, cl: np.ndarray) -> np.ndarray:
    """Area of each segment [t_j, t_j+1]: linear up, log down."""
    c1, c2 = c[:-1], cl[1:]
    dt = np.diff(t)
    lin = 0.5 * (c1 + c2) * dt
    down = (c2 < c1) & (c2 > 0) & (c1 > 0)
    out = lin.copy()
    if np.any(down):
        a, b = c1[down], c2[down]
        out[down] = (a - b) * dt[down] / np.log(a / b)
    return out


def auc(t: Sequence[float], c: Sequence[float], jumps: Sequence[float] = (),
        start: float | None = None, end: float | None = None) -> float:
    """Area under the concentration curve by the linear-up / log-down trapezoidal rule.

    Parameters
    ----------
    t : array, h
        Increasing output times.
    c : array, mg/mL
    jumps : sequence of float, h
        Times of instantaneous events on this compartment (see :func:`left_limits`).
    start, end : float or None, h
        Limits (default: the whole trace). A limit between output times is placed by linear
        interpolation (log-linear on a falling segment).

    Returns
    -------
    float, mg h/mL

    Examples
    --------
    A hand-worked table: rising 0 -> 2 over 1 h (linear, 1.0), falling 2 -> 1 over 1 h
    (log: 1/ln 2 = 1.442695):

    >>> round(auc([0, 1, 2], [0, 2, 1]), 6)
    2.442695
    """
    t, c = _asarray(t), _asarray(c)
    if len(t) < 2:
        return 0.0
    cl = left_limits(t, c, jumps)
    seg = _segment_areas(t, c, cl)
    cum = np.concatenate(([0.0], np.cumsum(seg)))
    lo = float(t[0]) if start is None else float(start)
    hi = float(t[-1]) if end is None else float(end)
    return _auc_between(t, c, cl, cum, lo, hi)


def _auc_between(t: np.ndarray, c: np.ndarray, cl: np.ndarray, cum: np.ndarray, lo: float, hi: float) -> float:
    """AUC over [lo, hi] from the cumulative segment areas, partial segments interpolated."""
    lo, hi = max(lo, float(t[0])), min(hi, float(t[-1]))
    if hi <= lo:
        return 0.0
    tol = 1e-12 * max(abs(float(t[-1])), 1.0)
    i = int(np.searchsorted(t, lo - tol))           # first row >= lo
    k = int(np.searchsorted(t, hi + tol, "right")) - 1   # last row <= hi
    if abs(t[i] - lo) <= tol:
        lo = float(t[i])
    if abs(t[k] - hi) <= tol:
        hi = float(t[k])
    if k < i:  # lo and hi inside one segment
        j = k
        y0 = _interp(t[j], t[j + 1], c[j], cl[j + 1], lo)
        y1 = _interp(t[j], t[j + 1], c[j], cl[j + 1], hi)
        return _one_segment(lo, hi, y0, y1)
    total = float(cum[k] - cum[i])
    if t[i] > lo:  # partial segment [lo, t_i] of segment i-1
        j = i - 1
        total += _one_segment(lo, t[i], _interp(t[j], t[i], c[j], cl[i], lo), cl[i])
    if t[k] < hi:  # partial segment [t_k, hi] of segment k
        total += _one_segment(t[k], hi, c[k], _interp(t[k], t[k + 1], c[k], cl[k + 1], hi))
    return total


def _one_segment(a: float, b: float, ya: float, yb: float) -> float:
    y = np.array([ya, yb])
    return float(_segment_areas(np.array([a, b]), y, y)[0])


def _interp(a: float, b: float, ya: float, yb: float, x: float) -> float:
    if b == a:
        return ya
    f = (x - a) / (b - a)
    if yb < ya and yb > 0 and ya > 0:
        return float(ya * (yb / ya) ** f)
    return float(ya + (yb - ya) * f)


@dataclass(frozen=True)
class TerminalFit:
    """Log-linear fit of the terminal phase.

    Attributes
    ----------
    lambda_z : float, 1/h
        Terminal rate constant (NaN when no fit was possible).
    intercept : float
        ln C at t = 0 of the fitted line.
    points : int
        Number of points used.
    start : float, h
        Time of the first point used.
    adj_r2 : float
        Adjusted R^2 of the fit.
    """

    lambda_z: float
    intercept: float
    points: int
    start: float
    adj_r2: float

    @property
    def half_life(self) -> float:
        """Terminal half-life ln 2 / lambda_z, h."""
        return math.log(2.0) / self.lambda_z if self.lambda_z > 0 else NAN


_NO_FIT = TerminalFit(NAN, NAN, 0, NAN, NAN)


def terminal_fit(t: Sequence[float], c: Sequence[float], *, after: float | None = None,
                 min_points: int = 3, adj_r2_tolerance: float = ADJ_R2_TOLERANCE) -> TerminalFit:
    """Terminal slope by the best adjusted R^2 over the last n points.

    Parameters
    ----------
    t : array, h
    c : array, mg/mL
    after : float or None, h
        Use only points later than this (default: later than tmax of the trace).
    min_points : int
        Fewest points of a fit (3, common practice).
    adj_r2_tolerance : float
        Fits within this of the best adjusted R^2 count as equally good; the one with most
        points wins (see :data:`ADJ_R2_TOLERANCE`).

    Returns
    -------
    TerminalFit
        ``lambda_z`` NaN when fewer than ``min_points`` usable points exist or the slope is not
        negative.

    Examples
    --------
    >>> import numpy as np
    >>> t = np.arange(0, 13.0); c = 5 * np.exp(-0.3 * t)
    >>> round(terminal_fit(t, c).lambda_z, 12)
    0.3
    """
    if min_points < 3:
        raise ValueError(f"min_points: got {min_points}; must be >= 3 (the adjusted R^2 needs 3 points)")
    t, c = _asarray(t), _asarray(c)
    if len(t) == 0:
        return _NO_FIT
    if after is None:
        after = float(t[int(np.argmax(c))])
    use = (t > after) & (c > 0) & np.isfinite(c)
    idx = np.nonzero(use)[0]
    if len(idx) < min_points:
        return _NO_FIT
    # only the trailing run of usable points (a zero in the middle ends the terminal phase)
    breaks = np.nonzero(np.diff(idx) != 1)[0]
    if len(breaks):
        idx = idx[breaks[-1] + 1:]
    if len(idx) < min_points:
        return _NO_FIT
    x = t[idx][::-1]
    y = np.log(c[idx])[::-1]
    # fits over the last n points, n = 1..N, by cumulative sums from the end; shifting by the
    # last point keeps the sums small (no cancellation for the short fits)
    x0, y0 = x[0], y[0]
    xs, ys = x - x0, y - y0
    n = np.arange(1, len(x) + 1, dtype=float)
    xm = np.cumsum(xs) / n
    ym = np.cumsum(ys) / n
    sxx = np.cumsum(xs * xs) - n * xm * xm
    sxy = np.cumsum(xs * ys) - n * xm * ym
    syy = np.cumsum(ys * ys) - n * ym * ym
    k = np.arange(min_points - 1, len(x))
    slope = sxy[k] / np.where(sxx[k] > 0, sxx[k], np.inf)
    ss_res = np.maximum(syy[k] - slope * sxy[k], 0.0)
    r2 = np.where(syy[k] > 0, 1.0 - ss_res / np.where(syy[k] > 0, syy[k], 1.0), 1.0)
    nk = n[k]
    adj = 1.0 - (1.0 - r2) * (nk - 1.0) / (nk - 2.0)
    ok = slope < 0
    if not np.any(ok):
        return _NO_FIT
    adj_ok = np.where(ok, adj, -np.inf)
    best = float(np.max(adj_ok))
    choice = int(np.nonzero(adj_ok >= best - adj_r2_tolerance)[0][-1])
    npts = int(nk[choice])
    lam = float(-slope[choice])
    kc = k[choice]
    icpt = float(y0 + ym[kc] - slope[choice] * (x0 + xm[kc]))
    return TerminalFit(lam, icpt, npts, float(x[npts - 1]), float(adj[choice]))


def time_above(t: Sequence[float], c: Sequence[float], threshold: float, jumps: Sequence[float] = ()) -> float:
    """Total time the concentration is above ``threshold``, crossings placed linearly.

    Parameters
    ----------
    t : array, h
    c : array, mg/mL
    threshold : float, mg/mL
    jumps : sequence of float, h
        Times of instantaneous events on this compartment.

    Returns
    -------
    float, h

    Examples
    --------
    >>> time_above([0, 1, 2, 3], [0, 2, 2, 0], 1.0)
    2.0
    """
    t, c = _asarray(t), _asarray(c)
    cl = left_limits(t, c, jumps)
    a, b = c[:-1] - threshold, cl[1:] - threshold
    dt = np.diff(t)
    both = (a > 0) & (b > 0)
    one = (a > 0) ^ (b > 0)
    part = np.zeros_like(dt)
    part[one] = dt[one] * np.maximum(a[one], b[one]) / (np.abs(a[one]) + np.abs(b[one]))
    return float(np.sum(dt[both]) + np.sum(part))


def application_times(scenario: Scenario, end: float | None = None) -> tuple[float, ...]:
    """Times at which substance is applied: time 0 if a compartment starts loaded, and the start
    of every bolus, infusion, hold and replace dose up to ``end`` (default: the duration), h."""
    end = scenario.duration if end is None else end
    times = set()
    if any(c.starting_concentration > 0 for c in scenario.compartments):
        times.add(0.0)
    for d in scenario.doses:
        if d.kind in _ADDING:
            times.update(d.start_times(end))
    return tuple(sorted(times))


def jump_times(scenario: Scenario, cid: str, end: float | None = None) -> tuple[float, ...]:
    """Times of instantaneous events on compartment ``cid`` (bolus, replace, remove, hold start), h."""
    end = scenario.duration if end is None else end
    out: set[float] = set()
    for d in scenario.doses:
        if d.target == cid and d.kind in _JUMPING:
            out.update(d.start_times(end))
    return tuple(sorted(out))


def dosing_intervals(applications: Sequence[float], end: float) -> tuple[tuple[float, float], ...]:
    """Dosing intervals: between consecutive applications, plus one whole interval after the last.

    Parameters
    ----------
    applications : sequence of float, h
        Application times (see :func:`application_times`).
    end : float, h
        End of the run.

    Returns
    -------
    tuple of (start, end), h
        With one application only: the single interval from it to the end of the run.

    Examples
    --------
    >>> dosing_intervals([0, 24, 48], 72)
    ((0.0, 24.0), (24.0, 48.0), (48.0, 72.0))
    >>> dosing_intervals([0, 24, 48], 60)
    ((0.0, 24.0), (24.0, 48.0))
    """
    a = sorted({float(x) for x in applications if x <= end})
    if not a:
        return ()
    if len(a) == 1:
        return ((a[0], float(end)),) if end > a[0] else ()
    out = [(a[i], a[i + 1]) for i in range(len(a) - 1)]
    tau = a[-1] - a[-2]
    if a[-1] + tau <= end * (1 + 1e-9) + 1e-12:
        out.append((a[-1], a[-1] + tau))
    return tuple(out)


@dataclass(frozen=True)
class LagFit:
    """Result of the time-lag method on a cumulative curve.

    Attributes
    ----------
    lag_time : float, h
        Time-axis intercept of the fitted line, counted from ``origin``.
    steady_flux : float, mg/(cm^2 h)
        Slope of the fitted line.
    window : tuple of float, h
        First and last time of the points used.
    points : int
    r2 : float
        R^2 of the line.
    """

    lag_time: float
    steady_flux: float
    window: tuple[float, float]
    points: int
    r2: float


_NO_LAG = LagFit(NAN, NAN, (NAN, NAN), 0, NAN)


def time_lag_fit(t: Sequence[float], permeated: Sequence[float], flux: Sequence[float], *,
                 origin: float = 0.0, end: float | None = None, tolerance: float = LAG_TOLERANCE) -> LagFit:
    """Apparent lag time and steady flux by the classic time-lag method.

    Parameters
    ----------
    t : array, h
    permeated : array, mg/cm^2
        Cumulative amount per area.
    flux : array, mg/(cm^2 h)
        Flux per area at the same times.
    origin : float, h
        Time of the application the lag is counted from.
    end : float or None, h
        Last time to consider (the next application; default: the end of the trace).
    tolerance : float
        The window holds the points around the peak flux within this fraction of it.

    Returns
    -------
    LagFit
        NaN values when fewer than 3 points qualify or the peak flux is not > 0.
    """
    t, q, j = _asarray(t), _asarray(permeated), _asarray(flux)
    hi = t[-1] if end is None else end
    sel = np.nonzero((t >= origin) & (t <= hi * (1 + 1e-12) + 1e-12))[0]
    if len(sel) < 3:
        return _NO_LAG
    js = j[sel]
    k = int(np.argmax(js))
    peak = js[k]
    if not peak > 0:
        return _NO_LAG
    good = js >= (1.0 - tolerance) * peak
    lo_k = k
    while lo_k > 0 and good[lo_k - 1]:
        lo_k -= 1
    hi_k = k
    while hi_k < len(js) - 1 and good[hi_k + 1]:
        hi_k += 1
    rows = sel[lo_k:hi_k + 1]
    if len(rows) < 3:
        return _NO_LAG
    x, y = t[rows], q[rows]
    slope, icpt = np.polyfit(x, y, 1)
    resid = y - (slope * x + icpt)
    ss = float(np.sum((y - y.mean()) ** 2))
    r2 = 1.0 - float(np.sum(resid**2)) / ss if ss > 0 else 1.0
    if not slope > 0:
        return _NO_LAG
    return LagFit(float(-icpt / slope - origin), float(slope), (float(x[0]), float(x[-1])), len(rows), r2)


# ----------------------------------------------------------------------------- typed table
@dataclass(frozen=True)
class CompartmentMetrics:
    """Exposure metrics of one compartment (internal units).

    Attributes
    ----------
    id : str
    cmax : float, mg/mL
        Highest concentration of the run.
    tmax : float, h
        Its (first) time.
    cmin : float, mg/mL
        Lowest concentration over the last dosing interval (just before the next dose included).
    cmax_interval : float, mg/mL
        Highest concentration over the last dosing interval.
    interval : tuple of float, h
        The last dosing interval (start, end) that ``cmin`` and ``cmax_interval`` refer to.
    auc : float, mg h/mL
        Over the run.
    auc_inf : float, mg h/mL
        Extrapolated to infinity with the terminal slope (NaN without a terminal phase).
    auc_extrapolated_percent : float, %
        Share of ``auc_inf`` that is extrapolated.
    lambda_z : float, 1/h
    half_life : float, h
    terminal_points : int
    terminal_start : float, h
    terminal_adj_r2 : float
    c_avg : float, mg/mL
        AUC over the run divided by its duration.
    c_avg_interval : float, mg/mL
        AUC of the last dosing interval divided by its length.
    threshold : float or None, mg/mL
    time_above : float or None, h
        Time above ``threshold`` (None without a threshold).
    interval_aucs : tuple of float, mg h/mL
        AUC of every dosing interval.
    accumulation_ratio : float
        AUC of the last interval over the first (NaN with fewer than 2 intervals).
    steady_state_reached : bool or None
        Last two intervals' AUC within 5 % (None with fewer than 2 intervals).
    """

    id: str
    cmax: float
    tmax: float
    cmin: float
    cmax_interval: float
    interval: tuple[float, float]
    auc: float
    auc_inf: float
    auc_extrapolated_percent: float
    lambda_z: float
    half_life: float
    terminal_points: int
    terminal_start: float
    terminal_adj_r2: float
    c_avg: float
    c_avg_interval: float
    threshold: float | None
    time_above: float | None
    interval_aucs: tuple[float, ...]
    accumulation_ratio: float
    steady_state_reached: bool | None


@dataclass(frozen=True)
class BarrierMetrics:
    """Metrics of one barrier (internal units).

    Attributes
    ----------
    id : str
    peak_flux : float, mg/(cm^2 h)
        Highest flux into ``to``.
    peak_flux_time : float, h
        First time the flux comes within 1e-6 of the peak (:data:`PEAK_TOLERANCE`).
    permeated : float, mg/cm^2
        Net cumulative amount per area that entered ``to``, at the end.
    permeated_amount : float, mg
        The same over the barrier's area.
    lag_time : float, h
        Apparent lag time of the time-lag method (see :func:`time_lag_fit`).
    steady_flux : float, mg/(cm^2 h)
        Apparent steady flux, the slope of the same line.
    lag_window : tuple of float, h
        First and last time of the points of that line.
    lag_points : int
    lag_r2 : float
    applied : float, mg
        The applied dose: initial amounts plus everything dosed (inf with a held source above 0).
    fraction_absorbed : float
        ``permeated_amount / applied`` (NaN for an infinite dose).
    content : float, mg
        Amount left in the barrier at the end.
    content_fraction : float
        ``content / applied``.
    """

    id: str
    peak_flux: float
    peak_flux_time: float
    permeated: float
    permeated_amount: float
    lag_time: float
    steady_flux: float
    lag_window: tuple[float, float]
    lag_points: int
    lag_r2: float
    applied: float
    fraction_absorbed: float
    content: float
    content_fraction: float



# unit kinds of every field, for the rows in output units
_C_UNITS = {
    "cmax": "conc", "tmax": "time", "cmin": "conc", "cmax_interval": "conc", "auc": "auc", "auc_inf": "auc",
    "auc_extrapolated_percent": "%", "lambda_z": "rate", "half_life": "time", "terminal_points": "count",
    "terminal_start": "time", "terminal_adj_r2": "1", "c_avg": "conc", "c_avg_interval": "conc",
    "threshold": "conc", "time_above": "time", "accumulation_ratio": "1", "steady_state_reached": "bool",
}
_B_UNITS = {
    "peak_flux": "flux", "peak_flux_time": "time", "permeated": "per_area", "permeated_amount": "amount",
    "lag_time": "time", "steady_flux": "flux", "lag_points": "count", "lag_r2": "1", "applied": "amount",
    "fraction_absorbed": "1", "content": "amount", "content_fraction": "1",
}
_INTERNAL = {"conc": "mg/mL", "time": "h", "auc": "mg*h/mL", "rate": "1/h", "flux": "mg/(cm^2*h)",
             "per_area": "mg/cm^2", "amount": "mg", "%": "%", "1": "", "count": "", "bool": ""}


@dataclass(frozen=True)
class Metrics:
    """The metrics of a run: one :class:`CompartmentMetrics` per compartment and one
    :class:`BarrierMetrics` per barrier, in the order of the scenario.

    Attributes
    ----------
    compartments : tuple of CompartmentMetrics
    barriers : tuple of BarrierMetrics
    application_times : tuple of float, h
    intervals : tuple of (float, float), h
        The dosing intervals used.
    duration : float, h
        Span of the traces.
    output_units : OutputUnits
        Units of :meth:`to_rows`, :meth:`to_csv` and :meth:`to_text`.
    molar_mass : float or None, mg/mmol
    """

    compartments: tuple[CompartmentMetrics, ...]
    barriers: tuple[BarrierMetrics, ...]
    application_times: tuple[float, ...]
    intervals: tuple[tuple[float, float], ...]
    duration: float
    output_units: OutputUnits = OutputUnits()
    molar_mass: float | None = None

    def compartment(self, cid: str) -> CompartmentMetrics:
        """Metrics of compartment ``cid``."""
        for m in self.compartments:
            if m.id == cid:
                return m
        raise KeyError(f"no compartment {cid!r}; known: {', '.join(m.id for m in self.compartments)}")

    def barrier(self, bid: str) -> BarrierMetrics:
        """Metrics of barrier ``bid``."""
        for m in self.barriers:
            if m.id == bid:
                return m
        raise KeyError(f"no barrier {bid!r}; known: {', '.join(m.id for m in self.barriers)}")

    # ------------------------------------------------------------------ exports
    def as_dict(self) -> dict[str, Any]:
        """JSON-able dict in internal units, with the unit of every metric under ``units``."""
        def clean(v: Any) -> Any:
            if isinstance(v, float) and not math.isfinite(v):
                return None if math.isnan(v) else ("inf" if v > 0 else "-inf")
            if isinstance(v, (tuple, list)):
                return [clean(x) for x in v]
            return v

        units = {k: _INTERNAL[u] for k, u in {**_C_UNITS, **_B_UNITS}.items()}
        units.update({"interval": "h", "interval_aucs": "mg*h/mL", "lag_window": "h"})
        return {
            "units": units,
            "application_times_h": list(self.application_times),
            "intervals_h": [list(i) for i in self.intervals],
            "compartments": {m.id: {k: clean(v) for k, v in asdict(m).items() if k != "id"}
                             for m in self.compartments},
            "barriers": {m.id: {k: clean(v) for k, v in asdict(m).items() if k != "id"} for m in self.barriers},
        }

    def _factors(self, units: OutputUnits | None) -> dict[str, tuple[float, str]]:
        u = units or self.output_units
        mm = self.molar_mass
        ft = unit_factor("time", u.time)
        fc = unit_factor("concentration", u.concentration, mm)
        fa = unit_factor("amount", u.amount, mm)
        farea = unit_factor("area", u.area)
        return {
            "conc": (fc, u.concentration), "time": (ft, u.time), "auc": (fc * ft, f"{u.concentration}*{u.time}"),
            "rate": (1.0 / ft, f"1/{u.time}"), "flux": (fa / farea / ft, f"{u.amount}/({u.area}*{u.time})"),
            "per_area": (fa / farea, f"{u.amount}/{u.area}"), "amount": (fa, u.amount),
            "%": (1.0, "%"), "1": (1.0, ""), "count": (1.0, ""), "bool": (1.0, ""),
        }

    def to_rows(self, units: OutputUnits | None = None) -> list[tuple[str, str, str, Any, str]]:
        """Rows ``(kind, id, metric, value, unit)`` in ``units`` (default: the scenario's output units).

        ``kind`` is ``compartment`` or ``barrier``; missing values are None; every dosing
        interval's AUC is a row ``auc_interval_<n>``.
        """
        fac = self._factors(units)
        rows: list[tuple[str, str, str, Any, str]] = []

        def put(kind: str, ident: str, name: str, value: Any, ukind: str) -> None:
            f, unit = fac[ukind]
            if value is None or (isinstance(value, float) and math.isnan(value)):
                rows.append((kind, ident, name, None, unit))
            elif ukind == "bool":
                rows.append((kind, ident, name, bool(value), unit))
            elif ukind == "count":
                rows.append((kind, ident, name, int(value), unit))
            else:
                rows.append((kind, ident, name, float(value) * f, unit))

        for m in self.compartments:
            for fld in fields(m):
                name = fld.name
                if name in _C_UNITS:
                    put("compartment", m.id, name, getattr(m, name), _C_UNITS[name])
            put("compartment", m.id, "interval_start", m.interval[0], "time")
            put("compartment", m.id, "interval_end", m.interval[1], "time")
            for i, a in enumerate(m.interval_aucs, start=1):
                put("compartment", m.id, f"auc_interval_{i}", a, "auc")
        for m in self.barriers:
            for fld in fields(m):
                name = fld.name
                if name in _B_UNITS:
                    put("barrier", m.id, name, getattr(m, name), _B_UNITS[name])
            put("barrier", m.id, "lag_window_start", m.lag_window[0], "time")
            put("barrier", m.id, "lag_window_end", m.lag_window[1], "time")
        return rows

    def to_csv(self, units: OutputUnits | None = None) -> str:
        """The rows of :meth:`to_rows` as CSV text with the columns :data:`CSV_COLUMNS`."""
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(CSV_COLUMNS)
        for kind, ident, name, value, unit in self.to_rows(units):
            if value is None:
                text = ""
            elif isinstance(value, bool):
                text = "true" if value else "false"
            elif isinstance(value, int):
                text = str(value)
            else:
                text = format(value, ".10g")
            w.writerow((kind, ident, name, text, unit))
        return buf.getvalue()

    def to_text(self, units: OutputUnits | None = None) -> str:
        """A compact printed table (what ``barrierflow run`` shows), in ``units``."""
        fac = self._factors(units)

        def fmt(value: Any, ukind: str) -> str:
            if value is None or (isinstance(value, float) and math.isnan(value)):
                return "-"
            if ukind == "bool":
                return "yes" if value else "no"
            return format(float(value) * fac[ukind][0], ".4g")

        lines = []
        ccols = [("Cmax", "cmax", "conc"), ("tmax", "tmax", "time"), ("Cmin", "cmin", "conc"),
                 ("AUC", "auc", "auc"), ("AUCinf", "auc_inf", "auc"), ("Cavg", "c_avg", "conc"),
                 ("t1/2", "half_life", "time"), ("accum.", "accumulation_ratio", "1"),
                 ("steady", "steady_state_reached", "bool")]
        if any(m.threshold is not None for m in self.compartments):
            ccols.append(("t>thr", "time_above", "time"))
        crows = [(m.id, [fmt(getattr(m, a), k) for _, a, k in ccols]) for m in self.compartments]
        lines += _table("compartment", crows, [f"{h} [{fac[k][1]}]" if fac[k][1] else h for h, _, k in ccols])
        bcols = [("peak flux", "peak_flux", "flux"), ("at", "peak_flux_time", "time"),
                 ("permeated", "permeated", "per_area"), ("permeated", "permeated_amount", "amount"),
                 ("lag", "lag_time", "time"), ("steady flux", "steady_flux", "flux"),
                 ("absorbed", "fraction_absorbed", "1"), ("in barrier", "content", "amount")]
        if self.barriers:
            lines.append("")
            brows = [(m.id, [fmt(getattr(m, a), k) for _, a, k in bcols]) for m in self.barriers]
            lines += _table("barrier", brows, [f"{h} [{fac[k][1]}]" if fac[k][1] else h for h, _, k in bcols])
        return "\n".join(lines)


def _table(first: str, rows: list[tuple[str, list[str]]], heads: list[str]) -> list[str]:
    cols = [[first] + [r[0] for r in rows]] + [[h] + [r[1][i] for r in rows] for i, h in enumerate(heads)]
    widths = [max(len(x) for x in col) for col in cols]
    out = []
    for i in range(len(rows) + 1):
        cells = [cols[k][i].ljust(widths[k]) if k == 0 else cols[k][i].rjust(widths[k]) for k in range(len(cols))]
        out.append("  ".join(cells).rstrip())
    return out


# ----------------------------------------------------------------------------- on arrays
def exposure_metrics(
    t: Sequence[float],
    c: Sequence[float],
    applications: Sequence[float] = (0.0,),
    *,
    jumps: Sequence[float] = (),
    threshold: float | None = None,
    cid: str = "",
    adj_r2_tolerance: float = ADJ_R2_TOLERANCE,
) -> CompartmentMetrics:
    """Exposure metrics of one concentration trace.

    Parameters
    ----------
    t : array, h
        Increasing output times.
    c : array, mg/mL
    applications : sequence of float, h
        Application times (dosing intervals are built from them, :func:`dosing_intervals`).
    jumps : sequence of float, h
        Times of instantaneous events on this compartment (see :func:`left_limits`).
    threshold : float or None, mg/mL
        For the time above threshold.
    cid : str
        Id to store.
    adj_r2_tolerance : float
        For the terminal fit (see :func:`terminal_fit`).

    Returns
    -------
    CompartmentMetrics
    """
    t, c = _asarray(t), _asarray(c)
    end = float(t[-1])
    k = int(np.argmax(c))
    cmax, tmax = float(c[k]), float(t[k])
    intervals = dosing_intervals(applications, end) or ((float(t[0]), end),)
    cl = left_limits(t, c, jumps)
    cum = np.concatenate(([0.0], np.cumsum(_segment_areas(t, c, cl)))) if len(t) > 1 else np.zeros(1)
    total = float(cum[-1])
    aucs = tuple(_auc_between(t, c, cl, cum, a, b) for a, b in intervals)
    a, b = intervals[-1]
    inside = (t >= a - 1e-12) & (t < b - 1e-9 * max(b, 1.0))
    vals = list(c[inside])
    end_rows = _rows_at(t, [b])
    if end_rows:
        vals.append(cl[end_rows[0]])
    else:
        vals.append(_interp_trace(t, c, b))
    cmin = float(min(vals)) if vals else NAN
    cmax_i = float(max(vals)) if vals else NAN
    # terminal phase: after the last application and after the Cmax that follows it
    last_app = max([x for x in applications if x <= end], default=float(t[0]))
    after_mask = t >= last_app
    if np.any(after_mask):
        j0 = int(np.nonzero(after_mask)[0][0])
        kk = j0 + int(np.argmax(c[j0:]))
        fit = terminal_fit(t, c, after=float(t[kk]), adj_r2_tolerance=adj_r2_tolerance)
    else:
        fit = _NO_FIT
    if fit.lambda_z > 0:
        auc_inf = total + float(c[-1]) / fit.lambda_z
        extra = 100.0 * (auc_inf - total) / auc_inf if auc_inf > 0 else NAN
    else:
        auc_inf, extra = NAN, NAN
    span = end - float(t[0])
    n_int = len(aucs)
    if n_int >= 2 and aucs[0] > 0:
        acc = aucs[-1] / aucs[0]
    else:
        acc = NAN
    steady = None
    if n_int >= 2 and aucs[-1] > 0:
        steady = bool(abs(aucs[-1] - aucs[-2]) <= STEADY_STATE_TOLERANCE * abs(aucs[-1]))
    return CompartmentMetrics(
        id=cid, cmax=cmax, tmax=tmax, cmin=cmin, cmax_interval=cmax_i, interval=(float(a), float(b)),
        auc=total, auc_inf=auc_inf, auc_extrapolated_percent=extra, lambda_z=fit.lambda_z,
        half_life=fit.half_life, terminal_points=fit.points, terminal_start=fit.start,
        terminal_adj_r2=fit.adj_r2, c_avg=total / span if span > 0 else NAN,
        c_avg_interval=aucs[-1] / (b - a) if b > a else NAN,
        threshold=threshold, time_above=None if threshold is None else time_above(t, c, threshold, jumps),
        interval_aucs=aucs, accumulation_ratio=acc, steady_state_reached=steady,
    )


def _interp_trace(t: np.ndarray, c: np.ndarray, x: float) -> float:
    j = int(np.clip(np.searchsorted(t, x) - 1, 0, len(t) - 2)) if len(t) > 1 else 0
    if len(t) < 2:
        return float(c[0])
    return _interp(t[j], t[j + 1], c[j], c[j + 1], x)


def barrier_metrics(
    t: Sequence[float],
    flux: Sequence[float],
    permeated: Sequence[float],
    content: Sequence[float],
    area: float,
    applied: float,
    applications: Sequence[float] = (0.0,),
    *,
    bid: str = "",
    lag_tolerance: float = LAG_TOLERANCE,
) -> BarrierMetrics:
    """Metrics of one barrier from its traces.

    Parameters
    ----------
    t : array, h
    flux : array, mg/(cm^2 h)
        Flux into ``to``.
    permeated : array, mg/cm^2
        Net cumulative amount per area into ``to``.
    content : array, mg
        Amount in the layers.
    area : float, cm^2
    applied : float, mg
        The applied dose (inf for an infinite dose).
    applications : sequence of float, h
        Application times; the time-lag method uses the first interval.
    bid : str
    lag_tolerance : float
        See :func:`time_lag_fit`.

    Returns
    -------
    BarrierMetrics
    """
    t, j, q, m = _asarray(t), _asarray(flux), _asarray(permeated), _asarray(content)
    # the first time the flux comes within PEAK_TOLERANCE of its peak (a plateau has no single top)
    top = float(np.max(j))
    k = int(np.nonzero(j >= top - PEAK_TOLERANCE * abs(top))[0][0])
    apps = sorted(x for x in applications if x <= t[-1])
    origin = apps[0] if apps else float(t[0])
    nxt = apps[1] if len(apps) > 1 else None
    fit = time_lag_fit(t, q, j, origin=origin, end=nxt, tolerance=lag_tolerance)
    perm_amount = float(q[-1]) * area
    finite = math.isfinite(applied) and applied > 0
    return BarrierMetrics(
        id=bid, peak_flux=top, peak_flux_time=float(t[k]), permeated=float(q[-1]),
        permeated_amount=perm_amount, lag_time=fit.lag_time, steady_flux=fit.steady_flux,
        lag_window=fit.window, lag_points=fit.points, lag_r2=fit.r2, applied=float(applied),
        fraction_absorbed=perm_amount / applied if finite else NAN, content=float(m[-1]),
        content_fraction=float(m[-1]) / applied if finite else NAN,
    )


# ----------------------------------------------------------------------------- on a Result
def applied_dose(result: Any) -> float:
    """The applied dose of a run, mg: initial amounts plus all that was dosed into compartments
    that are not held; ``inf`` when a held compartment above 0 supplies (an infinite dose)."""
    sc = result.scenario
    total = 0.0
    for comp in sc.compartments:
        if comp.held:
            if comp.held_concentration and comp.held_concentration > 0:
                return math.inf
            continue
        total += comp.initial_concentration * (comp.volume or 0.0)
        dosed = np.asarray(result.dosed(comp.id), dtype=float)
        if len(dosed):
            total += float(dosed[-1])
    return total


def compute_metrics(result: Any, threshold: float | Mapping[str, float] | None = None, *,
                    lag_tolerance: float = LAG_TOLERANCE, adj_r2_tolerance: float = ADJ_R2_TOLERANCE) -> Metrics:
    """Metrics of a simulated run.

    Parameters
    ----------
    result : Result
        From :func:`barrierflow.simulate`.
    threshold : float, mapping or None, mg/mL
        Concentration for the time above threshold, one for every compartment or a mapping
        from compartment id to its own.
    lag_tolerance : float
        Width of the time-lag window (see :func:`time_lag_fit`).
    adj_r2_tolerance : float
        For the terminal fit (see :func:`terminal_fit`).

    Returns
    -------
    Metrics
    """
    sc: Scenario = result.scenario
    t = np.asarray(result.times, dtype=float)
    end = float(t[-1])
    apps = application_times(sc, end)
    intervals = dosing_intervals(apps, end) or ((float(t[0]), end),)
    comps = []
    for comp in sc.compartments:
        thr = threshold.get(comp.id) if isinstance(threshold, Mapping) else threshold
        comps.append(exposure_metrics(t, result.concentration(comp.id), apps or (float(t[0]),),
                                      jumps=jump_times(sc, comp.id, end), threshold=thr, cid=comp.id,
                                      adj_r2_tolerance=adj_r2_tolerance))
    dose = applied_dose(result)
    bars = []
    for b in sc.barriers:
        bars.append(barrier_metrics(t, result.flux(b.id), result.permeated(b.id), result.content(b.id),
                                    b.area, dose, apps or (float(t[0]),), bid=b.id, lag_tolerance=lag_tolerance))
    return Metrics(tuple(comps), tuple(bars), tuple(apps), tuple(intervals), end - float(t[0]),
                   sc.output_units, sc.substance.molar_mass)
