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
- **Terminal phase only after the last input**: the terminal slope, half-life and AUC to
  infinity come from the points after every input has ended (:func:`last_input_end`: the last
  bolus, the end of the last infusion or hold, an applied formulation removed or exhausted);
  while an input still acts at the end of the run they are blank, with the reason.
- **Time-lag method**: within the first interval, the window of output times around the peak
  flux where the flux stays within ``lag_tolerance`` (2 %) of the peak (the cumulative curve is
  straight there); the least-squares line of the cumulative amount on t gives the apparent
  steady flux (slope) and lag time (its time-axis intercept, counted from the first
  application). A straight steady line exists only when that window lasts at least as long as
  the apparent lag time (:data:`STEADY_WINDOW_LAGS`): near the top of a transient peak (a finite
  dose, a receptor filling up) the flux also stays within 2 % for a while, but the line through
  those points is no steady line, so lag and flux are then blank, with the reason. A closed
  receptor whose C/K rises above :data:`CLOSED_RECEPTOR_FRACTION` (10 %) of the donor side's C/K
  before the window ends no longer holds the sink condition the method assumes: the values stay,
  flagged as biased.
- **Fraction absorbed**: the amount that crossed the barrier into its ``to`` side over the amount
  applied to its ``from`` side (:func:`applied_to`): what the donor held at the start plus every
  dose into it; what a hold or a wash-off took away is never subtracted.
- **Blanks and flags**: a metric that does not apply is NaN (blank in the CSV) with the reason in
  ``notes``; a value that stands but needs care carries its flag there too. The metrics CSV holds
  numbers or blanks in ``value`` and the notes in their own column ``note``.

A row of the traces at the time of an instantaneous event (bolus, replace, remove, start of a
hold) shows the state just after it (scenario format). For the segment that ends at such a row,
the value just before the event is estimated from the two rows before (log-linear when they
fall, linear otherwise), so the jump is not smeared over the segment.

Values are in the internal units (h, mg, mL, cm; concentration mg/mL, AUC mg h/mL); rows for the
CSV and the printed table are converted to the scenario's ``[output]`` units.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, fields
from typing import Any

import numpy as np

from ..model import OutputUnits, Scenario
from ..units import unit_factor

