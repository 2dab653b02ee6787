"""The exact solution of chain networks, fully compiled.

Most networks are chains: a patch or donor, the cells of its barrier, the receptor or body
compartments in a row. Their unclamped dynamic states, in chain order, evolve under a
symmetric tridiagonal matrix (see :mod:`barrierflow.engine.exact` for the symmetrisation)::

    T = -M^(-1/2) (L + E) M^(-1/2),   x = M^(1/2) u = sqrt(V / K) y

with M = V K the capacities of the potentials, L the Laplacian of the conductances between
neighbours and E >= 0 the diagonal of what leaves the chain (clearance, degradation, links to
clamped compartments). T is built here directly from the link arrays, so its small eigenvalues
keep their relative accuracy.

Only the modes that have not decayed below exp(-60) at the time from which the modes serve
(:func:`~barrierflow.engine.exact.mode_time`: the shortest time from an interval's start to an
output, unless a few are much shorter than the rest; at most :data:`MAX_MODES`) are computed, k x n,
once per clamp pattern (up to :data:`PATTERNS` kept for the run): eigenvalues by Sturm counts (all
of them in lockstep, each count narrowing every bracket) and Newton's step on the characteristic
polynomial once a bracket holds one eigenvalue, eigenvectors
by inverse iteration with partial pivoting and re-orthogonalisation, and each eigenvalue
polished as the Rayleigh quotient written as a sum of squares,
``-(sum_edges G (u_i - u_j)^2 + sum E u_i^2) / |x|^2``, which has no cancellation (Parlett,
The Symmetric Eigenvalue Problem, 1980, for bisection, inverse iteration and the Rayleigh
quotient). The decayed modes enter through solves with T (O(n)); a closed part of the
chain without any loss is singular and is solved on the complement of its equilibrium mode,
which is known exactly (u constant). The output rows are evaluated four at a time, each with
the modes not yet decayed at its block's first time; the few output times earlier than the modes
serve (an output just after a dose, a short interval) go through a rational approximation of the
exponential (:func:`_rational_row`). Everything runs in compiled code, so a population runs in
parallel threads.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .arrays import ModelArrays, working_arrays
from .compiled import CompiledModel, chain_walk
from .exported import chain_guard, chain_taps, flush_chain_guard, take_chain_row, take_row
from .kernels import INNER, jacobian_kernel, rates_kernel
from .schedule import EventArrays, EventState, apply_events, rows_until

FAIL_CONDITION = 5
"""Status of a chain run whose modes failed their a posteriori check (the path is not exact there)."""

__all__ = ["FAIL_CONDITION", "MODE_ANGLE_LIMIT", "chain_order", "chain_schedule"]


def chain_order(model: CompiledModel) -> np.ndarray | None:
    """The dynamic states (not permanently held) in an order that makes the network a chain.

    Returns None when the model does not qualify: saturable elimination (nonlinear), transfers
    (not symmetric), a link whose two rates differ (b != c beyond rounding), or a state with
    more than two neighbours or a loop.
    """
    memo = model.__dict__.get("_chain_order", False)  # the model is immutable: decide once
    if memo is not False:
        return memo
    order = _chain_order(model)
    model.__dict__["_chain_order"] = order
    return order


def _chain_order(model: CompiledModel) -> np.ndarray | None:
    m = model
    if not m.is_linear or len(m.tr_from):
        return None
    # (the rates of every subject of a stacked model in one row: any that differ refuse the chain)
    order = chain_walk(m.n_dyn, m.held, m.link_p, m.link_q, np.ravel(m.link_b), np.ravel(m.link_c))
    return order if len(order) == 0 or order[0] >= 0 else None


# ---------------------------------------------------------------- the chain matrix
@njit(**INNER)
def _build(order, clamp, m, idx, cmap, msq, tv, dd, ee, gedge, ediag, comp_of):
    """Compact chain of the free states: returns n (their number) and fills the arrays.

    ``idx`` state of each position, ``cmap`` position of each state (-1), ``msq`` sqrt(M),
    ``tv`` sqrt(V/K), ``dd, ee`` the tridiagonal T, ``gedge`` conductance to the next position,
    ``ediag`` the loss diagonal E, ``comp_of`` the index of the connected part of each position.
    """
    nc = m.n_comp
    cap = m.capacity
    invk = m.inv_partition
    lp = m.link_p
    lq = m.link_q
    la = m.link_a
    lb = m.link_b
    lc = m.link_c
    ld = m.link_d
    loss_rate = m.loss_rate
    for i in range(cmap.shape[0]):
        cmap[i] = -1
    n = 0
    for k in range(order.shape[0]):
        i = order[k]
        if i < nc and clamp[i]:
            continue
        idx[n] = i
        cmap[i] = n
        mm = cap[i] / invk[i]
        msq[n] = math.sqrt(mm)
        tv[n] = math.sqrt(cap[i] * invk[i])
        ediag[n] = loss_rate[i] * mm
        gedge[n] = 0.0
        dd[n] = 0.0
        n += 1
    if n == 0:
        return 0
    gsum = np.zeros(n)
    for j in range(lp.shape[0]):
        p = lp[j]
        q = lq[j]
        a = cmap[p]
        b = cmap[q]
        if a >= 0 and b >= 0:
            w = 0.5 * (lb[j] + lc[j])
            gsum[a] += w
            gsum[b] += w
            gedge[min(a, b)] += w
            ediag[a] += la[j] - w
            ediag[b] += ld[j] - w
        elif a >= 0:
            ediag[a] += la[j]
        elif b >= 0:
            ediag[b] += ld[j]
    part = 0
    for a in range(n):
        mm = msq[a] * msq[a]
        dd[a] = -(gsum[a] + ediag[a]) / mm
        if a + 1 < n:
            ee[a] = gedge[a] / (msq[a] * msq[a + 1])
        comp_of[a] = part
        if a + 1 < n and gedge[a] == 0.0:
            part += 1
    return n


@njit(**INNER)
def _dot(a, b, n):
    """sum a[i] b[i] over i < n, in four interleaved partial sums (not one chain of dependent
    additions: the loop runs at the speed of the multiplications)."""
    s0 = 0.0
    s1 = 0.0
    s2 = 0.0
    s3 = 0.0
    m = n - n % 4
    for i in range(0, m, 4):
        s0 += a[i] * b[i]
        s1 += a[i + 1] * b[i + 1]
        s2 += a[i + 2] * b[i + 2]
        s3 += a[i + 3] * b[i + 3]
    for i in range(m, n):
        s0 += a[i] * b[i]
    return (s0 + s1) + (s2 + s3)


@njit(**INNER)
def _sturm(dd, ee, n, x, pivmin):
    """Number of eigenvalues of the tridiagonal (dd, ee) below ``x``."""
    cnt = 0
    q = dd[0] - x
    if abs(q) < pivmin:
        q = -pivmin
    if q < 0.0:
        cnt += 1
    for i in range(1, n):
        q = dd[i] - x - ee[i - 1] * ee[i - 1] / q
        if abs(q) < pivmin:
            q = -pivmin
        if q < 0.0:
            cnt += 1
    return cnt


#: Largest accepted sine of the angle between a computed mode and the true one, bounded a
#: posteriori by residual / gap (Parlett 1980, theorem 11.7.1 (Davis-Kahan)); above it the
#: chain is too ill-conditioned for the exact path and the run is handed to the robust integrator.
MODE_ANGLE_LIMIT = 1e-6


@njit(**INNER)
def _slow_modes(dd, ee, n, cut, gedge, ediag, msq, comp_of, lam, vec):
    """Eigenpairs of T with eigenvalue above ``cut`` (<= 0), slowest first; returns their number.

    Each connected part of the chain (``comp_of``) is decomposed on its own, so that modes of
    parts that do not touch never mix (their eigenvalues may agree to rounding). ``vec[s, :n]``
    holds eigenvector s (unit length, zero outside its part). Returns -1 when a mode fails its
    a posteriori check (residual / gap above :data:`MODE_ANGLE_LIMIT`): the modes cannot be
    trusted and the exact path does not apply.
    """
    if n == 0:
        return 0
    # not literal zeros: _part_modes would be compiled for them as well (seconds)
    k = np.int64(0)
    start = np.int64(0)
    while start < n:
        stop = start
        while stop + 1 < n and comp_of[stop + 1] == comp_of[start]:
            stop += 1
        got = _part_modes(dd, ee, start, stop + 1, cut, gedge, ediag, msq, lam, vec, k)
        if got < 0:
            return -1
        k += got
        start = stop + 1
    # slowest first over all parts (insertion sort: the parts' lists are each sorted)
    for s in range(1, k):
        j = s
        while j > 0 and lam[j] > lam[j - 1]:
            tmp = lam[j]
            lam[j] = lam[j - 1]
            lam[j - 1] = tmp
            for i in range(n):
                tmp = vec[j, i]
                vec[j, i] = vec[j - 1, i]
                vec[j - 1, i] = tmp
            j -= 1
    return k


@njit(**INNER)
def _part_norms(dd, ee, n):
    """(tnorm, upper, pivmin) of the tridiagonal (dd, ee) of size n: the largest absolute row sum,
    Gershgorin's upper bound of the eigenvalues, and the smallest pivot of the Sturm counts."""
    tnorm = 0.0
    upper = -np.inf
    for i in range(n):
        r = abs(dd[i])
        g = dd[i]
        if i > 0:
            r += abs(ee[i - 1])
            g += abs(ee[i - 1])
        if i + 1 < n:
            r += abs(ee[i])
            g += abs(ee[i])
        tnorm = max(tnorm, r)
        upper = max(upper, g)
    pivmin = 1e-300 + 2.2e-16 * 2.2e-16 * tnorm
    upper = max(upper, 0.0) + 1e-14 * tnorm + 1e-300
    return tnorm, upper, pivmin


