"""Saturable elimination on a chain network: the linear part exact, only the slow modes integrated.

A network that would be a chain (:mod:`barrierflow.engine.exact_chain`) but for the saturable
(Michaelis-Menten) elimination of one compartment ``c`` is linear in every state but that
compartment's concentration. In the symmetrised free states x of the chain (``x' = T x + tg``,
see :mod:`barrierflow.engine.exact_chain`) the elimination enters as one column::

    x' = T x + tg + beta u(c),   u(c) = -vmax c / ((km + |c|) V_c),   beta = sqrt(V_c / K_c) e_c

Between two events the state is split, y = y_lin + z:

* ``y_lin``: the exact solution of the linear network (the elimination left out) from the state
  after the event minus z(0), by the chain path's slow modes, the decayed modes' constants
  through solves with T, and the rational approximation of the exponential before the modes
  serve (the chain path's own pieces);
* ``z = V_S a + s_F u(c)``: the slow modes of T (|lambda| <= :data:`CUT_SLOW`) carry amplitudes
  ``a' = Lambda_S a + V_S^T beta u(c)``, integrated by RODAS4 (Hairer and Wanner, *Solving
  Ordinary Differential Equations II*, 2nd ed., 1996, sec. IV.7; the coefficients of
  :mod:`barrierflow.engine.rosenbrock` in their non-autonomous form: the stage times and the
  d_i of their code RODAS); the fast modes by their static response ``s_F u(c)``, s_F = -P T^+ P
  beta with P the projection on the fast modes (modal truncation with a static correction; common
  practice in structural dynamics, from memory: Craig and Kurdila, *Fundamentals of Structural
  Dynamics*, 2nd ed., 2006, ch. 11);
* ``c = c_lin(t) + (V_S a)_c + s_f u(c)``: one scalar equation, increasing in c (s_f >= 0,
  u' <= 0), solved by Newton;
* the cumulative amounts: the linear ones of z through the integrals of a and of u (two more
  quadratures in the integrated system), the eliminated amount -V_c int u.

At every event the split is made again (the static part from the concentration after the event):
z(0) = V_S a(0) + s_F u(c(0)), y_lin(0) = y(0) - z(0), so the fast modes start in step with the
elimination and y_lin carries their decay after the jump. The slow amplitudes a are carried over
the event (0 where the modes are new); the integrated modes faster than :data:`CUT_SLOW` start at
their static response -beta_s u(c(0)) / lambda_s, as the fast modes of the static part do.

The integrated system (a, its integral, the integral of u) has a Jacobian diag(Lambda_S) plus a
rank-one term: each stage is solved in O(k) (Sherman and Morrison). The error of a step is
measured as the product's RODAS4 measures it: the embedded estimate mapped onto every state
(the slow modes' patterns, the static part's response, the cumulative amounts; in one pass over
the states with the step's end, in chain order), the larger of the
root mean square over all states and the largest over the compartments of error / (atol + rtol
max(|y(t)|, |y(t + h)|)); a step over which the Jacobian of its start no longer holds (the slope of
the elimination changing within it, :data:`DRIFT`) is refused and made shorter, since the embedded
estimate, made with the same stages, does not see that error. What the static correction leaves
out is bounded: each fast mode's lag e_s obeys e_s' = lambda_s e_s + beta_s u'(t) / lambda_s from
e_s(0) = 0, so every free state's
error is at most max|du/dt| |P T^+ P T^+ P beta| / sqrt(V/K) (Cauchy-Schwarz over the fast
modes); with du/dt taken at every stage point, an interval in which that bound exceeds
:data:`STATIC_SHARE` of a state's absolute tolerance stops and is split again with more modes
integrated (:data:`RESPLIT`; the bound shrinks with the fast modes' rates), from the state at its
start; only when :data:`~barrierflow.engine.exact_chain.MAX_MODES` modes are integrated already
does the integrator compute the run on RODAS4 over all states instead. So does a run whose Newton
iteration fails, whose saturable compartment is clamped, whose modes fail their check, or that
needs more steps than its budget (:attr:`SplitIntegrator.step_budget`, which the default sets).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numba import njit

from ..errors import ScenarioError
from .arrays import INNER, larger, working_copy
from .compiled import CompiledModel
from .exact_chain import (
    MAX_MODES,
    RATIONAL_CONSTANT,
    RATIONAL_POLES,
    RATIONAL_RESIDUES,
    _build,
    _fast_constants,
    _forcing,
    _mode_cut,
    _phi1,
    _phi2,
    _project_fast,
    _rational_row,
    _slow_modes,
    add_modes,
    chain_order,
    cumulative_at,
)
from .exported import (
    Rows,
    chain_guard,
    chain_taps,
    empty_taps,
    flush_chain_guard,
    new_buffers,
    take_chain_row,
    take_row,
    taps_of,
)
from .integrators import Integration, Integrator, RunPlan, RunStats, check_tolerances, refuse_vehicle_terms
from .kernels import jacobian_kernel, jacobian_size, saturable_rate, saturable_slope
from .ledger import (
    FINAL_TOLERANCE,
    MAGNITUDE_FLOOR,
    _floor_peaks,
    _magnitudes,
    describe_state,
    floor_tolerances,
    present_amount,
    rows_relative_error,
)
from .rosenbrock import COEF, GAMMA, RosenbrockIntegrator, step_size
from .schedule import EV_HOLD_START, apply_events, rows_until, start_events

__all__ = ["BUDGET_START", "CUT_SLOW", "DRIFT", "REPLAY_STEPS", "RESPLIT", "ROW_FACTOR", "STATIC_SHARE",
           "SPLIT_BALANCE_LIMIT", "SUM_LIMIT", "SplitIntegrator", "linear_part", "split_schedule", "split_unresolved"]

CUT_SLOW = 100.0
"""1/h: the modes of the chain no faster than this are integrated (the slow modes), and so are
all the modes the chain path would compute for the output times (up to
:data:`~barrierflow.engine.exact_chain.MAX_MODES`); the faster ones follow the elimination by
their static response."""

STATIC_SHARE = 0.1
"""An interval stops when the bound of what the static correction leaves out exceeds this share of
any free state's absolute tolerance; it is split again with more modes integrated
(:data:`RESPLIT`), and once no more can be (:data:`~barrierflow.engine.exact_chain.MAX_MODES`),
the run goes to RODAS4 over all states."""

DRIFT = 0.1
"""A step is refused (and made shorter) when the slope of the elimination in the integrated
system, gam = u'(c) / (1 - s_f u'(c)), changes within it (at its stage points and its end) so
much that h |dgam| rho / (1 + h GAMMA |gam_0| rho) exceeds this (rho = |vyc . beta|: gam rho is
the eigenvalue of the rank-one part of the Jacobian; the ratio is the change of that part through
the stages' solve with I - h GAMMA J_0: relative to J_0 where the step is stiff in it, absolute
where not). RODAS4 uses the Jacobian of the step's start, and its embedded error estimate, made
with the same stages, does not see the error of a step over which it no longer holds: a sharp
elimination (km 3.4e-5 mg/mL) whose concentration rose from near 0 past km within one step of
55 h lost 0.25 mg of its eliminated amount, with an estimate of 0.83 of the tolerance.
"""

RESPLIT = 2.0
"""When the bound of the static correction fails, the interval is computed again with the modes
up to this many times faster than the cut integrated (a diffusion's modes up to a rate lambda
number about sqrt(lambda): about 1.4 times the modes; the bound, led by the slowest fast modes'
|beta_s| / lambda_s^2, falls by 2 to 5 times on the benchmark's networks)."""

ROW_FACTOR = 10.0
"""How many times the sum of a cumulative amount's error estimates over the accepted steps its
error at the rows may be, for :func:`~barrierflow.engine.ledger.floor_tolerances` (the rule for
the cumulative amounts below the magnitude floor, shared with RODAS4): the split's run is computed
again only where this many times that sum exceeds the promise on the floor. The split integrates
only the slow modes and takes few long steps (13 over the 24 h of extreme patch 167 of the
adversarial sweep); its error comes near its tolerance, and the rows inside a step come from the
dense output of RODAS4 (order 3 where the step is order 4; Hairer and Wanner, *Solving Ordinary
Differential Equations II*, 2nd ed., 1996, sec. IV.7), some 13 times the step end's: that patch's
eliminated amount (2.9e-4 mg, floor 1e-3 mg) came 37 times the promise off scipy Radau. The
estimates are those of the step ends; on extreme patch 167 and random case 226 of the sweep
(flagged at 1,089 and 360 times the promise) the rows' error was a third of the sum; random
networks 5 and 10 of tests/test_split_random.py's generator (0.31 and 0.43) came out within the
contract without a second run."""

REPLAY_STEPS = 512
"""Each dosing interval of a repeated dose meets what the one before it met: on the benchmark's
saturable variant each daily replacement refused about five tries in its first hours (the first
of 1.6 h by :data:`DRIFT`, the next ones by the error estimate: the controller's growth ahead of
an elimination that saturates again). Where the previous interval, of the same length and on the
same modes, refused a longer try and then accepted a step of h covering the same local time, a
step proposed longer than h starts at h (the controller's own proposal goes on to the next
step). Only the size of a step's first try changes: every step passes the same error, drift and
lag checks. An interval that took more than this many steps serves none."""

BUDGET_START = 0.2
"""A run with a step budget (:attr:`SplitIntegrator.step_budget`) may take this share of it from
its start, and the rest in proportion to the simulated time: a split that needs many more steps
than expected (a concentration crossing a small km, each step held short by :data:`DRIFT`) gives
up early, with little work spent, and not only at the budget's end."""

# the stage times c_i and the sums gamma_i of RODAS (Hairer and Wanner 1996, their code RODAS,
# METH = 1): the non-autonomous terms of the stages
STAGE_TIME = np.array([0.0, 0.386, 0.21, 0.63, 1.0, 1.0])
STAGE_GAMMA = np.array([0.25, -0.1043, 0.1035, -0.0362, 0.0, 0.0])

# status codes of the compiled run (0: done)
OK, FAIL_STEP, FAIL_MODES, FAIL_NEWTON, FAIL_STATIC, FAIL_CLAMPED, FAIL_NONFINITE, FAIL_MAXSTEPS, FAIL_BUDGET = range(9)
FAIL_UNRESOLVED = 9  # (set after the run, by :func:`split_unresolved`)
_FAILURES = {
    FAIL_STEP: "the step size became too small",
    FAIL_MODES: "the chain's modes failed their check",
    FAIL_NEWTON: "the concentration under saturable elimination could not be solved for",
    FAIL_STATIC: "the static response of the fast modes was not accurate enough",
    FAIL_CLAMPED: "the compartment with saturable elimination is held",
    FAIL_NONFINITE: "the solution became non-finite",
    FAIL_MAXSTEPS: "the step limit was reached",
    FAIL_BUDGET: "it needed more steps than its budget",
}


def linear_part(model: CompiledModel) -> CompiledModel | None:
    """``model`` without its saturable elimination, when the split applies: exactly one
    compartment with saturable elimination, not held, no vehicle terms, and the rest a chain
    network (:func:`~barrierflow.engine.exact_chain.chain_order`) of at most
    :data:`~barrierflow.engine.exact.CHAIN_STATES` states. None otherwise."""
    memo = model.__dict__.get("_linear_part", False)  # the model is immutable: decide once
    if memo is not False:
        return memo
    out = None
    if not model.vehicle_terms and len(model.mm_state) == 1 and not model.held[int(model.mm_state[0])]:
        from .exact import CHAIN_STATES

        empty = np.zeros(0)
        lin = model.with_arrays(model.arrays._replace(mm_state=np.zeros(0, dtype=np.int64), mm_vmax=empty,
                                                      mm_km=empty.copy()))
        order = chain_order(lin)
        if order is not None and 0 < len(order) <= CHAIN_STATES:
            out = lin
    model.__dict__["_linear_part"] = out
    return out


# ---------------------------------------------------------------- the scalar concentration
@njit(inline="always", error_model="numpy")
def _conc(b, s_f, vmax, km, icap):
    """The root c of c = b + s_f u(c) (u = -saturable_rate / V); returns (c, ok)."""
    c = b
    for _it in range(60):
        u = -saturable_rate(vmax, km, c) * icap
        du = -saturable_slope(vmax, km, c) * icap
        dc = (c - b - s_f * u) / (1.0 - s_f * du)
        c -= dc
        if abs(dc) <= 1e-15 * (abs(c) + km) or not math.isfinite(c):
            return c, math.isfinite(c)
    return c, False


# ---------------------------------------------------------------- the linear part
@njit(**INNER)
def _rational_central(rat, n, t, has_g, pc, poles, residues, c0, wk):
    """x(t) and dx/dt at position ``pc`` of the chain, by the rational approximation of the
    exponential of :func:`~barrierflow.engine.exact_chain._rational_row` (x(t) = exp(tT) x0 +
    t phi1(tT) tg, dx/dt = exp(tT) r0 with r0 = T x0 + tg), computing only what that position
    needs: per pole, the elimination of T - p/t from the chain's first position to its last and
    the back substitution down to ``pc``. No pivoting: the imaginary part of every pivot is at
    least Im(p)/t in size (each is -Im(p)/t minus e^2 Im(1/previous pivot), of the same sign), so
    none vanishes. The poles run side by side in vector lanes, in real arithmetic; ``wk`` is work
    space (8, n, number of poles); ``rat`` holds the chain's diagonal, off-diagonal, x0, the
    forcing tg and r0 in its rows.
    """
    dd = rat[0]
    ee = rat[1]
    x0 = rat[2]
    tg = rat[3]
    r0 = rat[4]
    kp = poles.shape[0]
    sr = np.empty(kp)
    si = np.empty(kp)
    for k in range(kp):
        sg = poles[k] / t
        sr[k] = sg.real
        si[k] = sg.imag
    pr = wk[0]
    pq = wk[1]
    ar = wk[2]
    ai = wk[3]
    br = wk[4]
    bi = wk[5]
    cr = wk[6]
    ci = wk[7]
    p0r = pr[0]
    p0i = pq[0]
    a0r = ar[0]
    a0i = ai[0]
    b0r = br[0]
    b0i = bi[0]
    c0r = cr[0]
    c0i = ci[0]
    for k in range(kp):
        p0r[k] = dd[0] - sr[k]
        p0i[k] = -si[k]
        a0r[k] = x0[0]
        a0i[k] = 0.0
        b0r[k] = tg[0]
        b0i[k] = 0.0
        c0r[k] = r0[0]
        c0i[k] = 0.0
    for i in range(1, n):
        e = ee[i - 1]
        d = dd[i]
        xv = x0[i]
        gv = tg[i]
        rv = r0[i]
        qpr = pr[i - 1]
        qpi = pq[i - 1]
        qar = ar[i - 1]
        qai = ai[i - 1]
        qbr = br[i - 1]
        qbi = bi[i - 1]
        qcr = cr[i - 1]
        qci = ci[i - 1]
        npr = pr[i]
        npi = pq[i]
        nar = ar[i]
        nai = ai[i]
        nbr = br[i]
        nbi = bi[i]
        ncr = cr[i]
        nci = ci[i]
        for k in range(kp):
            u = qpr[k]
            v = qpi[k]
            q = e / (u * u + v * v)
            mr = q * u  # the multiplier e / pivot
            mi = -q * v
            npr[k] = d - sr[k] - mr * e
            npi[k] = -si[k] - mi * e
            nar[k] = xv - (mr * qar[k] - mi * qai[k])
            nai[k] = -(mr * qai[k] + mi * qar[k])
            ncr[k] = rv - (mr * qcr[k] - mi * qci[k])
            nci[k] = -(mr * qci[k] + mi * qcr[k])
        if has_g:  # the forcing's right-hand side (none without forcing)
            for k in range(kp):
                u = qpr[k]
                v = qpi[k]
                q = e / (u * u + v * v)
                mr = q * u
                mi = -q * v
                nbr[k] = gv - (mr * qbr[k] - mi * qbi[k])
                nbi[k] = -(mr * qbi[k] + mi * qbr[k])
    xs = c0 * x0[pc]
    dx = c0 * r0[pc]
    for k in range(kp):
        w1 = complex(ar[n - 1, k], ai[n - 1, k]) / complex(pr[n - 1, k], pq[n - 1, k])
        w2 = complex(br[n - 1, k], bi[n - 1, k]) / complex(pr[n - 1, k], pq[n - 1, k]) if has_g else 0j
        w3 = complex(cr[n - 1, k], ci[n - 1, k]) / complex(pr[n - 1, k], pq[n - 1, k])
        for i in range(n - 2, pc - 1, -1):
            pv = complex(pr[i, k], pq[i, k])
            w1 = (complex(ar[i, k], ai[i, k]) - ee[i] * w1) / pv
            if has_g:
                w2 = (complex(br[i, k], bi[i, k]) - ee[i] * w2) / pv
            w3 = (complex(cr[i, k], ci[i, k]) - ee[i] * w3) / pv
        rk = residues[k]
        ce = 2.0 * rk / t
        xs += (ce * w1).real
        dx += (ce * w3).real
        if has_g:
            xs += (2.0 * rk / poles[k] * w2).real
    return xs, dx


@njit(inline="always", error_model="numpy")
def _central(t, t_thr, k_all, cen, cfast, rat, n, has_g, pc, tvc, cw):
    """c_lin(t) and its time derivative (the linear solution at the saturable compartment).
    ``cen`` holds the modes' rates, their inverses, the amplitudes z0 and forcings gz at the
    start, the patterns at the compartment and the decayed modes' forcing constants (summed from
    the fastest) in its rows; ``rat`` the chain for :func:`_rational_central`. Three arrays, not
    twelve: inlined at each stage, each array argument costs an atomic reference count."""
    if t <= 0.0:
        return rat[2, pc] / tvc, rat[4, pc] / tvc
    if t < t_thr:
        xc, dx = _rational_central(rat, n, t, has_g, pc, RATIONAL_POLES, RATIONAL_RESIDUES, RATIONAL_CONSTANT, cw)
        return xc / tvc, dx / tvc
    c = cfast
    dc = 0.0
    s = 0
    while s < k_all:
        el = cen[0, s]
        x = el * t
        if x < -60.0:
            break  # decayed, and so are the faster ones: their forcing constants in the last row
        ex = math.exp(x)
        p1 = (ex - 1.0) * cen[1, s] if abs(x) > 0.5 else t * _phi1(x)
        c += cen[4, s] * (ex * cen[2, s] + p1 * cen[3, s])
        dc += cen[4, s] * ex * (el * cen[2, s] + cen[3, s])
        s += 1
    if s < k_all:
        c += cen[5, s]
    return c, dc


@njit(inline="always", error_model="numpy")
def _amplitudes(t, wa, wb, kz, k_all, cen, has_g, zs, zi):
    """The amplitudes ``zs`` of every computed mode at local time ``t`` (> 0, past the rational
    approximation's times) and their integrals ``zi``: the linear part's exact ones (the rates,
    their inverses, z0 and gz in the rows of ``cen``, see :func:`_central`) plus the integrated
    amplitudes ``wa`` and their integrals ``wb`` of the first ``kz``."""
    for s in range(k_all):
        el = cen[0, s]
        x = el * t
        ex = math.exp(x) if x > -700.0 else 0.0
        p1 = (ex - 1.0) * cen[1, s] if abs(x) > 0.5 else t * _phi1(x)
        zs[s] = ex * cen[2, s]
        zi[s] = p1 * cen[2, s]
        if has_g:
            zs[s] += p1 * cen[3, s]
            zi[s] += t * t * _phi2(x) * cen[3, s]
        if s < kz:
            zs[s] += wa[s]
            zi[s] += wb[s]


@njit(inline="always", error_model="numpy")
def _row_values(t, wa, wb, wu, kz, r, y0, g, sc, cen, vy, yfast, wt, qconst, qslope, qm, uq, zi, qs, zsb,
                qb, tb):
    """Row ``r`` of the block of rows (see :func:`_flush_rows`: ``zsb`` its amplitudes, ``qb`` its
    cumulative amounts, ``tb`` its times) at local time ``t`` (past the rational approximation's
    times): the amplitudes of the modes and of the static part (the elimination u, whose pattern
    follows the modes') and the cumulative amounts. Returns False when the Newton iteration of the
    saturable concentration fails. ``sc`` holds the run's numbers (:func:`_interval`). Arrays and
    a tuple of numbers, not the run's tuples of arrays, as arguments: a tuple of arrays unpacked
    in a helper inlined into a loop costs an atomic reference count per array at each call."""
    n, k_all, has_g, pc, s_f, vmax, km, icap, nd, n_state = sc
    zr = zsb[r]
    _amplitudes(t, wa, wb, kz, k_all, cen, has_g, zr, zi)
    b = yfast[pc]  # the state at the saturable compartment before the static part, in the order of _state
    for s in range(k_all):
        b += vy[s, pc] * zr[s]
    c, ok = _conc(b, s_f, vmax, km, icap)
    zr[k_all] = -saturable_rate(vmax, km, c) * icap
    qr_ = qb[r]
    cumulative_at(t, qconst, qslope, qm, qm.shape[0], wt, zi, k_all, qr_.shape[0], qs)
    for q in range(qr_.shape[0]):
        qr_[q] = y0[nd + q] + g[nd + q] * t + qs[q] + uq[q] * wu
    tb[r] = t
    return ok


@njit(inline="always", error_model="numpy")
def _flush_rows(nb, y0, g, out, full, row, taps, row0, cap, n, idx, yfast, alone, fixed, n_fixed, nd, vyp, zsb, ysb,
                qb, tb, rix, chained, pos, plo, phi, capc, isc, mins):
    """Keep the ``nb`` rows of the block of rows (patterns ``vyp``, amplitudes ``zsb``, states
    ``ysb``, cumulative amounts ``qb``, times ``tb``, row indices ``rix``; ``chained, pos, plo,
    phi, capc, isc`` as :func:`~barrierflow.engine.exported.chain_taps` gives them, ``mins`` the
    guard's minima): their states in chain order four at a time
    (:func:`~barrierflow.engine.exact_chain.add_modes`, the static part's pattern after the
    modes'), kept from there as the chain path keeps its rows
    (:func:`~barrierflow.engine.exported.take_chain_row`), or scattered into the full state where
    that is asked for, for the buffers' last row, or where the barriers are not neighbours on the
    chain. Returns the number of rows kept in chain order."""
    last_row = taps[4].shape[0] - 1
    add_modes(yfast, vyp, zsb, ysb, n, vyp.shape[0])
    kept = 0
    use = np.zeros(4, dtype=np.bool_)  # the rows kept in chain order (chain_guard)
    for r in range(nb):
        t = tb[r]
        io = rix[r]
        ys = ysb[r]
        for a in range(n):
            if alone[a]:
                ia = idx[a]
                ys[a] = y0[ia] + g[ia] * t
        dst = out[io] if full else row
        qr_ = qb[r]
        for q in range(qr_.shape[0]):
            dst[nd + q] = qr_[q]
        for q in range(n_fixed):  # the states off the chain (held): take_chain_row reads them from dst
            dst[fixed[q]] = y0[fixed[q]]
        if chained and row0 + io != last_row:
            take_chain_row(ys, dst, row0 + io, taps, pos, capc, plo, phi)
            use[r] = True
            kept += 1
            continue
        for a in range(n):
            dst[idx[a]] = ys[a]
        take_row(dst, row0 + io, taps, cap, nd)
    if kept:
        chain_guard(ysb, use, isc, mins)
    return kept


@njit(**INNER)
def _state(t, wa, wb, wu, kz, dst, y0, g, L, P, out_c):
    """The full state at local time ``t`` into ``dst`` from the amplitudes ``wa`` of the slow
    modes, their integrals ``wb`` and the integral ``wu`` of u; ``out_c[0]`` gets the saturable
    compartment's concentration. Returns False when its Newton iteration fails."""
    (n, idx, tv, dd, ee, lam, vec, vy, wt, k_all, z0, gz, yfast, qconst, qslope, x0, tg, has_g, t_thr, alone,
     fixed, n_fixed, nq, qr, qc, qv, ilam, qm, cen) = L
    (pc, s_f, sfy, uq, vmax, km, icap, nd, xs, xi, cw, ys, zs, zi, qs) = P
    nqd = dst.shape[0] - nd
    if t > 0.0 and t < t_thr:
        _rational_row(dd, ee, n, t, x0, tg, has_g, RATIONAL_POLES, RATIONAL_RESIDUES, RATIONAL_CONSTANT, xs, xi, cw)
        for a in range(n):
            v = xs[a] / tv[a]
            for s in range(kz):
                v += vy[s, a] * wa[s]
            ys[a] = v
        for q in range(nqd):
            qs[q] = 0.0
        for j in range(nq):
            a = qc[j]
            if a >= 0:
                qs[qr[j] - nd] += qv[j] * (xi[a] / tv[a])
        for q in range(nqd):
            acc = qs[q]
            for s in range(kz):
                acc += wt[s, q] * wb[s]
            qs[q] = acc
    elif t <= 0.0:
        for a in range(n):
            v = x0[a] / tv[a]
            for s in range(kz):
                v += vy[s, a] * wa[s]
            ys[a] = v
        for q in range(nqd):
            acc = 0.0
            for s in range(kz):
                acc += wt[s, q] * wb[s]
            qs[q] = acc
    else:
        _amplitudes(t, wa, wb, kz, k_all, cen, has_g, zs, zi)
        # the modes decayed below exp(-60) add nothing to the states (without forcing), nor do
        # the slow ones beyond those integrated
        kb = k_all
        if not has_g:
            kb = kz
            while kb < k_all and cen[0, kb] * t > -60.0:
                kb += 1
        for a in range(n):
            ys[a] = yfast[a]
        for s in range(kb):
            z = zs[s]
            v = vy[s]
            for a in range(n):
                ys[a] += v[a] * z
        cumulative_at(t, qconst, qslope, qm, qm.shape[0], wt, zi, k_all, nqd, qs)
    c, ok = _conc(ys[pc], s_f, vmax, km, icap)
    out_c[0] = c
    u = -saturable_rate(vmax, km, c) * icap
    for q in range(n_fixed):
        dst[fixed[q]] = y0[fixed[q]]
    for a in range(n):
        ia = idx[a]
        dst[ia] = y0[ia] + g[ia] * t if alone[a] else ys[a] + sfy[a] * u
    for q in range(nqd):
        dst[nd + q] = y0[nd + q] + g[nd + q] * t + qs[q] + uq[q] * wu
    return ok


# ---------------------------------------------------------------- the slow modes' system
@njit(inline="always", error_model="numpy")
def _rates(cl, dcl, wa, kz, fa, lam, beta, vyc, s_f, vmax, km, icap):
    """The rates of the integrated system where the linear solution's concentration is ``cl``
    (its time derivative ``dcl``; :func:`_central`): fa (the amplitudes' rates) in place;
    returns (u, du/dc / (1 - s_f du/dc), dc_lin/dt, ok)."""
    b = cl
    for s in range(kz):
        b += vyc[s] * wa[s]
    c, ok = _conc(b, s_f, vmax, km, icap)
    u = -saturable_rate(vmax, km, c) * icap
    du = -saturable_slope(vmax, km, c) * icap
    gam = du / (1.0 - s_f * du)
    for s in range(kz):
        fa[s] = lam[s] * wa[s] + beta[s] * u
    return u, gam, dcl, ok


@njit(inline="always", error_model="numpy")
def _step_end(t, na, nb, nu, ka, kb, ku, gam, kz, y0, g, atol, rtol, out_c, sc, idx, vy, cen, yfast, wt,
              qconst, qslope, qm, uq, zi, qs, S):
    """The state at the end of a step (local time ``t``, amplitudes ``na``, integrals ``nb`` and
    ``nu``) in chain order into ``S``'s ``new_c`` and ``new_q``, and the error of the step's
    estimate (ka, kb, ku) mapped onto every state, both in one pass over the states: the state
    and the error map share the patterns (the modes', then the static part's: its error is u'
    dc, dc = vyc . ka / (1 - s_f u')). Returns (the product's RODAS4 error measure: the larger of
    the root mean square over all states and the largest over the compartments of error / (atol
    + rtol max(|y(t)|, |y(t + h)|)); the states off the chain and those alone carry no error,
    whether the Newton iteration of the saturable concentration converged); ``out_c[0]`` gets the
    saturable compartment's concentration. ``sc`` holds the run's numbers (:func:`_interval`), ``S``
    the step ends' work space."""
    n, k_all, has_g, pc, s_f, vmax, km, icap, nd, n_state = sc
    vyp, zse, yse, atc, alone_at, comp_at, cur_c, new_c, cur_q, new_q, err_q = S
    zr = zse[0]
    er = zse[1]
    _amplitudes(t, na, nb, kz, k_all, cen, has_g, zr, zi)
    b = yfast[pc]  # the state at the saturable compartment before the static part
    for s in range(k_all):
        b += vy[s, pc] * zr[s]
    c, ok = _conc(b, s_f, vmax, km, icap)
    out_c[0] = c
    zr[k_all] = -saturable_rate(vmax, km, c) * icap
    sig = 0.0
    for s in range(kz):
        sig += vy[s, pc] * ka[s]
        er[s] = ka[s]
    for s in range(kz, k_all):
        er[s] = 0.0
    er[k_all] = gam * sig
    y_n = yse[0]
    e_n = yse[1]
    for a in range(n):
        y_n[a] = yfast[a]
        e_n[a] = 0.0
    for s in range(0, vyp.shape[0], 4):  # four patterns per pass, the state and its error side by side
        v0 = vyp[s]
        v1 = vyp[s + 1]
        v2 = vyp[s + 2]
        v3 = vyp[s + 3]
        z0_, z1_, z2_, z3_ = zr[s], zr[s + 1], zr[s + 2], zr[s + 3]
        f0, f1, f2, f3 = er[s], er[s + 1], er[s + 2], er[s + 3]
        for a in range(n):
            va = v0[a]
            vb = v1[a]
            vc = v2[a]
            vd = v3[a]
            y_n[a] += va * z0_ + vb * z1_ + vc * z2_ + vd * z3_
            e_n[a] += va * f0 + vb * f1 + vc * f2 + vd * f3
    for a in alone_at:  # nothing touches these: their value plus what is infused, no error
        ia = idx[a]
        y_n[a] = y0[ia] + g[ia] * t
        e_n[a] = 0.0
    acc = 0.0
    for a in range(n):
        w = e_n[a] / (atc[a] + rtol * larger(abs(cur_c[a]), abs(y_n[a])))
        acc += w * w
        new_c[a] = y_n[a]
    err_c = 0.0
    for a in comp_at:
        err_c = larger(err_c, abs(e_n[a]) / (atc[a] + rtol * larger(abs(cur_c[a]), abs(y_n[a]))))
    nqd = new_q.shape[0]
    cumulative_at(t, qconst, qslope, qm, qm.shape[0], wt, zi, k_all, nqd, qs)
    for q in range(nqd):
        new_q[q] = y0[nd + q] + g[nd + q] * t + qs[q] + uq[q] * nu
        err_q[q] = uq[q] * ku  # the error of the cumulative amounts
    for q in qm:
        v = err_q[q]
        for s in range(kz):
            v += wt[s, q] * kb[s]
        err_q[q] = v
    for q in range(nqd):
        w = err_q[q] / (atol[nd + q] + rtol * larger(abs(cur_q[q]), abs(new_q[q])))
        acc += w * w
    return max(math.sqrt(acc / n_state), err_c), ok


@njit(**INNER)
def _interval(y, t_end, tau, out, full, taps, row0, cap, L, P, R, W, S, kz, coef, rtol, atol, nc, h, max_steps, stats,
              static_w, info, g, carry, rec):
    """RODAS4 on the slow modes from local time 0 to ``t_end``; rows at ``tau`` kept (as the chain
    path keeps them), the state at ``t_end`` into ``y``. The amplitudes start from ``carry`` and
    end there. ``W`` is the block of rows (:func:`_flush_rows`), ``S`` the step ends' work space
    (:func:`_step_end`), ``rec`` the steps of the previous interval and of this one
    (:func:`split_schedule`, see :data:`REPLAY_STEPS`). Returns (status, the next step size)."""
    n_state = y.shape[0]
    ca, cc, cd = coef
    n_t = tau.shape[0]
    y0 = y.copy()
    nw = max(kz, 1)
    wa = np.zeros(nw)
    for i in range(kz):
        wa[i] = carry[i]
    wb = np.zeros(nw)
    wu = 0.0
    kka = np.zeros((6, nw))
    kkb = np.zeros((6, nw))
    kku = np.zeros(6)
    ya = np.zeros(nw)
    yb = np.zeros(nw)
    fa = np.zeros(nw)
    fa0 = np.zeros(nw)
    na = np.zeros(nw)
    nb = np.zeros(nw)
    ra = np.zeros(nw)
    rb = np.zeros(nw)
    inv_d = np.zeros(nw)
    c2a = np.zeros(nw)
    c3a = np.zeros(nw)
    c2b = np.zeros(nw)
    c3b = np.zeros(nw)
    cur = np.zeros(n_state)
    row = out[0] if out.shape[0] > 0 else cur
    # the run's tuples unpacked once, here: the helpers inlined into the step loop take their
    # arrays one by one (a tuple unpacked in each would cost an atomic reference count per array
    # and per call: 130,000 per run of the benchmark's saturable variant)
    (n, idx, tv, dd, ee, lam, vec, vy, wt, k_all, z0, gz, yfast, qconst, qslope, x0, tg, has_g, t_thr, alone,
     fixed, n_fixed, nq, qr, qc, qv, ilam, qm, cen) = L
    (pc, s_f, sfy, uq, vmax, km, icap, nd, xs, xi, cw, ys, zs, zi, qs) = P
    (beta, vyc, cen, rat, cfast, tvc, cw4, t_lim) = R
    vyp, zse, yse, atc, alone_at, comp_at, cur_c, new_c, cur_q, new_q, err_q = S
    _vyp, zsb, ysb, qb, tb, rix, ct, mins = W
    chained, pos, plo, phi, capc, isc = ct
    sc = (n, k_all, has_g, pc, s_f, vmax, km, icap, nd, n_state)  # numbers: no reference counts
    cbuf = np.zeros(1)
    rho = 0.0  # the rank-one part of the Jacobian, beta gam vyc^T, has the eigenvalue gam rho
    for s in range(kz):
        rho += vyc[s] * beta[s]
    rho = abs(rho)
    t_rat = t_thr
    # t_lim: before it the modes not computed add to the saturable compartment
    n_pend = np.int64(0)  # handed to _row_values and _flush_rows: not a literal
    n_kept = 0
    uo = 0.0
    io = 0
    while io < n_t and tau[io] <= 0.0:
        dst = out[io] if full else row
        for i in range(n_state):
            dst[i] = y0[i]
        take_row(dst, row0 + io, taps, cap, nd)
        io += 1
    if not _state(0.0, wa, wb, wu, kz, cur, y0, g, L, P, cbuf):
        return FAIL_NEWTON, h
    for a in range(n):
        cur_c[a] = cur[idx[a]]
    for q in range(cur_q.shape[0]):
        cur_q[q] = cur[nd + q]
    t = 0.0
    h_min = 1e-14 * t_end
    h = min(h, t_end)
    h_acc = 0.0
    err_acc = 0.0
    reject = False
    n_steps = 0
    h_carry = h
    lag = 0.0  # the bound of the fast modes' lag behind their static response (x units)
    budget = info[2]
    t_run = info[3]  # the run's time at the interval's start, h
    i_dur = 1.0 / info[4]
    # the previous interval's accepted steps (start, size, whether a longer try failed first), and
    # this one's (see REPLAY_STEPS); n_prev < 0: none to follow
    prev_t, prev_h, prev_r, cur_t, cur_h, cur_r, n_rec, qerr = rec
    n_prev = n_rec[0]
    n_cur = np.int64(0)
    ip = 0
    while t < t_end:
        if n_steps >= max_steps:
            return FAIL_MAXSTEPS, h
        # the step budget: BUDGET_START of it from the start, the rest in proportion to the time
        if stats[0] + stats[1] > budget * min(1.0, BUDGET_START + (1.0 - BUDGET_START) * (t_run + t) * i_dur):
            return FAIL_BUDGET, h
        if h < h_min:
            return FAIL_STEP, h
        last = False
        h_carry = h  # the next interval starts from the step the controller proposed, not a last
        if n_prev > 0:  # where a longer try failed in the previous interval, its accepted step
            while ip + 1 < n_prev and prev_t[ip + 1] <= t:
                ip += 1
            if prev_r[ip] and prev_t[ip] <= t < prev_t[ip] + prev_h[ip] and h > prev_h[ip]:
                h = prev_h[ip]
                reject = True  # as after a refused try: the next step grows from this one's proposal at most
        if t + 1.0001 * h >= t_end:  # step cut short at the interval's end
            h = t_end - t
            last = True
        cl0, dcl0 = _central(t, t_lim, k_all, cen, cfast, rat, n, has_g, pc, tvc, cw4)
        u0, gam0, dcl0, ok = _rates(cl0, dcl0, wa, kz, fa0, lam, beta, vyc, s_f, vmax, km, icap)
        if not ok:
            return FAIL_NEWTON, h
        # the time derivative of the rates (the linear solution moves c): non-autonomous RODAS4
        ft = gam0 * dcl0
        umax = 0.0
        while True:
            gdev = 0.0  # the largest change of the slope gam from the step's start, over its points
            fac = 1.0 / (h * GAMMA)
            ifac = h * GAMMA
            ih = 1.0 / h
            den = 1.0
            for s in range(kz):
                inv_d[s] = 1.0 / (fac - lam[s])
                den -= gam0 * vyc[s] * beta[s] * inv_d[s]
            t_cl = -1.0
            cl_s = 0.0
            dcl_s = 0.0
            for st in range(6):
                ts = t + STAGE_TIME[st] * h
                # the stage's point (each sum over the earlier stages in their order, the loops
                # over the modes innermost, so that they run in vector lanes)
                for s in range(kz):
                    ya[s] = wa[s]
                for j in range(st):  # kka[j, s], not a view kka[j]: a view in a loop is a reference count
                    cj = ca[st, j]
                    for s in range(kz):
                        ya[s] += cj * kka[j, s]
                if st == 0:
                    for s in range(kz):
                        fa[s] = fa0[s]
                    u_s = u0
                    gam_s = gam0
                    dcl_s = dcl0
                else:
                    if ts != t_cl:  # the last two stages share their time
                        cl_s, dcl_s = _central(ts, t_lim, k_all, cen, cfast, rat, n, has_g, pc, tvc, cw4)
                        t_cl = ts
                    u_s, gam_s, dcl_s, ok = _rates(cl_s, dcl_s, ya, kz, fa, lam, beta, vyc, s_f, vmax, km, icap)
                    if not ok:
                        return FAIL_NEWTON, h
                    gdev = larger(gdev, abs(gam_s - gam0))
                # du/dt at the stage point: u' dc/dt, dc/dt = (dc_lin/dt + vyc . a') / (1 - s_f u')
                dsum = dcl_s
                for s in range(kz):
                    dsum += vyc[s] * fa[s]
                umax = larger(umax, abs(gam_s * dsum))
                hd = h * STAGE_GAMMA[st]
                ru = u_s + hd * ft
                for s in range(kz):
                    rb[s] = ya[s]  # the integral's rate is the stage's amplitude
                    ra[s] = fa[s] + hd * beta[s] * ft
                for j in range(st):
                    cj = cc[st, j] * ih
                    for s in range(kz):
                        ra[s] += cj * kka[j, s]
                        rb[s] += cj * kkb[j, s]
                for j in range(st):
                    ru += cc[st, j] * ih * kku[j]
                # the stage: (fac I - J) k = r for the integrated system (J: diag(lam) + beta gam0
                # vyc^T on the amplitudes, the identity into their integrals, gam0 vyc^T into the
                # integral of u) by Sherman and Morrison (den = 1 - gam0 vyc . (inv_d beta), the same
                # for every stage of the step); written here, not as an inlined helper, whose seven
                # array arguments cost an atomic reference count each per stage
                num = 0.0
                for s in range(kz):
                    num += vyc[s] * ra[s] * inv_d[s]
                sig = num / den  # vyc . ka
                for s in range(kz):
                    ka = (ra[s] + beta[s] * gam0 * sig) * inv_d[s]
                    kka[st, s] = ka
                    kkb[st, s] = (rb[s] + ka) * ifac
                kku[st] = (ru + gam0 * sig) * ifac
            # the new solution: the last stage's point plus k_6 (RODAS4 is stiffly accurate)
            for s in range(kz):
                na[s] = wa[s]
                nb[s] = wb[s]
            for j in range(5):
                cj = ca[5, j]
                for s in range(kz):
                    na[s] += cj * kka[j, s]
                    nb[s] += cj * kkb[j, s]
            for s in range(kz):
                na[s] += kka[5, s]
                nb[s] += kkb[5, s]
            nu = wu
            for j in range(5):
                nu += ca[5, j] * kku[j]
            nu += kku[5]
            t_new = t_end if last else t + h
            err, ok = _step_end(t_new, na, nb, nu, kka[5], kkb[5], kku[5], gam0, kz, y0, g, atol, rtol, cbuf, sc, idx,
                                vy, cen, yfast, wt, qconst, qslope, qm, uq, zi, qs, S)
            if not ok:
                err = np.inf
            if ok:
                c_end = cbuf[0]
                if t_new < t_lim:
                    # the step ends take the modes not computed as decayed, which they are not yet
                    # at the compartment: its concentration there as the stages have it (the
                    # rational approximation), as the interval's end state and the rows
                    cl_e, dcl_e = _central(t_new, t_lim, k_all, cen, cfast, rat, n, has_g, pc, tvc, cw4)
                    for s in range(kz):
                        cl_e += vyc[s] * na[s]
                    c_end, ok = _conc(cl_e, s_f, vmax, km, icap)
                    if not ok:
                        err = np.inf
            if ok:
                du = -saturable_slope(vmax, km, c_end) * icap
                gdev = max(gdev, abs(du / (1.0 - s_f * du) - gam0))
                # the Jacobian of the step's start must hold over the step (see DRIFT): its
                # change, through the stages' solve with (I - h GAMMA J), relative to that solve
                drift = h * gdev * rho / (1.0 + h * GAMMA * abs(gam0) * rho)
                if drift > DRIFT:
                    h *= max(0.1, min(0.5, 0.9 * DRIFT / drift))
                    last = False
                    reject = True
                    stats[1] += 1
                    if h < h_min:
                        return FAIL_STEP, h
                    continue
            if not math.isfinite(err):
                h *= 0.25
                last = False
                reject = True
                stats[1] += 1
                if h < h_min:
                    return FAIL_NONFINITE, h
                continue
            h_new = step_size(h, err, h_acc, err_acc)
            if err <= 1.0:
                h_acc = h
                err_acc = max(1e-2, err)
                break
            reject = True
            last = False
            stats[1] += 1
            h = h_new
            if h < h_min:
                return FAIL_STEP, h
        # what the static correction leaves out: each fast mode's lag e_s obeys e_s' = lam_s e_s +
        # beta_s u'(t) / lam_s, so over the step |e_s| shrinks by exp(lam_s h) <= exp(cut h) and
        # gains at most |beta_s / lam_s| max|du/dt| min(h, 1 / |lam_s|); the 2-norm over the fast
        # modes bounds every free state (Cauchy-Schwarz), against its absolute tolerance
        lag = math.exp(static_w[3] * (t_new - t)) * lag + umax * min((t_new - t) * static_w[0], static_w[1])
        info[0] = max(info[0], lag * static_w[2])
        if lag * static_w[2] > STATIC_SHARE:
            return FAIL_STATIC, h
        if io < n_t and tau[io] <= t_new:
            for s in range(kz):
                a2 = 0.0
                a3 = 0.0
                b2 = 0.0
                b3 = 0.0
                for j in range(5):
                    a2 += cd[0, j] * kka[j, s]
                    a3 += cd[1, j] * kka[j, s]
                    b2 += cd[0, j] * kkb[j, s]
                    b3 += cd[1, j] * kkb[j, s]
                c2a[s] = a2
                c3a[s] = a3
                c2b[s] = b2
                c3b[s] = b3
            u2 = 0.0
            u3 = 0.0
            for j in range(5):
                u2 += cd[0, j] * kku[j]
                u3 += cd[1, j] * kku[j]
            while io < n_t and tau[io] <= t_new:
                sx = (tau[io] - t) / h
                s1 = 1.0 - sx
                # the row's amplitudes into ya, yb, uo (one call site of each helper below: each
                # inlined call binds its arrays again, an atomic reference count each)
                if sx < 1.0:
                    t_row = tau[io]
                    for s in range(kz):
                        ya[s] = wa[s] + sx * ((na[s] - wa[s]) + s1 * (c2a[s] + sx * c3a[s]))
                        yb[s] = wb[s] + sx * ((nb[s] - wb[s]) + s1 * (c2b[s] + sx * c3b[s]))
                    uo = wu + sx * ((nu - wu) + s1 * (u2 + sx * u3))
                else:
                    t_row = t_new
                    for s in range(kz):
                        ya[s] = na[s]
                        yb[s] = nb[s]
                    uo = nu
                if tau[io] < t_rat:  # the rational approximation's times: one row at a time
                    dst = out[io] if full else row
                    ok = _state(t_row, ya, yb, uo, kz, dst, y0, g, L, P, cbuf)
                    if not ok:
                        return FAIL_NEWTON, h
                    take_row(dst, row0 + io, taps, cap, nd)
                else:  # the others four at a time, in chain order
                    ok = _row_values(t_row, ya, yb, uo, kz, n_pend, y0, g, sc, cen, vy, yfast, wt, qconst,
                                     qslope, qm, uq, zi, qs, zsb, qb, tb)
                    if not ok:
                        return FAIL_NEWTON, h
                    rix[n_pend] = io
                    n_pend += 1
                    if n_pend == 4:
                        n_kept += _flush_rows(n_pend, y0, g, out, full, row, taps, row0, cap, n, idx, yfast, alone,
                                              fixed, n_fixed, nd, vyp, zsb, ysb, qb, tb, rix, chained, pos, plo, phi,
                                              capc, isc, mins)
                        n_pend = np.int64(0)
                io += 1
        if n_cur < cur_t.shape[0]:
            cur_t[n_cur] = t
            cur_h[n_cur] = h
            cur_r[n_cur] = reject
            n_cur += 1
        else:
            n_cur = cur_t.shape[0] + 1  # more steps than the record holds: the next interval follows none
        for s in range(kz):
            wa[s] = na[s]
            wb[s] = nb[s]
        wu = nu
        for a in range(n):
            cur_c[a] = new_c[a]
        for q in range(cur_q.shape[0]):
            cur_q[q] = new_q[q]
        t = t_new
        n_steps += 1
        stats[0] += 1
        for q in range(err_q.shape[0]):  # the cumulative amounts' error estimates, summed (floor_tolerances)
            qerr[q] += abs(err_q[q])
        stats[2] += 6
        if reject:
            h_new = min(h_new, h)
        reject = False
        h_carry = h_new if not last else max(h_new, h_carry)
        h = h_new
    if n_pend:
        n_kept += _flush_rows(n_pend, y0, g, out, full, row, taps, row0, cap, n, idx, yfast, alone, fixed, n_fixed,
                              nd, vyp, zsb, ysb, qb, tb, rix, chained, pos, plo, phi, capc, isc, mins)
    if n_kept:
        flush_chain_guard(mins, taps, y0, pos)
    # the state at the interval's end: off the chain as it started, the chain and the cumulative
    # amounts from the last step's end; before t_rat the modes not computed have not decayed, and
    # the step ends (the decayed modes' constants) leave them out: there the rational
    # approximation serves, as for the rows (an interval of 0.016 h between a bolus and a
    # remove, shorter than the modes' cut, lost the bolus to the constants: 0.35 mg removed
    # became 1e-7 mg)
    if t_end < t_rat:
        if not _state(t_end, wa, wb, wu, kz, cur, y0, g, L, P, cbuf):
            return FAIL_NEWTON, h
        for a in range(n):
            cur_c[a] = cur[idx[a]]
        for q in range(cur_q.shape[0]):
            cur_q[q] = cur[nd + q]
    for a in range(n):
        y[idx[a]] = cur_c[a]
    for q in range(cur_q.shape[0]):
        y[nd + q] = cur_q[q]
    for i in range(kz):
        carry[i] = wa[i]
    n_rec[1] = n_cur
    return OK, h_carry


# ---------------------------------------------------------------- the whole regimen
@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def split_schedule(marks, times, ev, m, base, s, order, cut, n_jac, y, states, ev_dosed, ev_removed, stats, full,
                   taps, ic, vmax, km, coef, rtol, atol, max_steps, info, qerr):
    """Run the regimen of a chain network with the saturable elimination of compartment ``ic``
    (``vmax`` mg/h, ``km`` mg/mL) by the split of the module docstring; returns a status code (0
    when done) and fills the rows as :func:`~barrierflow.engine.exact_chain.chain_schedule` does.

    ``m`` and ``base`` are the arrays of the network without the saturable elimination (``m`` the
    run's working copy, which the events change), ``cut`` (1/h, < 0) the chain path's cut of its
    modes (:func:`~barrierflow.engine.exact.mode_time`), ``info[0]`` gets the largest ratio of the
    static correction's bound to the absolute tolerances met, ``info[1]`` the number of intervals
    split again with more modes (:data:`RESPLIT`); ``info[2]`` is the step budget (inf for none;
    :attr:`SplitIntegrator.step_budget`), ``info[3]`` gets each interval's start (h) and ``info[4]``
    is the run's duration (h); ``qerr`` (mg, one per cumulative amount) gets the sum over the
    accepted steps of each cumulative amount's error estimate.
    """
    nc = m.n_comp
    nd = m.n_dyn
    n_state = y.shape[0]
    nqd = n_state - nd
    n_ord = order.shape[0]
    Lz = max(n_ord, 1)
    idx = np.zeros(Lz, dtype=np.int64)
    cmap = np.zeros(nd, dtype=np.int64)
    msq = np.zeros(Lz)
    tv = np.zeros(Lz)
    dd = np.zeros(Lz)
    ee = np.zeros(Lz)
    gedge = np.zeros(Lz)
    ediag = np.zeros(Lz)
    comp_of = np.zeros(Lz, dtype=np.int64)
    lam = np.zeros(Lz)
    vec = np.zeros((1, Lz))
    rows = np.zeros(n_jac, dtype=np.int64)
    cols = np.zeros(n_jac, dtype=np.int64)
    vals = np.zeros(n_jac)
    qr = np.zeros(n_jac, dtype=np.int64)
    qc = np.zeros(n_jac, dtype=np.int64)
    qv = np.zeros(n_jac)
    key_clamp = np.zeros(nc, dtype=np.bool_)
    key_closed = np.zeros(nc, dtype=np.bool_)
    have = False
    n = np.int64(0)
    k_all = np.int64(0)
    kz = np.int64(0)
    nq = np.int64(0)
    t_thr = 0.0
    cut_now = -CUT_SLOW
    pc = np.int64(0)
    s_f = 0.0
    static_w = np.zeros(4)
    sfy = np.zeros(Lz)
    vyp = np.zeros((4, Lz))
    qm = np.zeros(0, dtype=np.int64)
    ilam = np.zeros(1)
    rows_z = np.zeros((4, 4))
    chain_t = chain_taps(idx, 0, nd, taps, m.capacity, full)
    rows_y = np.zeros((4, Lz))
    rows_q = np.zeros((4, nqd))
    rows_t = np.zeros(4)
    ends_z = np.zeros((2, 4))
    ends_y = np.zeros((2, Lz))
    atc = np.zeros(Lz)
    alone_at = np.zeros(0, dtype=np.int64)
    comp_at = np.zeros(0, dtype=np.int64)
    cur_c = np.zeros(Lz)
    new_c = np.zeros(Lz)
    cur_q = np.zeros(nqd)
    new_q = np.zeros(nqd)
    err_q = np.zeros(nqd)
    rows_i = np.zeros(4, dtype=np.int64)
    mins = np.zeros((3, Lz))
    uq = np.zeros(nqd)
    beta = np.zeros(1)
    vy = np.zeros((1, Lz))
    wt = np.zeros((1, nqd))
    icap = 1.0 / m.capacity[ic]
    carry = np.zeros(MAX_MODES + 1)
    yz = np.zeros(n_state)
    uz = np.zeros(nd)
    g = np.zeros(n_state)
    x0 = np.zeros(Lz)
    tg = np.zeros(Lz)
    px = np.zeros(Lz)
    pg = np.zeros(Lz)
    ppg = np.zeros(Lz)
    e1 = np.zeros(Lz)
    pe = np.zeros(Lz)
    pe2 = np.zeros(Lz)
    yfast = np.zeros(Lz)
    qconst = np.zeros(nqd)
    qslope = np.zeros(nqd)
    qsum = np.zeros(nqd)
    xs = np.zeros(Lz)
    xi = np.zeros(Lz)
    cw = np.zeros((6, Lz), dtype=np.complex128)
    cw4 = np.zeros((8, Lz, RATIONAL_POLES.shape[0]))
    ys = np.zeros(Lz)
    alone = np.zeros(Lz, dtype=np.bool_)
    fixed = np.zeros(nd, dtype=np.int64)
    n_fixed = np.int64(0)
    infusion = s.infusion
    clamp = s.clamp
    closed = s.closed
    dosed = s.dosed
    removed = s.removed
    n_marks = marks.shape[0]
    n_t = times.shape[0]
    row = np.int64(0)
    ei = np.int64(0)
    h = 1e-4 * (marks[1] - marks[0]) if n_marks > 1 else 1.0
    cut_req = min(cut, -CUT_SLOW)
    again = False  # the interval is computed again, its events applied already
    guard0 = np.zeros(3)
    rec_t = np.zeros((2, REPLAY_STEPS))
    rec_h = np.zeros((2, REPLAY_STEPS))
    rec_r = np.zeros((2, REPLAY_STEPS), dtype=np.bool_)
    n_rec = np.zeros(2, dtype=np.int64)
    p_rec = 0
    t_prev = -1.0
    k = 0
    while k < n_marks - 1:
        t0 = marks[k]
        t1 = marks[k + 1]
        if not again:
            ei = apply_events(t0, ei, ev, m, base, y, s)
            if clamp[ic]:
                return FAIL_CLAMPED
        same = have and not again
        for p in range(nc):
            if clamp[p] != key_clamp[p] or closed[p] != key_closed[p]:
                same = False
        if not same:
            for s_ in range(carry.shape[0]):
                carry[s_] = 0.0  # new modes: the split starts with the slow part in y_lin
            # the chain of this clamp pattern, its slow modes and the static response
            n = _build(order, clamp, m, idx, cmap, msq, tv, dd, ee, gedge, ediag, comp_of)
            pc = cmap[ic]
            cut_now, k_need = _mode_cut(dd, ee, n, cut_req, comp_of)  # at most MAX_MODES
            t_thr = -60.0 / cut_now
            if k_need > vec.shape[0]:
                vec = np.zeros((k_need, Lz))
            k_all = _slow_modes(dd, ee, n, cut_now, gedge, ediag, msq, comp_of, lam, vec)
            if k_all < 0:
                return FAIL_MODES
            kz = k_all  # every computed mode is integrated: the static part takes only the decayed ones
            # the quadrature rates (rows of the cumulative amounts) acting on the chain's states
            kj = jacobian_kernel(yz, rows, cols, vals, m, clamp)
            nq = 0
            for j in range(kj):
                if rows[j] >= nd:
                    qr[nq] = rows[j]
                    qc[nq] = cmap[cols[j]] if cols[j] < nd else -1
                    qv[nq] = vals[j]
                    nq += 1
            vy = np.zeros((max(k_all, 1), Lz))
            for s_ in range(k_all):
                for a in range(n):
                    vy[s_, a] = vec[s_, a] / tv[a]
            wt = np.zeros((max(k_all, 1), nqd))
            for j in range(nq):
                a = qc[j]
                if a < 0:
                    continue
                for s_ in range(k_all):
                    wt[s_, qr[j] - nd] += qv[j] * vy[s_, a]
            # the cumulative amounts that some mode moves (the others take their constant and slope)
            n_qm = 0
            for q in range(nqd):
                for s_ in range(k_all):
                    if wt[s_, q] != 0.0:
                        n_qm += 1
                        break
            qm = np.zeros(n_qm, dtype=np.int64)
            n_qm = 0
            for q in range(nqd):
                for s_ in range(k_all):
                    if wt[s_, q] != 0.0:
                        qm[n_qm] = q
                        n_qm += 1
                        break
            ilam = np.zeros(max(k_all, 1))
            for s_ in range(k_all):
                ilam[s_] = 1.0 / lam[s_]
            # static response of the fast modes to u: s_F = -P T^+ P beta (beta = tv_c e_c)
            for a in range(n):
                e1[a] = 0.0
            e1[pc] = 1.0
            _project_fast(dd, ee, n, ediag, msq, comp_of, lam, vec, kz, e1, pe)
            _project_fast(dd, ee, n, ediag, msq, comp_of, lam, vec, kz, pe, pe2)
            for a in range(n):
                sfy[a] = -pe[a] * tv[pc] / tv[a]
            s_f = sfy[pc]
            # the rows' patterns: the modes' states, then the static part's (per unit u), padded
            # to a multiple of four with zeros
            vyp = np.zeros(((k_all + 4) // 4 * 4, Lz))
            for s_ in range(k_all):
                for a in range(n):
                    vyp[s_, a] = vy[s_, a]
            for a in range(n):
                vyp[k_all, a] = sfy[a]
            rows_z = np.zeros((4, vyp.shape[0]))
            chain_t = chain_taps(idx, n, nd, taps, m.capacity, full)
            ends_z = np.zeros((2, vyp.shape[0]))
            for q in range(nqd):
                uq[q] = 0.0
            for j in range(nq):
                a = qc[j]
                if a >= 0:
                    uq[qr[j] - nd] += qv[j] * sfy[a]
            uq[ic] -= m.capacity[ic]  # the eliminated amount: -V_c int u
            beta = np.zeros(max(kz, 1))
            for s_ in range(kz):
                beta[s_] = vec[s_, pc] * tv[pc]
            # the bound of the static correction's lag at each free state, per unit |du/dt|,
            # against its absolute tolerance
            w1 = 0.0
            w2 = 0.0
            for a in range(n):
                w1 += pe[a] * pe[a]
                w2 += pe2[a] * pe2[a]
            static_w[0] = math.sqrt(w1) * tv[pc]
            static_w[1] = math.sqrt(w2) * tv[pc]
            static_w[2] = 0.0
            for a in range(n):
                static_w[2] = max(static_w[2], 1.0 / (tv[a] * atol[idx[a]]))
            static_w[3] = cut_now
            on_chain = np.zeros(nd, dtype=np.bool_)
            for a in range(n):
                on_chain[idx[a]] = True
            n_fixed = 0
            for q in range(nd):
                if not on_chain[q]:
                    fixed[n_fixed] = q
                    n_fixed += 1
            # states that nothing touches keep their value plus what is infused; never the
            # saturable compartment, which the elimination empties even when linked to nothing
            for a in range(n):
                alone[a] = a != pc and ediag[a] == 0.0 and (a == 0 or comp_of[a - 1] != comp_of[a]) and (
                    a == n - 1 or comp_of[a + 1] != comp_of[a])
            # the step ends' tolerances in chain order, the positions alone and the compartments'
            n_alone = 0
            n_comp_at = 0
            for a in range(n):
                atc[a] = atol[idx[a]]
                n_alone += 1 if alone[a] else 0
                n_comp_at += 1 if idx[a] < nc else 0
            alone_at = np.zeros(n_alone, dtype=np.int64)
            comp_at = np.zeros(n_comp_at, dtype=np.int64)
            n_alone = 0
            n_comp_at = 0
            for a in range(n):
                if alone[a]:
                    alone_at[n_alone] = a
                    n_alone += 1
                if idx[a] < nc:
                    comp_at[n_comp_at] = a
                    n_comp_at += 1
            for p in range(nc):
                key_clamp[p] = clamp[p]
                key_closed[p] = closed[p]
            have = True
            stats[3] += 1
            stats[4] += 1
        _forcing(y, m, infusion, clamp, nc, yz, uz, g)
        stats[2] += 1
        # the split: z(0) = V_S a + s_F u(c(0)) with the slow amplitudes a carried over the event
        # (the slow modes near the cut would otherwise start far from their response to u, and
        # both parts would carry that transient), y_lin(0) = y(0) - z(0)
        u0 = -saturable_rate(vmax, km, y[ic]) * icap
        # the integrated modes faster than CUT_SLOW (integrated for the output times or after a
        # RESPLIT) start in step with the elimination too, at their static response -beta u / lam,
        # as they would in the static part: from 0 (or from the response to u before the event),
        # each would carry a transient over 1 / |lam|, and y_lin the opposite one; the two cancel
        # at the step ends, but a step of thousands of times 1 / |lam| sees no error in its
        # estimate, and the rows inside it, interpolated, keep all of that transient
        for s_ in range(kz):
            if lam[s_] < -CUT_SLOW:
                carry[s_] = -beta[s_] * u0 / lam[s_]
        has_g = np.bool_(False)
        for a in range(n):
            v = 0.0
            for s_ in range(kz):
                v += vec[s_, a] * carry[s_]
            x0[a] = tv[a] * (y[idx[a]] - sfy[a] * u0) - v
            tg[a] = tv[a] * g[idx[a]]
            if tg[a] != 0.0:
                has_g = True
        z0 = np.zeros(max(k_all, 1))
        gz = np.zeros(max(k_all, 1))
        for s_ in range(k_all):
            a0 = 0.0
            b0 = 0.0
            for a in range(n):
                a0 += vec[s_, a] * x0[a]
                b0 += vec[s_, a] * tg[a]
            z0[s_] = a0
            gz[s_] = b0
        # the modes not computed (decayed by t_thr): constants (states), constant and slope
        # (cumulative amounts), through T^+ (as the chain path)
        _fast_constants(dd, ee, n, ediag, msq, comp_of, lam, vec, k_all, x0, tg, has_g, tv, qr, qc, qv, nq, nd, px,
                        pg, ppg, yfast, qconst, qslope)
        # the central row: the decayed modes' forcing constants, summed from the fastest
        csum = np.zeros(max(k_all, 1) + 1)
        vyc_all = np.zeros(max(k_all, 1))
        for s_ in range(k_all):
            vyc_all[s_] = vy[s_, pc]
        for s_ in range(k_all - 1, -1, -1):
            term = 0.0
            if has_g and lam[s_] != 0.0:
                term = vyc_all[s_] * (-gz[s_] / lam[s_])
            csum[s_] = csum[s_ + 1] + term
        P = (pc, s_f, sfy, uq, vmax, km, icap, nd, xs, xi, cw, ys, np.zeros(max(k_all, 1)),
             np.zeros(max(k_all, 1)), np.zeros(nqd))
        # r0 = T x0 + tg: the rate of the linear solution at the start (its derivative at the
        # saturable compartment before the modes serve)
        r0 = np.empty(max(n, 1))
        for a in range(n):
            v = dd[a] * x0[a] + tg[a]
            if a > 0:
                v += ee[a - 1] * x0[a - 1]
            if a + 1 < n:
                v += ee[a] * x0[a + 1]
            r0[a] = v
        # before t_thr the modes not computed have not decayed: the rational approximation serves
        # there, unless their whole part at the saturable compartment, e_c^T exp(t T_F) (P_F x0 +
        # P T^+ P tg) (the forcing's part measured from its steady value), is below a thousandth
        # of its absolute tolerance: at most |P_F e_c| exp(cut t) |P_F x0 + P T^+ P tg|
        # (Cauchy-Schwarz; every mode not computed is at or below the cut)
        pf = 0.0
        for a in range(n):
            v = x0[a] + (pg[a] if has_g else 0.0)
            for s_ in range(k_all):
                v -= z0[s_] * vec[s_, a]
            pf += v * v
        pe_c = 1.0
        for s_ in range(k_all):
            pe_c -= vec[s_, pc] * vec[s_, pc]
        bound0 = math.sqrt(max(pe_c, 0.0) + 1e-15) * math.sqrt(pf) / tv[pc]
        target = 1e-3 * atol[ic]
        t_lim = t_thr
        if bound0 > target:
            t_lim = min(t_thr, math.log(bound0 / target) / -cut_now)
        else:
            t_lim = 0.0
        # the same for every state (the full states at step ends and rows): each free state's part
        # is at most exp(cut t) |v| / sqrt(V/K), each cumulative amount's (the integral of the
        # difference from its constant) exp(cut t) |v| / |cut| times the sum of its rates' weights
        t_all = t_lim
        vn = math.sqrt(pf)
        for a in range(n):
            b_a = vn / tv[a]
            tgt = 1e-3 * atol[idx[a]]
            if b_a > tgt:
                t_all = max(t_all, math.log(b_a / tgt) / -cut_now)
        for q in range(nqd):
            qsum[q] = 0.0
        for j in range(nq):
            a = qc[j]
            if a >= 0:
                qsum[qr[j] - nd] += abs(qv[j]) / tv[a]
        for q in range(nqd):
            b_q = qsum[q] * vn / -cut_now
            tgt = 1e-3 * atol[nd + q]
            if b_q > tgt:
                t_all = max(t_all, math.log(b_q / tgt) / -cut_now)
        t_all = min(t_all, t_thr)
        # the central row's numbers in two arrays (see _central)
        cen = np.zeros((6, max(k_all, 1) + 1))
        for s_ in range(k_all):
            cen[0, s_] = lam[s_]
            cen[1, s_] = ilam[s_]
            cen[2, s_] = z0[s_]
            cen[3, s_] = gz[s_]
            cen[4, s_] = vyc_all[s_]
        for s_ in range(csum.shape[0]):
            cen[5, s_] = csum[s_]
        rat = np.zeros((5, Lz))
        for a in range(n):
            rat[0, a] = dd[a]
            rat[1, a] = ee[a]
            rat[2, a] = x0[a]
            rat[3, a] = tg[a]
            rat[4, a] = r0[a]
        L = (n, idx, tv, dd, ee, lam, vec, vy, wt, k_all, z0, gz, yfast, qconst, qslope, x0, tg, has_g, t_all,
             alone, fixed, n_fixed, nq, qr, qc, qv, ilam, qm, cen)
        R = (beta, vyc_all, cen, rat, yfast[pc], tv[pc], cw4, t_lim)
        sel_end = rows_until(times, row, t1, k == n_marks - 2)
        m_out = sel_end - row
        tau = np.empty(m_out)
        for r in range(m_out):
            tau[r] = times[row + r] - t0
        W = (vyp, rows_z, rows_y, rows_q, rows_t, rows_i, chain_t, mins)
        guard = taps[7]
        for i in range(3):
            guard0[i] = guard[i]
        info0 = info[0]
        info[3] = t0
        h0 = h
        S = (vyp, ends_z, ends_y, atc, alone_at, comp_at, cur_c, new_c, cur_q, new_q, err_q)
        # the previous interval's steps serve one of the same length on the same modes (REPLAY_STEPS)
        n_rec[0] = n_rec[1] if same and t1 - t0 == t_prev and n_rec[1] <= REPLAY_STEPS else -1
        rec = (rec_t[p_rec], rec_h[p_rec], rec_r[p_rec], rec_t[1 - p_rec], rec_h[1 - p_rec], rec_r[1 - p_rec], n_rec,
               qerr)
        status, h = _interval(y, t1 - t0, tau, states[row:sel_end] if full else states, full, taps, row,
                              m.capacity, L, P, R, W, S, kz, coef, rtol, atol, nc, h, max_steps, stats, static_w, info,
                              g, carry, rec)
        if status == FAIL_STATIC and cut_now == cut_req:
            # the fast modes lag too far behind their static response: split this interval again
            # with the modes up to RESPLIT times faster integrated (the state at its start, its
            # rows and the guard as before it; the interval's failed steps stay counted), and keep
            # that cut for the rest of the run. Only once MAX_MODES modes are integrated does the
            # run go to RODAS4.
            cut_req *= RESPLIT
            again = True
            h = h0
            for i in range(3):
                guard[i] = guard0[i]
            for i in range(mins.shape[0]):
                for a in range(mins.shape[1]):
                    mins[i, a] = 0.0
            info[0] = info0
            info[1] += 1.0
            continue
        again = False
        if status != OK:
            return status
        for r in range(m_out):
            for p in range(nc):
                ev_dosed[row + r, p] = dosed[p]
                ev_removed[row + r, p] = removed[p]
        row = sel_end
        stats[5] += 1
        k += 1
        p_rec = 1 - p_rec  # this interval's steps serve the next
        t_prev = t1 - t0
    if row < n_t:
        return FAIL_STEP
    return OK


SPLIT_BALANCE_LIMIT = 1e-9
"""The largest relative error of a split run's ledger (:func:`~barrierflow.engine.ledger.rows_relative_error`)
that :func:`split_unresolved` accepts. The linear part is exact and RODAS4 keeps the linear
invariants of the slow modes' system, so the 37 split runs of the adversarial sweep's default
(extreme patches 0-199, random cases 0-399) closed it to 4e-10 or better (extreme patch 90, within
the contract; the others 2e-11 or better); a ledger further off shows the chain's modes rounding at
about 1e-7 of each state's scale, which a compartment far below its scale is made of (extreme
patch 1910: 2.1e-7 mg in a peripheral compartment that scipy's Radau leaves at 1e-68 mg, 21.4
times the contract, its ledger 2.7e-8 off)."""

SUM_LIMIT = 20.0
"""How many times the accuracy promised on a cumulative amount (:data:`~barrierflow.engine.ledger.FINAL_TOLERANCE`
of its peak, floored at :data:`~barrierflow.engine.ledger.MAGNITUDE_FLOOR` of the run's largest
amount) the sum of its error estimates over the accepted steps may be (:func:`split_unresolved`).
The split's relative tolerance (3e-6) is itself three times that promise, and its rows inside a
step come from the dense output, so the sum is a yardstick, not a bound: on the adversarial
sweep the amount's error against scipy's Radau was 0.025 to 0.15 of its sum (extreme patches 4,
97 and 1487, random case 107: sums of 103, 48, 212 and 22, errors of 2.5, 2.8, 20.1 and 3.4
times the contract); the benchmark's saturable variant has 1.9 (its eliminated amount), and the
other 33 split runs of the sweep's default (extreme 0-199, random 0-399) 7.7 or less."""


def split_unresolved(model: CompiledModel, rows: Rows, event_dosed: np.ndarray, event_removed: np.ndarray,
                     estimate: np.ndarray) -> str:
    """Why a finished split run is not to be trusted, in words ('' when it is): its ledger off by
    more than :data:`SPLIT_BALANCE_LIMIT`, or a cumulative amount whose error estimates summed over
    the accepted steps (``estimate``, mg) exceed :data:`SUM_LIMIT` times the accuracy promised on
    it. The run is then computed on RODAS4 over all states."""
    m = model
    t = rows.taps
    if not len(rows.cols):
        return ""
    bal = rows_relative_error(m, rows, event_dosed, event_removed)
    if not bal <= SPLIT_BALANCE_LIMIT:
        return f"its mass balance was off by {bal:.3g} of what moved"
    nq = m.n_state - m.n_dyn
    if not nq or not float(estimate.max()) > 0.0:
        return ""
    peak = np.empty(nq)
    _floor_peaks(rows.cols, estimate, 0.0, peak)
    if not np.any(estimate > SUM_LIMIT * FINAL_TOLERANCE * peak):
        return ""
    big = float(_magnitudes(rows.cols, t.keep, t.bstart, t.bstop, m.capacity, m.has_volume, m.scale, m.n_comp,
                            m.n_dyn, m.q_elim, m.q_perm, m.q_lost, m.q_sampled, rows.content,
                            np.ascontiguousarray(event_dosed), np.ascontiguousarray(event_removed),
                            present_amount(m, m.y0), -1.0)[7])
    over = estimate / (FINAL_TOLERANCE * np.maximum(peak, MAGNITUDE_FLOOR * big))
    q = int(over.argmax())
    if not over[q] > SUM_LIMIT:
        return ""
    return (f"the error estimates of {describe_state(m, m.n_dyn + q)} summed to {over[q]:.3g} times the accuracy "
            "promised on it")


@dataclass(frozen=True)
class SplitIntegrator(Integrator):
    """The linear part exact, the slow modes by RODAS4: chain networks with the saturable
    elimination of one compartment (see the module docstring).

    A run whose conditions fail on the way (the bound of the static correction, the Newton
    iteration of the saturable concentration, a hold on that compartment, the modes' check, the
    step budget) is computed on :class:`~barrierflow.engine.rosenbrock.RosenbrockIntegrator` at
    the same tolerances instead, and its message says so.

    Parameters
    ----------
    rtol, atol : float
        As :class:`~barrierflow.engine.rosenbrock.RosenbrockIntegrator` (3e-6 and 3e-9 of each
        state's magnitude scale), applied to every state.
    max_steps : int
        Largest number of steps in one dosing interval (default 1,000,000).
    step_budget : float or None
        Most steps, accepted and rejected, over the whole run (None: no budget): :data:`BUDGET_START`
        of it from the start, the rest in proportion to the simulated time; past it the run is
        computed on RODAS4. The default (:class:`~barrierflow.engine.integrators.AutoIntegrator`)
        sets it from RODAS4's estimated steps (:data:`~barrierflow.engine.integrators.SPLIT_BUDGET`),
        so that a split that turns out slower than its estimate costs a bounded share of work more
        than RODAS4 alone.
    """

    rtol: float = 3e-6
    atol: float = 3e-9
    max_steps: int = 1_000_000
    step_budget: float | None = None
    name: str = field(init=False, default="split")

    def __post_init__(self) -> None:
        check_tolerances(self.rtol, self.atol)
        if not (isinstance(self.max_steps, int) and self.max_steps >= 1):
            raise ScenarioError.single("integrator max_steps", self.max_steps, "must be a whole number >= 1")
        b = self.step_budget
        if b is not None and not (isinstance(b, float | int) and not isinstance(b, bool) and b > 0):
            raise ScenarioError.single("integrator step_budget", b, "must be a number of steps > 0, or none")

    def working_memory(self, model: CompiledModel) -> int:
        """Bytes of working arrays: the chain's slow modes (k x n) and O(n) vectors."""
        n = model.n_state
        return 8 * (2 * MAX_MODES + 60) * n + 8 * 12 * len(model.link_p)

    def run(self, plan: RunPlan) -> Integration:
        """Run the whole regimen (:func:`split_schedule`).

        Raises
        ------
        ScenarioError
            For a model the split does not apply to (:func:`linear_part`).
        """
        from .exact import _FAST

        model = plan.model
        refuse_vehicle_terms(model, self.name)
        lin = linear_part(model)
        if lin is None:
            raise ScenarioError.single("integrator", "'split'",
                                       "needs a chain network (no transfers, at most two neighbours per state) with "
                                       "saturable elimination (vmax, km) in exactly one compartment that is not held; "
                                       "use auto or rodas")
        times, marks, ev = plan.times, plan.marks, plan.events
        n_t, nc = len(times), model.n_comp
        base = lin.arrays
        full = plan.full
        st = np.zeros(6, dtype=np.int64)
        ic = int(model.mm_state[0])
        held = bool(np.any((ev.kind == EV_HOLD_START) & (ev.comp == ic)))
        atol = self.atol * model.scale
        rescaled = False
        while True:
            work = working_copy(base)
            s = start_events(base, len(ev.time))
            if full:
                states = np.empty((n_t, model.n_state))
                taps = empty_taps(model.n_state)
            else:
                states = np.empty((1, model.n_state))
                taps = new_buffers(taps_of(model), n_t, model.n_state)
            ev_dosed = np.empty((n_t, nc))
            ev_removed = np.empty((n_t, nc))
            info = np.zeros(5)
            info[2] = np.inf if self.step_budget is None else float(self.step_budget)
            info[4] = max(plan.duration, 1e-300)
            qerr = np.zeros(model.n_state - model.n_dyn)
            if held:
                code = FAIL_CLAMPED  # a hold on the compartment, known before the run: no split work spent on it
            else:
                code = split_schedule(marks, times, ev, work, base, s, chain_order(lin), _FAST / plan.mode_time,
                                      jacobian_size(lin), model.y0.copy(), states, ev_dosed, ev_removed, st, full,
                                      taps, ic, float(model.mm_vmax[0]), float(model.mm_km[0]), COEF,
                                      float(self.rtol), atol, self.max_steps, info, qerr)
            if code != OK:
                break
            rows = Rows.from_states(model, states) if full else Rows.from_buffers(model, taps, n_t)
            tighter = None if rescaled else floor_tolerances(model, rows, ev_dosed, ev_removed, atol, qerr,
                                                             1.0 / ROW_FACTOR)
            if tighter is None:
                why = split_unresolved(model, rows, ev_dosed, ev_removed, qerr)
                if why:
                    code = FAIL_UNRESOLVED
                break
            atol, rescaled = tighter, True  # computed again, those amounts held to their floor
        if code != OK:
            rodas = RosenbrockIntegrator(rtol=self.rtol, atol=self.atol, max_steps=self.max_steps)
            out = rodas.run(plan)
            if code != FAIL_UNRESOLVED:
                why = _FAILURES.get(int(code), "unknown failure")
            if code == FAIL_BUDGET:
                why = f"{why}, {self.step_budget:.0f}, after {int(st[0] + st[1])} steps"
            note = (f"computed on {rodas.name} over all states: the split of the saturable elimination did not "
                    f"apply ({why})" if code != FAIL_UNRESOLVED else
                    f"computed on {rodas.name} over all states: the split's result was not trusted ({why})")
            return Integration(out.states, out.event_dosed, out.event_removed, out.status,
                               f"{out.message} ({note})", out.stats, out.event_amounts, out.volumes, out.failed_at,
                               out.rows, out.last)
        stats = RunStats()
        stats.add(st)
        if plan.progress is not None:
            plan.progress(1.0)
        message = "the run finished"
        if rescaled:
            message += (" (computed twice: the second time with the cumulative amounts that stayed below the "
                        "magnitude floor held to it)")
        if full:
            return Integration(states, ev_dosed, ev_removed, 0, message, stats, s.moved.copy())
        return Integration(None, ev_dosed, ev_removed, 0, message, stats, s.moved.copy(),
                           rows=Rows.from_buffers(model, taps, n_t), last=taps[8])