__all__ = [
    "CLOSED_RECEPTOR_FRACTION",
    "STEADY_WINDOW_LAGS",
    "BarrierMetrics",
    "CompartmentMetrics",
    "LagFit",
    "Metrics",
    "TerminalFit",
    "application_times",
    "applied_to",
    "closed_receptor_time",
    "first_interval_end",
    "auc",
    "barrier_metrics",
    "compute_metrics",
    "dosing_intervals",
    "exposure_metrics",
    "jump_times",
    "last_input_end",
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
STEADY_WINDOW_LAGS = 1.0
"""Time-lag method: the steady window must last at least this many apparent lag times."""
CLOSED_RECEPTOR_FRACTION = 0.1
"""A closed receptor above this fraction of the donor side's C/K breaks the sink condition of the
time-lag method (common practice: the 10 % of OECD Test Guideline 428's sink condition)."""
EXHAUSTED_FRACTION = 1e-3
"""An applied formulation holding less than this fraction of what was applied to it counts as
exhausted: its input has ended (this project's choice)."""
CSV_COLUMNS = ("kind", "id", "metric", "value", "unit", "note")
"""Columns of the metrics CSV (``barrierflow run --metrics OUT.csv``): ``value`` is a number or
blank; ``note`` says why a value is blank, or flags one that needs care."""

_LAST_APPLICATION = "last application"
_ADDING = ("bolus", "infusion", "hold", "replace")
_JUMPING = ("bolus", "replace", "remove", "hold", "sample")


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
        j = int(t.searchsorted(s - tol))
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
    i = int(t.searchsorted(lo - tol))           # first row >= lo
    k = int(t.searchsorted(hi + tol, "right")) - 1   # last row <= hi
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
    """One segment by the rule of :func:`_segment_areas` (on plain numbers: it runs for every interval)."""
    dt = float(b) - float(a)
    ya, yb = float(ya), float(yb)
    if yb < ya and yb > 0 and ya > 0:
        return (ya - yb) * dt / math.log(ya / yb)
    return 0.5 * (ya + yb) * dt


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
    """Times at which substance is applied: time 0 if a compartment or a barrier layer starts
    loaded, and the start of every bolus, infusion, hold and replace dose up to ``end`` (default:
    the duration), h."""
    end = scenario.duration if end is None else end
    times = set()
    if any(c.starting_concentration > 0 for c in scenario.compartments) or any(b.loaded for b in scenario.barriers):
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


def _ends_application(d: Any) -> bool:
    """A dose that takes an applied formulation off: a full remove, one that ends contact, or a
    replace or hold at zero (a wash with blank vehicle)."""
    if d.kind == "remove":
        return d.removed_fraction >= 1.0 or d.closes
    return d.kind in ("replace", "hold") and d.concentration == 0


def last_input_end(scenario: Scenario, result: Any = None, end: float | None = None) -> tuple[float | None, str]:
    """When the last input of the regimen ended, h; None (and why) when one still acts at the end.

    Inputs and their ends: a bolus, and the starting content of a compartment or a loaded layer,
    end when given; an infusion or a hold above zero at the end of its duration. A formulation
    applied to the ``from`` side of a barrier (its starting content, a bolus, a refill) keeps
    delivering until it is taken off (a full remove, a remove that ends contact, a replace or hold
    at zero) or, with ``result``, until it is exhausted (less than :data:`EXHAUSTED_FRACTION` of
    what it held after its last application). A held compartment above zero never ends.

    Parameters
    ----------
    scenario : Scenario
    result : Result, optional
        The run, to see when an applied formulation is exhausted.
    end : float or None, h
        End of the traces (default: the duration).

    Returns
    -------
    time : float or None, h
    reason : str
        Which input still acts at the end ("" when ``time`` is a number).
    """
    end = scenario.duration if end is None else end
    sites = {b.from_id for b in scenario.barriers}
    ends: list[float] = [0.0]
    ongoing: list[str] = []
    applied: dict[str, list[float]] = {}
    for c in scenario.compartments:
        if c.held:
            if c.held_concentration > 0:
                ongoing.append(f"compartment '{c.id}' is held above zero (an infinite dose)")
        elif c.initial_concentration > 0 and c.id in sites:
            applied.setdefault(c.id, []).append(0.0)
    for i, d in enumerate(scenario.doses, start=1):
        times = d.start_times(end)
        if not times:
            continue
        adds = d.kind == "bolus" or (d.kind == "replace" and d.concentration > 0)
        if adds and d.target in sites:
            applied.setdefault(d.target, []).extend(times)
        elif d.kind == "bolus":
            ends.append(max(times))
        elif d.kind in ("infusion", "hold") and (d.kind == "infusion" or d.concentration > 0):
            stop = max(times) + d.duration
            if stop >= end * (1 - 1e-12):
                ongoing.append(f"dose {i} ({d.kind} on '{d.target}') runs to the end of the run")
            else:
                ends.append(stop)
    for cid, starts in applied.items():
        last = max(starts)
        offs = [t for d in scenario.doses if d.target == cid and _ends_application(d)
                for t in d.start_times(end) if t >= last]
        if offs:
            ends.append(min(offs))
            continue
        gone = _exhausted(result, cid, last) if result is not None else None
        if gone is not None:
            ends.append(gone)
        else:
            ongoing.append(f"the formulation applied to '{cid}' at {last:.4g} h is neither taken off nor exhausted "
                           "by the end of the run")
    if ongoing:
        return None, "; ".join(ongoing)
    return max(ends), ""


def _exhausted(result: Any, cid: str, start: float) -> float | None:
    """The first output time from ``start`` on at which ``cid`` holds less than
    :data:`EXHAUSTED_FRACTION` of what it held at ``start``, or None."""
    t = np.asarray(result.times, dtype=float)
    m = np.asarray(result.amount(cid), dtype=float)
    rows = np.nonzero(t >= start - 1e-9 * max(abs(float(t[-1])), 1.0))[0]
    if not len(rows) or not m[rows[0]] > 0:
        return None
    low = np.nonzero(m[rows] < EXHAUSTED_FRACTION * m[rows[0]])[0]
    return float(t[rows[low[0]]]) if len(low) else None


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
    reason : str
        Why ``lag_time`` and ``steady_flux`` are NaN ("" when they are not).
    """

    lag_time: float
    steady_flux: float
    window: tuple[float, float]
    points: int
    r2: float
    reason: str = ""


_NO_LAG = LagFit(NAN, NAN, (NAN, NAN), 0, NAN)


def time_lag_fit(t: Sequence[float], permeated: Sequence[float], flux: Sequence[float], *,
                 origin: float = 0.0, end: float | None = None, tolerance: float = LAG_TOLERANCE,
                 window_lags: float = STEADY_WINDOW_LAGS) -> LagFit:
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
    window_lags : float
        A straight steady line exists only when the window reaches the end of the interval
        considered (the flux does not fall again: no transient peak) and lasts at least this many
        apparent lag times (and 3 points); otherwise the values are NaN with the reason.

    Returns
    -------
    LagFit
        NaN values, with ``reason``, when fewer than 3 points qualify, the peak flux is not > 0,
        or the window is too short to be a steady line.

    Examples
    --------
    A flux that rises to a peak and falls again (a finite dose) has no steady line:

    >>> import numpy as np
    >>> t = np.linspace(0, 24, 97); j = t * np.exp(-t / 4); q = np.cumsum(j) * 0.25
    >>> fit = time_lag_fit(t, q, j)
    >>> fit.lag_time != fit.lag_time, fit.reason.startswith("no steady line")
    (True, True)
    """
    t, q, j = _asarray(t), _asarray(permeated), _asarray(flux)
    hi = t[-1] if end is None else end
    sel = np.nonzero((t >= origin) & (t <= hi * (1 + 1e-12) + 1e-12))[0]
    if len(sel) < 3:
        return dataclasses.replace(_NO_LAG, reason="fewer than 3 output times in the first dosing interval")
    js = j[sel]
    k = int(np.argmax(js))
    peak = js[k]
    if not peak > 0:
        return dataclasses.replace(_NO_LAG, reason="nothing crossed the barrier (the flux never rises above 0)")
    good = js >= (1.0 - tolerance) * peak
    lo_k = k
    while lo_k > 0 and good[lo_k - 1]:
        lo_k -= 1
    hi_k = k
    while hi_k < len(js) - 1 and good[hi_k + 1]:
        hi_k += 1
    rows = sel[lo_k:hi_k + 1]
    if len(rows) < 3:
        return dataclasses.replace(_NO_LAG, reason=f"no steady line: the flux stays within {tolerance:.0%} of its "
                                   f"peak at fewer than 3 output times")
    x, y = t[rows], q[rows]
    # the least-squares line (the normal equations about the means; numpy.polyfit gives the same
    # line through a general least-squares solver, ten times slower on these few points)
    xm, ym = float(x.mean()), float(y.mean())
    dx = x - xm
    sxx = float(dx @ dx)
    if not sxx > 0:
        return _NO_LAG
    slope = float(dx @ (y - ym)) / sxx
    icpt = ym - slope * xm
    resid = y - (slope * x + icpt)
    ss = float(np.sum((y - y.mean()) ** 2))
    r2 = 1.0 - float(np.sum(resid**2)) / ss if ss > 0 else 1.0
    if not slope > 0:
        return dataclasses.replace(_NO_LAG, reason="no steady line: the cumulative amount does not rise")
    lag = float(-icpt / slope - origin)
    span = float(x[-1] - x[0])
    blank = dataclasses.replace(_NO_LAG, window=(float(x[0]), float(x[-1])), points=len(rows), r2=r2)
    if hi_k < len(js) - 1:
        return dataclasses.replace(blank, reason=(
            f"no steady line: the flux falls more than {tolerance:.0%} below its peak (at {t[sel[k]]:.4g} h) again "
            f"by {t[sel[hi_k + 1]]:.4g} h, within the first dosing interval: a transient peak (a finite dose running "
            "out, a receptor filling up), not a steady state"))
    if span < window_lags * abs(lag):
        return dataclasses.replace(blank, reason=(
            f"no steady line yet: the flux is steady only from {x[0]:.4g} h to {x[-1]:.4g} h, shorter than the "
            f"apparent lag ({abs(lag):.4g} h); a longer run (or first dosing interval) would show one"))
    return LagFit(lag, float(slope), (float(x[0]), float(x[-1])), len(rows), r2)


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
    notes : dict of str to str
        Metric name to why it is blank, or to a flag on a value that needs care.
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
    notes: dict[str, str] = dataclasses.field(default_factory=dict)


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
    notes : dict of str to str
        Metric name to why it is blank, or to a flag on a value that needs care (a closed
        receptor that biases the time-lag method).
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
    notes: dict[str, str] = dataclasses.field(default_factory=dict)



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
    input_end : float or None, h
        When the last input ended (see :func:`last_input_end`; None when one acts to the end).
    """

    compartments: tuple[CompartmentMetrics, ...]
    barriers: tuple[BarrierMetrics, ...]
    application_times: tuple[float, ...]
    intervals: tuple[tuple[float, float], ...]
    duration: float
    output_units: OutputUnits = OutputUnits()
    molar_mass: float | None = None
    input_end: float | None = None

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
            if isinstance(v, dict):
                return dict(v)
            return v

        def fields_of(m: Any) -> dict[str, Any]:
            # the fields hold numbers, texts, tuples and a dict of notes: one level is enough
            # (dataclasses.asdict would deep-copy every value first)
            return {f.name: clean(getattr(m, f.name)) for f in fields(m) if f.name != "id"}

        units = {k: _INTERNAL[u] for k, u in {**_C_UNITS, **_B_UNITS}.items()}
        units.update({"interval": "h", "interval_aucs": "mg*h/mL", "lag_window": "h"})
        return {
            "units": units,
            "application_times_h": list(self.application_times),
            "intervals_h": [list(i) for i in self.intervals],
            "compartments": {m.id: fields_of(m) for m in self.compartments},
            "barriers": {m.id: fields_of(m) for m in self.barriers},
            "input_end_h": clean(self.input_end) if self.input_end is not None else None,
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

    def to_rows(self, units: OutputUnits | None = None) -> list[tuple[str, str, str, Any, str, str]]:
        """Rows ``(kind, id, metric, value, unit, note)`` in ``units`` (default: the scenario's output units).

        ``kind`` is ``compartment`` or ``barrier``; missing values are None, with the reason in
        ``note``; ``note`` also flags a value that needs care; every dosing interval's AUC is a
        row ``auc_interval_<n>``.
        """
        fac = self._factors(units)
        rows: list[tuple[str, str, str, Any, str, str]] = []

        def put(kind: str, ident: str, name: str, value: Any, ukind: str, notes: Mapping[str, str]) -> None:
            f, unit = fac[ukind]
            note = notes.get(name, "")
            if value is None or (isinstance(value, float) and math.isnan(value)):
                rows.append((kind, ident, name, None, unit, note))
            elif ukind == "bool":
                rows.append((kind, ident, name, bool(value), unit, note))
            elif ukind == "count":
                rows.append((kind, ident, name, int(value), unit, note))
            else:
                rows.append((kind, ident, name, float(value) * f, unit, note))

        for m in self.compartments:
            for fld in fields(m):
                name = fld.name
                if name in _C_UNITS:
                    put("compartment", m.id, name, getattr(m, name), _C_UNITS[name], m.notes)
            put("compartment", m.id, "interval_start", m.interval[0], "time", m.notes)
            put("compartment", m.id, "interval_end", m.interval[1], "time", m.notes)
            for i, a in enumerate(m.interval_aucs, start=1):
                put("compartment", m.id, f"auc_interval_{i}", a, "auc", m.notes)
        for m in self.barriers:
            for fld in fields(m):
                name = fld.name
                if name in _B_UNITS:
                    put("barrier", m.id, name, getattr(m, name), _B_UNITS[name], m.notes)
            put("barrier", m.id, "lag_window_start", m.lag_window[0], "time", m.notes)
            put("barrier", m.id, "lag_window_end", m.lag_window[1], "time", m.notes)
        return rows

    def to_csv(self, units: OutputUnits | None = None) -> str:
        """The rows of :meth:`to_rows` as CSV text with the columns :data:`CSV_COLUMNS`.

        Every ``value`` is a number or blank (a yes/no metric is 1 or 0), so a statistics tool
        reads the column as numbers; the reasons and flags are in ``note``.
        """
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(CSV_COLUMNS)
        for kind, ident, name, value, unit, note in self.to_rows(units):
            if value is None:
                text = ""
            elif isinstance(value, bool):
                text = "1" if value else "0"
                note = note or "1 = yes, 0 = no"
            elif isinstance(value, int):
                text = str(value)
            else:
                text = format(value, ".10g")
            w.writerow((kind, ident, name, text, unit, note))
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
    input_end: float | None | str = _LAST_APPLICATION,
    input_reason: str = "",
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
    input_end : float, None or ``"last application"``, h
        When the last input ended (:func:`last_input_end`): the terminal phase is fitted after it.
        None means an input still acts at the end: no terminal phase (``input_reason`` says
        why). The default, for a bare trace, is the last of ``applications``.
    input_reason : str
        Why no input end is known (a note on the blank terminal metrics).

    Returns
    -------
    CompartmentMetrics
        Blank (NaN) metrics carry their reason in ``notes``.
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
    # terminal phase: after the last input has ended and after the Cmax that follows it
    notes: dict[str, str] = {}
    if input_end == _LAST_APPLICATION:
        input_end = max([x for x in applications if x <= end], default=float(t[0]))
    fit = _NO_FIT
    if input_end is None:
        why = f"no terminal phase: an input still acts at the end of the run ({input_reason})"
    else:
        after_mask = t >= float(input_end) - 1e-9 * max(abs(end), 1.0)
        why = ""
        if np.any(after_mask):
            j0 = int(np.nonzero(after_mask)[0][0])
            kk = j0 + int(np.argmax(c[j0:]))
            fit = terminal_fit(t, c, after=float(t[kk]), adj_r2_tolerance=adj_r2_tolerance)
        if not fit.lambda_z > 0:
            why = (f"no terminal phase: fewer than 3 falling, positive points after the last input ended "
                   f"({float(input_end):.4g} h) and the highest value after it")
    if why:
        for name in ("auc_inf", "auc_extrapolated_percent", "lambda_z", "half_life", "terminal_start",
                     "terminal_adj_r2"):
            notes[name] = why
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
    if threshold is None:
        notes["threshold"] = notes["time_above"] = "no threshold given"
    if n_int < 2:
        notes["accumulation_ratio"] = notes["steady_state_reached"] = "a single dosing interval"
    elif acc != acc or steady is None:
        notes.setdefault("accumulation_ratio", "no exposure in the first dosing interval")
        if steady is None:
            notes["steady_state_reached"] = "no exposure in the last dosing interval"
    return CompartmentMetrics(
        id=cid, cmax=cmax, tmax=tmax, cmin=cmin, cmax_interval=cmax_i, interval=(float(a), float(b)),
        auc=total, auc_inf=auc_inf, auc_extrapolated_percent=extra, lambda_z=fit.lambda_z,
        half_life=fit.half_life, terminal_points=fit.points, terminal_start=fit.start,
        terminal_adj_r2=fit.adj_r2, c_avg=total / span if span > 0 else NAN,
        c_avg_interval=aucs[-1] / (b - a) if b > a else NAN,
        threshold=threshold, time_above=None if threshold is None else time_above(t, c, threshold, jumps),
        interval_aucs=aucs, accumulation_ratio=acc, steady_state_reached=steady, notes=notes,
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
    lag_flag: str = "",
    lag_end: float | None = None,
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
    lag_flag : str
        A flag on the time-lag values (a closed receptor that breaks the sink condition).
    lag_end : float or None, h
        Where the time-lag method stops looking (default: the second application): a wash-off
        ends the first exposure too.

    Returns
    -------
    BarrierMetrics
        Blank (NaN) metrics carry their reason in ``notes``.
    """
    t, j, q, m = _asarray(t), _asarray(flux), _asarray(permeated), _asarray(content)
    # the first time the flux comes within PEAK_TOLERANCE of its peak (a plateau has no single top)
    top = float(np.max(j))
    k = int(np.nonzero(j >= top - PEAK_TOLERANCE * abs(top))[0][0])
    apps = sorted(x for x in applications if x <= t[-1])
    origin = apps[0] if apps else float(t[0])
    nxt = apps[1] if len(apps) > 1 else None
    if lag_end is not None and (nxt is None or lag_end < nxt):
        nxt = lag_end
    fit = time_lag_fit(t, q, j, origin=origin, end=nxt, tolerance=lag_tolerance)
    perm_amount = float(q[-1]) * area
    finite = math.isfinite(applied) and applied > 0
    notes: dict[str, str] = {}
    lag_notes = "; ".join(x for x in (fit.reason, lag_flag) if x)
    if lag_notes:
        for name in ("lag_time", "steady_flux", "lag_window_start", "lag_window_end", "lag_points", "lag_r2"):
            notes[name] = lag_notes
    if not finite:
        why = ("an infinite dose (a held source): no applied amount to divide by" if applied == math.inf
               else "nothing was applied to the barrier's 'from' side")
        notes["fraction_absorbed"] = notes["content_fraction"] = why
    return BarrierMetrics(
        id=bid, peak_flux=top, peak_flux_time=float(t[k]), permeated=float(q[-1]),
        permeated_amount=perm_amount, lag_time=fit.lag_time, steady_flux=fit.steady_flux,
        lag_window=fit.window, lag_points=fit.points, lag_r2=fit.r2, applied=float(applied),
        fraction_absorbed=perm_amount / applied if finite else NAN, content=float(m[-1]),
        content_fraction=float(m[-1]) / applied if finite else NAN, notes=notes,
    )


# ----------------------------------------------------------------------------- on a Result
def applied_to(result: Any, cid: str, barrier: Any = None) -> float:
    """The amount applied to compartment ``cid`` over the run, mg.

    What it held at the start plus every dose into it: boluses, refills, infusions, the rise
    of a hold and what a hold above its content supplied. What a hold or a wash-off took away is
    never subtracted. ``inf`` for a compartment held above zero (an infinite dose). With
    ``barrier``, what its own layers held at the start is added (a loaded patch matrix).

    Parameters
    ----------
    result : Result
        Or anything with ``scenario`` and ``dose_parts(cid)`` (the cumulative amounts added by
        events, infused, and supplied by holds, at each output time).
    cid : str
        Compartment id (the ``from`` side of a barrier, for the fraction absorbed).
    barrier : Barrier, optional

    Returns
    -------
    float, mg
    """
    sc = result.scenario
    comp = sc.compartment(cid)
    if comp.held:
        return math.inf if comp.held_concentration > 0 else 0.0
    total = comp.initial_concentration * (comp.volume or 0.0)
    if barrier is not None:
        total += sum(layer.initial_concentration * layer.thickness * barrier.area for layer in barrier.layers)
    events, infused, supply = (np.asarray(x, dtype=float) for x in result.dose_parts(cid))
    if not len(events):
        return float(total)
    events = np.diff(np.concatenate(([0.0], events)))
    supply = np.diff(np.concatenate(([0.0], supply)))
    return float(total + np.sum(np.maximum(events, 0.0)) + np.sum(np.maximum(supply, 0.0)) + infused[-1])


def closed_receptor_time(result: Any, barrier: Any, start: float, stop: float) -> float | None:
    """The first output time in [start, stop] at which barrier's closed ``to`` compartment holds
    a C/K above :data:`CLOSED_RECEPTOR_FRACTION` of the ``from`` side's (None when it never does,
    or when ``to`` is held, a sink)."""
    sc = result.scenario
    to, frm = sc.compartment(barrier.to_id), sc.compartment(barrier.from_id)
    if to.held:
        return None
    t = np.asarray(result.times, dtype=float)
    u_to = np.asarray(result.concentration(to.id), dtype=float) / to.partition
    u_from = np.asarray(result.concentration(frm.id), dtype=float) / frm.partition
    tol = 1e-9 * max(abs(float(t[-1])), 1.0)
    rows = np.nonzero((t >= start - tol) & (t <= stop + tol) & (u_from > 0)
                      & (u_to > CLOSED_RECEPTOR_FRACTION * u_from))[0]
    return float(t[rows[0]]) if len(rows) else None


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
    input_end, input_reason = last_input_end(sc, result, end)
    comps = []
    for comp in sc.compartments:
        thr = threshold.get(comp.id) if isinstance(threshold, Mapping) else threshold
        comps.append(exposure_metrics(t, result.concentration(comp.id), apps or (float(t[0]),),
                                      jumps=jump_times(sc, comp.id, end), threshold=thr, cid=comp.id,
                                      adj_r2_tolerance=adj_r2_tolerance, input_end=input_end,
                                      input_reason=input_reason))
    bars = []
    for b in sc.barriers:
        dose = applied_to(result, b.from_id, b)
        flux, perm = result.flux(b.id), result.permeated(b.id)
        origin = min(apps) if apps else float(t[0])
        stop = first_interval_end(sc, b.from_id, apps, end)
        when = closed_receptor_time(result, b, origin, stop)
        flag = "" if when is None else (
            f"biased: the closed receptor '{b.to_id}' rises above {CLOSED_RECEPTOR_FRACTION:.0%} of the donor side's "
            f"concentration (partition considered) at {when:.4g} h, so it is no sink")
        m = barrier_metrics(t, flux, perm, result.content(b.id), b.area, dose, apps or (float(t[0]),), bid=b.id,
                            lag_tolerance=lag_tolerance, lag_flag=flag, lag_end=stop)
        bars.append(m)
    return Metrics(tuple(comps), tuple(bars), tuple(apps), tuple(intervals), end - float(t[0]),
                   sc.output_units, sc.substance.molar_mass, input_end)


def first_interval_end(scenario: Scenario, cid: str, apps: Sequence[float], end: float) -> float:
    """End of the first dosing interval (``apps``: the application times), or the first time the
    formulation on ``cid`` is taken off or partly removed, whichever comes first, h."""
    first = min(apps) if apps else 0.0
    later = [a for a in apps if a > first]
    stop = min(later) if later else end
    for d in scenario.doses:
        if d.target == cid and (d.kind == "remove" or _ends_application(d)):
            offs = [x for x in d.start_times(end) if x > first]
            if offs:
                stop = min(stop, min(offs))
    return stop