@njit(**INNER)
def _part_count(dd, ee, n, cut):
    """How many eigenvalues of the tridiagonal (dd, ee) of size n lie above ``cut`` (the modes
    :func:`_part_modes` computes for it)."""
    if n == 1:
        return 1 if dd[0] > cut else 0
    _tnorm, _upper, pivmin = _part_norms(dd, ee, n)
    below = _sturm(dd, ee, n, cut, pivmin) if math.isfinite(cut) else 0
    return n - below


@njit(**INNER)
def _count_slow(dd, ee, n, cut, comp_of):
    """How many modes :func:`_slow_modes` computes (above ``cut``, over every connected part)."""
    k = 0
    start = 0
    while start < n:
        stop = start
        while stop + 1 < n and comp_of[stop + 1] == comp_of[start]:
            stop += 1
        k += _part_count(dd[start:stop + 1], ee[start:stop + 1], stop + 1 - start, cut)
        start = stop + 1
    return k


@njit(**INNER)
def _part_modes(dd_all, ee_all, lo_i, hi_i, cut, gedge_all, ediag_all, msq_all, lam_all, vec_all, k0):
    """The modes above ``cut`` of one connected part (positions lo_i .. hi_i - 1) into
    ``lam_all[k0:]`` and ``vec_all[k0:]``; returns their number, or -1 when one fails its check."""
    n = hi_i - lo_i
    nn = vec_all.shape[1]
    dd = dd_all[lo_i:hi_i]
    ee = ee_all[lo_i:hi_i]
    gedge = gedge_all[lo_i:hi_i]
    ediag = ediag_all[lo_i:hi_i]
    msq = msq_all[lo_i:hi_i]
    if n == 1:
        if dd[0] <= cut:
            return 0
        lam_all[k0] = dd[0]
        for i in range(nn):
            vec_all[k0, i] = 0.0
        vec_all[k0, lo_i] = 1.0
        return 1
    tnorm, upper, pivmin = _part_norms(dd, ee, n)
    k = _part_count(dd, ee, n, cut)
    if k == 0:
        return 0
    k = min(k, lam_all.shape[0] - k0, vec_all.shape[0] - k0)
    # one more eigenvalue than the modes kept (the next faster one), for the gap of the last
    kb = min(k + 1, n)
    lo = np.empty(kb)
    hi = np.empty(kb)
    lower = -tnorm - 1.0
    # mode s (slowest first) is eigenvalue number n - 1 - s (ascending); the eigenvalues from
    # number ``below`` up lie above the cut: brackets [lo, hi] with the counts at their ends
    below = _sturm(dd, ee, n, cut, pivmin) if math.isfinite(cut) else 0
    clo = np.empty(kb, dtype=np.int64)
    chi = np.empty(kb, dtype=np.int64)
    for s in range(kb):
        if n - 1 - s >= below and below > 0:
            lo[s] = cut
            clo[s] = below
            hi[s] = upper
            chi[s] = n
        elif n - 1 - s >= below:
            lo[s] = lower
            clo[s] = 0
            hi[s] = upper
            chi[s] = n
        else:
            lo[s] = lower
            clo[s] = 0
            hi[s] = cut
            chi[s] = below
    # In lockstep over the modes: the Sturm count at each mode's point (how many eigenvalues lie
    # below it) narrows the brackets of every mode; a bracket that holds one eigenvalue only takes
    # Newton's step on det(T - x I), whose logarithmic derivative the same recurrence gives
    # (q_i' = -1 + e_i^2 q_(i-1)' / q_(i-1)^2, d log|det| / dx = sum q_i' / q_i), while it stays
    # inside the bracket, else the bracket's midpoint: quadratic convergence instead of one bit
    # per pass. Done when the bracket is below the bisection's tolerance; a step of Newton's below
    # it is confirmed by the counts just below and above its limit, which close the bracket (the
    # logarithmic derivative could be spoiled by cancellation near a pole of one q_i).
    # A bracket that holds several eigenvalues is cut at as many points, one per mode in it, not
    # at its midpoint by each of them (multisection: the modes' points in one pass no longer
    # fall on the same value while their eigenvalues are not yet apart).
    xq = np.empty(kb)
    rq = np.empty(kb)
    dq = np.empty(kb)
    dl = np.empty(kb)
    cnt = np.empty(kb, dtype=np.int64)
    fin = np.zeros(kb, dtype=np.bool_)
    phase = np.zeros(kb, dtype=np.int64)
    xv = np.empty(kb)
    tol = 4e-16 * tnorm
    for s in range(kb):
        xq[s] = 0.5 * (lo[s] + hi[s])
        j = chi[s] - clo[s]
        if j > 1:  # mode s is eigenvalue n - 1 - s, number (n - 1 - s) - clo[s] of those in its bracket
            x = lo[s] + (hi[s] - lo[s]) * (min(max(n - 1 - s - clo[s], 0), j - 1) + 1) / (j + 1)
            if lo[s] < x < hi[s]:
                xq[s] = x
    # The recurrence runs at the points of the modes not yet finished only, side by side (``act``
    # their modes, ``xa`` their points): a finished mode's point no longer moves, so its count is
    # the one it had, and it narrows the brackets as it did (the same bounds again).
    act = np.empty(kb, dtype=np.int64)
    xa = np.empty(kb)
    dla = np.empty(kb)
    cna = np.empty(kb, dtype=np.int64)
    for _it in range(200):
        na = 0
        for s in range(kb):
            if not fin[s]:
                act[na] = s
                xa[na] = xq[s]
                na += 1
        if na == 0:
            break
        for s in range(na):
            v = dd[0] - xa[s]
            v = v if abs(v) >= pivmin else -pivmin
            rq[s] = 1.0 / v
            dq[s] = -1.0
            dla[s] = -rq[s]
            cna[s] = 1 if v < 0.0 else 0
        for i in range(1, n):
            e2 = ee[i - 1] * ee[i - 1]
            di = dd[i]
            for s in range(na):  # branch-free, so that the shifts run in vector lanes
                r = rq[s]
                v = di - xa[s] - e2 * r
                v = v if abs(v) >= pivmin else -pivmin
                d = -1.0 + e2 * dq[s] * r * r
                r = 1.0 / v
                rq[s] = r
                dq[s] = d
                dla[s] += d * r
                cna[s] += v < 0.0
        for s in range(na):
            dl[act[s]] = dla[s]
            cnt[act[s]] = cna[s]
        for p in range(kb):  # every point narrows every bracket
            xp = xq[p]
            c = cnt[p]
            for s in range(kb):
                if c > n - 1 - s:
                    if xp < hi[s]:
                        hi[s] = xp
                        chi[s] = c
                elif xp > lo[s]:
                    lo[s] = xp
                    clo[s] = c
        for s in range(kb):
            if fin[s]:
                continue
            mid = 0.5 * (lo[s] + hi[s])
            if hi[s] - lo[s] <= tol + 4e-16 * abs(mid):
                fin[s] = True
                continue
            if phase[s] == 1:  # the counts just below and above Newton's limit confirm it
                xq[s] = min(xv[s] + 0.45 * (tol + 4e-16 * abs(xv[s])), hi[s])
                phase[s] = 2
                continue
            if phase[s] == 2:  # not confirmed: bisection from here on
                phase[s] = 3
            if phase[s] == 0 and chi[s] - clo[s] == 1 and math.isfinite(dl[s]) and dl[s] != 0.0:
                xn = xq[s] - 1.0 / dl[s]
                if abs(xn - xq[s]) <= 0.5 * (tol + 4e-16 * abs(xn)):
                    xv[s] = min(max(xn, lo[s]), hi[s])
                    xq[s] = max(xv[s] - 0.45 * (tol + 4e-16 * abs(xv[s])), lo[s])
                    phase[s] = 1
                    continue
                if lo[s] < xn < hi[s]:
                    xq[s] = xn
                    continue
            xq[s] = mid
            j = chi[s] - clo[s]
            if j > 1:  # several eigenvalues in the bracket: mode s's share of it (see above)
                x = lo[s] + (hi[s] - lo[s]) * (min(max(n - 1 - s - clo[s], 0), j - 1) + 1) / (j + 1)
                if lo[s] < x < hi[s]:
                    xq[s] = x
    lam = lam_all[k0:k0 + k]
    vec = np.zeros((k, n))
    # inverse iteration with partial pivoting, re-orthogonalised against the slower modes; the
    # factorisations and solves of all the modes in lockstep (position by position, the modes
    # side by side: their chains of divisions overlap and run in vector lanes; each mode's
    # arithmetic is that of a solve of its own), the re-orthogonalisation mode by mode
    sig = np.empty(k)
    a0 = np.empty((n, k))
    a1 = np.empty((n, k))
    a2 = np.empty((n, k))
    mult = np.empty((n, k))
    piv = np.empty((n, k), dtype=np.bool_)
    vt = np.empty((n, k))
    uu0 = np.empty(k)
    uu1 = np.empty(k)
    for s in range(k):
        sig[s] = 0.5 * (lo[s] + hi[s])
        # factor T - sig I: rows kept as (a0 diag, a1 super, a2 second super)
        uu0[s] = dd[0] - sig[s]
        uu1[s] = ee[0] if n > 1 else 0.0
    for i in range(n - 1):
        lsub = ee[i]
        nsup = ee[i + 1] if i + 2 < n else 0.0
        alsub = abs(lsub)
        d1 = dd[i + 1]
        r0 = a0[i]
        r1 = a1[i]
        r2 = a2[i]
        rm = mult[i]
        rp = piv[i]
        for s in range(k):  # branch-free: the two cases of the pivoting side by side
            u0 = uu0[s]
            u1 = uu1[s]
            nd_ = d1 - sig[s]
            swap = not abs(u0) >= alsub  # (a NaN takes the swap, as before)
            u0k = pivmin if u0 == 0.0 else u0  # kept (no row swap): a zero pivot moved off zero
            mlt = (u0 / lsub) if swap else (lsub / u0k)
            rp[s] = swap
            r0[s] = lsub if swap else u0k
            r1[s] = nd_ if swap else u1
            r2[s] = nsup if swap else 0.0
            rm[s] = mlt
            uu0[s] = (u1 - mlt * nd_) if swap else (nd_ - mlt * u1)
            uu1[s] = (-mlt * nsup) if swap else nsup
    for s in range(k):
        u0 = uu0[s]
        a0[n - 1, s] = pivmin if u0 == 0.0 else u0
    for i in range(n):
        for s in range(k):
            vt[i, s] = 1.0 + 0.01 * ((i * 7919 + s * 104729) % 101) / 101.0
    for _rep in range(2):
        # forward: apply the row operations
        for i in range(n - 1):
            vi = vt[i]
            vj = vt[i + 1]
            rm = mult[i]
            rp = piv[i]
            for s in range(k):
                upper_ = vi[s]
                lower_ = vj[s]
                first = lower_ if rp[s] else upper_
                second = upper_ if rp[s] else lower_
                vi[s] = first
                vj[s] = second - rm[s] * first
        # back substitution
        for s in range(k):
            vt[n - 1, s] /= a0[n - 1, s]
        if n > 1:
            for s in range(k):
                vt[n - 2, s] = (vt[n - 2, s] - a1[n - 2, s] * vt[n - 1, s]) / a0[n - 2, s]
        for i in range(n - 3, -1, -1):
            vi = vt[i]
            v1 = vt[i + 1]
            v2 = vt[i + 2]
            r0 = a0[i]
            r1 = a1[i]
            r2 = a2[i]
            for s in range(k):
                vi[s] = (vi[s] - r1[s] * v1[s] - r2[s] * v2[s]) / r0[s]
        # mode by mode: re-orthogonalised (twice) after the last solve (after the first, the
        # slower modes' share is already down to about |lam - sig| / gap), normalised
        for s in range(k):
            v = vec[s]
            for i in range(n):
                v[i] = vt[i, s]
            for _gs in range(2 * _rep):
                for r in range(s):
                    vr = vec[r]
                    dot = _dot(vr, v, n)
                    for i in range(n):
                        v[i] -= dot * vr[i]
            nrm = math.sqrt(_dot(v, v, n))
            if nrm == 0.0 or not math.isfinite(nrm):
                for i in range(n):
                    v[i] = 1.0 / math.sqrt(n)
                nrm = 1.0
            for i in range(n):
                v[i] /= nrm
            if _rep == 0:
                for i in range(n):
                    vt[i, s] = v[i]
    for s in range(k):
        v = vec[s]
        # Rayleigh quotient as a sum of squares (no cancellation)
        acc = 0.0
        for i in range(n):
            ui = v[i] / msq[i]
            acc += ediag[i] * ui * ui
            if i + 1 < n and gedge[i] != 0.0:
                du = ui - v[i + 1] / msq[i + 1]
                acc += gedge[i] * du * du
        lam[s] = -acc
    # a closed part without loss: its equilibrium mode is exact (u constant, lam 0)
    closed = True
    msum = 0.0
    for i in range(n):
        msum += msq[i] * msq[i]
        if ediag[i] != 0.0:
            closed = False
    if closed:
        best = -1
        bestdot = 0.5
        for s in range(k):
            dot = 0.0
            for i in range(n):
                dot += vec[s, i] * msq[i]
            dot = abs(dot) / math.sqrt(msum)
            if dot > bestdot:
                bestdot = dot
                best = s
        if best >= 0:
            lam[best] = 0.0
            for i in range(n):
                vec[best, i] = msq[i] / math.sqrt(msum)
    # slowest first (the Rayleigh polish may reorder near-equal values)
    for s in range(1, k):
        j = s
        while j > 0 and lam[j] > lam[j - 1]:
            tmp = lam[j]
            lam[j] = lam[j - 1]
            lam[j - 1] = tmp
            for i in range(n):
                tmp = vec[j, i]
                vec[j, i] = vec[j - 1, i]
                vec[j - 1, i] = tmp
            j -= 1
    # a posteriori check: the angle to the true mode is at most residual / gap
    nxt = 0.5 * (lo[k] + hi[k]) if kb > k else -np.inf
    for s in range(k):
        res = 0.0
        for i in range(n):
            t = dd[i] * vec[s, i] - lam[s] * vec[s, i]
            if i > 0:
                t += ee[i - 1] * vec[s, i - 1]
            if i + 1 < n:
                t += ee[i] * vec[s, i + 1]
            res += t * t
        res = math.sqrt(res)
        gap = lam[s] - nxt if s == k - 1 else lam[s] - lam[s + 1]
        if s > 0:
            gap = min(gap, lam[s - 1] - lam[s])
        if res > MODE_ANGLE_LIMIT * gap:
            return -1
    for s in range(k):
        for i in range(nn):
            vec_all[k0 + s, i] = 0.0
        for i in range(n):
            vec_all[k0 + s, lo_i + i] = vec[s, i]
    return k


