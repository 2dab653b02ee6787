"""Percentiles of very many subjects in bounded memory: a mergeable quantile sketch.

A population of 100,000 subjects of a week-long patch holds billions of trace values; their
percentiles at every output time cannot be computed from all values at once. A
:class:`QuantileSketch` keeps, for every cell (an output time of one trace, or one metric), a
histogram of the values on logarithmic bins: a value x > 0 falls in bin
k = ceil(ln x / ln gamma), gamma = (1 + a) / (1 - a), which holds (gamma^(k-1), gamma^k]; it is
represented by 2 gamma^k / (gamma + 1), within a relative error a of every value of the bin.
Negative values go to a second histogram of |x|, zeros to a count of their own; NaN is left
out. This is the relative-error sketch of Masson, Rim and Lee (DDSketch: a fast and fully-mergeable
quantile sketch with relative-error guarantees, Proc. VLDB Endow. 12, 2019, 2195-2205), with
its "collapsing lowest" store: each cell keeps at most ``bins`` bins, the highest ones, and
counts values further below in the lowest kept bin.

**Error.** A percentile is taken as numpy's default (linear interpolation between the order
statistics at rank h = (n - 1) q / 100) with each order statistic replaced by its bin's
representative, kept within the cell's smallest and largest values (which are kept exactly, so
that the 0th and 100th percentiles, and every percentile of equal values, are exact). When the
two order statistics have one sign and lie within ``bins`` bins of the cell's largest magnitude
(``bins`` ln(gamma) in ln, 8.9 decades with the defaults), the result is within a relative
``accuracy`` (default 1 %) of ``numpy.percentile`` over the same values. A percentile further
below is reported at the floor of the kept range (an upper bound of the true value);
:meth:`QuantileSketch.floored` says where that happened.

**Merge.** The histogram of a cell depends only on the multiset of values added: the bin of a
value is a fixed function of the value, counts are whole numbers, and the collapse keeps the
bins below the cell's largest bin, whatever the order in which values came. Adding chunks in any
grouping or order, on one machine or many, therefore gives bit-identical sketches and
percentiles. A worker sends a chunk's histogram (:class:`Counts`, compact: only the bins its own
values reach), never its values.

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numba import njit

__all__ = ["ACCURACY", "BINS", "Counts", "QuantileSketch", "count_values"]

ACCURACY = 0.01
"""Default relative accuracy of a percentile (1 %)."""

BINS = 1024
"""Default number of bins kept per cell (with 1 % accuracy, values over 8.9 decades)."""

_EMPTY = np.iinfo(np.int64).min


# ---------------------------------------------------------------- a chunk's histogram
@dataclass(frozen=True, eq=False)
class Counts:
    """The histogram of one chunk of values, per cell, compact (what a worker sends back).

    For the positive values of cell c: bins ``pos_lo[c]`` to ``pos_lo[c] + pos_n[c] - 1`` with
    counts ``pos[pos_at[c]:pos_at[c] + pos_n[c]]`` (the lowest bin also counts what lies more
    than ``bins`` bins below the chunk's highest); the same for the magnitudes of negative values;
    ``zeros[c]`` exact zeros; ``pos_min`` and ``neg_min`` the lowest bin reached before the
    collapse; ``vmin`` and ``vmax`` the smallest and largest value (NaN without values).
    ``accuracy`` and ``bins`` say how the bins were made.
    """

    accuracy: float
    bins: int
    pos_lo: np.ndarray
    pos_n: np.ndarray
    pos: np.ndarray
    neg_lo: np.ndarray
    neg_n: np.ndarray
    neg: np.ndarray
    zeros: np.ndarray
    pos_min: np.ndarray
    neg_min: np.ndarray
    vmin: np.ndarray
    vmax: np.ndarray

    @property
    def n_cells(self) -> int:
        """Number of cells."""
        return len(self.zeros)

    @property
    def nbytes(self) -> int:
        """Size of the arrays, bytes."""
        return sum(a.nbytes for a in (self.pos_lo, self.pos_n, self.pos, self.neg_lo, self.neg_n, self.neg,
                                      self.zeros, self.pos_min, self.neg_min, self.vmin, self.vmax))


def _gamma(accuracy: float) -> float:
    return (1.0 + accuracy) / (1.0 - accuracy)


@njit(cache=True)
def _encode(vt, inv_lg, bins, sign):
    """Bins of the values of ``sign`` (+1 or -1) per cell of ``vt`` (n_cells, n_rows): lowest bin kept,
    width, and lowest bin reached."""
    n_cells, n_rows = vt.shape
    lo = np.zeros(n_cells, dtype=np.int64)
    width = np.zeros(n_cells, dtype=np.int64)
    low = np.full(n_cells, _EMPTY, dtype=np.int64)
    for c in range(n_cells):
        kmin = np.int64(0)
        kmax = np.int64(0)
        seen = False
        for r in range(n_rows):
            x = vt[c, r] * sign
            if x > 0.0:
                k = np.int64(math.ceil(math.log(x) * inv_lg))
                if not seen:
                    kmin = k
                    kmax = k
                    seen = True
                elif k < kmin:
                    kmin = k
                elif k > kmax:
                    kmax = k
        if seen:
            low[c] = kmin
            if kmin < kmax - bins + 1:
                kmin = kmax - bins + 1
            lo[c] = kmin
            width[c] = kmax - kmin + 1
    return lo, width, low


@njit(cache=True)
def _fill(vt, inv_lg, sign, lo, width, at, out):
    n_cells, n_rows = vt.shape
    for c in range(n_cells):
        if width[c] == 0:
            continue
        base = lo[c]
        o = at[c]
        for r in range(n_rows):
            x = vt[c, r] * sign
            if x > 0.0:
                j = np.int64(math.ceil(math.log(x) * inv_lg)) - base
                if j < 0:
                    j = 0
                out[o + j] += 1


@njit(cache=True)
def _zeros(vt):
    """Exact zeros, smallest and largest value of each cell (NaN left out)."""
    n_cells, n_rows = vt.shape
    z = np.zeros(n_cells, dtype=np.int64)
    lo = np.full(n_cells, np.inf)
    hi = np.full(n_cells, -np.inf)
    for c in range(n_cells):
        for r in range(n_rows):
            x = vt[c, r]
            if x == 0.0:
                z[c] += 1
            if x < lo[c]:
                lo[c] = x
            if x > hi[c]:
                hi[c] = x
    return z, lo, hi


def count_values(values: np.ndarray, accuracy: float = ACCURACY, bins: int = BINS) -> Counts:
    """The histogram of ``values`` per cell (a chunk's contribution to a :class:`QuantileSketch`).

    Parameters
    ----------
    values : array (n_rows, n_cells)
        One row per subject, one column per cell (an output time, a metric). NaN is left out.
    accuracy : float
        Relative accuracy a of the bins (0 < a < 0.5).
    bins : int
        Bins kept per cell.

    Returns
    -------
    Counts
    """
    _check(accuracy, bins)
    vt = np.ascontiguousarray(np.asarray(values, dtype=np.float64).T)
    inv_lg = 1.0 / math.log(_gamma(accuracy))
    parts = []
    for sign in (1.0, -1.0):
        lo, width, low = _encode(vt, inv_lg, bins, sign)
        at = np.zeros(len(width), dtype=np.int64)
        if len(width) > 1:
            np.cumsum(width[:-1], out=at[1:])
        flat = np.zeros(int(width.sum()), dtype=np.int64)
        _fill(vt, inv_lg, sign, lo, width, at, flat)
        parts.append((lo, width, flat, low))
    (plo, pn, pc, pmin), (nlo, nn, nc, nmin) = parts
    zeros, vmin, vmax = _zeros(vt)
    return Counts(accuracy, bins, plo, pn, pc, nlo, nn, nc, zeros, pmin, nmin, vmin, vmax)


def _check(accuracy: float, bins: int) -> None:
    if not (isinstance(accuracy, float | int) and 0 < accuracy < 0.5):
        raise ValueError(f"sketch accuracy: got {accuracy!r}; expected a relative accuracy between 0 and 0.5")
    if not (isinstance(bins, int) and bins >= 8):
        raise ValueError(f"sketch bins: got {bins!r}; expected a whole number >= 8")


# ---------------------------------------------------------------- the accumulating store
@njit(cache=True)
def _add(top, store, low, lo, width, flat, chunk_low):
    """Add a chunk's compact histogram (``lo``, ``width``, ``flat``) to the collapsing store ``store``."""
    n_cells, bins = store.shape
    o = 0
    for c in range(n_cells):
        w = width[c]
        if w == 0:
            continue
        if low[c] == _EMPTY or chunk_low[c] < low[c]:
            low[c] = chunk_low[c]
        chunk_top = lo[c] + w - 1
        if top[c] == _EMPTY:
            top[c] = chunk_top
        elif chunk_top > top[c]:
            s = chunk_top - top[c]
            row = store[c]
            if s >= bins:
                total = 0
                for j in range(bins):
                    total += row[j]
                    row[j] = 0
                row[0] = total
            else:
                total = 0
                for j in range(s + 1):
                    total += row[j]
                row[0] = total
                for j in range(1, bins - s):
                    row[j] = row[j + s]
                for j in range(bins - s, bins):
                    row[j] = 0
            top[c] = chunk_top
        base = top[c] - bins + 1
        row = store[c]
        for j in range(w):
            idx = lo[c] + j - base
            if idx < 0:
                idx = 0
            row[idx] += flat[o + j]
        o += w


@njit(cache=True)
def _rank_value(r, neg_top, neg, neg_low, zeros, pos_top, pos, pos_low, n_neg, gamma, bins):
    """The representative value of the order statistic of rank ``r`` (0-based) of one cell.

    Returns (value, floored): floored is 1 when the rank fell in a lowest bin that holds collapsed values.
    """
    f = 2.0 / (gamma + 1.0)
    if r < n_neg:
        # negatives from the most negative: highest magnitude bin first
        acc = 0
        for j in range(bins - 1, -1, -1):
            acc += neg[j]
            if r < acc:
                k = neg_top - bins + 1 + j
                return -f * gamma ** k, 1 if (j == 0 and neg_low < k) else 0
        return 0.0, 0
    r -= n_neg
    if r < zeros:
        return 0.0, 0
    r -= zeros
    acc = 0
    for j in range(bins):
        acc += pos[j]
        if r < acc:
            k = pos_top - bins + 1 + j
            return f * gamma ** k, 1 if (j == 0 and pos_low < k) else 0
    return math.nan, 0


@njit(cache=True)
def _quantiles(qs, neg_top, neg, neg_low, zeros, pos_top, pos, pos_low, vmin, vmax, gamma, bins, out, floored):
    n_cells = zeros.shape[0]
    for c in range(n_cells):
        n_neg = 0
        for j in range(bins):
            n_neg += neg[c, j]
        n_pos = 0
        for j in range(bins):
            n_pos += pos[c, j]
        n = n_neg + zeros[c] + n_pos
        for i in range(qs.shape[0]):
            if n == 0:
                out[i, c] = math.nan
                continue
            h = (n - 1) * qs[i] / 100.0
            lo = int(math.floor(h))
            if lo > n - 1:
                lo = n - 1
            a, fa = _rank_value(lo, neg_top[c], neg[c], neg_low[c], zeros[c], pos_top[c], pos[c], pos_low[c], n_neg,
                                gamma, bins)
            a = _clamp(a, lo, n, vmin[c], vmax[c])
            frac = h - lo
            if frac > 0.0 and lo + 1 < n:
                b, fb = _rank_value(lo + 1, neg_top[c], neg[c], neg_low[c], zeros[c], pos_top[c], pos[c], pos_low[c],
                                    n_neg, gamma, bins)
                b = _clamp(b, lo + 1, n, vmin[c], vmax[c])
                v = a + frac * (b - a)
                fa = fa | fb
            else:
                v = a
            out[i, c] = v
            floored[i, c] = fa


@njit(cache=True)
def _clamp(x, rank, n, lo, hi):
    """The smallest and largest values are known exactly: rank 0 and n - 1 take them, the others
    stay within them (all equal values thus come out exact)."""
    if rank == 0:
        return lo
    if rank == n - 1:
        return hi
    if x < lo:
        return lo
    if x > hi:
        return hi
    return x


class QuantileSketch:
    """Percentiles of each cell over every value added, in bounded memory (see the module docstring).

    The stores are made on first need: a cell block that only ever sees zeros holds no histogram.

    Parameters
    ----------
    n_cells : int
        Number of cells (output times of one trace, or metrics).
    accuracy : float
        Relative accuracy of a percentile (default 1 %).
    bins : int
        Bins kept per cell (default 1024).

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(1).lognormal(0.0, 0.5, size=(10_000, 1))
    >>> sk = QuantileSketch(1)
    >>> sk.add(count_values(x[:3000])); sk.add(count_values(x[3000:]))
    >>> est, exact = sk.percentiles([5, 50, 95])[:, 0], np.percentile(x, [5, 50, 95])
    >>> bool(np.all(np.abs(est - exact) <= 0.01 * exact))
    True
    """

    def __init__(self, n_cells: int, accuracy: float = ACCURACY, bins: int = BINS):
        _check(accuracy, bins)
        self.n_cells = int(n_cells)
        self.accuracy = float(accuracy)
        self.bins = int(bins)
        self.zeros = np.zeros(self.n_cells, dtype=np.int64)
        self.vmin = np.full(self.n_cells, np.inf)
        self.vmax = np.full(self.n_cells, -np.inf)
        # each store: (highest bin, counts of the kept bins, lowest bin reached) per cell
        self._pos: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
        self._neg: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None

    @property
    def gamma(self) -> float:
        """Ratio of neighbouring bin edges, (1 + accuracy) / (1 - accuracy)."""
        return _gamma(self.accuracy)

    @property
    def nbytes(self) -> int:
        """Memory held by the histograms, bytes."""
        held = [self.zeros, self.vmin, self.vmax] + [a for s in (self._pos, self._neg) if s is not None for a in s]
        return sum(a.nbytes for a in held)

    def _store(self, negative: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        s = self._neg if negative else self._pos
        if s is None:
            s = (np.full(self.n_cells, _EMPTY, dtype=np.int64), np.zeros((self.n_cells, self.bins), dtype=np.int32),
                 np.full(self.n_cells, _EMPTY, dtype=np.int64))
            if negative:
                self._neg = s
            else:
                self._pos = s
        return s

    def add(self, counts: Counts) -> None:
        """Add a chunk's histogram (from :func:`count_values` with the same accuracy and bins).

        The result does not depend on the order or grouping of the chunks added.
        """
        if counts.n_cells != self.n_cells or counts.accuracy != self.accuracy or counts.bins != self.bins:
            raise ValueError(f"sketch: a chunk of {counts.n_cells} cells at accuracy {counts.accuracy} with "
                             f"{counts.bins} bins cannot join a sketch of {self.n_cells} cells at accuracy "
                             f"{self.accuracy} with {self.bins} bins")
        self.zeros += counts.zeros
        np.minimum(self.vmin, counts.vmin, out=self.vmin)
        np.maximum(self.vmax, counts.vmax, out=self.vmax)
        if counts.pos_n.any():
            top, store, low = self._store(False)
            _add(top, store, low, counts.pos_lo, counts.pos_n, counts.pos, counts.pos_min)
        if counts.neg_n.any():
            top, store, low = self._store(True)
            _add(top, store, low, counts.neg_lo, counts.neg_n, counts.neg, counts.neg_min)

    def to_counts(self) -> Counts:
        """The sketch as a chunk histogram, so that one sketch can be added to another."""
        parts = []
        for s in (self._pos, self._neg):
            if s is None:
                parts.append((np.zeros(self.n_cells, dtype=np.int64), np.zeros(self.n_cells, dtype=np.int64),
                              np.zeros(0, dtype=np.int64), np.full(self.n_cells, _EMPTY, dtype=np.int64)))
                continue
            top, store, low = s
            used = top != _EMPTY
            lo = np.where(used, top - self.bins + 1, 0)
            width = np.where(used, self.bins, 0)
            parts.append((lo, width, store[used].astype(np.int64).ravel(), low.copy()))
        (plo, pn, pc, pmin), (nlo, nn, nc, nmin) = parts
        return Counts(self.accuracy, self.bins, plo, pn, pc, nlo, nn, nc, self.zeros.copy(), pmin, nmin,
                      self.vmin.copy(), self.vmax.copy())

    def count(self) -> np.ndarray:
        """Number of values (NaN excluded) per cell."""
        total = self.zeros.copy()
        for s in (self._pos, self._neg):
            if s is not None:
                total += s[1].sum(axis=1, dtype=np.int64)
        return total

    def _arrays(self) -> tuple[np.ndarray, ...]:
        empty = (np.full(self.n_cells, _EMPTY, dtype=np.int64), np.zeros((self.n_cells, self.bins), dtype=np.int32),
                 np.full(self.n_cells, _EMPTY, dtype=np.int64))
        ntop, neg, nlow = self._neg if self._neg is not None else empty
        ptop, pos, plow = self._pos if self._pos is not None else empty
        return ntop, neg, nlow, ptop, pos, plow

    def percentiles(self, q: Sequence[float]) -> np.ndarray:
        """Percentiles of each cell (NaN for a cell without values).

        Parameters
        ----------
        q : sequence of float
            Percentiles from 0 to 100.

        Returns
        -------
        ndarray (len(q), n_cells)
        """
        return self._percentiles(q)[0]

    def floored(self, q: Sequence[float]) -> np.ndarray:
        """True where a percentile fell more than ``bins`` bins below its cell's largest magnitude
        (it is then reported at the floor of the kept range, an upper bound)."""
        return self._percentiles(q)[1].astype(bool)

    def _percentiles(self, q: Sequence[float]) -> tuple[np.ndarray, np.ndarray]:
        qs = np.asarray(q, dtype=np.float64)
        if qs.ndim != 1 or np.any(~np.isfinite(qs)) or np.any((qs < 0) | (qs > 100)):
            raise ValueError(f"percentiles: got {list(np.atleast_1d(q))}; expected numbers from 0 to 100")
        out = np.full((len(qs), self.n_cells), np.nan)
        floored = np.zeros((len(qs), self.n_cells), dtype=np.int64)
        ntop, neg, nlow, ptop, pos, plow = self._arrays()
        _quantiles(qs, ntop, neg, nlow, self.zeros, ptop, pos, plow, self.vmin, self.vmax, self.gamma, self.bins, out,
                   floored)
        return out, floored

    def histogram(self, cell: int) -> tuple[np.ndarray, np.ndarray]:
        """The positive values of one cell as a histogram: bin edges (n + 1,) and counts (n,).

        Only the bins between the lowest and highest used; the lowest also holds what was
        collapsed below the kept range. (A histogram of a metric, as the dashboard draws it.)
        """
        if self._pos is None or self._pos[0][cell] == _EMPTY:
            return np.zeros(1), np.zeros(0, dtype=np.int64)
        top, store, _ = self._pos
        row = store[cell]
        used = np.flatnonzero(row)
        a, b = int(used[0]), int(used[-1])
        ks = top[cell] - self.bins + 1 + np.arange(a, b + 2)
        edges = self.gamma ** (ks - 1).astype(float)
        return edges, row[a:b + 1].astype(np.int64)
