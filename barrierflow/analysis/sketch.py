"""Percentiles of very many subjects in bounded memory: a mergeable quantile sketch.

A population of 100,000 subjects of a week-long patch holds billions of trace values; their
percentiles at every output time cannot be computed from all values at once. A
:class:`QuantileSketch` keeps, for every cell (an output time of one trace, or one metric), a
histogram of the values on logarithmic bins: a value x > 0 falls in bin
k = ceil(ln x / ln gamma), gamma = 1 + a, which holds (gamma^(k-1), gamma^k]. Negative values
go to a second histogram of |x|, zeros to a count of their own; NaN and infinities are left out
(an infinite applied dose, for a held source, has no percentile). These are the
relative-error bins of Masson, Rim and Lee (DDSketch: a fast and fully-mergeable quantile
sketch with relative-error guarantees, Proc. VLDB Endow. 12, 2019, 2195-2205), with their
"collapsing lowest" store: each cell keeps at most ``bins`` bins, the highest ones, and counts
values further below in the lowest kept bin.

**Error.** A percentile is taken as numpy's default (linear interpolation between the order
statistics at rank h = (n - 1) q / 100). An order statistic is placed inside its bin by its
rank among the bin's m values, at gamma^(k - 1 + (j + 1/2) / m) for the j-th (log-uniform in the
bin, so that a band moves smoothly rather than in steps of a bin), and kept within the cell's
smallest and largest values, which are kept exactly (the 0th and 100th percentiles, and every
percentile of equal values, are exact). Both the estimate and the true value lie in the same bin,
so when the two order statistics have one sign and lie within ``bins`` bins of the cell's largest
magnitude (``bins`` ln(gamma) in ln: 4.4 decades with the defaults), the result is within a
relative ``accuracy`` a (default 1 %) of ``numpy.percentile`` over the same values. A percentile
further below is reported at the top of the lowest kept bin (an upper bound of the true value);
:meth:`QuantileSketch.floored` says where that happened.

**Merge.** The histogram of a cell depends only on the multiset of values added: the bin of a
value is a fixed function of the value, counts are whole numbers, and the collapse keeps the
bins below the cell's largest bin, whatever the order in which values came. Adding chunks in any
grouping or order, on one machine or many, therefore gives bit-identical sketches and
percentiles. A worker sends a chunk's histogram (:class:`Counts`, compact: only the bins that
hold one of its values), never its values.

**The logarithm.** The bin is ceil(ln|x| / ln gamma) with the C library's logarithm
(``math.log``). A chunk's values are taken through numpy's vectorised logarithm, an order of
magnitude faster, which can differ from it in the last place; where the quotient lies within
1e-12 of a whole number (a bin edge) the bin is taken from ``math.log``, so every value gets the
same bin either way.

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
"""Default number of bins kept per cell (with 1 % accuracy, values over 4.4 decades)."""

_EMPTY = np.iinfo(np.int64).min


# ---------------------------------------------------------------- a chunk's histogram
@dataclass(frozen=True, eq=False)
class Counts:
    """The histogram of one chunk of values, per cell, compact (what a worker sends back).

    For the positive values of cell c: ``pos_n[c]`` entries, the next ones of ``pos_bin`` (bins,
    ascending) and ``pos`` (how many values fell in each; only bins that hold a value are listed,
    and the lowest listed bin also counts what lies more than ``bins`` bins below the chunk's
    highest); the cells' entries follow one another in cell order. The same for the magnitudes of
    negative values; ``zeros[c]`` exact zeros; ``pos_min`` and ``neg_min`` the lowest bin
    reached before the collapse; ``vmin`` and ``vmax`` the smallest and largest value (NaN
    without values). ``accuracy`` and ``bins`` say how the bins were made.
    """

    accuracy: float
    bins: int
    pos_n: np.ndarray
    pos_bin: np.ndarray
    pos: np.ndarray
    neg_n: np.ndarray
    neg_bin: np.ndarray
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
        return sum(a.nbytes for a in (self.pos_n, self.pos_bin, self.pos, self.neg_n, self.neg_bin, self.neg,
                                      self.zeros, self.pos_min, self.neg_min, self.vmin, self.vmax))


def _gamma(accuracy: float) -> float:
    return 1.0 + accuracy


_NONE = np.iinfo(np.int64).max  # a bin code for zero or NaN in the scratch row
_NEAR = 1e-12  # ln|x| / ln gamma this close to a whole number: the bin is taken from math.log


@njit(cache=True, inline="always")
def _bin(magnitude, scaled, inv_lg):
    """The bin ceil(ln(magnitude) / ln gamma) of a value > 0, from ``scaled`` (its ln / ln gamma by
    numpy's logarithm) unless that lies within _NEAR of a whole number (see :func:`_count`)."""
    whole = math.floor(scaled)
    if scaled - whole > _NEAR * max(abs(scaled), 1.0) and whole + 1.0 - scaled > _NEAR * max(abs(scaled), 1.0):
        return np.int64(whole) + 1
    return np.int64(math.ceil(math.log(magnitude) * inv_lg))


@njit(cache=True)
def _count(values, scaled, inv_lg, bins):
    """One pass over ``values`` (n_rows, n_cells): each cell's compact histograms, zeros and extremes.

    The bin of each value is computed once (kept in a scratch row), then the cell's histogram is
    laid out from its own lowest and highest bins. The bin is ceil(ln|x| / ln gamma) with the
    logarithm of the C library (``math.log``); ``scaled`` holds ln|x| / ln gamma from numpy's
    vectorised logarithm (within a few units in the last place of it), which gives the same bin
    except where it lies within 1e-12 of a whole number: there the bin is taken from
    ``math.log`` itself, so the bins are those of ``math.log`` for every value.
    """
    n_rows, n_cells = values.shape
    pos_lo = np.zeros(n_cells, dtype=np.int64)
    pos_n = np.zeros(n_cells, dtype=np.int64)
    pos_min = np.full(n_cells, _EMPTY, dtype=np.int64)
    neg_lo = np.zeros(n_cells, dtype=np.int64)
    neg_n = np.zeros(n_cells, dtype=np.int64)
    neg_min = np.full(n_cells, _EMPTY, dtype=np.int64)
    zeros = np.zeros(n_cells, dtype=np.int64)
    vmin = np.full(n_cells, np.inf)
    vmax = np.full(n_cells, -np.inf)
    codes = np.empty((n_cells, n_rows), dtype=np.int64)  # bin of each value; sign in the parity
    big = np.int64(1) << 40
    for c in range(n_cells):
        pk0, pk1, nk0, nk1 = big, -big, big, -big
        row = codes[c]
        lo_v = np.inf
        hi_v = -np.inf
        for r in range(n_rows):
            x = values[r, c]
            if not math.isfinite(x):  # NaN and infinities are left out
                row[r] = _NONE
                continue
            if x > 0.0:
                k = _bin(x, scaled[r, c], inv_lg)
                row[r] = 2 * k
                if k < pk0:
                    pk0 = k
                if k > pk1:
                    pk1 = k
            elif x < 0.0:
                k = _bin(-x, scaled[r, c], inv_lg)
                row[r] = 2 * k + 1
                if k < nk0:
                    nk0 = k
                if k > nk1:
                    nk1 = k
            else:
                row[r] = _NONE
                zeros[c] += 1
                continue
            if x < lo_v:
                lo_v = x
            if x > hi_v:
                hi_v = x
        if zeros[c] > 0:
            lo_v = min(lo_v, 0.0)
            hi_v = max(hi_v, 0.0)
        vmin[c] = lo_v
        vmax[c] = hi_v
        if pk1 >= pk0:
            pos_min[c] = pk0
            pos_lo[c] = max(pk0, pk1 - bins + 1)
            pos_n[c] = pk1 - pos_lo[c] + 1
        if nk1 >= nk0:
            neg_min[c] = nk0
            neg_lo[c] = max(nk0, nk1 - bins + 1)
            neg_n[c] = nk1 - neg_lo[c] + 1
    # the bins that hold a value, ascending, with their counts (at most one entry per row)
    pos_bin = np.empty(n_cells * n_rows, dtype=np.int64)
    pos = np.empty(n_cells * n_rows, dtype=np.int64)
    neg_bin = np.empty(n_cells * n_rows, dtype=np.int64)
    neg = np.empty(n_cells * n_rows, dtype=np.int64)
    scratch_pos = np.zeros(bins, dtype=np.int64)
    scratch_neg = np.zeros(bins, dtype=np.int64)
    n_pos = 0
    n_neg = 0
    for c in range(n_cells):
        row = codes[c]
        for r in range(n_rows):
            code = row[r]
            if code == _NONE:
                continue
            k = code >> 1
            if code & 1:
                j = k - neg_lo[c]
                scratch_neg[j if j > 0 else 0] += 1
            else:
                j = k - pos_lo[c]
                scratch_pos[j if j > 0 else 0] += 1
        first = n_pos
        for j in range(pos_n[c]):
            if scratch_pos[j] > 0:
                pos_bin[n_pos] = pos_lo[c] + j
                pos[n_pos] = scratch_pos[j]
                scratch_pos[j] = 0
                n_pos += 1
        pos_n[c] = n_pos - first
        first = n_neg
        for j in range(neg_n[c]):
            if scratch_neg[j] > 0:
                neg_bin[n_neg] = neg_lo[c] + j
                neg[n_neg] = scratch_neg[j]
                scratch_neg[j] = 0
                n_neg += 1
        neg_n[c] = n_neg - first
    return (pos_n, pos_bin[:n_pos].copy(), pos[:n_pos].copy(), neg_n, neg_bin[:n_neg].copy(), neg[:n_neg].copy(),
            zeros, pos_min, neg_min, vmin, vmax)


def count_values(values: np.ndarray, accuracy: float = ACCURACY, bins: int = BINS) -> Counts:
    """The histogram of ``values`` per cell (a chunk's contribution to a :class:`QuantileSketch`).

    Parameters
    ----------
    values : array (n_rows, n_cells)
        One row per subject, one column per cell (an output time, a metric). NaN and infinities
        are left out.
    accuracy : float
        Relative accuracy a of the bins (0 < a < 0.5).
    bins : int
        Bins kept per cell.

    Returns
    -------
    Counts
    """
    _check(accuracy, bins)
    values = np.asarray(values, dtype=np.float64)
    if values.ndim != 2:
        raise ValueError(f"sketch values: got an array of shape {values.shape}; expected (rows, cells)")
    inv_lg = 1.0 / math.log(_gamma(accuracy))
    with np.errstate(divide="ignore", invalid="ignore"):
        scaled = np.log(np.abs(values)) * inv_lg   # numpy's vectorised logarithm; see _count
    parts = _count(values, scaled, inv_lg, bins)
    return Counts(accuracy, bins, *parts)


def _check(accuracy: float, bins: int) -> None:
    if not (isinstance(accuracy, float | int) and 0 < accuracy < 0.5):
        raise ValueError(f"sketch accuracy: got {accuracy!r}; expected a relative accuracy between 0 and 0.5")
    if not (isinstance(bins, int) and bins >= 8):
        raise ValueError(f"sketch bins: got {bins!r}; expected a whole number >= 8")


# ---------------------------------------------------------------- the accumulating store
@njit(cache=True)
def _add(top, store, low, n_entries, entry_bin, entry_count, chunk_low):
    """Add a chunk's histogram (per cell ``n_entries`` bins ``entry_bin`` with ``entry_count``
    values, ascending) to the collapsing store ``store``."""
    n_cells, bins = store.shape
    o = 0
    for c in range(n_cells):
        w = n_entries[c]
        if w == 0:
            continue
        if low[c] == _EMPTY or chunk_low[c] < low[c]:
            low[c] = chunk_low[c]
        chunk_top = entry_bin[o + w - 1]
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
            idx = entry_bin[o + j] - base
            if idx < 0:
                idx = 0
            row[idx] += entry_count[o + j]
        o += w


@njit(cache=True)
def _rank_value(r, neg_top, neg, neg_low, zeros, pos_top, pos, pos_low, n_neg, gamma, bins):
    """The estimate of the order statistic of rank ``r`` (0-based) of one cell.

    Placed log-uniformly inside its bin by its rank among the bin's values. Returns
    (value, floored): floored is 1 when the rank fell in a lowest bin that holds collapsed
    values (the value is then the top of that bin, an upper bound of the magnitude).
    """
    lg = math.log(gamma)
    if r < n_neg:
        # negatives from the most negative: highest magnitude bin first, largest magnitude first
        acc = 0
        for j in range(neg.shape[0] - 1, -1, -1):
            m = neg[j]
            if r < acc + m:
                k = neg_top - bins + 1 + j
                if j == 0 and neg_low < k:
                    return -math.exp(k * lg), 1
                p = 1.0 - (r - acc + 0.5) / m
                return -math.exp((k - 1 + p) * lg), 0
            acc += m
        return 0.0, 0
    r -= n_neg
    if r < zeros:
        return 0.0, 0
    r -= zeros
    acc = 0
    for j in range(pos.shape[0]):
        m = pos[j]
        if r < acc + m:
            k = pos_top - bins + 1 + j
            if j == 0 and pos_low < k:
                return math.exp(k * lg), 1
            p = (r - acc + 0.5) / m
            return math.exp((k - 1 + p) * lg), 0
        acc += m
    return math.nan, 0


@njit(cache=True)
def _quantiles(qs, neg_top, neg, neg_low, zeros, pos_top, pos, pos_low, vmin, vmax, gamma, bins, out, floored):
    """Percentiles of every cell. A store that was never made is given with no bins (shape (n, 0))."""
    n_cells = zeros.shape[0]
    for c in range(n_cells):
        n_neg = np.int64(0)  # not a literal 0: _rank_value would be compiled for it as well
        for j in range(neg.shape[1]):
            n_neg += neg[c, j]
        n_pos = 0
        for j in range(pos.shape[1]):
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
        """Ratio of neighbouring bin edges, 1 + accuracy."""
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
            _add(top, store, low, counts.pos_n, counts.pos_bin, counts.pos, counts.pos_min)
        if counts.neg_n.any():
            top, store, low = self._store(True)
            _add(top, store, low, counts.neg_n, counts.neg_bin, counts.neg, counts.neg_min)

    def to_counts(self) -> Counts:
        """The sketch as a chunk histogram, so that one sketch can be added to another."""
        parts = []
        for s in (self._pos, self._neg):
            if s is None:
                parts.append((np.zeros(self.n_cells, dtype=np.int64), np.zeros(0, dtype=np.int64),
                              np.zeros(0, dtype=np.int64), np.full(self.n_cells, _EMPTY, dtype=np.int64)))
                continue
            top, store, low = s
            held = store != 0           # a cell never reached holds no counts
            cells, slots = np.nonzero(held)
            parts.append((held.sum(axis=1, dtype=np.int64), (top[cells] - self.bins + 1 + slots).astype(np.int64),
                          store[cells, slots].astype(np.int64), low.copy()))
        (pn, pb, pc, pmin), (nn, nb, nc, nmin) = parts
        return Counts(self.accuracy, self.bins, pn, pb, pc, nn, nb, nc, self.zeros.copy(), pmin, nmin,
                      self.vmin.copy(), self.vmax.copy())

    def count(self) -> np.ndarray:
        """Number of values (NaN excluded) per cell."""
        total = self.zeros.copy()
        for s in (self._pos, self._neg):
            if s is not None:
                total += s[1].sum(axis=1, dtype=np.int64)
        return total

    def _arrays(self) -> tuple[np.ndarray, ...]:
        empty = (np.full(self.n_cells, _EMPTY, dtype=np.int64), np.zeros((self.n_cells, 0), dtype=np.int32),
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
        return self.percentiles_and_floored(q)[1]

    def percentiles_and_floored(self, q: Sequence[float]) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`percentiles` and :meth:`floored` in one pass."""
        values, floored = self._percentiles(q)
        return values, floored.astype(bool)

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