@njit(**INNER)
def _solve_t(dd, ee, n, ediag, msq, comp_of, r, x):
    """x = T^+ r: the solution orthogonal to the equilibrium modes of closed parts."""
    for i in range(n):
        x[i] = r[i]
    start = 0
    while start < n:
        stop = start
        while stop + 1 < n and comp_of[stop + 1] == comp_of[start]:
            stop += 1
        closed = True
        for i in range(start, stop + 1):
            if ediag[i] != 0.0:
                closed = False
        msum = 0.0
        if closed:
            dot = 0.0
            for i in range(start, stop + 1):
                msum += msq[i] * msq[i]
                dot += msq[i] * x[i]
            for i in range(start, stop + 1):
                x[i] -= dot * msq[i] / msum
        # LDL^T without pivoting (T is negative semi-definite); the last pivot of a closed part is 0
        piv = np.empty(stop - start + 1)
        piv[0] = dd[start]
        for i in range(start + 1, stop + 1):
            mlt = ee[i - 1] / piv[i - 1 - start]
            piv[i - start] = dd[i] - mlt * ee[i - 1]
            x[i] -= mlt * x[i - 1]
        last = stop
        if closed:
            x[stop] = 0.0
            last = stop - 1
        else:
            x[stop] /= piv[stop - start]
        for i in range(last if closed else stop - 1, start - 1, -1):
            nxt = x[i + 1] if i + 1 <= stop else 0.0
            x[i] = (x[i] - ee[i] * nxt) / piv[i - start]
        if closed:
            dot = 0.0
            for i in range(start, stop + 1):
                dot += msq[i] * x[i]
            for i in range(start, stop + 1):
                x[i] -= dot * msq[i] / msum
        start = stop + 1


