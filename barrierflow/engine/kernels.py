"""Numba kernels: amount balances and their sparse Jacobian on flat arrays.

The kernels take arrays and numbers only (see :mod:`barrierflow.engine.compiled` for the
layout); they know nothing of graphs, dataclasses or units. Each has a plain-Python twin
behaviour under ``NUMBA_DISABLE_JIT=1``, which the tests use to cover the compiled code.
"""

from __future__ import annotations

from numba import njit

__all__ = ["INNER", "jacobian_coo", "jacobian_kernel", "jacobian_size", "rates", "rates_kernel"]

#: Options of the kernels that only compiled code calls: no Python or C-callable wrappers. Each
#: compiled caller links in (and LLVM optimises and emits again) the whole code library of every
#: callee, wrappers included; leaving the unused wrappers out shortens the first-ever compile.
INNER = dict(cache=True, error_model="numpy", no_cpython_wrapper=True, no_cfunc_wrapper=True)


@njit(**INNER)
def rates_kernel(y, out, n_comp, n_dyn, cap, invk, lp, lq, la, lb, lc, ld, lloss, ltrack,
          loss_rate, loss_to, mm_s, mm_v, mm_k, tr_f, tr_t, tr_k, infusion, clamp, q_supply, q_infused):
    """Time derivative of the full state ``y`` into ``out`` (concentrations per h, mg per h).

    ``infusion`` (mg/h per compartment) and ``clamp`` (bool per compartment: held, or under a
    hold dose) are the settings of the current dosing interval. A clamped compartment does not
    change; what keeps it constant is added to its supply quadrature.
    """
    out[:] = 0.0
    for j in range(lp.shape[0]):
        p = lp[j]
        q = lq[j]
        up = y[p] * invk[p]
        uq = y[q] * invk[q]
        r_out = la[j] * up - lb[j] * uq
        r_in = lc[j] * up - ld[j] * uq
        out[p] -= r_out
        out[q] += r_in
        if lloss[j] >= 0:
            out[lloss[j]] += r_out - r_in
        if ltrack[j] >= 0:
            out[ltrack[j]] += r_in
    for p in range(n_dyn):
        k = loss_rate[p]
        if k != 0.0:
            r = k * cap[p] * y[p]
            out[p] -= r
            out[loss_to[p]] += r
    for m in range(mm_s.shape[0]):
        p = mm_s[m]
        c = y[p]
        r = mm_v[m] * c / (mm_k[m] + abs(c))
        out[p] -= r
        out[n_dyn + p] += r
    for m in range(tr_f.shape[0]):
        p = tr_f[m]
        r = tr_k[m] * cap[p] * y[p]
        out[p] -= r
        out[tr_t[m]] += r
    for p in range(n_comp):
        if infusion[p] != 0.0:
            out[p] += infusion[p]
            out[q_infused + p] += infusion[p]
    for p in range(n_comp):
        if clamp[p]:
            out[q_supply + p] = -out[p]
            out[p] = 0.0
    for p in range(n_dyn):
        out[p] /= cap[p]


def jacobian_size(n_link: int, n_dyn: int, n_mm: int, n_tr: int) -> int:
    """Upper bound on the number of COO entries that :func:`jacobian_kernel` writes."""
    return 8 * n_link + 2 * n_dyn + 2 * n_mm + 2 * n_tr


@njit(**INNER)
def jacobian_kernel(y, rows, cols, vals, n_comp, n_dyn, cap, invk, lp, lq, la, lb, lc, ld, lloss, ltrack,
                 loss_rate, loss_to, mm_s, mm_v, mm_k, tr_f, tr_t, tr_k, clamp, q_supply):
    """Jacobian of :func:`rates_kernel` as COO triplets (duplicates are to be summed); returns the count."""
    k = 0
    for j in range(lp.shape[0]):
        p = lp[j]
        q = lq[j]
        ip = invk[p]
        iq = invk[q]
        rows[k] = p
        cols[k] = p
        vals[k] = -la[j] * ip
        k += 1
        rows[k] = p
        cols[k] = q
        vals[k] = lb[j] * iq
        k += 1
        rows[k] = q
        cols[k] = p
        vals[k] = lc[j] * ip
        k += 1
        rows[k] = q
        cols[k] = q
        vals[k] = -ld[j] * iq
        k += 1
        if lloss[j] >= 0:
            rows[k] = lloss[j]
            cols[k] = p
            vals[k] = (la[j] - lc[j]) * ip
            k += 1
            rows[k] = lloss[j]
            cols[k] = q
            vals[k] = -(lb[j] - ld[j]) * iq
            k += 1
        if ltrack[j] >= 0:
            rows[k] = ltrack[j]
            cols[k] = p
            vals[k] = lc[j] * ip
            k += 1
            rows[k] = ltrack[j]
            cols[k] = q
            vals[k] = -ld[j] * iq
            k += 1
    for p in range(n_dyn):
        kk = loss_rate[p]
        if kk != 0.0:
            rows[k] = p
            cols[k] = p
            vals[k] = -kk * cap[p]
            k += 1
            rows[k] = loss_to[p]
            cols[k] = p
            vals[k] = kk * cap[p]
            k += 1
    for m in range(mm_s.shape[0]):
        p = mm_s[m]
        den = mm_k[m] + abs(y[p])
        d = mm_v[m] * mm_k[m] / (den * den)
        rows[k] = p
        cols[k] = p
        vals[k] = -d
        k += 1
        rows[k] = n_dyn + p
        cols[k] = p
        vals[k] = d
        k += 1
    for m in range(tr_f.shape[0]):
        p = tr_f[m]
        rows[k] = p
        cols[k] = p
        vals[k] = -tr_k[m] * cap[p]
        k += 1
        rows[k] = tr_t[m]
        cols[k] = p
        vals[k] = tr_k[m] * cap[p]
        k += 1
    for i in range(k):
        r = rows[i]
        if r < n_comp and clamp[r]:
            rows[i] = q_supply + r
            vals[i] = -vals[i]
        elif r < n_dyn:
            vals[i] /= cap[r]
    return k


@njit(cache=True, no_cfunc_wrapper=True)
def rates(y, out, n_comp, n_dyn, cap, invk, lp, lq, la, lb, lc, ld, lloss, ltrack,
          loss_rate, loss_to, mm_s, mm_v, mm_k, tr_f, tr_t, tr_k, infusion, clamp, q_supply, q_infused):
    """:func:`rates_kernel`, callable from Python (the scipy path); same arguments and units."""
    rates_kernel(y, out, n_comp, n_dyn, cap, invk, lp, lq, la, lb, lc, ld, lloss, ltrack, loss_rate, loss_to, mm_s,
                 mm_v, mm_k, tr_f, tr_t, tr_k, infusion, clamp, q_supply, q_infused)


@njit(cache=True, no_cfunc_wrapper=True)
def jacobian_coo(y, rows, cols, vals, n_comp, n_dyn, cap, invk, lp, lq, la, lb, lc, ld, lloss, ltrack,
                 loss_rate, loss_to, mm_s, mm_v, mm_k, tr_f, tr_t, tr_k, clamp, q_supply):
    """:func:`jacobian_kernel`, callable from Python; returns the number of COO entries."""
    return jacobian_kernel(y, rows, cols, vals, n_comp, n_dyn, cap, invk, lp, lq, la, lb, lc, ld, lloss, ltrack,
                           loss_rate, loss_to, mm_s, mm_v, mm_k, tr_f, tr_t, tr_k, clamp, q_supply)
