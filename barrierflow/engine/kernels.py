"""Numba kernels: the one rate kernel of the engine and its sparse Jacobian, on flat arrays.

Every path computes the balances here and nowhere else: the compiled RODAS4 integrator, the
exact paths (their forcing and their matrices) and the scipy integrators (through the
Python-callable :func:`rates` and :func:`jacobian_coo`). A new process goes into
:func:`rates_kernel` and its derivative into :func:`jacobian_linear` (or, when it is not
linear in the state, :func:`jacobian_nonlinear`).

The kernels take the model as one :class:`~barrierflow.engine.compiled.ModelArrays` (numbers
and arrays only; see :mod:`barrierflow.engine.compiled` for the layout) and know nothing of
graphs, dataclasses or units. Under ``NUMBA_DISABLE_JIT=1`` they run as plain Python, which the
tests use to cover the compiled code.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .arrays import INNER, ModelArrays

__all__ = ["INNER", "jacobian_coo", "jacobian_finish", "jacobian_kernel", "jacobian_linear", "jacobian_nonlinear",
           "jacobian_size", "rates", "rates_kernel", "saturable_rate", "saturable_slope"]


@njit(**INNER)
def saturable_rate(vmax, km, c):
    """Amount rate of saturable (Michaelis-Menten) elimination at concentration ``c``, mg/h:
    vmax c / (km + |c|) (the one home of the rate law; ``vmax`` mg/h, ``km`` and ``c`` mg/mL)."""
    return vmax * c / (km + abs(c))


@njit(**INNER)
def saturable_slope(vmax, km, c):
    """d/dc of :func:`saturable_rate`, mL/h: vmax km / (km + |c|)^2."""
    den = km + abs(c)
    return vmax * km / (den * den)


@njit(**INNER)
def rates_kernel(y, out, m, infusion, clamp, u):
    """Time derivative of the full state ``y`` into ``out`` (concentrations per h, mg per h).

    Parameters
    ----------
    y, out : ndarray (n_state,)
    m : ModelArrays
    infusion : ndarray (n_comp,), mg/h
        Infusion rate into each compartment in the current dosing interval.
    clamp : ndarray of bool (n_comp,)
        Compartments held constant in the current interval (held, or under a hold dose): a
        clamped compartment does not change; what keeps it constant goes to its supply.
    u : ndarray (>= n_dyn,)
        Scratch (the potentials y / K).

    The links between the cells of a barrier (``m.chain_g``) run as one sweep over the cells,
    on views indexed by the loop variable (numba then knows the index is not negative and the
    loop vectorises; ``out[nc + i]`` would not); every other link (``m.other_links``) as
    ``a u_p - b u_q`` out of p and ``c u_p - d u_q`` into q.
    """
    nc = m.n_comp
    nd = m.n_dyn
    cap = m.capacity
    inv_cap = m.inv_capacity
    invk = m.inv_partition
    lp = m.link_p
    lq = m.link_q
    la = m.link_a
    lb = m.link_b
    lc = m.link_c
    ld = m.link_d
    lloss = m.link_loss
    ltrack = m.link_track
    gch = m.chain_g
    olinks = m.other_links
    loss_rate = m.loss_rate
    loss_to = m.loss_to
    lossy = m.lossy
    mm_s = m.mm_state
    mm_v = m.mm_vmax
    mm_k = m.mm_km
    tr_f = m.tr_from
    tr_t = m.tr_to
    tr_k = m.tr_rate
    q_supply = m.q_supply
    q_infused = m.q_infused
    n = y.shape[0]
    nx = nd - nc
    for i in range(nd):
        u[i] = y[i] * invk[i]
    for i in range(nd, n):
        out[i] = 0.0
    for i in range(nc):
        out[i] = 0.0  # compartments gather amount rates, divided by their volume at the end
    # cells: the flux from each cell to the next
    if nx > 0:
        uc = u[nc:nd]
        oc = out[nc:nd]
        ic = inv_cap[nc:nd]
        prev = 0.0
        for i in range(nx - 1):
            f = gch[i] * (uc[i] - uc[i + 1])
            oc[i] = (prev - f) * ic[i]
            prev = f
        oc[nx - 1] = prev * ic[nx - 1]
    for jj in range(olinks.shape[0]):
        j = olinks[jj]
        p = lp[j]
        q = lq[j]
        r_out = la[j] * u[p] - lb[j] * u[q]
        r_in = lc[j] * u[p] - ld[j] * u[q]
        out[p] -= r_out if p < nc else r_out * inv_cap[p]
        out[q] += r_in if q < nc else r_in * inv_cap[q]
        if lloss[j] >= 0:
            out[lloss[j]] += r_out - r_in
        if ltrack[j] >= 0:
            out[ltrack[j]] += r_in
    for jj in range(lossy.shape[0]):
        p = lossy[jj]
        r = loss_rate[p] * cap[p] * y[p]
        out[p] -= r if p < nc else loss_rate[p] * y[p]
        out[loss_to[p]] += r
    for k in range(mm_s.shape[0]):
        p = mm_s[k]
        r = saturable_rate(mm_v[k], mm_k[k], y[p])
        out[p] -= r
        out[nd + p] += r
    for k in range(tr_f.shape[0]):
        p = tr_f[k]
        r = tr_k[k] * cap[p] * y[p]
        out[p] -= r
        out[tr_t[k]] += r
    for p in range(nc):
        if infusion[p] != 0.0:
            out[p] += infusion[p]
            out[q_infused + p] += infusion[p]
        if clamp[p]:
            out[q_supply + p] = -out[p]
            out[p] = 0.0
        out[p] *= inv_cap[p]


def jacobian_size(m) -> int:
    """Upper bound on the number of COO entries that :func:`jacobian_kernel` writes for ``m``."""
    return 8 * len(m.link_p) + 2 * m.n_dyn + 2 * len(m.mm_state) + 2 * len(m.tr_from)


@njit(**INNER)
def jacobian_linear(rows, cols, vals, m, k):
    """The part of the Jacobian that does not depend on the state, as amount rates (COO triplets
    from entry ``k`` on; duplicates are to be summed); returns the new count.

    Links, first-order losses and transfers. :func:`jacobian_finish` turns the rows into rates
    of the states.
    """
    nd = m.n_dyn
    cap = m.capacity
    invk = m.inv_partition
    lp = m.link_p
    lq = m.link_q
    la = m.link_a
    lb = m.link_b
    lc = m.link_c
    ld = m.link_d
    lloss = m.link_loss
    ltrack = m.link_track
    loss_rate = m.loss_rate
    loss_to = m.loss_to
    tr_f = m.tr_from
    tr_t = m.tr_to
    tr_k = m.tr_rate
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
    for p in range(nd):
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
    for i in range(tr_f.shape[0]):
        p = tr_f[i]
        rows[k] = p
        cols[k] = p
        vals[k] = -tr_k[i] * cap[p]
        k += 1
        rows[k] = tr_t[i]
        cols[k] = p
        vals[k] = tr_k[i] * cap[p]
        k += 1
    return k


@njit(**INNER)
def jacobian_nonlinear(y, rows, cols, vals, m, k):
    """The part of the Jacobian that changes with the state ``y`` (saturable elimination), as
    amount rates from entry ``k`` on; returns the new count.

    d/dc [Vmax c / (Km + |c|)] = Vmax Km / (Km + |c|)^2. The compiled RODAS4 integrator
    evaluates this part at every step, on the compartment block and the cumulative amounts
    (a nonlinear term inside the cells would also need the cell block refreshed there).
    """
    nd = m.n_dyn
    mm_s = m.mm_state
    mm_v = m.mm_vmax
    mm_k = m.mm_km
    for i in range(mm_s.shape[0]):
        p = mm_s[i]
        d = saturable_slope(mm_v[i], mm_k[i], y[p])
        rows[k] = p
        cols[k] = p
        vals[k] = -d
        k += 1
        rows[k] = nd + p
        cols[k] = p
        vals[k] = d
        k += 1
    return k


@njit(**INNER)
def jacobian_finish(rows, vals, k0, k, m, clamp):
    """Turn the amount-rate entries ``k0 .. k-1`` into rates of the states, in place: a clamped
    compartment's row goes to its supply (negated), a dynamic state's is divided by its capacity."""
    nc = m.n_comp
    nd = m.n_dyn
    cap = m.capacity
    q_supply = m.q_supply
    for i in range(k0, k):
        r = rows[i]
        if r < nc and clamp[r]:
            rows[i] = q_supply + r
            vals[i] = -vals[i]
        elif r < nd:
            vals[i] /= cap[r]


@njit(**INNER)
def jacobian_kernel(y, rows, cols, vals, m, clamp):
    """Jacobian of :func:`rates_kernel` at ``y`` as COO triplets (duplicates are to be summed);
    returns the count (at most :func:`jacobian_size`)."""
    k = jacobian_linear(rows, cols, vals, m, np.int64(0))
    k = jacobian_nonlinear(y, rows, cols, vals, m, k)
    jacobian_finish(rows, vals, np.int64(0), k, m, clamp)
    return k


@njit(cache=True, no_cfunc_wrapper=True)
def _rates(y, out, mt, infusion, clamp, u):
    rates_kernel(y, out, ModelArrays(*mt), infusion, clamp, u)


@njit(cache=True, no_cfunc_wrapper=True)
def _jacobian_coo(y, rows, cols, vals, mt, clamp):
    return jacobian_kernel(y, rows, cols, vals, ModelArrays(*mt), clamp)


def rates(y: np.ndarray, out: np.ndarray, m: ModelArrays | tuple, infusion: np.ndarray, clamp: np.ndarray,
          u: np.ndarray | None = None) -> None:
    """:func:`rates_kernel` from Python (the scipy path); same arguments and units.

    ``m`` may be given as ``tuple(model.arrays)``, and the scratch ``u`` kept by the caller, for
    a caller in a loop (see :mod:`barrierflow.engine.arrays`).
    """
    _rates(y, out, tuple(m), infusion, clamp, np.empty(m[1]) if u is None else u)


def jacobian_coo(y: np.ndarray, rows: np.ndarray, cols: np.ndarray, vals: np.ndarray, m: ModelArrays,
                 clamp: np.ndarray) -> int:
    """:func:`jacobian_kernel` from Python; returns the number of COO entries."""
    return int(_jacobian_coo(y, rows, cols, vals, tuple(m), clamp))