@njit(**INNER)
def _project_fast(dd, ee, n, ediag, msq, comp_of, lam, vec, ks, v, out):
    """out = P v, P = T^+ restricted to the decayed modes (those from ``ks`` on).

    Computed as Q T^+ Q v with Q = I - (the modes 0 .. ks-1) q q^T, not as T^+ v minus the slow
    modes' q q^T v / lam: the solve with T has an error of rounding times its condition number
    (up to |T| / |slowest eigenvalue|) along the slowest modes, which the subtraction would keep
    and the projection removes; what is left is bounded by rounding times |T| / |lam_ks|.
    """
    w = np.empty(n)
    for i in range(n):
        w[i] = v[i]
    for _rep in range(2):
        for s in range(ks):
            vs = vec[s]
            dot = _dot(vs, w, n)
            for i in range(n):
                w[i] -= dot * vs[i]
    _solve_t(dd, ee, n, ediag, msq, comp_of, w, out)
    for _rep in range(2):
        for s in range(ks):
            vs = vec[s]
            dot = _dot(vs, out, n)
            for i in range(n):
                out[i] -= dot * vs[i]


@njit(**INNER)
def _fast_constants(dd, ee, n, ediag, msq, comp_of, lam, vec, ks, x0, tg, has_g, tv, qr, qc, qv, nq, nd, px, pg, ppg,
                    yfast, qconst, qslope):
    """The decayed modes' part of an interval (those from ``ks`` on), through T^+: constants at the
    states, constant and slope at the cumulative amounts. The one home of these constants for the
    chain path and the split path (:mod:`.split`).

    With P the projection of :func:`_project_fast`: px = P x0, pg = P tg, ppg = P pg; a free state's
    value is -pg / t (the forcing's steady value; zero without forcing); each cumulative amount
    gains -A (px + ppg) + (-A pg) t, with A its rates on y = x / t (COO entries qr, qc, qv; qr
    counted from nd). ``yfast``, ``qconst`` and ``qslope`` are overwritten; px, pg, ppg are left
    holding the projections (pg and ppg only when ``has_g``).
    """
    for a in range(n):
        yfast[a] = 0.0
    for q in range(qconst.shape[0]):
        qconst[q] = 0.0
        qslope[q] = 0.0
    _project_fast(dd, ee, n, ediag, msq, comp_of, lam, vec, ks, x0, px)
    if has_g:
        _project_fast(dd, ee, n, ediag, msq, comp_of, lam, vec, ks, tg, pg)
        _project_fast(dd, ee, n, ediag, msq, comp_of, lam, vec, ks, pg, ppg)
        for a in range(n):
            yfast[a] = -pg[a] / tv[a]
    # quadrature rates: A_QD (COO entries qr, qc, qv) acting on y = x / t
    for j in range(nq):
        a = qc[j]
        if a < 0:
            continue
        r = qr[j] - nd
        w = qv[j] / tv[a]
        if has_g:
            qconst[r] -= w * (px[a] + ppg[a])
            qslope[r] -= w * pg[a]
        else:
            qconst[r] -= w * px[a]


@njit(**INNER)
def _forcing(y, m, infusion, clamp, nc, yz, uz, g):
    """The forcing of an interval into ``g``: the rates with the free dynamic states at zero (the
    clamped ones at their values, the infusions on), the one home of it for the chain path and
    the split path (:mod:`.split`). ``yz`` is left at zero; ``uz`` is the rates kernel's work array.
    """
    for r in range(yz.shape[0]):
        yz[r] = 0.0
    for p in range(nc):
        if clamp[p]:
            yz[p] = y[p]
    rates_kernel(yz, g, m, infusion, clamp, uz)
    for r in range(yz.shape[0]):
        yz[r] = 0.0


# ---------------------------------------------------------------- outputs of one interval
@njit(**INNER)
def _phi1(x):
    """(e^x - 1) / x without cancellation near 0 (shared with :mod:`.exact`)."""
    if abs(x) < 1e-5:
        return 1.0 + x / 2.0 + x * x / 6.0
    return math.expm1(x) / x


