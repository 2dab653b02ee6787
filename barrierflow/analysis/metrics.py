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
:class:`~barrierflow.analysis.result.Result`. Each rule is written once, element-wise over a
subject axis (traces (n, n_t), a value per subject (n,)): a single run is a block of one subject,
and :func:`compute_metrics` measures many subjects of one scenario at once (their traces with a
subject axis and their stacked scenario, :func:`barrierflow.model.cohort.stacked`), giving each
subject the metrics and notes of its own run.

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
from numba import njit

from ..model import OutputUnits, Scenario
from ..model.cohort import decide
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
    "loaded_at_start",
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


def _block(x: Sequence[float] | np.ndarray) -> np.ndarray:
    """Traces as a block (n_subjects, n_t): one trace is a block of one row."""
    return np.atleast_2d(np.asarray(x, dtype=float))


def _each(x: Any, n: int) -> np.ndarray:
    """A value per subject as (n,): a number (shared), or a column (n, 1) of a stacked scenario
    (:func:`barrierflow.model.cohort.stacked`)."""
    if isinstance(x, float | int):
        return np.full(n, float(x))
    return np.broadcast_to(np.asarray(x, dtype=float).reshape(-1), (n,))


def _texts(n: int, text: str = "") -> np.ndarray:
    """A text per subject (an object array), all ``text``."""
    out = np.empty(n, dtype=object)
    out[:] = text
    return out


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


def left_limits(t: Sequence[float], c: Sequence[float] | np.ndarray, jumps: Sequence[float] = ()) -> np.ndarray:
    """Concentration just before each output time, h and mg/mL.

    Equal to ``c`` except at rows whose time is in ``jumps`` (an instantaneous event that
    changed the compartment; the row shows the state after it). There the value before is
    estimated from the two rows before: log-linear when they fall and are > 0, linear otherwise
    (never below 0); with only one row before, that row's value.

    Parameters
    ----------
    t : array (n_t,), h
    c : array (n_t,) or (n_subjects, n_t), mg/mL
        One trace, or one per subject.
    jumps : sequence of float, h
        Times of instantaneous events on this compartment.

    Returns
    -------
    ndarray, mg/mL
        The shape of ``c``.
    """
    t, c = _asarray(t), _asarray(c)
    return _left_limits(t, _block(c), jumps).reshape(c.shape)


def _left_limits(t: np.ndarray, c: np.ndarray, jumps: Sequence[float], cl: np.ndarray | None = None) -> np.ndarray:
    """:func:`left_limits` of a block (n, n_t), written into ``cl`` (a copy of ``c`` by default,
    else an array holding ``c``'s values: only the rows at ``jumps`` are written)."""
    if cl is None:
        cl = c.copy(order="C")
    at = _rows_at(t, jumps)
    if not at or at[-1] == 0:
        return cl
    _jump_limits(np.ascontiguousarray(t, dtype=np.float64), np.ascontiguousarray(c, dtype=np.float64),
                 np.array(at, dtype=np.int64), cl)
    return cl


@njit(cache=True, nogil=True, error_model="numpy", no_cfunc_wrapper=True)
def _jump_limits(t, c, at, cl):  # pragma: no cover - compiled (tested through left_limits)
    """Write into ``cl`` the value just before each jump row ``at`` (sorted, distinct) of each row
    of ``c``: from the two rows before when the row before is no jump row itself (log-linear when
    they fall and the nearer is > 0, else linear, never below 0), else the row before."""
    n = c.shape[0]
    for a in range(len(at)):
        j = at[a]
        if j <= 0:
            continue
        two = j >= 2 and not (a > 0 and at[a - 1] == j - 1)
        ratio = (t[j] - t[j - 1]) / (t[j - 1] - t[j - 2]) if two else 0.0
        for i in range(n):
            c1 = c[i, j - 1]
            if two:
                c0 = c[i, j - 2]
                if c0 > c1 and c1 > 0.0:
                    cl[i, j] = c1 * (c1 / c0) ** ratio
                else:
                    v = c1 + (c1 - c0) * ratio
                    cl[i, j] = v if v >= 0.0 or v != v else 0.0  # (np.maximum(v, 0): NaN stays)
            else:
                cl[i, j] = c1


def _cumulative(t: np.ndarray, c: np.ndarray, cl: np.ndarray) -> np.ndarray:
    """AUC from the first output time to each output time, (n, n_t): each segment [t_j, t_j+1] of
    each row of the block linear up, log down (:func:`_cumulative_areas`)."""
    if len(t) < 2:
        return np.zeros((c.shape[0], 1))
    return _cumulative_areas(np.ascontiguousarray(t, dtype=np.float64), np.ascontiguousarray(c, dtype=np.float64),
                             np.ascontiguousarray(cl, dtype=np.float64))


@njit(cache=True, nogil=True, error_model="numpy", no_cfunc_wrapper=True)
def _cumulative_areas(t, c, cl):  # pragma: no cover - compiled (tested through auc and compute_metrics)
    """The running sums of the segment areas of each row, a first column of 0: segment j from
    ``c[:, j]`` to ``cl[:, j + 1]`` (the left limit at its end) is ``0.5 (c1 + c2) dt``, or
    ``(c1 - c2) dt / ln(c1 / c2)`` where it falls and both ends are > 0 (the one pass over the
    traces that the numpy form took a dozen calls for; the same operations in the same order)."""
    n, n_t = c.shape
    out = np.empty((n, n_t))
    for i in range(n):
        ci = c[i]
        li = cl[i]
        oi = out[i]
        s = 0.0
        oi[0] = 0.0
        for j in range(n_t - 1):
            c1 = ci[j]
            c2 = li[j + 1]
            dt = t[j + 1] - t[j]
            if c2 < c1 and c2 > 0.0 and c1 > 0.0:
                a = (c1 - c2) * dt / np.log(c1 / c2)
            else:
                a = 0.5 * (c1 + c2) * dt
            s += a
            oi[j + 1] = s
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
    t, c = _asarray(t), _block(c)
    if len(t) < 2:
        return 0.0
    cl = _left_limits(t, c, jumps)
    cum = _cumulative(t, c, cl)
    lo = float(t[0]) if start is None else float(start)
    hi = float(t[-1]) if end is None else float(end)
    return float(_auc_between(t, c, cl, cum, lo, hi)[0])


