"""The time-lag method on measured data: the late straight line of the cumulative amount permeated.

For a membrane of thickness L, initially free of solute, between a source held at concentration
C (so that the membrane's face holds C1 = K C) and a perfect sink, the amount per area that has
crossed by time t is (Crank, The Mathematics of Diffusion, 2nd ed., 1975, eq. 4.24a)::

    Q(t) / (L C1) = D t / L^2 - 1/6 - (2/pi^2) sum_n ((-1)^n / n^2) exp(-D n^2 pi^2 t / L^2)

and at late times the straight line (Crank 1975, eq. 4.24b)::

    Q(t) -> (D C1 / L) (t - L^2 / (6 D))

whose slope is the steady flux J_ss = D K C / L and whose intercept on the time axis is the lag
time t_lag = L^2 / (6 D). Hence the classic estimates D = L^2 / (6 t_lag) and K = J_ss L / (D C).

Which points lie on the line: the transient sum above, at t = 3 t_lag = L^2/(2D), is
(2/pi^2) exp(-pi^2/2) = 0.0015 of L C1, below 0.5 % of Q there, and it shrinks by a factor
exp(-pi^2/6) = 0.19 with every further lag time. :func:`time_lag` therefore fits the line to the
points from 3 lag times on, found by iteration (start with the last half of the times, fit,
keep the points beyond 3 lag times of that fit, fit again, until the choice no longer changes).
When the data end before enough such points exist, the last three times are used and the
estimate is flagged as not from steady state.

The method assumes a constant source and a sink. With a finite dose, a filling receptor or a
layered barrier it still gives a permeability and a lag time of the barrier as a whole, which
serve as starting values for a transient fit (:func:`barrierflow.studies.fit`); the fit then
uses the model itself.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

__all__ = ["STEADY_AFTER_LAGS", "TimeLag", "time_lag"]

STEADY_AFTER_LAGS = 3.0
"""The straight line is fitted from this many lag times on (see the module docstring)."""


@dataclass(frozen=True)
class TimeLag:
    """The late straight line of Q(t) and what it implies.

    Attributes
    ----------
    flux : float, mg/(cm^2 h)
        Slope of the line, the steady flux J_ss.
    lag_time : float, h
        Where the line crosses the time axis.
    first_time : float, h
        The first time of the points on the line.
    n_points : int
        How many measured values the line was fitted to.
    r_squared : float
        Of the line over its points.
    steady : bool
        True when the points used start at 3 lag times or later (the line is the steady one);
        False when the data end too early and the last three times were used instead.
    thickness : float or None, cm
        L, for D and K.
    source_concentration : float or None, mg/mL
        C, the concentration held on the source side, for K and the permeability.
    """

    flux: float
    lag_time: float
    first_time: float
    n_points: int
    r_squared: float
    steady: bool
    thickness: float | None = None
    source_concentration: float | None = None

    @property
    def diffusivity(self) -> float | None:
        """D = L^2 / (6 t_lag), cm^2/h (None without a thickness or with a lag time <= 0)."""
        if self.thickness is None or not self.lag_time > 0:
            return None
        return self.thickness**2 / (6.0 * self.lag_time)

    @property
    def permeability(self) -> float | None:
        """P = J_ss / C, cm/h (None without a source concentration)."""
        if not self.source_concentration:
            return None
        return self.flux / self.source_concentration

    @property
    def partition(self) -> float | None:
        """K = J_ss L / (D C) = P L / D (None when D or P is unknown)."""
        d, p = self.diffusivity, self.permeability
        if d is None or p is None:
            return None
        return p * self.thickness / d

    @property
    def message(self) -> str:
        """What the estimate rests on, in words."""
        if self.steady:
            return (f"straight line through {self.n_points} values from {self.first_time:.4g} h on (at least "
                    f"{STEADY_AFTER_LAGS:g} lag times)")
        return (f"the data end before {STEADY_AFTER_LAGS:g} lag times: the line through the last {self.n_points} "
                "values is not yet the steady one, so J_ss, the lag time, D and K from it are rough")

    def as_dict(self) -> dict[str, float | int | bool | str | None]:
        """The values in the internal units (h, mg/(cm^2 h), cm^2/h, cm/h), for JSON."""
        return {"flux": self.flux, "lag_time": self.lag_time, "first_time": self.first_time,
                "n_points": self.n_points, "r_squared": self.r_squared, "steady": self.steady,
                "diffusivity": self.diffusivity, "partition": self.partition, "permeability": self.permeability,
                "message": self.message}


def time_lag(times: Sequence[float] | np.ndarray, cumulative: Sequence[float] | np.ndarray, *,
             thickness: float | None = None, source_concentration: float | None = None) -> TimeLag:
    """Fit the late straight line of cumulative permeation data (the time-lag method).

    Parameters
    ----------
    times : array_like, h
        Times of the values; replicates may repeat a time (pooled data).
    cumulative : array_like, mg/cm^2
        Cumulative amount per area permeated; NaN values are left out.
    thickness : float, optional, cm
        The barrier's thickness L, for D = L^2/(6 t_lag).
    source_concentration : float, optional, mg/mL
        The concentration held on the source side, for the permeability and K.

    Returns
    -------
    TimeLag

    Raises
    ------
    ValueError
        With fewer than three distinct times holding values, or when the late values do not rise
        (no positive slope).

    Examples
    --------
    Noise-free values of Crank's late line, Q = J (t - t_lag), J = 2, t_lag = 1.5:

    >>> t = [0.5, 1, 2, 4, 6, 8, 10]
    >>> q = [max(0.0, 2 * (x - 1.5)) for x in t]
    >>> est = time_lag(t, q)
    >>> round(est.flux, 12), round(est.lag_time, 12), est.steady
    (2.0, 1.5, True)
    """
    t = np.asarray(times, dtype=float).ravel()
    q = np.asarray(cumulative, dtype=float).ravel()
    if t.shape != q.shape:
        raise ValueError(f"times and cumulative amounts differ in length ({len(t)} and {len(q)})")
    keep = np.isfinite(t) & np.isfinite(q)
    t, q = t[keep], q[keep]
    order = np.argsort(t, kind="stable")
    t, q = t[order], q[order]
    distinct = np.unique(t)
    if len(distinct) < 3:
        raise ValueError(f"the time-lag method needs values at three times or more; got {len(distinct)}")
    start = distinct[len(distinct) // 2] if len(distinct) >= 6 else distinct[-3]
    steady = False
    seen: set[float] = set()
    for _ in range(50):
        sel = t >= start
        slope, intercept = np.polyfit(t[sel], q[sel], 1)
        if not slope > 0:
            raise ValueError("the late values do not rise with time, so there is no steady flux to read")
        lag = -intercept / slope
        wanted = STEADY_AFTER_LAGS * abs(lag)
        enough = distinct[distinct >= wanted]
        if len(enough) >= 3:
            new_start, steady = float(enough[0]), True
        else:
            new_start, steady = float(distinct[-3]), False
        if new_start == start or new_start in seen:
            start = new_start
            break
        seen.add(start)
        start = new_start
    sel = t >= start
    slope, intercept = np.polyfit(t[sel], q[sel], 1)
    lag = -intercept / slope
    fitted = slope * t[sel] + intercept
    ss_tot = float(np.sum((q[sel] - q[sel].mean()) ** 2))
    r2 = 1.0 - float(np.sum((q[sel] - fitted) ** 2)) / ss_tot if ss_tot > 0 else math.nan
    steady = steady and start >= STEADY_AFTER_LAGS * abs(lag) * (1 - 1e-12)
    return TimeLag(float(slope), float(lag), float(start), int(sel.sum()), r2, bool(steady), thickness,
                   source_concentration)