@njit(**INNER)
def _phi2(x):
    """(e^x - 1 - x) / x^2 without cancellation near 0 (shared with :mod:`.exact`)."""
    if abs(x) < 0.1:
        return 0.5 + x * (1 / 6 + x * (1 / 24 + x * (1 / 120 + x * (1 / 720 + x * (1 / 5040 + x * (
            1 / 40320 + x / 362880))))))
    return (math.expm1(x) - x) / (x * x)


#: Clamp patterns whose decomposition a run keeps (a pattern that comes back is not decomposed again).
PATTERNS = 4

#: Most slow modes computed for one clamp pattern. An output time so close to the start of its
#: interval that more modes have not yet decayed there (exp(lam t) > exp(-60)) is computed by the
#: rational approximation of the exponential instead (:func:`_rational_row`): a few solves with the
#: chain matrix, O(n), where the modes would cost O(k^2 n) to compute and O(k n) per row.
MAX_MODES = 64


@njit(**INNER)
def _mode_cut(dd, ee, n, cut, comp_of):
    """The cut of the computed modes and how many lie above it: ``cut`` itself (1/h) unless more
    than :data:`MAX_MODES` modes lie above it; then the cut moves up to between the slowest
    MAX_MODES and the rest (bisection on the counts, to a thousandth of the cut). The one home of
    that choice for the chain path and the split path (:mod:`.split`).

    Returns
    -------
    cut_now : float (1/h)
        The cut used; every mode computed lies above it.
    k_need : int
        How many modes :func:`_slow_modes` computes above ``cut_now``.
    """
    k_need = _count_slow(dd, ee, n, cut, comp_of)
    if k_need <= MAX_MODES:
        return cut, k_need
    lo_c = cut
    hi_c = 0.0
    for _it in range(200):
        mid_c = 0.5 * (lo_c + hi_c)
        if _count_slow(dd, ee, n, mid_c, comp_of) > MAX_MODES:
            lo_c = mid_c
        else:
            hi_c = mid_c
        if hi_c - lo_c <= 1e-3 * abs(hi_c):
            break
    return hi_c, _count_slow(dd, ee, n, hi_c, comp_of)


#: Poles and residues of a rational approximation of exp(z) on the negative real axis, of type
#: (16, 16) with the constant ``RATIONAL_CONSTANT``: exp(z) ~ c0 + 2 Re sum_k r_k / (z - p_k), one
#: pole of each conjugate pair listed. The poles are those of the Caratheodory-Fejer approximation
#: (Trefethen, Weideman and Schmelzer, Talbot quadratures and rational approximations, BIT Numer.
#: Math. 46, 2006, section 4); the residues a weighted least-squares fit on (-inf, 0]. Largest error
#: 6e-14 on (-inf, 0] (tests/test_engine_paths.py checks it against numpy's exp), and for the
#: integrals phi1 and phi2 below 3e-13. As for any such approximation the spectrum must be real and
#: not positive: the chain matrix is symmetric negative semi-definite.
RATIONAL_POLES = np.array([
    -10.823477773044113 + 19.28850304441891j, -5.24899913443642 + 16.230183380159986j,
    -1.4006174319262092 + 13.505837945524027j, 1.4311509493042418 + 10.931598702023587j,
    3.5200170602929046 + 8.440745872165822j, 5.003623134884475 + 5.999953382854939j,
    5.958367462137661 + 3.589227090672555j, 6.426297498427404 + 1.1946999205295765j])
RATIONAL_RESIDUES = 0.5 * np.array([
    -5.077746028092633e-07 - 4.941674123313014e-05j, 0.0003462370209963367 + 0.00892020794307803j,
    0.08551512737658046 - 0.3184326872367145j, -3.014235951274744 + 3.56277029403584j,
    30.506006239476744 - 11.508337702936974j, -126.3384436208307 - 22.970619499898053j,
    228.90458835325825 + 206.44193101523035j, -130.143775877239 - 454.04200662923023j])
RATIONAL_CONSTANT = -2.4074167424436544e-14


@njit(**INNER)
def _rational_row(dd, ee, n, tj, x0, tg, has_g, poles, residues, c0, xs, xi, cw):
    """x(tj) into ``xs`` and its integral from 0 to tj into ``xi`` (the symmetrised free states),
    by the rational approximation of exp (``poles``, ``residues``, ``c0``; see :data:`RATIONAL_POLES`)::

        x(t) = exp(t T) x0 + t phi1(t T) tg,   int_0^t x = t phi1(t T) x0 + t^2 phi2(t T) tg

    with exp(z) ~ c0 + 2 Re sum r / (z - p), t phi1(t T) ~ 2 Re sum (r / p) (T - p/t)^-1 and
    t^2 phi2(t T) ~ 2 Re sum (r t / p^2) (T - p/t)^-1 (the partial fractions of (exp(z) - 1) / z and
    (exp(z) - 1 - z) / z^2, whose terms in 1/z and 1/z^2 vanish as the approximation is exact to
    1e-13 at 0). Each pole needs one tridiagonal factorisation of T - p/t, with partial pivoting
    (LAPACK's gttrf), and solves for x0 and tg. ``cw`` is complex work space (7 x n).
    """
    for a in range(n):
        xs[a] = c0 * x0[a]
        xi[a] = 0.0
    d = cw[0]
    du = cw[1]
    du2 = cw[2]
    dl = cw[3]
    b1 = cw[4]
    b2 = cw[5]
    piv = np.zeros(n, dtype=np.bool_)
    two = 2.0
    for k in range(poles.shape[0]):
        sig = poles[k] / tj
        rk = residues[k]
        for i in range(n):
            d[i] = dd[i] - sig
            b1[i] = x0[i]
            b2[i] = tg[i]
        for i in range(n - 1):
            du[i] = ee[i]
            dl[i] = ee[i]
            du2[i] = 0.0
        # factor (gttrf): rows i and i + 1 swapped where the sub-diagonal is the larger
        for i in range(n - 1):
            if abs(d[i]) >= abs(dl[i]):
                piv[i] = False
                f = dl[i] / d[i]
                dl[i] = f
                d[i + 1] = d[i + 1] - f * du[i]
            else:
                piv[i] = True
                f = d[i] / dl[i]
                d[i] = dl[i]
                dl[i] = f
                tmp = du[i]
                du[i] = d[i + 1]
                d[i + 1] = tmp - f * d[i + 1]
                if i < n - 2:
                    du2[i] = du[i + 1]
                    du[i + 1] = -f * du[i + 1]
        # solve for x0 and tg (gtts2)
        for i in range(n - 1):
            if piv[i]:
                tmp = b1[i]
                b1[i] = b1[i + 1]
                b1[i + 1] = tmp - dl[i] * b1[i]
                tmp = b2[i]
                b2[i] = b2[i + 1]
                b2[i + 1] = tmp - dl[i] * b2[i]
            else:
                b1[i + 1] = b1[i + 1] - dl[i] * b1[i]
                b2[i + 1] = b2[i + 1] - dl[i] * b2[i]
        for i in range(n - 1, -1, -1):
            v1 = b1[i]
            v2 = b2[i]
            if i + 1 < n:
                v1 = v1 - du[i] * b1[i + 1]
                v2 = v2 - du[i] * b2[i + 1]
            if i + 2 < n:
                v1 = v1 - du2[i] * b1[i + 2]
                v2 = v2 - du2[i] * b2[i + 2]
            b1[i] = v1 / d[i]
            b2[i] = v2 / d[i]
        # accumulate the real parts (each pole stands for its conjugate pair: twice the real part)
        ce = two * rk / tj
        c1 = two * rk / poles[k]
        c2 = c1 * tj / poles[k]
        for a in range(n):
            xs[a] += (ce * b1[a]).real
            xi[a] += (c1 * b1[a]).real
            if has_g:
                xs[a] += (c1 * b2[a]).real
                xi[a] += (c2 * b2[a]).real