def _auc_between(t: np.ndarray, c: np.ndarray, cl: np.ndarray, cum: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """AUC over [lo, hi] of each row of a block from the cumulative areas, partial segments interpolated."""
    return _aucs_between(t, c, cl, cum, ((lo, hi),))[0]


def _aucs_between(t: np.ndarray, c: np.ndarray, cl: np.ndarray, cum: np.ndarray,
                  spans: Sequence[tuple[float, float]]) -> list[np.ndarray]:
    """AUC over each span [lo, hi] of each row of a block, (n,) per span, from the cumulative
    areas; partial segments interpolated. The spans that begin and end on output rows (the dosing
    intervals, as a rule) are taken together, by one difference of the cumulative areas."""
    t0, t1 = float(t[0]), float(t[-1])
    lo = np.maximum(np.array([a for a, _ in spans], dtype=float), t0)
    hi = np.minimum(np.array([b for _, b in spans], dtype=float), t1)
    empty = (hi <= lo).tolist()
    tol = 1e-12 * max(abs(t1), 1.0)
    i = t.searchsorted(lo - tol)                 # first row >= lo
    k = t.searchsorted(hi + tol, "right") - 1    # last row <= hi
    ti, tk = t[np.minimum(i, len(t) - 1)], t[k]
    lo = np.where(np.abs(ti - lo) <= tol, ti, lo)
    hi = np.where(np.abs(tk - hi) <= tol, tk, hi)
    whole = cum[:, k] - cum[:, np.minimum(i, len(t) - 1)]   # (n, n_spans)
    out = []
    for s, (a, b, ia, kb) in enumerate(zip(lo.tolist(), hi.tolist(), i.tolist(), k.tolist(), strict=True)):
        if empty[s]:
            out.append(np.zeros(c.shape[0]))
        elif kb < ia:  # a and b inside one segment
            y0 = _interp(t[kb], t[kb + 1], c[:, kb], cl[:, kb + 1], a)
            y1 = _interp(t[kb], t[kb + 1], c[:, kb], cl[:, kb + 1], b)
            out.append(_one_segment(a, b, y0, y1))
        else:
            total = whole[:, s]
            if t[ia] > a:  # partial segment [a, t_i] of segment i-1
                j = ia - 1
                total = total + _one_segment(a, t[ia], _interp(t[j], t[ia], c[:, j], cl[:, ia], a), cl[:, ia])
            if t[kb] < b:  # partial segment [t_k, b] of segment k
                total = total + _one_segment(t[kb], b, c[:, kb], _interp(t[kb], t[kb + 1], c[:, kb], cl[:, kb + 1], b))
            out.append(total)
    return out


def _one_segment(a: float, b: float, ya: np.ndarray, yb: np.ndarray) -> np.ndarray:
    """One segment of each subject by the rule of :func:`_cumulative_areas`."""
    dt = float(b) - float(a)
    down = (yb < ya) & (yb > 0) & (ya > 0)
    with np.errstate(all="ignore"):
        return np.where(down, (ya - yb) * dt / np.log(np.where(down, ya / yb, 2.0)), 0.5 * (ya + yb) * dt)


def _interp(a: float, b: float, ya: np.ndarray, yb: np.ndarray, x: float) -> np.ndarray:
    """The value at ``x`` of each subject on the segment from (a, ya) to (b, yb): log-linear where it falls."""
    ya, yb = np.asarray(ya, dtype=float), np.asarray(yb, dtype=float)
    if b == a:
        return ya.copy()
    f = (x - a) / (b - a)
    down = (yb < ya) & (yb > 0) & (ya > 0)
    with np.errstate(all="ignore"):
        return np.where(down, ya * (yb / ya) ** f, ya + (yb - ya) * f)
















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
    t, c = _asarray(t), _block(c)
    if len(t) == 0:
        return _NO_FIT
    if after is None:
        after = float(t[int(np.argmax(c[0]))])
    lam, icpt, points, start, adj = (x[0] for x in _terminal_fits(t, c, np.full(1, float(after)), min_points,
                                                                    adj_r2_tolerance))
    return TerminalFit(float(lam), float(icpt), int(points), float(start), float(adj))


def _terminal_fits(t: np.ndarray, c: np.ndarray, after: np.ndarray, min_points: int,
                   adj_r2_tolerance: float) -> tuple[np.ndarray, ...]:
    """:func:`terminal_fit` of each row of a block (n, n_t), each after its own time ``after`` (n,).

    Returns lambda_z, intercept, points, start and adjusted R^2, each (n,) (NaN and 0 points
    where there is no fit).
    """
    n, n_t = c.shape
    lam, icpt, start, adj_out = (np.full(n, NAN) for _ in range(4))
    points = np.zeros(n, dtype=np.int64)
    with np.errstate(invalid="ignore"):
        use = (t > after[:, None]) & (c > 0) & np.isfinite(c)
    # only the trailing run of usable points of each row (a zero in the middle ends the terminal phase)
    cols = np.arange(n_t)
    last = n_t - 1 - np.argmax(use[:, ::-1], axis=1)
    gap = np.max(np.where(~use & (cols <= last[:, None]), cols, -1), axis=1)
    length = np.where(use.any(axis=1), last - gap, 0)
    rows = np.flatnonzero(length >= min_points)
    if not len(rows):
        return lam, icpt, points, start, adj_out
    # fits over the last n points, n = 1..N, by cumulative sums from the end; shifting by the
    # last point keeps the sums small (no cancellation for the short fits)
    end, size = last[rows], length[rows]
    m = np.arange(int(size.max()))
    valid = m < size[:, None]
    at = np.where(valid, end[:, None] - m, end[:, None])
    x = t[at]
    y = np.log(c[rows[:, None], at])
    x0, y0 = x[:, :1], y[:, :1]
    xs = np.where(valid, x - x0, 0.0)
    ys = np.where(valid, y - y0, 0.0)
    num = m + 1.0
    xm = np.cumsum(xs, axis=1) / num
    ym = np.cumsum(ys, axis=1) / num
    sxx = np.cumsum(xs * xs, axis=1) - num * xm * xm
    sxy = np.cumsum(xs * ys, axis=1) - num * xm * ym
    syy = np.cumsum(ys * ys, axis=1) - num * ym * ym
    slope = sxy / np.where(sxx > 0, sxx, np.inf)
    ss_res = np.maximum(syy - slope * sxy, 0.0)
    r2 = np.where(syy > 0, 1.0 - ss_res / np.where(syy > 0, syy, 1.0), 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        adj = 1.0 - (1.0 - r2) * (num - 1.0) / (num - 2.0)
    ok = (slope < 0) & valid & (m >= min_points - 1)
    fitted = ok.any(axis=1)
    adj_ok = np.where(ok, adj, -np.inf)
    best = np.max(adj_ok, axis=1)
    near = adj_ok >= (best - adj_r2_tolerance)[:, None]
    choice = len(m) - 1 - np.argmax(near[:, ::-1], axis=1)
    r = np.arange(len(rows))
    slope_c = slope[r, choice]
    into = rows[fitted]
    lam[into] = -slope_c[fitted]
    icpt[into] = (y0[:, 0] + ym[r, choice] - slope_c * (x0[:, 0] + xm[r, choice]))[fitted]
    points[into] = choice[fitted] + 1
    start[into] = x[r, choice][fitted]
    adj_out[into] = adj[r, choice][fitted]
    return lam, icpt, points, start, adj_out


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
    t, c = _asarray(t), _block(c)
    return float(_time_above(t, c, _left_limits(t, c, jumps), threshold)[0])


def _time_above(t: np.ndarray, c: np.ndarray, cl: np.ndarray, threshold: float) -> np.ndarray:
    """:func:`time_above` of each row of a block, with its left limits ``cl``."""
    a, b = c[:, :-1] - threshold, cl[:, 1:] - threshold
    dt = np.diff(t)
    both = (a > 0) & (b > 0)
    one = (a > 0) ^ (b > 0)
    with np.errstate(all="ignore"):
        part = np.where(one, dt * np.maximum(a, b) / (np.abs(a) + np.abs(b)), 0.0)
    return np.sum(np.where(both, dt, 0.0), axis=1) + np.sum(part, axis=1)




def application_times(scenario: Scenario, end: float | None = None) -> tuple[float, ...]:
    """Times at which substance is applied: time 0 if a compartment or a barrier layer starts
    loaded, and the start of every bolus, infusion, hold and replace dose up to ``end`` (default:
    the duration), h.

    The same for every subject of a stacked scenario (:func:`barrierflow.model.cohort.stacked`);
    a starting content that is zero for some subjects only raises
    :class:`~barrierflow.model.cohort.Diverging`."""
    end = scenario.duration if end is None else end
    times = set()
    if decide(loaded_at_start(scenario)):
        times.add(0.0)
    for d in scenario.doses:
        if d.kind in _ADDING:
            times.update(d.start_times(end))
    return tuple(sorted(times))


def loaded_at_start(scenario: Scenario) -> bool | np.ndarray:
    """Whether a compartment or a barrier layer holds substance at time 0 (an application at 0).

    Returns
    -------
    bool, or ndarray of bool (n, 1)
        One answer per subject for a stacked scenario (:func:`barrierflow.model.cohort.stacked`)
        whose starting contents hold one value per subject.
    """
    loaded: bool | np.ndarray = False
    for c in scenario.compartments:
        loaded = loaded | (c.starting_concentration > 0)
    for b in scenario.barriers:
        for layer in b.layers:
            loaded = loaded | (layer.initial_concentration > 0)
    return loaded


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
        return decide(d.removed_fraction >= 1.0) or d.closes
    return d.kind in ("replace", "hold") and decide(d.concentration == 0)


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
    ends, reasons = _input_ends(scenario, result, scenario.duration if end is None else end, 1)
    return (None if math.isnan(ends[0]) else float(ends[0])), str(reasons[0])


def _input_ends(scenario: Scenario, result: Any, end: float, n: int) -> tuple[np.ndarray, np.ndarray]:
    """:func:`last_input_end` of each of ``n`` subjects (a stacked scenario and a block of
    traces): the times (n,), NaN where an input still acts, and the reasons (n,) ("" where none)."""
    sites = {b.from_id for b in scenario.barriers}
    ends: list[Any] = [0.0]
    ongoing: list[str] = []
    applied: dict[str, list[float]] = {}
    for c in scenario.compartments:
        if c.held:
            if decide(c.held_concentration > 0):
                ongoing.append(f"compartment '{c.id}' is held above zero (an infinite dose)")
        elif decide(c.initial_concentration > 0) and c.id in sites:
            applied.setdefault(c.id, []).append(0.0)
    for i, d in enumerate(scenario.doses, start=1):
        times = d.start_times(end)
        if not times:
            continue
        adds = d.kind == "bolus" or (d.kind == "replace" and decide(d.concentration > 0))
        if adds and d.target in sites:
            applied.setdefault(d.target, []).extend(times)
        elif d.kind == "bolus":
            ends.append(max(times))
        elif d.kind in ("infusion", "hold") and (d.kind == "infusion" or decide(d.concentration > 0)):
            stop = max(times) + d.duration
            if decide(stop >= end * (1 - 1e-12)):
                ongoing.append(f"dose {i} ({d.kind} on '{d.target}') runs to the end of the run")
            else:
                ends.append(stop)
    # an applied formulation that is neither taken off nor exhausted: for some subjects only
    pending: list[tuple[np.ndarray, str]] = []
    for cid, starts in applied.items():
        last = max(starts)
        offs = [t for d in scenario.doses if d.target == cid and _ends_application(d)
                for t in d.start_times(end) if t >= last]
        if offs:
            ends.append(min(offs))
            continue
        gone = _exhausted(result, cid, last, n) if result is not None else np.full(n, NAN)
        never = np.isnan(gone)
        ends.append(np.where(never, -np.inf, gone))
        if never.any():
            pending.append((never, f"the formulation applied to '{cid}' at {last:.4g} h is neither taken off nor "
                                   "exhausted by the end of the run"))
    times = _each(ends[0], n)
    for e in ends[1:]:
        times = np.maximum(times, _each(e, n))
    reasons = _texts(n)
    code = np.zeros(n, dtype=np.int64)
    for k, (mask, _) in enumerate(pending):
        code |= mask.astype(np.int64) << k
    acting = (code > 0) | bool(ongoing)
    if acting.any():
        times = np.where(acting, NAN, times)
        for which in np.unique(code[acting]).tolist():
            reasons[acting & (code == which)] = "; ".join(ongoing + [text for k, (_, text) in enumerate(pending)
                                                                     if which >> k & 1])
    return times, reasons


def _exhausted(result: Any, cid: str, start: float, n: int) -> np.ndarray:
    """For each subject, the first output time from ``start`` on at which ``cid`` holds less than
    :data:`EXHAUSTED_FRACTION` of what it held at ``start``, or NaN."""
    t = np.asarray(result.times, dtype=float)
    m = _block(result.amount(cid))
    first = int(t.searchsorted(start - 1e-9 * max(abs(float(t[-1])), 1.0)))  # the rows from start on (t rises)
    if first == len(t):
        return np.full(n, NAN)
    held = m[:, first]
    with np.errstate(invalid="ignore"):
        low = m[:, first:] < EXHAUSTED_FRACTION * held[:, None]
    found = (held > 0) & low.any(axis=1)
    return np.where(found, t[first + np.argmax(low, axis=1)], NAN)










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
    lag, slope, w0, w1, points, r2, reason = (x[0] for x in _lag_fits(
        _asarray(t), _block(permeated), _block(flux), origin, end, tolerance, window_lags))
    return LagFit(float(lag), float(slope), (float(w0), float(w1)), int(points), float(r2), str(reason))


def _lag_fits(t: np.ndarray, q: np.ndarray, j: np.ndarray, origin: float, end: float | None, tolerance: float,
              window_lags: float) -> tuple[np.ndarray, ...]:
    """:func:`time_lag_fit` of each row of the blocks ``q`` and ``j`` (n, n_t).

    Returns the lag times, steady fluxes, window starts and ends, points, R^2 and reasons, each (n,).
    """
    n = q.shape[0]
    lag, steady, w0, w1, r2_out = (np.full(n, NAN) for _ in range(5))
    points = np.zeros(n, dtype=np.int64)
    reason = _texts(n)
    out = (lag, steady, w0, w1, points, r2_out, reason)
    hi = t[-1] if end is None else end
    sel = np.nonzero((t >= origin) & (t <= hi * (1 + 1e-12) + 1e-12))[0]
    if len(sel) < 3:
        reason[:] = "fewer than 3 output times in the first dosing interval"
        return out
    ns = len(sel)
    x = np.ascontiguousarray(t[sel], dtype=np.float64)
    k, peak, lo_k, hi_k, slope, icpt, r2, sxx = _lag_windows(
        np.ascontiguousarray(j[:, sel], dtype=np.float64), x, np.ascontiguousarray(q[:, sel], dtype=np.float64),
        float(tolerance))
    nothing = ~(peak > 0)
    reason[nothing] = "nothing crossed the barrier (the flux never rises above 0)"
    size = hi_k - lo_k + 1
    few = ~nothing & (size < 3)
    reason[few] = f"no steady line: the flux stays within {tolerance:.0%} of its peak at fewer than 3 output times"
    rows = np.flatnonzero(~nothing & ~few)
    if not len(rows):
        return out
    lo_k, hi_k, size, k = lo_k[rows], hi_k[rows], size[rows], k[rows]
    slope, icpt, r2, sxx = slope[rows], icpt[rows], r2[rows], sxx[rows]
    with np.errstate(all="ignore"):
        lags = -icpt / slope - origin
    line = sxx > 0
    rising = line & (slope > 0)
    reason[rows[line & ~rising]] = "no steady line: the cumulative amount does not rise"
    first, final = x[lo_k], x[hi_k]
    transient = rising & (hi_k < ns - 1)
    short = rising & ~transient & (final - first < window_lags * np.abs(lags))
    for i in np.flatnonzero(transient).tolist():
        reason[rows[i]] = (
            f"no steady line: the flux falls more than {tolerance:.0%} below its peak (at {t[sel[k[i]]]:.4g} h) again "
            f"by {t[sel[hi_k[i] + 1]]:.4g} h, within the first dosing interval: a transient peak (a finite dose "
            "running out, a receptor filling up), not a steady state")
    for i in np.flatnonzero(short).tolist():
        reason[rows[i]] = (
            f"no steady line yet: the flux is steady only from {first[i]:.4g} h to {final[i]:.4g} h, shorter than "
            f"the apparent lag ({abs(lags[i]):.4g} h); a longer run (or first dosing interval) would show one")
    shown = rows[rising]
    w0[shown], w1[shown], points[shown], r2_out[shown] = first[rising], final[rising], size[rising], r2[rising]
    fitted = rising & ~transient & ~short
    lag[rows[fitted]], steady[rows[fitted]] = lags[fitted], slope[fitted]
    return out


@njit(inline="always", error_model="numpy")
def _first_largest(row):  # pragma: no cover - compiled (inlined in _lag_windows and _peaks)
    """The index of the first largest value of ``row`` (a NaN counts as largest, as np.argmax)."""
    at = 0
    best = row[0]
    for m in range(row.shape[0]):
        v = row[m]
        if v != v:
            return m
        if v > best:
            best = v
            at = m
    return at


@njit(cache=True, nogil=True, error_model="numpy", no_cfunc_wrapper=True)
def _lag_windows(j, x, q, tolerance):  # pragma: no cover - compiled (tested through time_lag_fit)
    """The window and the least-squares line of the time-lag method for each row, in one pass.

    ``j`` and ``q`` (n, ns): flux and cumulative amount at the times ``x`` (ns,) of the interval
    considered. For each row: the (first) peak of the flux ``k`` and its value, the run of
    points around it within ``tolerance`` of the peak (``lo``, ``hi``, inclusive), and the line
    of ``q`` on ``x`` over that run by the normal equations about the means (slope, intercept,
    R^2 and the sum of squares of x about its mean; R^2 is 1 for a flat run). Rows whose peak is
    not > 0 or whose run has fewer than 3 points are left to the caller (their line is not used).
    """
    n, ns = j.shape
    k = np.zeros(n, dtype=np.int64)
    peak = np.empty(n)
    lo = np.zeros(n, dtype=np.int64)
    hi = np.zeros(n, dtype=np.int64)
    slope = np.full(n, np.nan)
    icpt = np.full(n, np.nan)
    r2 = np.full(n, np.nan)
    sxx = np.zeros(n)
    for i in range(n):
        ji = j[i]
        qi = q[i]
        at = _first_largest(ji)
        top = ji[at]
        k[i] = at
        peak[i] = top
        level = (1.0 - tolerance) * top
        a = at
        while a > 0 and ji[a - 1] >= level:
            a -= 1
        b = at
        while b < ns - 1 and ji[b + 1] >= level:
            b += 1
        lo[i] = a
        hi[i] = b
        if not top > 0 or b - a + 1 < 3:
            continue
        size = b - a + 1
        sx = 0.0
        sy = 0.0
        for m in range(a, b + 1):
            sx += x[m]
            sy += qi[m]
        xm = sx / size
        ym = sy / size
        s_xx = 0.0
        s_xy = 0.0
        s_yy = 0.0
        for m in range(a, b + 1):
            dx = x[m] - xm
            dy = qi[m] - ym
            s_xx += dx * dx
            s_xy += dx * dy
            s_yy += dy * dy
        sl = s_xy / s_xx
        c0 = ym - sl * xm
        s_rr = 0.0
        for m in range(a, b + 1):
            e = qi[m] - (sl * x[m] + c0)
            s_rr += e * e
        slope[i] = sl
        icpt[i] = c0
        r2[i] = 1.0 - s_rr / s_yy if s_yy > 0 else 1.0
        sxx[i] = s_xx
    return k, peak, lo, hi, slope, icpt, r2, sxx


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
_C_FIELDS = tuple(f.name for f in fields(CompartmentMetrics) if f.name in _C_UNITS)
_B_FIELDS = tuple(f.name for f in fields(BarrierMetrics) if f.name in _B_UNITS)
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

    Notes
    -----
    The metrics of many subjects at once (:func:`compute_metrics` on a block) have the same form
    with an array (n_subjects,) in place of every number of the compartments and barriers, and of
    ``input_end`` (NaN for None) and ``molar_mass`` (when it varies), and an array of texts per
    note (``""`` for a subject without it); ``steady_state_reached`` is then 1, 0 or NaN.
    :meth:`subject` gives one subject's metrics in the form of a single run, :meth:`columns` the
    table of all; the other exports are for a single run.
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

    def _factors(self, units: OutputUnits | None) -> dict[str, tuple[Any, str]]:
        u = units or self.output_units
        mm = self.molar_mass
        if isinstance(mm, np.ndarray):  # many subjects, each its own molar mass: a factor per subject
            each, which = np.unique(np.asarray(mm, dtype=float).reshape(-1), return_inverse=True)
            per = [_unit_factors(u, float(x)) for x in each]
            return {k: (np.array([p[k][0] for p in per])[which], unit) for k, (_, unit) in per[0].items()}
        return _unit_factors(u, mm)

    def _entries(self) -> Any:
        """Every metric as ``(kind, id, metric, value, unit kind, notes)``, in the order of the rows."""
        for m in self.compartments:
            for name in _C_FIELDS:
                yield "compartment", m.id, name, getattr(m, name), _C_UNITS[name], m.notes
            yield "compartment", m.id, "interval_start", m.interval[0], "time", m.notes
            yield "compartment", m.id, "interval_end", m.interval[1], "time", m.notes
            for i, a in enumerate(m.interval_aucs, start=1):
                yield "compartment", m.id, f"auc_interval_{i}", a, "auc", m.notes
        for m in self.barriers:
            for name in _B_FIELDS:
                yield "barrier", m.id, name, getattr(m, name), _B_UNITS[name], m.notes
            yield "barrier", m.id, "lag_window_start", m.lag_window[0], "time", m.notes
            yield "barrier", m.id, "lag_window_end", m.lag_window[1], "time", m.notes

    def to_rows(self, units: OutputUnits | None = None) -> list[tuple[str, str, str, Any, str, str]]:
        """Rows ``(kind, id, metric, value, unit, note)`` in ``units`` (default: the scenario's output units).

        ``kind`` is ``compartment`` or ``barrier``; missing values are None, with the reason in
        ``note``; ``note`` also flags a value that needs care; every dosing interval's AUC is a
        row ``auc_interval_<n>``.
        """
        fac = self._factors(units)
        rows: list[tuple[str, str, str, Any, str, str]] = []
        for kind, ident, name, value, ukind, notes in self._entries():
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
        return rows

    def columns(self, units: OutputUnits | None = None) -> tuple[tuple[str, ...], tuple[str, ...], np.ndarray]:
        """The metrics as a table with one row per subject (one row for a single run).

        Returns
        -------
        names : tuple of str
            ``"<metric>:<id>"`` in the order of :meth:`to_rows`.
        units : tuple of str
            The unit of each, in ``units`` (default: the scenario's output units).
        values : ndarray (n_subjects, n_metrics)
            The values of :meth:`to_rows`; NaN where a metric is blank, yes/no as 1 and 0.
        """
        fac = self._factors(units)
        entries = list(self._entries())
        n = np.size(self.compartments[0].cmax) if self.compartments else np.size(self.barriers[0].peak_flux)
        values = np.full((n, len(entries)), np.nan)
        for col, (_, _, _, value, ukind, _) in enumerate(entries):
            if value is None:
                continue
            if ukind in ("bool", "count"):
                values[:, col] = value
            else:
                values[:, col] = value * fac[ukind][0]
        return (tuple(f"{name}:{ident}" for _, ident, name, *_ in entries),
                tuple(fac[ukind][1] for *_, ukind, _ in entries), values)

    def note_texts(self) -> np.ndarray:
        """Each subject's notes (why a metric is blank, or a flag on one that needs care) as one
        text, the ``note`` column of :meth:`to_rows` gathered in a row of a table (the per-subject
        table of a population, SUBJECTS.csv).

        The metrics that share a note are named together before it, ``"<metric>:<id>, ...:
        <note>"``, compartments first, then barriers; notes are joined by ``" / "``.

        Returns
        -------
        ndarray of str (n_subjects,)
            ``""`` for a subject without notes; one entry for a single run.
        """
        n = np.size(self.compartments[0].cmax) if self.compartments else np.size(self.barriers[0].peak_flux)
        labels: list[str] = []
        codes: list[np.ndarray] = []
        texts: list[np.ndarray] = []
        for m in (*self.compartments, *self.barriers):
            for name, note in m.notes.items():
                each = np.broadcast_to(np.asarray(note, dtype=object).reshape(-1), (n,))
                known, code = np.unique(each.astype(str), return_inverse=True)
                labels.append(f"{name}:{m.id}")
                texts.append(known)
                codes.append(code.reshape(-1))
        out = np.full(n, "", dtype=object)
        if not labels:
            return out
        # the distinct combinations of notes (few: subjects differ in a handful of ways), each
        # written once
        combos, which = np.unique(np.stack(codes, axis=1), axis=0, return_inverse=True)
        made = []
        for combo in combos.tolist():
            shared: dict[str, list[str]] = {}
            for label, known, k in zip(labels, texts, combo, strict=True):
                if known[k]:
                    shared.setdefault(str(known[k]), []).append(label)
            made.append(" / ".join(f"{', '.join(names)}: {note}" for note, names in shared.items()))
        out[:] = np.array(made, dtype=object)[which.reshape(-1)]
        return out

    def subject(self, i: int) -> Metrics:
        """Subject ``i``'s metrics from those of many subjects (:func:`compute_metrics` on a block):
        what its own run gives."""
        mm = self.molar_mass
        end = np.asarray(self.input_end, dtype=float).reshape(-1)[i]
        return Metrics(tuple(_subject_of(m, i) for m in self.compartments),
                       tuple(_subject_of(m, i) for m in self.barriers), self.application_times, self.intervals,
                       self.duration, self.output_units,
                       float(np.reshape(mm, -1)[i]) if isinstance(mm, np.ndarray) else mm,
                       None if math.isnan(end) else float(end))

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


def _unit_factors(u: OutputUnits, mm: float | None) -> dict[str, tuple[float, str]]:
    """Internal unit -> ``u`` for each unit kind of the metrics: (factor, unit)."""
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


def _subject_of(m: Any, i: int) -> Any:
    """Subject ``i``'s :class:`CompartmentMetrics` or :class:`BarrierMetrics` (plain numbers and its
    own notes) from those of many subjects (an array per field)."""
    kw = dict(m.__dict__)
    for name, v in kw.items():
        if type(v) is np.ndarray:
            kw[name] = int(v.item(i)) if name in _WHOLE else float(v.item(i))
        elif type(v) is tuple:
            kw[name] = tuple(x.item(i) if type(x) is np.ndarray else float(x) for x in v)
    kw["notes"] = {k: str(x[i]) for k, x in m.notes.items() if x[i]}
    if "steady_state_reached" in kw:
        x = kw["steady_state_reached"]
        kw["steady_state_reached"] = None if x != x else bool(x)
    # every field is set from the block's own (a frozen dataclass without checks in its __init__,
    # which would set them one by one through object.__setattr__)
    out = object.__new__(type(m))
    out.__dict__.update(kw)
    return out


_WHOLE = ("terminal_points", "lag_points")


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
    t, c = _asarray(t), _block(c)
    if input_end == _LAST_APPLICATION:
        input_end = max([x for x in applications if x <= float(t[-1])], default=float(t[0]))
    ends = np.full(1, NAN if input_end is None else float(input_end))
    block, = _exposures(t, c, applications, ((cid, jumps, threshold),), adj_r2_tolerance, ends,
                        _texts(1, input_reason))
    return _subject_of(block, 0)


def _exposures(t: np.ndarray, c: np.ndarray, applications: Sequence[float],
               groups: Sequence[tuple[str, Sequence[float], float | None]], adj_r2_tolerance: float,
               input_end: np.ndarray, input_reason: np.ndarray) -> tuple[CompartmentMetrics, ...]:
    """:func:`exposure_metrics` of each row of a block, for several compartments at once.

    ``c`` holds the traces of every compartment of ``groups`` ((id, jump times, threshold) each)
    one after the other, each a block of the same n subjects ((len(groups) * n, n_t)); the rules
    are element-wise over the rows, so the compartments are measured in one pass (the jumps and
    the threshold, which differ by compartment, are applied to the rows of their own).
    ``input_end`` (n,) is NaN where an input still acts at the end. Returns one
    :class:`CompartmentMetrics` per group: every field an array (n,), the notes arrays of texts
    (a note that no subject of a compartment has is left out).
    """
    rows_all, n_t = c.shape
    n = rows_all // max(len(groups), 1)
    if len(groups) > 1:
        input_end, input_reason = (np.concatenate((x,) * len(groups)) for x in (input_end, input_reason))
    end = float(t[-1])
    intervals = dosing_intervals(applications, end) or ((float(t[0]), end),)
    cl = c.copy(order="C")
    for g, (_, jumps, _) in enumerate(groups):
        if jumps:
            _left_limits(t, c[g * n:(g + 1) * n], jumps, cl[g * n:(g + 1) * n])
    cum = _cumulative(t, c, cl)
    total = cum[:, -1]
    aucs = tuple(_aucs_between(t, c, cl, cum, intervals))
    a, b = intervals[-1]
    inside = (t >= a - 1e-12) & (t < b - 1e-9 * max(b, 1.0))
    end_rows = _rows_at(t, [b])
    last = cl[:, end_rows[0]] if end_rows else _interp_trace(t, c, b)
    # Cmax (its first row), and Cmin and Cmax over the last interval and the value just before its end
    k, cmax, cmin, cmax_i = _peaks(np.ascontiguousarray(c, dtype=np.float64), inside,
                                   np.ascontiguousarray(last, dtype=np.float64))
    tmax = t[k]
    # terminal phase: after the last input has ended and after the Cmax that follows it
    lam, icpt, start, adj = (np.full(rows_all, NAN) for _ in range(4))
    points = np.zeros(rows_all, dtype=np.int64)
    ended = ~np.isnan(input_end)
    rows = np.zeros(0, dtype=np.int64)
    if ended.any():
        with np.errstate(invalid="ignore"):
            after_end = t >= (input_end - 1e-9 * max(abs(end), 1.0))[:, None]
        rows = np.flatnonzero(ended & after_end.any(axis=1))
    if len(rows):
        j0 = np.argmax(after_end[rows], axis=1)
        kk = np.argmax(np.where(np.arange(n_t) >= j0[:, None], c[rows], -np.inf), axis=1)
        fits = _terminal_fits(t, c[rows], t[kk], 3, adj_r2_tolerance)
        for whole, part in zip((lam, icpt, points, start, adj), fits, strict=True):
            whole[rows] = part
    notes: dict[str, np.ndarray] = {}
    why = _texts(rows_all)
    if not ended.all():
        for text in sorted(set(input_reason[~ended].tolist())):
            why[~ended & (input_reason == text)] = (f"no terminal phase: an input still acts at the end of the run "
                                                    f"({text})")
    for i in np.flatnonzero(ended & ~(lam > 0)).tolist():
        why[i] = (f"no terminal phase: fewer than 3 falling, positive points after the last input ended "
                  f"({float(input_end[i]):.4g} h) and the highest value after it")
    fitted = lam > 0
    with np.errstate(all="ignore"):
        auc_inf = np.where(fitted, total + c[:, -1] / lam, NAN)
        extra = np.where(fitted & (auc_inf > 0), 100.0 * (auc_inf - total) / auc_inf, NAN)
        half_life = np.where(fitted, math.log(2.0) / lam, NAN)
    span = end - float(t[0])
    n_int = len(aucs)
    acc, steady = np.full(rows_all, NAN), np.full(rows_all, NAN)   # steady state: 1 yes, 0 no, NaN not known
    if n_int >= 2:
        with np.errstate(all="ignore"):
            acc = np.where(aucs[0] > 0, aucs[-1] / aucs[0], NAN)
            steady = np.where(aucs[-1] > 0, np.abs(aucs[-1] - aucs[-2]) <= STEADY_STATE_TOLERANCE * np.abs(aucs[-1]),
                              NAN)
    if n_int < 2:
        notes["accumulation_ratio"] = notes["steady_state_reached"] = _texts(rows_all, "a single dosing interval")
    else:
        unknown = np.isnan(steady)
        if (np.isnan(acc) | unknown).any():
            notes["accumulation_ratio"] = np.where(np.isnan(acc) | unknown, "no exposure in the first dosing interval",
                                                   "").astype(object)
        if unknown.any():
            notes["steady_state_reached"] = np.where(unknown, "no exposure in the last dosing interval",
                                                     "").astype(object)
    c_avg = total / span if span > 0 else np.full(rows_all, NAN)
    c_avg_i = aucs[-1] / (b - a) if b > a else np.full(rows_all, NAN)
    out = []
    for g, (cid, _, threshold) in enumerate(groups):
        part = slice(g * n, (g + 1) * n)
        own: dict[str, np.ndarray] = {}
        blank = why[part]
        if (blank != "").any():
            own.update(dict.fromkeys(_TERMINAL, blank))
        if threshold is None:
            own["threshold"] = own["time_above"] = _texts(n, "no threshold given")
        for name, x in notes.items():
            if (x[part] != "").any():
                own[name] = x[part]
        out.append(CompartmentMetrics(
            id=cid, cmax=cmax[part], tmax=tmax[part], cmin=cmin[part], cmax_interval=cmax_i[part],
            interval=(float(a), float(b)), auc=total[part], auc_inf=auc_inf[part],
            auc_extrapolated_percent=extra[part], lambda_z=lam[part], half_life=half_life[part],
            terminal_points=points[part], terminal_start=start[part], terminal_adj_r2=adj[part],
            c_avg=c_avg[part], c_avg_interval=c_avg_i[part], threshold=threshold,
            time_above=None if threshold is None else _time_above(t, c[part], cl[part], threshold),
            interval_aucs=tuple(x[part] for x in aucs), accumulation_ratio=acc[part],
            steady_state_reached=steady[part], notes=own))
    return tuple(out)


@njit(cache=True, nogil=True, error_model="numpy", no_cfunc_wrapper=True)
def _peaks(c, inside, last):  # pragma: no cover - compiled (tested through exposure_metrics)
    """For each row of ``c``: the row of its first largest value and that value (a NaN counts as
    largest, as np.argmax does), and the smallest and largest of its values at the rows ``inside``
    and ``last`` (NaN when any is NaN, as np.min and np.max)."""
    n, n_t = c.shape
    k = np.zeros(n, dtype=np.int64)
    top = np.empty(n)
    low = np.empty(n)
    high = np.empty(n)
    for i in range(n):
        ci = c[i]
        at = _first_largest(ci)
        k[i] = at
        top[i] = ci[at]
        lo = last[i]
        hi = lo
        for j in range(n_t):
            if inside[j]:
                v = ci[j]
                if v != v or lo != lo:
                    lo = np.nan
                    hi = np.nan
                    break
                if v < lo:
                    lo = v
                if v > hi:
                    hi = v
        low[i] = lo
        high[i] = hi
    return k, top, low, high


_TERMINAL = ("auc_inf", "auc_extrapolated_percent", "lambda_z", "half_life", "terminal_start", "terminal_adj_r2")
"""The metrics of the terminal phase (blank together, with one reason)."""


def _interp_trace(t: np.ndarray, c: np.ndarray, x: float) -> np.ndarray:
    """The value of each row of a block at ``x``, on its segment (log-linear where it falls)."""
    if len(t) < 2:
        return c[:, 0].copy()
    j = int(np.clip(np.searchsorted(t, x) - 1, 0, len(t) - 2))
    return _interp(t[j], t[j + 1], c[:, j], c[:, j + 1], x)


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
    block = _barrier(_asarray(t), _block(flux), _block(permeated), _block(content), _each(area, 1),
                     _each(applied, 1), applications, bid, lag_tolerance, _texts(1, lag_flag), lag_end)
    return _subject_of(block, 0)


def _barrier(t: np.ndarray, j: np.ndarray, q: np.ndarray, m: np.ndarray, area: np.ndarray, applied: np.ndarray,
             applications: Sequence[float], bid: str, lag_tolerance: float, lag_flag: np.ndarray,
             lag_end: float | None) -> BarrierMetrics:
    """:func:`barrier_metrics` of each row of the blocks (n, n_t), with the area, applied amount and
    flag of each subject (n,): every field an array (n,), the notes arrays of texts."""
    n = q.shape[0]
    # the first time the flux comes within PEAK_TOLERANCE of its peak (a plateau has no single top)
    top = np.max(j, axis=1)
    k = np.argmax(j >= (top - PEAK_TOLERANCE * np.abs(top))[:, None], axis=1)
    apps = sorted(x for x in applications if x <= t[-1])
    origin = apps[0] if apps else float(t[0])
    nxt = apps[1] if len(apps) > 1 else None
    if lag_end is not None and (nxt is None or lag_end < nxt):
        nxt = lag_end
    lag, steady, w0, w1, points, r2, reason = _lag_fits(t, q, j, origin, nxt, lag_tolerance, STEADY_WINDOW_LAGS)
    perm_amount = q[:, -1] * area
    finite = np.isfinite(applied) & (applied > 0)
    notes: dict[str, np.ndarray] = {}
    lag_notes = _texts(n)
    for i in np.flatnonzero((reason != "") | (lag_flag != "")).tolist():
        lag_notes[i] = "; ".join(x for x in (reason[i], lag_flag[i]) if x)
    if (lag_notes != "").any():
        for name in ("lag_time", "steady_flux", "lag_window_start", "lag_window_end", "lag_points", "lag_r2"):
            notes[name] = lag_notes
    if not finite.all():
        why = np.where(finite, "", np.where(applied == math.inf, "an infinite dose (a held source): no applied "
                                            "amount to divide by", "nothing was applied to the barrier's 'from' "
                                            "side")).astype(object)
        notes["fraction_absorbed"] = notes["content_fraction"] = why
    with np.errstate(all="ignore"):
        fraction = np.where(finite, perm_amount / applied, NAN)
        content_fraction = np.where(finite, m[:, -1] / applied, NAN)
    return BarrierMetrics(
        id=bid, peak_flux=top, peak_flux_time=t[k], permeated=q[:, -1],
        permeated_amount=perm_amount, lag_time=lag, steady_flux=steady,
        lag_window=(w0, w1), lag_points=points, lag_r2=r2, applied=np.array(applied, dtype=float),
        fraction_absorbed=fraction, content=m[:, -1], content_fraction=content_fraction, notes=notes,
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
    return float(_applied(result, cid, barrier, 1)[0])


def _applied(result: Any, cid: str, barrier: Any, n: int) -> np.ndarray:
    """:func:`applied_to` of each of ``n`` subjects (a stacked scenario and a block of traces), (n,)."""
    sc = result.scenario
    comp = sc.compartment(cid)
    if comp.held:
        return np.where(_each(comp.held_concentration, n) > 0, math.inf, 0.0)
    total = comp.initial_concentration * (0.0 if comp.volume is None else comp.volume)
    if barrier is not None:
        total += sum(layer.initial_concentration * layer.thickness * barrier.area for layer in barrier.layers)
    events, infused, supply = (_block(x) for x in result.dose_parts(cid))
    total = _each(total, n)
    if not events.shape[1]:
        return total.copy()
    return total + np.sum(_rises(events), axis=1) + np.sum(_rises(supply), axis=1) + infused[:, -1]


def _rises(x: np.ndarray) -> np.ndarray:
    """Each row's rise from the row before (from 0 before the first), where it rises, else 0:
    ``np.maximum(np.diff(x, axis=1, prepend=0.0), 0.0)`` (the same numbers, fewer steps)."""
    d = np.empty_like(x)
    d[:, 0] = x[:, 0]
    np.subtract(x[:, 1:], x[:, :-1], out=d[:, 1:])
    return np.maximum(d, 0.0, out=d)


def closed_receptor_time(result: Any, barrier: Any, start: float, stop: float) -> float | None:
    """The first output time in [start, stop] at which barrier's closed ``to`` compartment holds
    a C/K above :data:`CLOSED_RECEPTOR_FRACTION` of the ``from`` side's (None when it never does,
    or when ``to`` is held, a sink)."""
    when = float(_closed_receptor_times(result, barrier, start, stop, 1)[0])
    return None if math.isnan(when) else when


def _closed_receptor_times(result: Any, barrier: Any, start: float, stop: float, n: int) -> np.ndarray:
    """:func:`closed_receptor_time` of each of ``n`` subjects, (n,), NaN where never."""
    sc = result.scenario
    to, frm = sc.compartment(barrier.to_id), sc.compartment(barrier.from_id)
    if to.held:
        return np.full(n, NAN)
    t = np.asarray(result.times, dtype=float)
    u_to = _block(result.concentration(to.id)) / _each(to.partition, n)[:, None]
    u_from = _block(result.concentration(frm.id)) / _each(frm.partition, n)[:, None]
    tol = 1e-9 * max(abs(float(t[-1])), 1.0)
    found = ((t >= start - tol) & (t <= stop + tol)) & (u_from > 0) & (u_to > CLOSED_RECEPTOR_FRACTION * u_from)
    return np.where(found.any(axis=1), t[np.argmax(found, axis=1)], NAN)


def compute_metrics(result: Any, threshold: float | Mapping[str, float] | None = None, *,
                    lag_tolerance: float = LAG_TOLERANCE, adj_r2_tolerance: float = ADJ_R2_TOLERANCE) -> Metrics:
    """Metrics of a simulated run, or of many subjects at once.

    Parameters
    ----------
    result : Result
        From :func:`barrierflow.simulate`; or many subjects of one scenario: traces with a
        subject axis (n, n_t) and a stacked ``scenario`` (:func:`barrierflow.model.cohort.stacked`),
        as :func:`barrierflow.analysis.population.population_metrics` gives it.
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
        Of the run; for many subjects every value is an array with one entry per subject and
        every note an array of texts (:meth:`Metrics.subject` gives one subject's, as its own
        run would; :meth:`Metrics.columns` the table).

    Raises
    ------
    barrierflow.model.cohort.Diverging
        For many subjects whose dosing differs in a way the rules decide on (a starting content
        zero for some only): compute each part on its own.
    """
    sc: Scenario = result.scenario
    t = np.asarray(result.times, dtype=float)
    end = float(t[-1])
    apps = application_times(sc, end)
    intervals = dosing_intervals(apps, end) or ((float(t[0]), end),)
    first = np.asarray(result.concentration(sc.compartments[0].id), dtype=float)
    many = first.ndim == 2
    n = first.shape[0] if many else 1
    input_end, input_reason = _input_ends(sc, result, end, n)
    groups = [(comp.id, jump_times(sc, comp.id, end),
               threshold.get(comp.id) if isinstance(threshold, Mapping) else threshold) for comp in sc.compartments]
    traces = [first if many else first[None, :]]
    traces += [_block(result.concentration(comp.id)) for comp in sc.compartments[1:]]
    comps = _exposures(t, np.concatenate(traces) if len(traces) > 1 else traces[0], apps or (float(t[0]),), groups,
                       adj_r2_tolerance, input_end, input_reason)
    bars = []
    for b in sc.barriers:
        dose = _applied(result, b.from_id, b, n)
        origin = min(apps) if apps else float(t[0])
        stop = first_interval_end(sc, b.from_id, apps, end)
        when = _closed_receptor_times(result, b, origin, stop, n)
        flag = _texts(n)
        for i in np.flatnonzero(~np.isnan(when)).tolist():
            flag[i] = (f"biased: the closed receptor '{b.to_id}' rises above {CLOSED_RECEPTOR_FRACTION:.0%} of the "
                       f"donor side's concentration (partition considered) at {when[i]:.4g} h, so it is no sink")
        bars.append(_barrier(t, _block(result.flux(b.id)), _block(result.permeated(b.id)),
                             _block(result.content(b.id)), _each(b.area, n), dose, apps or (float(t[0]),), b.id,
                             lag_tolerance, flag, stop))
    block = Metrics(tuple(comps), tuple(bars), tuple(apps), tuple(intervals), end - float(t[0]),
                    sc.output_units, sc.substance.molar_mass, input_end)
    return block if many else block.subject(0)



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
