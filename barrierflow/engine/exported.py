"""What a run keeps at every output row: the exported columns, the barriers' contents, the guard.

A result's traces and its mass balance need, at each output time, only the compartments, the
cells at each barrier's two faces (the fluxes), the cumulative amounts (the quadratures) and each
barrier's content (a sum of its cells, a linear functional of the state). The compiled paths
(the exact chain, RODAS4) keep just these in a :class:`Rows` instead of every state at every row
(a star of 64 barriers has 8,204 states per row), together with the guard every result passes:
the lowest dynamic state relative to its scale, the most negative raw concentration, and whether
every value is finite, each taken over *every* state at every row. The full states are computed
only when asked for (:attr:`barrierflow.engine.Trajectory.states`: barrier profiles, the whole
array), by running the same deterministic path again with every state kept; the numbers are the
same to the last bit.

:class:`Taps` says which states are kept (one per compiled model); :func:`take_row` is the one
rule by which a full state vector of a row becomes the row's kept values, used by the compiled
paths inside their loops and by :meth:`Rows.from_states` for the paths that return full states.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit

from .arrays import INNER, larger, smaller
from .compiled import CompiledModel, taps_arrays

__all__ = ["Rows", "Taps", "chain_guard", "chain_taps", "empty_taps", "flush_chain_guard", "take_chain_row", "take_row",
           "taps_of"]


@dataclass(frozen=True, eq=False)
class Taps:
    """Which states a run keeps at every row (built once per compiled model by :func:`taps_of`).

    Attributes
    ----------
    keep : ndarray of int
        The kept states, increasing: every compartment, the two states of each barrier's face
        links, every cumulative amount.
    pos : ndarray of int (n_state,)
        The column of each state in :attr:`Rows.cols` (-1 when not kept).
    bstart, bstop : ndarray of int (n_bar,)
        The cells of each barrier (an empty range for a steady barrier).
    inv_scale : ndarray (n_state,)
        1 / the magnitude scale of each state (the guard's yardstick).
    """

    keep: np.ndarray
    pos: np.ndarray
    bstart: np.ndarray
    bstop: np.ndarray
    inv_scale: np.ndarray


def taps_of(model: CompiledModel) -> Taps:
    """The :class:`Taps` of ``model`` (built once: the model is immutable)."""
    d = model.__dict__
    memo = d.get("_taps")
    if memo is not None:
        return memo
    parts = d.get("_taps_parts")  # computed with the model's arrays (compiled._compile_one)
    if parts is not None:
        taps = d["_taps"] = Taps(*parts)
        return taps
    m = model
    nd, grids = m.n_dyn, m.grids
    ends = [0] * (4 * len(grids))  # each barrier's first and last link and first and last cell
    for b, g in enumerate(grids):
        ends[4 * b:4 * b + 4] = (g.in_link, g.out_link, g.start, max(g.start, min(g.stop, nd)))
    keep, pos, bstart, bstop = taps_arrays(m.n_comp, nd, m.n_state, m.link_p, m.link_q,
                                            np.array(ends, dtype=np.int64))
    taps = Taps(keep, pos, bstart, bstop, 1.0 / m.scale)
    model.__dict__["_taps"] = taps
    return taps


def new_buffers(taps: Taps, n_t: int, n_state: int) -> tuple:
    """The kernels' output arrays of a run of ``n_t`` rows: ``(keep, bstart, bstop, inv_scale, cols,
    content, clipped, guard, last)``, ``guard = [lowest scaled, most negative, finite (0 or NaN)]``,
    ``last`` the full state of the last row."""
    nb = len(taps.bstart)
    return (taps.keep, taps.bstart, taps.bstop, taps.inv_scale, np.empty((n_t, len(taps.keep))),
            np.empty((n_t, nb)), np.empty((n_t, nb)), np.zeros(3), np.zeros(n_state))


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def empty_taps(n_state):
    """Output arrays that keep nothing (for a caller that keeps the full states itself)."""
    z = np.zeros(0, dtype=np.int64)
    return (z, z, z, np.zeros(0), np.zeros((0, 0)), np.zeros((0, 0)), np.zeros((0, 0)), np.zeros(3),
            np.zeros(n_state))


#: The row rule's sums and minima may be reordered, so that its loops run in vector lanes (NaN
#: and infinity keep their meaning: no finite-math assumption).
_LANES = dict(INNER, fastmath={"reassoc", "nsz", "arcp", "contract"})


@njit(**_LANES)
def take_row(y, r, taps, cap, nd):
    """Keep row ``r`` of the full state ``y`` in the buffers ``taps`` (see :func:`new_buffers`).

    The last row (``r`` the buffers' last) is kept whole in ``last`` and left out of the guard:
    the driver applies the events at the very end of the run to it first
    (:meth:`Rows.finished`).
    """
    keep, bstart, bstop, inv_scale, cols, cont, clip, guard, last = taps
    if keep.shape[0] == 0:
        return
    for j in range(keep.shape[0]):
        cols[r, j] = y[keep[j]]
    for b in range(bstart.shape[0]):
        yc = y[bstart[b]:bstop[b]]
        cc = cap[bstart[b]:bstop[b]]
        acc = 0.0
        pos = 0.0
        for i in range(yc.shape[0]):
            v = yc[i] * cc[i]
            acc += v
            pos += larger(v, 0.0)
        cont[r, b] = acc
        clip[r, b] = pos
    if r == cols.shape[0] - 1:
        for i in range(y.shape[0]):
            last[i] = y[i]
        return
    yd = y[:nd]
    sd = inv_scale[:nd]
    low = 0.0
    neg = 0.0
    for i in range(nd):
        low = smaller(low, yd[i] * sd[i])
        neg = smaller(neg, yd[i])
    fin = 0.0
    for i in range(y.shape[0]):
        fin += y[i] * 0.0  # NaN for a NaN or an infinity
    guard[0] = min(guard[0], low)
    guard[1] = min(guard[1], neg)
    guard[2] += fin


@njit(**_LANES)
def take_chain_row(ys, dst, r, taps, pos, capc, plo, phi):
    """:func:`take_row` for a row whose chain states are at hand in chain order (the exact chain
    path, the split path): the same values kept by the same rule, without first scattering them
    into a full state; the guard over the chain's states is :func:`chain_guard`'s, once per block
    of rows.

    ``ys`` holds the states of the chain's positions, ``pos`` the position of each dynamic state
    (-1 off the chain: those and the quadratures are read from ``dst``, the full row), ``capc`` the
    capacity of each position, ``plo, phi`` each barrier's range of positions (its cells are
    neighbours on the chain). Not for the buffers' last row (:func:`take_row` keeps it whole).
    """
    keep, bstart, _bstop, _inv_scale, cols, cont, clip, guard, _last = taps
    nd = pos.shape[0]
    for j in range(keep.shape[0]):
        i = keep[j]
        p = pos[i] if i < nd else -1
        cols[r, j] = ys[p] if p >= 0 else dst[i]
    for b in range(bstart.shape[0]):
        yc = ys[plo[b]:phi[b]]
        cc = capc[plo[b]:phi[b]]
        acc = 0.0
        tot = 0.0
        for a in range(yc.shape[0]):
            v = yc[a] * cc[a]
            acc += v
            tot += larger(v, 0.0)
        cont[r, b] = acc
        clip[r, b] = tot
    f = 0.0
    for i in range(nd, dst.shape[0]):
        f += dst[i] * 0.0
    guard[2] += f


@njit(**_LANES)
def chain_guard(ysb, use, isc, mins):
    """The guard of :func:`take_row` over the chain's states of the rows ``r`` of the block
    ``ysb`` (4 x positions, in chain order) with ``use[r]``, kept element by element in ``mins``
    (3 x positions: lowest scaled value, most negative value, finite), so that its loop runs in
    vector lanes and each position's minima are loaded and stored once per block of four rows,
    not once per row; :func:`flush_chain_guard` folds it into the guard. ``isc`` is the inverse
    scale of each position. (A minimum, and a sum of zeros or NaN, do not depend on the order of
    the rows.)"""
    low = mins[0]
    neg = mins[1]
    fin = mins[2]
    if use[0] and use[1] and use[2] and use[3]:
        y0 = ysb[0]
        y1 = ysb[1]
        y2 = ysb[2]
        y3 = ysb[3]
        for a in range(isc.shape[0]):
            s = isc[a]
            lo = low[a]
            ne = neg[a]
            v = y0[a]
            w = v * s
            lo = w if w < lo else lo
            ne = v if v < ne else ne
            f = v * 0.0  # NaN for a NaN or an infinity
            v = y1[a]
            w = v * s
            lo = w if w < lo else lo
            ne = v if v < ne else ne
            f += v * 0.0
            v = y2[a]
            w = v * s
            lo = w if w < lo else lo
            ne = v if v < ne else ne
            f += v * 0.0
            v = y3[a]
            w = v * s
            lo = w if w < lo else lo
            ne = v if v < ne else ne
            f += v * 0.0
            low[a] = lo
            neg[a] = ne
            fin[a] += f
        return
    for r in range(4):
        if not use[r]:
            continue
        ys = ysb[r]
        for a in range(isc.shape[0]):
            v = ys[a]
            w = v * isc[a]
            low[a] = w if w < low[a] else low[a]
            neg[a] = v if v < neg[a] else neg[a]
            fin[a] += v * 0.0  # NaN for a NaN or an infinity


@njit(inline="always", error_model="numpy")
def chain_taps(idx, n, nd, taps, cap, full):
    """What :func:`take_chain_row` and :func:`chain_guard` need for a chain of ``n`` positions
    (``idx``: the state at each position): ``(chained, pos, plo, phi, capc, isc)``, ``chained``
    False when the rows cannot be kept in chain order (the full states asked for, nothing kept, or
    a barrier whose cells are not neighbours on the chain; they are: a barrier is a path of
    cells)."""
    pos = np.full(nd, -1, dtype=np.int64)
    for a in range(n):
        pos[idx[a]] = a
    bstart = taps[1]
    bstop = taps[2]
    n_bar = bstart.shape[0]
    plo = np.zeros(n_bar, dtype=np.int64)
    phi = np.zeros(n_bar, dtype=np.int64)
    chained = not full and taps[0].shape[0] > 0
    for b in range(n_bar):
        if bstop[b] <= bstart[b] or not chained:
            continue
        lo_p = n
        hi_p = -1
        for i in range(bstart[b], bstop[b]):
            lo_p = min(lo_p, pos[i])
            hi_p = max(hi_p, pos[i])
        if lo_p < 0 or hi_p - lo_p + 1 != bstop[b] - bstart[b]:
            chained = False
        plo[b] = lo_p
        phi[b] = hi_p + 1
    capc = np.empty(n)
    isc = np.empty(n)
    if chained:
        inv_scale = taps[3]
        for a in range(n):
            capc[a] = cap[idx[a]]
            isc[a] = inv_scale[idx[a]]
    return chained, pos, plo, phi, capc, isc


@njit(**_LANES)
def flush_chain_guard(mins, taps, y0, pos):
    """Fold the guard that :func:`chain_guard` kept element by element into ``taps``' guard,
    with the dynamic states off the chain (held or clamped: their values in ``y0``, the state at
    the interval's start, the same at every row of it), and start ``mins`` again."""
    guard = taps[7]
    low = 0.0
    neg = 0.0
    fin = 0.0
    for a in range(mins.shape[1]):
        low = min(low, mins[0, a])
        neg = min(neg, mins[1, a])
        fin += mins[2, a]
        mins[0, a] = 0.0
        mins[1, a] = 0.0
        mins[2, a] = 0.0
    inv_scale = taps[3]
    for i in range(pos.shape[0]):
        if pos[i] < 0:
            v = y0[i]
            low = min(low, v * inv_scale[i])
            neg = min(neg, v)
            fin += v * 0.0
    guard[0] = min(guard[0], low)
    guard[1] = min(guard[1], neg)
    guard[2] += fin


@dataclass(frozen=True, eq=False)
class Rows:
    """What a run keeps at each output row (see the module docstring).

    Attributes
    ----------
    taps : Taps
    cols : ndarray (n_t, len(taps.keep))
        The kept states (internal units).
    content : ndarray (n_t, n_bar), mg
        Amount in each barrier's cells.
    clipped : ndarray (n_t, n_bar), mg
        The same with each cell's negative values counted as 0 (what the traces show).
    low : float
        The lowest dynamic state over the rows, relative to its scale (0 when none is negative).
    most_negative : float, mg/mL
        The most negative raw dynamic state (0 when none is).
    finite : bool
        Every state at every row is finite.
    """

    taps: Taps
    cols: np.ndarray
    content: np.ndarray
    clipped: np.ndarray
    low: float
    most_negative: float
    finite: bool

    def column(self, i: int) -> np.ndarray | None:
        """State ``i`` at every row (a view), or None when it is not kept."""
        j = int(self.taps.pos[i])
        return self.cols[:, j] if j >= 0 else None

    @property
    def cells(self) -> np.ndarray:
        """Amount in every barrier cell together at each row, mg (the ledger's share of the cells)."""
        return self.content.sum(axis=1)

    @classmethod
    def from_buffers(cls, model: CompiledModel, buf: tuple, n_rows: int) -> Rows:
        """The rows a kernel filled in the buffers of :func:`new_buffers` (the first ``n_rows``;
        the guard over them, the last row's included only when it is the buffers' last, through
        :meth:`finished`)."""
        _k, _s, _e, _i, cols, cont, clip, guard, _last = buf
        if n_rows != len(cols):
            cols, cont, clip = cols[:n_rows], cont[:n_rows], clip[:n_rows]
        low, neg, fin = guard.tolist()
        return cls(taps_of(model), cols, cont, clip, low, neg, fin == fin)  # (fin: 0.0, or NaN when not finite)

    def finished(self, model: CompiledModel, last: np.ndarray) -> Rows:
        """These rows with the last one kept from its full state ``last`` (after the events at the
        very end of the run), and the guard taken over it too."""
        t = self.taps
        n = len(self.cols)
        y = np.ascontiguousarray(last, dtype=np.float64)
        # (the buffers' last row is y itself: take_row keeps the last row there, a copy onto itself)
        buf = (t.keep, t.bstart, t.bstop, t.inv_scale, self.cols, self.content, self.clipped,
               np.array([self.low, self.most_negative, 0.0 if self.finite else np.nan]), y)
        _finish(y, n - 1, buf, model.capacity, model.n_dyn)
        low, neg, fin = buf[7].tolist()
        return Rows(t, self.cols, self.content, self.clipped, low, neg, fin == fin)

    @classmethod
    def from_states(cls, model: CompiledModel, states: np.ndarray) -> Rows:
        """The rows of a run that kept its full states (n_t, n_state), by the same rule."""
        n_t = len(states)
        buf = new_buffers(taps_of(model), n_t, model.n_state)
        _fill(np.ascontiguousarray(states), buf, model.capacity, model.n_dyn)
        rows = cls.from_buffers(model, buf, n_t)
        return rows.finished(model, states[-1]) if n_t else rows


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def _finish(y, r, taps, cap, nd):
    """Keep the last row ``r`` from ``y`` and take the guard over it too (:func:`take_row` leaves
    the buffers' last row out of the guard)."""
    guard = taps[7]
    inv_scale = taps[3]
    for i in range(nd):
        guard[0] = min(guard[0], y[i] * inv_scale[i])
        guard[1] = min(guard[1], y[i])
    for i in range(y.shape[0]):
        guard[2] += y[i] * 0.0
    take_row(y, r, taps, cap, nd)


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def _fill(states, taps, cap, nd):
    for r in range(states.shape[0]):
        take_row(states[r], r, taps, cap, nd)