@njit(inline="always", error_model="numpy")  # in the rows' loops: a call per row cost the split path 8 %
def cumulative_at(t, qconst, qslope, moved, n_moved, wt, zi, k, nqd, qs):
    """The cumulative amounts (mg) at local time ``t`` (h) into ``qs[:nqd]``: each one's constant
    and slope through the decayed modes (``qconst``, ``qslope``), plus, for the ``n_moved`` ones
    listed in ``moved`` that some mode moves, the weights ``wt`` (k x nqd) times the modes' integrals
    ``zi`` (the one rule of the chain path's and the split path's rows and steps)."""
    for q in range(nqd):
        qs[q] = qconst[q] + qslope[q] * t
    for i in range(n_moved):
        q = moved[i]
        acc = qs[q]
        for s in range(k):
            acc += wt[s, q] * zi[s]
        qs[q] = acc


@njit(inline="always", error_model="numpy")
def add_modes(base, vyp, zsb, ysb, n, kb4):
    """Four rows at a time: ``ysb[r, :n] = base[:n] + sum_s zsb[r, s] vyp[s, :n]`` over the first
    ``kb4`` (a multiple of four) patterns, four patterns per pass over the states, so that a
    pattern value loaded once serves four rows (the sums of each row in the same order as one row
    at a time: ``base``, then each pass's four terms added to it); the first pass starts from
    ``base`` itself (no pass of its own to copy it)."""
    y_0 = ysb[0]
    y_1 = ysb[1]
    y_2 = ysb[2]
    y_3 = ysb[3]
    if kb4 == 0:
        for a in range(n):
            va = base[a]
            y_0[a] = va
            y_1[a] = va
            y_2[a] = va
            y_3[a] = va
        return
    for s in range(0, kb4, 4):  # four modes per pass over the states
        v0 = vyp[s]
        v1 = vyp[s + 1]
        v2 = vyp[s + 2]
        v3 = vyp[s + 3]
        z00, z01, z02, z03 = zsb[0, s], zsb[0, s + 1], zsb[0, s + 2], zsb[0, s + 3]
        z10, z11, z12, z13 = zsb[1, s], zsb[1, s + 1], zsb[1, s + 2], zsb[1, s + 3]
        z20, z21, z22, z23 = zsb[2, s], zsb[2, s + 1], zsb[2, s + 2], zsb[2, s + 3]
        z30, z31, z32, z33 = zsb[3, s], zsb[3, s + 1], zsb[3, s + 2], zsb[3, s + 3]
        if s == 0:
            for a in range(n):
                va = v0[a]
                vb = v1[a]
                vc = v2[a]
                vd = v3[a]
                b = base[a]
                y_0[a] = b + (va * z00 + vb * z01 + vc * z02 + vd * z03)
                y_1[a] = b + (va * z10 + vb * z11 + vc * z12 + vd * z13)
                y_2[a] = b + (va * z20 + vb * z21 + vc * z22 + vd * z23)
                y_3[a] = b + (va * z30 + vb * z31 + vc * z32 + vd * z33)
            continue
        for a in range(n):
            va = v0[a]
            vb = v1[a]
            vc = v2[a]
            vd = v3[a]
            y_0[a] += va * z00 + vb * z01 + vc * z02 + vd * z03
            y_1[a] += va * z10 + vb * z11 + vc * z12 + vd * z13
            y_2[a] += va * z20 + vb * z21 + vc * z22 + vd * z23
            y_3[a] += va * z30 + vb * z31 + vc * z32 + vd * z33


@njit(**INNER)
def _interval(y0, g, tau, n, idx, tv, dd, ee, ediag, msq, comp_of, lam, vec, vyp, k_all, qr, qc, qv, nq, nd, clamp,
              nc, out, work, t_end, last, t_thr, full, taps, row0, cap):
    """States at local times ``tau`` (h, non-decreasing, >= 0) from ``y0`` into ``out``, and the
    state at the interval's end ``t_end`` (> 0) into ``last``.

    With ``full`` False, ``out`` is one row of work space: each row is computed there and kept by
    :func:`~barrierflow.engine.exported.take_row` in ``taps`` (as row ``row0`` plus its index).

    ``vyp`` holds the states of each mode (y = x / t, ``vec`` divided by ``tv``), at least a
    multiple of four rows: the modes not kept here meet coefficients of zero.

    Times below ``t_thr`` (h), at which more modes than were computed have not yet decayed, go
    through :func:`_rational_row`; the others through the modes, keeping those not decayed at the
    first of them (or ``t_end``).
    """
    n_state = y0.shape[0]
    n_t = tau.shape[0]
    j0 = 0
    while j0 < n_t and tau[j0] <= 0.0:
        dst = out[j0 if full else 0]
        for r in range(n_state):
            dst[r] = y0[r]
        take_row(dst, row0 + j0, taps, cap, nd)
        j0 += 1
    x0 = work[0]
    tg = work[1]
    has_g = np.bool_(False)  # not a literal False: _rational_row would be compiled for it as well
    for a in range(n):
        x0[a] = tv[a] * y0[idx[a]]
        tg[a] = tv[a] * g[idx[a]]
        if tg[a] != 0.0:
            has_g = True
    nqd = n_state - nd
    # states that nothing touches: exactly their value plus what is infused (the symmetrising
    # scale would round them)
    alone = np.zeros(n, dtype=np.bool_)
    for a in range(n):
        alone[a] = ediag[a] == 0.0 and (a == 0 or comp_of[a - 1] != comp_of[a]) and (
            a == n - 1 or comp_of[a + 1] != comp_of[a])
    if (j0 < n_t and tau[j0] < t_thr) or t_end < t_thr:
        xs = np.empty(n)
        xi = np.empty(n)
        cw = np.empty((6, n), dtype=np.complex128)
        while j0 <= n_t:
            tj = tau[j0] if j0 < n_t else t_end
            if tj >= t_thr:
                break
            dst = out[j0 if full else 0] if j0 < n_t else last
            _rational_row(dd, ee, n, tj, x0, tg, has_g, RATIONAL_POLES, RATIONAL_RESIDUES, RATIONAL_CONSTANT, xs,
                          xi, cw)
            for q in range(nd):
                dst[q] = y0[q]
            for a in range(n):
                ia = idx[a]
                dst[ia] = y0[ia] + g[ia] * tj if alone[a] else xs[a] / tv[a]
            for q in range(nqd):
                dst[nd + q] = y0[nd + q] + g[nd + q] * tj
            for j in range(nq):
                a = qc[j]
                if a >= 0:
                    dst[qr[j]] += qv[j] * (xi[a] / tv[a])
            if j0 < n_t:
                take_row(dst, row0 + j0, taps, cap, nd)
            j0 += 1
        if j0 > n_t:
            return
    t_min = min(tau[j0], t_end) if j0 < n_t else t_end
    ks = 0
    while ks < k_all and lam[ks] * t_min > -60.0:
        ks += 1
    px = work[2]
    pg = work[3]
    ppg = work[4]
    z0 = np.zeros(ks)
    gz = np.zeros(ks)
    lim = np.zeros(ks)  # without forcing, the integral of a mode once decayed: -z0 / lam
    for s in range(ks):
        z0[s] = _dot(vec[s], x0, n)
        gz[s] = _dot(vec[s], tg, n) if has_g else 0.0
        lim[s] = (-1.0 / lam[s]) * z0[s]
    # decayed modes: constants (states) and constant + slope (quadratures), through T^+
    yfast = np.zeros(n)
    qconst = np.zeros(nqd)
    qslope = np.zeros(nqd)
    _fast_constants(dd, ee, n, ediag, msq, comp_of, lam, vec, ks, x0, tg, has_g, tv, qr, qc, qv, nq, nd, px, pg,
                    ppg, yfast, qconst, qslope)
    # per-mode quadrature patterns of the slow modes
    wt = np.zeros((ks, nqd))
    for j in range(nq):
        a = qc[j]
        if a < 0:
            continue
        r = qr[j] - nd
        w = qv[j] / tv[a]
        for s in range(ks):
            wt[s, r] += w * vec[s, a]
    # the quadratures that some slow mode moves (most do not: the lost, sampled, degraded amounts
    # of a network without those terms); the others are their constant and slope alone
    moved = np.zeros(nqd, dtype=np.int64)
    n_moved = np.int64(0)
    for q in range(nqd):
        for s in range(ks):
            if wt[s, q] != 0.0:
                moved[n_moved] = q
                n_moved += 1
                break
    qs = np.empty(nqd)
    # the dynamic states outside the chain (held or clamped: they keep their value) and whether a
    # state of the chain is alone (then the rows need the branch below)
    on_chain = np.zeros(nd, dtype=np.bool_)
    for a in range(n):
        on_chain[idx[a]] = True
    fixed = np.empty(nd, dtype=np.int64)
    n_fixed = 0
    for q in range(nd):
        if not on_chain[q]:
            fixed[n_fixed] = q
            n_fixed += 1
    any_alone = False
    for a in range(n):
        if alone[a]:
            any_alone = True
    # rows kept in chain order (take_chain_row) when only the kept values are asked for
    chained, pos, plo, phi, capc, isc = chain_taps(idx, n, nd, taps, cap, full)
    mins = np.zeros((3, n))
    last_row = taps[4].shape[0] - 1
    n_chained = 0
    # equally spaced output times (the usual output_step): exp(lam tau) by recurrence, one
    # multiplication per mode and time instead of a call of exp; the times' rounding deviations
    # from the even grid (~1e-15 h) enter to first order, exp(lam d) = 1 + lam d
    m_out = n_t - j0
    even = False
    step = 0.0
    if m_out >= 3:
        step = (tau[n_t - 1] - tau[j0]) / (m_out - 1)
        even = step > 0.0
        for j in range(j0, n_t):
            if abs(tau[j] - (tau[j0] + (j - j0) * step)) > 1e-10 * step:
                even = False
    rec = np.empty(ks)
    fac = np.empty(ks)
    if even:
        for s in range(ks):
            rec[s] = math.exp(lam[s] * tau[j0])
            fac[s] = math.exp(lam[s] * step)
    ks4 = (ks + 3) // 4 * 4
    # four rows at a time: each pass over the states applies four modes to four rows, so that a
    # pattern value loaded once serves four rows (the sums of each row in the same order as one
    # row at a time)
    zsb = np.zeros((4, ks4))
    zib = np.zeros((4, ks4))
    ysb = np.empty((4, n))
    tb = np.empty(4)
    use = np.zeros(4, dtype=np.bool_)  # the block's rows kept in chain order (chain_guard)
    j = j0
    while j <= n_t:  # the output times, then the end of the interval
        nb = min(4, n_t + 1 - j)
        for r in range(nb):
            jr = j + r
            tj = tau[jr] if jr < n_t else t_end
            tb[r] = tj
            use_rec = even and jr < n_t
            dev = tj - (tau[j0] + (jr - j0) * step) if use_rec else 0.0
            zs = zsb[r]
            zi = zib[r]
            # without forcing, a mode decayed below exp(-60) at the block's first time adds nothing
            # to the states (see below) and its integral has reached its limit: -z0 / lam (lim, one
            # division per mode and interval, not per row), the value the formula gives once
            # exp(x) - 1 rounds to -1
            kz = ks
            if not has_g:
                kz = 0
                while kz < ks and lam[kz] * tb[0] > -60.0:
                    kz += 1
                kz = min((kz + 3) // 4 * 4, ks)
            for s in range(kz, ks):
                zs[s] = 0.0
                zi[s] = lim[s]
            for s in range(kz):
                el = lam[s]
                x = el * tj
                if use_rec:
                    if jr > j0:
                        rec[s] *= fac[s]
                        if rec[s] < 1e-250:
                            rec[s] = 0.0  # decayed: no denormal arithmetic
                    ex = rec[s] * (1.0 + el * dev)
                else:
                    ex = math.exp(x)
                if abs(x) > 0.5:
                    p1 = (ex - 1.0) / el
                else:
                    p1 = tj * _phi1(x)
                zs[s] = ex * z0[s]
                zi[s] = p1 * z0[s]
                if has_g:
                    zs[s] += p1 * gz[s]
                    zi[s] += tj * tj * _phi2(x) * gz[s]
        # without forcing, a mode decayed below exp(-60) at the block's first time adds nothing to
        # the states of its rows: later rows need fewer modes
        kb4 = ks4
        if not has_g:
            kb = 0
            while kb < ks and lam[kb] * tb[0] > -60.0:
                kb += 1
            kb4 = (kb + 3) // 4 * 4
        add_modes(yfast, vyp, zsb, ysb, n, kb4)
        for r in range(4):
            use[r] = False
        for r in range(nb):
            jr = j + r
            tj = tb[r]
            dst = out[jr if full else 0] if jr < n_t else last
            zi = zib[r]
            ys = ysb[r]
            cumulative_at(tj, qconst, qslope, moved, n_moved, wt, zi, ks, nqd, qs)
            for q in range(n_fixed):
                dst[fixed[q]] = y0[fixed[q]]
            if any_alone:
                for a in range(n):
                    if alone[a]:
                        ia = idx[a]
                        ys[a] = y0[ia] + g[ia] * tj
            dq = dst[nd:]
            for q in range(nqd):
                dq[q] = y0[nd + q] + qs[q] + g[nd + q] * tj
            if chained and jr < n_t and row0 + jr != last_row:
                take_chain_row(ys, dst, row0 + jr, taps, pos, capc, plo, phi)
                use[r] = True
                n_chained += 1
                continue
            for a in range(n):
                dst[idx[a]] = ys[a]
            if jr < n_t:
                take_row(dst, row0 + jr, taps, cap, nd)
        if chained:
            chain_guard(ysb, use, isc, mins)
        j += nb
    if n_chained:
        flush_chain_guard(mins, taps, y0, pos)


@njit(inline="always", error_model="numpy")
def _more_modes(a, k):
    """``a`` (patterns x modes x states) with room for ``k`` modes per pattern, those kept in front."""
    grown = np.zeros((a.shape[0], k, a.shape[2]))
    for p in range(a.shape[0]):  # a loop, not a slice assignment (see DEVELOPERS.md, "Speed")
        for q in range(a.shape[1]):
            for i in range(a.shape[2]):
                grown[p, q, i] = a[p, q, i]
    return grown


# ---------------------------------------------------------------- the whole regimen
@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def chain_schedule(marks, times, et, bt, st, order, cut, n_jac, y, states, ev_dosed, ev_removed, stats, full, taps):
    """Run the regimen exactly on a chain network; returns a status code (0 when done).

    ``bt`` is the model's arrays, ``st`` the run's
    :class:`~barrierflow.engine.schedule.EventState` (changed in place) and ``et`` its events
    (:class:`~barrierflow.engine.schedule.EventArrays`), each as a plain tuple (``tuple(m)``; named
    again here: numba types a named tuple from Python field by field at every call, a plain tuple
    in C; compiled callers pass :func:`~barrierflow.engine.calls.plain`); the run's copy of what
    events change is made here (:func:`~barrierflow.engine.arrays.working_arrays`: one tuple of the
    model's arrays to type per call, not two, and no copy made from Python).
    The events apply by :func:`~barrierflow.engine.schedule.apply_events` (a
    closed face changes the links, and the modes are computed again); the states
    at the output rows ``times`` go to ``states`` and the ledger to ``ev_dosed`` / ``ev_removed``; with
    ``full`` False ``states`` is one row of work space and each row is kept in ``taps`` instead
    (:func:`~barrierflow.engine.exported.take_row`: the exported columns and the guard).
    ``stats`` counts [steps, rejected, rhs evaluations, Jacobians, decompositions, intervals].
    ``cut`` (1/h, < 0) is -60 over the time from an interval's start from which on the modes serve
    (:func:`~barrierflow.engine.exact.mode_time`): the modes above it are computed (at most
    :data:`MAX_MODES`, the cut moving up as needed) and the earlier times go through the rational
    approximation; a cut of 0 computes no modes, every row through the rational approximation
    (``ExactIntegrator(rational_rows=True)``).

    The single runs call it from Python and the population kernel through its address (one
    compiled form serves both; see :mod:`~barrierflow.engine.calls`).
    """
    base = ModelArrays(*bt)
    m = working_arrays(base)
    ev = EventArrays(*et)
    s = EventState(*st)
    nc = m.n_comp
    nd = m.n_dyn
    n_state = y.shape[0]
    n_ord = order.shape[0]
    L = max(n_ord, 1)
    # the decompositions of up to PATTERNS clamp patterns (which compartments are held, which
    # faces closed), kept for when a pattern comes back (a hold that starts and ends each day):
    # slot by slot, the chain, its slow modes (k x n, grown when a pattern needs more) and the
    # quadrature rates
    P = PATTERNS
    idx_c = np.zeros((P, L), dtype=np.int64)
    cmap_c = np.zeros((P, nd), dtype=np.int64)
    msq_c = np.zeros((P, L))
    tv_c = np.zeros((P, L))
    dd_c = np.zeros((P, L))
    ee_c = np.zeros((P, L))
    gedge_c = np.zeros((P, L))
    ediag_c = np.zeros((P, L))
    comp_c = np.zeros((P, L), dtype=np.int64)
    lam_c = np.zeros((P, L))
    vec_c = np.zeros((P, 1, L))
    vyp_c = np.zeros((P, 4, L))  # the states of each mode (vec / tv), padded to a multiple of four
    qr_c = np.zeros((P, n_jac), dtype=np.int64)
    qc_c = np.zeros((P, n_jac), dtype=np.int64)
    qv_c = np.zeros((P, n_jac))
    n_c = np.zeros(P, dtype=np.int64)
    k_c = np.zeros(P, dtype=np.int64)
    nq_c = np.zeros(P, dtype=np.int64)
    thr_c = np.zeros(P)
    key_clamp = np.zeros((P, nc), dtype=np.bool_)
    key_closed = np.zeros((P, nc), dtype=np.bool_)
    valid = np.zeros(P, dtype=np.bool_)
    used = np.zeros(P, dtype=np.int64)
    work = np.zeros((5, L))
    rows = np.zeros(n_jac, dtype=np.int64)
    cols = np.zeros(n_jac, dtype=np.int64)
    vals = np.zeros(n_jac)
    infusion = s.infusion
    clamp = s.clamp
    closed = s.closed
    dosed = s.dosed
    removed = s.removed
    yz = np.zeros(n_state)
    uz = np.zeros(nd)
    g = np.zeros(n_state)
    last = np.zeros(n_state)
    n_marks = marks.shape[0]
    n_t = times.shape[0]
    # counters start as int64 values, not literal zeros (a literal would compile the callees twice)
    row = np.int64(0)
    ei = np.int64(0)
    for k in range(n_marks - 1):
        t0 = marks[k]
        t1 = marks[k + 1]
        ei = apply_events(t0, ei, ev, m, base, y, s)
        slot = -1
        for c in range(P):
            if valid[c]:
                same = True
                for p in range(nc):
                    if clamp[p] != key_clamp[c, p] or closed[p] != key_closed[c, p]:
                        same = False
                if same:
                    slot = c
        if slot < 0:
            slot = 0  # an empty slot, or the one used least recently
            for c in range(P):
                if not valid[c]:
                    slot = c
                    break
                if used[c] < used[slot]:
                    slot = c
            n = _build(order, clamp, m, idx_c[slot], cmap_c[slot], msq_c[slot], tv_c[slot], dd_c[slot], ee_c[slot],
                       gedge_c[slot], ediag_c[slot], comp_c[slot])
            dd = dd_c[slot]
            ee = ee_c[slot]
            comp_of = comp_c[slot]
            # at most MAX_MODES modes; the times before the others decay take the rational
            # approximation
            if cut == 0.0:  # no modes: every row through the rational approximation (rational_rows)
                t_thr = np.inf
                k_all = np.int64(0)
            else:
                cut_now, k_need = _mode_cut(dd, ee, n, cut, comp_of)
                t_thr = -60.0 / cut_now
                if k_need > vec_c.shape[1]:
                    vec_c = _more_modes(vec_c, k_need)
                k_all = _slow_modes(dd, ee, n, cut_now, gedge_c[slot], ediag_c[slot], msq_c[slot], comp_of,
                                    lam_c[slot], vec_c[slot])
                if k_all < 0:
                    return FAIL_CONDITION
            k4 = (k_all + 3) // 4 * 4
            if k4 > vyp_c.shape[1]:
                vyp_c = _more_modes(vyp_c, k4)
            tv = tv_c[slot]
            for q in range(k4):
                vq = vyp_c[slot, q]
                if q < k_all:
                    for i in range(n):
                        vq[i] = vec_c[slot, q, i] / tv[i]
                else:
                    for i in range(n):
                        vq[i] = 0.0
            kj = jacobian_kernel(yz, rows, cols, vals, m, clamp)
            nq = 0
            cmap = cmap_c[slot]
            for j in range(kj):
                if rows[j] >= nd:
                    qr_c[slot, nq] = rows[j]
                    qc_c[slot, nq] = cmap[cols[j]] if cols[j] < nd else -1
                    qv_c[slot, nq] = vals[j]
                    nq += 1
            for p in range(nc):
                key_clamp[slot, p] = clamp[p]
                key_closed[slot, p] = closed[p]
            n_c[slot] = n
            k_c[slot] = k_all
            nq_c[slot] = nq
            thr_c[slot] = t_thr
            valid[slot] = True
            stats[3] += 1
            stats[4] += 1
        used[slot] = k + 1
        _forcing(y, m, infusion, clamp, nc, yz, uz, g)
        stats[2] += 1
        sel_end = rows_until(times, row, t1, k == n_marks - 2)
        m_out = sel_end - row
        tau = np.empty(m_out + 1)
        for r in range(m_out):
            tau[r] = times[row + r] - t0
        tau[m_out] = t1 - t0
        dest = states[row:sel_end] if full else states
        _interval(y, g, tau[:m_out], n_c[slot], idx_c[slot], tv_c[slot], dd_c[slot], ee_c[slot], ediag_c[slot],
                  msq_c[slot], comp_c[slot], lam_c[slot], vec_c[slot], vyp_c[slot], k_c[slot], qr_c[slot], qc_c[slot],
                  qv_c[slot], nq_c[slot], nd, clamp, nc, dest, work, tau[m_out], last, thr_c[slot], full, taps, row,
                  m.capacity)
        for r in range(m_out):
            for p in range(nc):
                ev_dosed[row + r, p] = dosed[p]
                ev_removed[row + r, p] = removed[p]
        for c in range(n_state):
            y[c] = last[c]
        row = sel_end
        stats[0] += 1
        stats[5] += 1
    if row < n_t:
        return 1
    return 0

