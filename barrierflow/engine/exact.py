"""Exact solution of linear networks between events.

Without saturable elimination the compiled model is linear: between two events
``dy/dt = A y + g`` with A and g constant (g holds infusions and what clamped compartments
give). The quadratures (cumulative amounts) have empty columns in A, so only the dynamic
states need a matrix function; the quadratures follow from integrals of the dynamic states.

Symmetric networks (no one-way transfer). Every process conserves the potential u = y / K and
is reciprocal, so with t = sqrt(V / K) (V the capacity) the matrix ``B = diag(t) A diag(1/t)``
of the unclamped dynamic states is symmetric negative semi-definite: each barrier network is a
symmetric generalised eigenproblem. With ``B = Q diag(lam) Q^T`` each mode evolves exactly::

    z(tau) = exp(lam tau) z0 + tau phi1(lam tau) gz,      phi1(x) = (exp(x) - 1) / x
    int_0^tau z = tau phi1(lam tau) z0 + tau^2 phi2(lam tau) gz,   phi2(x) = (exp(x) - 1 - x) / x^2

(the eigenvector method of Moler and Van Loan, Nineteen dubious ways to compute the exponential
of a matrix, twenty-five years later, SIAM Review 45, 2003, which is well conditioned for a
symmetric matrix). When the states form one chain (a
patch, its barrier cells, the body compartments in a row), B is tridiagonal in chain order and
the decomposition costs O(n^2) (LAPACK's MRRR); otherwise a dense symmetric decomposition is
used. Modes so fast that exp(lam tau) < 1e-26 at every requested time contribute only their
constant (and, in the integrals, linear) part, so the outputs need only the slow modes.

Other linear networks (with transfers). The augmented matrix ``[[A, g], [0, 0]]`` is
exponentiated once per distinct step length (scipy's scaling and squaring with Pade
approximants, Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 31, 2009) and the state is
propagated from output time to output time. On very stiff networks (fast thin cells) over long
steps the squarings amplify rounding to about 1e-10 per step (a closed cell loses 2e-9 of its
mass in 40 steps of 10 h), far below any integrator tolerance but above the symmetric paths'
rounding, which is why those are preferred whenever they apply.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numba import njit

from ..errors import ScenarioError
from .arrays import working_copy
from .compiled import CompiledModel
from .exact_chain import _phi1, _phi2, chain_order, chain_schedule
from .exported import Rows, empty_taps, new_buffers, taps_of
from .integrators import Integration, Integrator, RunPlan, RunStats, refuse_vehicle_terms
from .kernels import jacobian_coo, jacobian_size, rates
from .schedule import apply_events, rows_until, start_events

__all__ = ["EXACT_BALANCE_LIMIT", "ExactIntegrator", "exact_balance_findings", "exact_supported", "phi1", "phi2"]

_FAST = -60.0  # exp(-60) ~ 9e-27: a mode below this at every output time has decayed to nothing


def phi1(x: np.ndarray) -> np.ndarray:
    """(exp(x) - 1) / x, accurate near 0 (1 at 0)."""
    x = np.asarray(x, dtype=float)
    out = np.empty_like(x)
    small = np.abs(x) < 1e-5
    xs = x[small]
    out[small] = 1.0 + xs / 2.0 + xs * xs / 6.0
    xl = x[~small]
    out[~small] = np.expm1(xl) / xl
    return out


def phi2(x: np.ndarray) -> np.ndarray:
    """(exp(x) - 1 - x) / x^2, accurate near 0 (1/2 at 0)."""
    x = np.asarray(x, dtype=float)
    out = np.empty_like(x)
    small = np.abs(x) < 0.1
    xs = x[small]
    # Taylor series to x^7: truncation below 1e-17 for |x| < 0.1
    out[small] = 0.5 + xs * (1 / 6 + xs * (1 / 24 + xs * (1 / 120 + xs * (1 / 720 + xs * (1 / 5040 + xs * (
        1 / 40320 + xs / 362880))))))
    xl = x[~small]
    out[~small] = (np.expm1(xl) - xl) / (xl * xl)
    return out


def _jacobian(model: CompiledModel, clamp: np.ndarray) -> np.ndarray:
    """Dense Jacobian (n_state x n_state) of the linear model with ``clamp``."""
    m = model
    size = jacobian_size(m)
    rows = np.zeros(size, dtype=np.int64)
    cols = np.zeros(size, dtype=np.int64)
    vals = np.zeros(size)
    k = jacobian_coo(np.zeros(m.n_state), rows, cols, vals, m.arrays, clamp)
    a = np.zeros((m.n_state, m.n_state))
    np.add.at(a, (rows[:k], cols[:k]), vals[:k])
    return a


def _forcing(model: CompiledModel, y: np.ndarray, infusion: np.ndarray, clamp: np.ndarray) -> np.ndarray:
    """g = f(y with the unclamped dynamic states set to 0): infusions and what clamps give."""
    m = model
    y0 = np.zeros(m.n_state)
    y0[: m.n_comp] = np.where(clamp, y[: m.n_comp], 0.0)
    out = np.empty(m.n_state)
    rates(y0, out, m.arrays, infusion, clamp)
    return out


def _chain_order(b: np.ndarray) -> np.ndarray | None:
    """An order in which symmetric ``b`` is tridiagonal, or None when its graph is not a set of paths."""
    n = b.shape[0]
    off = b != 0.0
    np.fill_diagonal(off, False)
    deg = off.sum(axis=1)
    if n == 0 or deg.max(initial=0) > 2 or off.sum() // 2 > n - 1:
        return None
    # neighbours as two columns (-1 where none)
    ii, jj = np.nonzero(off)
    nb = np.full((n, 2), -1, dtype=np.int64)
    first = np.ones(len(ii), dtype=bool)
    first[1:] = ii[1:] != ii[:-1]
    nb[ii[first], 0] = jj[first]
    nb[ii[~first], 1] = jj[~first]
    nbl = nb.tolist()
    seen = [False] * n
    order: list[int] = []
    for start in np.flatnonzero(deg <= 1).tolist():
        if seen[start]:
            continue
        prev, cur = -1, start
        while cur >= 0 and not seen[cur]:
            seen[cur] = True
            order.append(cur)
            a, c = nbl[cur]
            nxt = a if a != prev and a >= 0 and not seen[a] else c if c >= 0 and not seen[c] else -1
            prev, cur = cur, nxt
    if len(order) != n:  # a cycle
        return None
    return np.array(order, dtype=np.int64)


@dataclass(eq=False)
class _Modes:
    """The decomposition of one clamp pattern (modes slowest first).

    With ``tri`` set (a chain that is not singular) only the modes slower than a cut are
    computed; the faster ones enter through solves with B (see :func:`_fast_terms`).
    """

    free: np.ndarray      # indices of the unclamped dynamic states
    fixed: np.ndarray     # the clamped compartments
    t: np.ndarray         # symmetrising scale sqrt(V/K) of the free states
    lam: np.ndarray       # eigenvalues, 1/h
    qt: np.ndarray        # orthonormal eigenvectors as rows (modes x free)
    qyt: np.ndarray       # (diag(1/t) q)^T: the states of each mode
    wt: np.ndarray        # (A_QD diag(1/t) q)^T: the quadrature rates of each mode
    aqt: np.ndarray       # A_QD diag(1/t): quadrature rates per free state (x-space)
    tri: tuple | None     # (order, factors of B in chain order) when B^-1 is used
    complete: bool        # every mode was computed


@dataclass(eq=False)
class _Propagator:
    """Matrix exponentials of the augmented matrix of one interval setting, by step length."""

    aug: np.ndarray
    cache: dict = field(default_factory=dict)

    def step(self, dt: float) -> np.ndarray:
        key = float(f"{dt:.12e}")
        e = self.cache.get(key)
        if e is None:
            import scipy.linalg as sla

            with one_blas_thread():
                e = sla.expm(self.aug * dt)
            self.cache[key] = e
        return e


_CONTROLLER = None


def one_blas_thread():
    """A context in which BLAS and LAPACK run on one thread (threadpoolctl).

    The exact paths' matrices are small (at most a few hundred states): on a loaded two-core
    machine OpenBLAS's threads wait for each other, and a 101 x 101 matrix exponential took
    0.5 s instead of 4.5 ms on one thread.
    """
    global _CONTROLLER
    if _CONTROLLER is None:
        from threadpoolctl import ThreadpoolController

        _CONTROLLER = ThreadpoolController()
    return _CONTROLLER.limit(limits=1, user_api="blas")


def _symmetric_modes(model: CompiledModel, a: np.ndarray, clamp: np.ndarray, cut: float = -np.inf) -> _Modes | None:
    """Eigen-decomposition of the symmetrised free block, or None when the modes cannot be trusted.

    Each connected part of the free states is decomposed on its own (numpy.linalg.eigh, LAPACK
    syevd), so that modes of parts that do not touch never mix; each eigenvalue is then polished
    as its Rayleigh quotient written as a sum of squares (relative accuracy for the slow modes,
    as on the chain path). eigh is backward stable, so the modes are those of a network whose
    rates are off by rounding times the largest rate; :data:`STIFFNESS_LIMIT` bounds what that
    does. ``cut`` is not used (every mode is computed).
    """
    nd = model.n_dyn
    free = np.flatnonzero(~np.concatenate([clamp, np.zeros(nd - model.n_comp, dtype=bool)]))
    nf = len(free)
    add = a[np.ix_(free, free)]
    t = np.sqrt(model.capacity[free] * model.inv_partition[free])
    b = add * t[:, None] / t[None, :]
    b = 0.5 * (b + b.T)
    ep, eq, gw, ediag, msq = _conductances(model, free)
    lam = np.zeros(nf)
    q = np.zeros((nf, nf))
    label = _block_labels(b)
    col = 0
    for part in np.unique(label):
        idx = np.flatnonzero(label == part)
        blk = b[np.ix_(idx, idx)]
        with one_blas_thread():
            w, v = np.linalg.eigh(blk)
        vv = np.zeros((nf, len(idx)))
        vv[idx] = v
        u = vv / msq[:, None]
        rq = -(gw @ (u[ep] - u[eq]) ** 2 + ediag @ u ** 2) / np.einsum("ij,ij->j", vv, vv)
        w = np.minimum(rq, 0.0)
        order = np.argsort(w)
        w, v = w[order], v[:, order]
        lam[col:col + len(idx)] = w
        q[idx, col:col + len(idx)] = v
        col += len(idx)
    order = np.argsort(lam)
    lam, q = lam[order], q[:, order]
    # slowest first, so that the slow modes of any interval are a leading block
    lam = np.ascontiguousarray(lam[::-1])
    qt = np.ascontiguousarray(q[:, ::-1].T)
    qyt = qt / t[None, :]
    aqt = np.ascontiguousarray(a[nd:][:, free] / t[None, :])
    wt = np.ascontiguousarray(_matmul(aqt, np.ascontiguousarray(qt.T)).T)
    return _Modes(free, np.flatnonzero(clamp), t, lam, qt, qyt, wt, aqt, None, True)


def _block_labels(b: np.ndarray) -> np.ndarray:
    """The connected part of each row of the symmetric matrix ``b`` (through nonzero entries)."""
    n = b.shape[0]
    label = np.arange(n)
    rows, cols = np.nonzero(b)
    changed = True
    while changed:  # label propagation: each part ends with its smallest index
        new = label.copy()
        np.minimum.at(new, rows, label[cols])
        changed = bool(np.any(new != label))
        label = new
    return label


def _conductances(model: CompiledModel, free: np.ndarray):
    """The free states' network in potential form: edges (p, q, conductance G, mL/h), the loss
    diagonal E (mL/h) and sqrt(M), M = V K (the capacity of each potential), indexed within ``free``.

    B = -M^(-1/2) (L + E) M^(-1/2), L the Laplacian of G: the same split as on the chain path.
    """
    m = model
    pos = np.full(m.n_dyn, -1, dtype=np.int64)
    pos[free] = np.arange(len(free))
    mm = m.capacity[free] / m.inv_partition[free]
    ediag = m.loss_rate[free] * mm
    a_, b_ = pos[m.link_p], pos[m.link_q]
    both = (a_ >= 0) & (b_ >= 0)
    w = 0.5 * (m.link_b + m.link_c)
    np.add.at(ediag, a_[both], (m.link_a - w)[both])
    np.add.at(ediag, b_[both], (m.link_d - w)[both])
    only_p = (a_ >= 0) & (b_ < 0)
    only_q = (a_ < 0) & (b_ >= 0)
    np.add.at(ediag, a_[only_p], m.link_a[only_p])
    np.add.at(ediag, b_[only_q], m.link_d[only_q])
    return a_[both], b_[both], w[both], ediag, np.sqrt(mm)


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def _tri_factor(d, e):
    """LU factors (multipliers, reciprocal pivots) of the symmetric tridiagonal (d, e); ok flag."""
    n = d.shape[0]
    lo = np.zeros(n)
    ipiv = np.zeros(n)
    big = 0.0
    for i in range(n):
        big = max(big, abs(d[i]))
    piv = d[0]
    for i in range(n):
        if i > 0:
            lo[i] = e[i - 1] * ipiv[i - 1]
            piv = d[i] - lo[i] * e[i - 1]
        if not abs(piv) > 1e-13 * big:
            return lo, ipiv, False
        ipiv[i] = 1.0 / piv
    return lo, ipiv, True


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def _tri_solve(lo, ipiv, e, r):
    """Solve (d, e) x = r with the factors of :func:`_tri_factor` (returns x)."""
    n = r.shape[0]
    x = r.copy()
    for i in range(1, n):
        x[i] -= lo[i] * x[i - 1]
    x[n - 1] *= ipiv[n - 1]
    for i in range(n - 2, -1, -1):
        x[i] = (x[i] - e[i] * x[i + 1]) * ipiv[i]
    return x


def _fast_terms(md: _Modes, ks: int, x0: np.ndarray, tg: np.ndarray | None):
    """What the modes from ``ks`` on (decayed at every output time) still contribute.

    Returns ``(yfast, qconst, qslope)``: a constant added to the free states, and the constant
    and the slope (per h) added to the quadratures. With ``P = sum over those modes of
    q q^T / lam`` (that is B^-1 minus the slow modes, or the fast eigenvectors directly):
    ``yfast = -P (t g) / t``, ``qconst = -A_QD diag(1/t) (P x0 + P P (t g))``,
    ``qslope = -A_QD diag(1/t) P (t g)``.
    """
    if ks == len(md.lam) and md.complete:
        return None
    if md.tri is not None:
        order, d, e, lo, ipiv = md.tri
        qs, ls = md.qt[:ks], md.lam[:ks]

        def p(v):
            x = np.empty_like(v)
            x[order] = _tri_solve(lo, ipiv, e, v[order])
            return x - qs.T @ ((qs @ v) / ls)
    else:
        qf, lf = md.qt[ks:], md.lam[ks:]

        def p(v):
            return qf.T @ ((qf @ v) / lf)
    px = p(x0)
    if tg is None:
        return np.zeros(len(md.free)), -(md.aqt @ px), np.zeros(md.aqt.shape[0])
    pg = p(tg)
    return -pg / md.t, -(md.aqt @ (px + p(pg))), -(md.aqt @ pg)


RATIONAL_ROWS = 8
"""The output times closest to the start of their interval, up to this many, may go through the
rational approximation of the chain path (:func:`~barrierflow.engine.exact_chain._rational_row`)
instead of setting how many modes the whole run computes (see :func:`mode_time`)."""


def mode_time(times: np.ndarray, marks: np.ndarray) -> float:
    """The time from the start of an interval at which the exact chain path cuts its modes, h.

    The local times (from the start of each interval to its output times and to its end): the
    shortest, unless a few are much shorter than the rest, that is, shorter than a quarter of the
    one after the :data:`RATIONAL_ROWS` shortest. The modes not decayed by then are computed (a
    diffusion's modes up to a time t number about 1 / sqrt(t), so a time 1,000 times shorter would
    take 30 times the modes and 1,000 times the work to compute them); the few shorter times (an
    output just after a dose, a short interval) are computed by the rational approximation, a few
    solves with the chain matrix each.
    """
    return float(_mode_time(np.ascontiguousarray(times, dtype=np.float64),
                            np.ascontiguousarray(marks, dtype=np.float64), np.int64(RATIONAL_ROWS)))


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def _mode_time(times, marks, rr):
    """:func:`mode_time` in one compiled pass (``rr`` is :data:`RATIONAL_ROWS`): the local times
    and the gaps between the marks that are above zero, the ``rr + 1`` shortest of them kept in
    order; their shortest, or a quarter of the (r + 1)-th shortest, r = min(rr, their number - 1),
    when that is longer; 1 h when there is none."""
    nm = marks.shape[0]
    n_t = times.shape[0]
    best = np.empty(rr + 1)
    nb = 0
    count = 0
    j = 0  # np.searchsorted(marks, t, side="right"): a pointer that moves forward on sorted times
    for i in range(n_t + max(nm - 1, 0)):
        if i < n_t:  # a local time: from the start of its interval (the last mark at or before it)
            t = times[i]
            if i and t < times[i - 1]:
                j = 0
            while j < nm and marks[j] <= t:
                j += 1
            k = min(max(j - 1, 0), nm - 2)
            v = t - marks[k]
        else:  # a gap between two marks
            v = marks[i - n_t + 1] - marks[i - n_t]
        if not v > 0.0:
            continue
        count += 1
        if nb <= rr:
            p = nb
            nb += 1
        elif v < best[rr]:
            p = rr
        else:
            continue
        while p > 0 and best[p - 1] > v:
            best[p] = best[p - 1]
            p -= 1
        best[p] = v
    if count == 0:
        return 1.0
    return max(best[0], 0.25 * best[min(rr, count - 1)])


_shortest_time = mode_time  # the name the population runner imports


def structurally_symmetric(model: CompiledModel) -> bool:
    """True when every link is reciprocal and no one-way transfer exists (the modes path applies).

    Decided from the structure, not from the numbers of the assembled matrix (a transfer of 1/h
    beside cells of 1e9/h would hide below any threshold taken relative to the largest entry).
    """
    b, c = model.link_b, model.link_c
    return (len(model.tr_from) == 0
            and not np.any(np.abs(b - c) > 1e-12 * np.maximum(np.abs(b), np.abs(c))))


def exact_plan(model: CompiledModel, method: str = "auto") -> tuple[str, int]:
    """Which exact method runs ``model`` (``"chain"``, ``"modes"`` or ``"expm"``) and its size.

    The size is the number of unclamped states of the chain (``chain``), of dynamic states
    (``modes``) or of all states (``expm``).
    """
    if method in ("auto", "chain"):
        order = chain_order(model)
        if order is not None:
            return "chain", len(order)
    if method in ("auto", "modes") and structurally_symmetric(model):
        return "modes", model.n_dyn
    return "expm", model.n_state


CHAIN_STATES = 1000
"""The default takes the exact chain path up to this many states (its cost grows with the number
of slow modes times the states; a long row of compartments has as many slow modes as states)."""

STIFFNESS_LIMIT = 1e7
"""The modes and matrix-exponential paths apply while rho * T stays below this, with rho a bound
on the rates of the network (Gershgorin, on states scaled by their magnitude) and T the longest
dosing interval: each path is backward stable, its result the exact solution of a network whose
rates are off by about rounding (1.1e-16) times rho, so rho * T * 1.1e-16 bounds what that does
over a dosing interval (1e-9 here). The chain path polishes its modes to relative accuracy and
checks each a posteriori instead."""


def stiffness(model: CompiledModel) -> float:
    """A bound on the rates of ``model``, 1/h: the largest absolute row sum of its Jacobian with
    every state divided by its magnitude scale (Gershgorin's bound on the eigenvalues)."""
    m = model
    size = jacobian_size(m)
    rows = np.zeros(size, dtype=np.int64)
    cols = np.zeros(size, dtype=np.int64)
    vals = np.zeros(size)
    k = jacobian_coo(np.zeros(m.n_state), rows, cols, vals, m.arrays, m.held.copy())
    rows, cols, vals = rows[:k], cols[:k], vals[:k]
    dyn = rows < m.n_dyn
    sums = np.zeros(m.n_dyn)
    np.add.at(sums, rows[dyn], np.abs(vals[dyn]) * m.scale[cols[dyn]] / m.scale[rows[dyn]])
    return float(sums.max(initial=0.0))


def exact_supported(model: CompiledModel, longest: float | None = None) -> bool:
    """True when the default may take the exact path for ``model``.

    Linear models only. Chains up to :data:`CHAIN_STATES` states (their modes are checked as they
    are computed; a failed check hands the run to the robust integrator); the modes and matrix-exponential paths while
    the network is not too stiff for the longest dosing interval ``longest`` (h; see
    :data:`STIFFNESS_LIMIT`), the latter (O(n^3) per distinct step) up to 400 states.
    """
    if not model.is_linear:
        return False
    plan, size = exact_plan(model)
    if plan == "chain":
        return size <= CHAIN_STATES
    if plan == "expm" and model.n_state > 400:
        return False
    return longest is None or stiffness(model) * longest <= STIFFNESS_LIMIT


EXACT_BALANCE_LIMIT = 1e-10
"""Largest relative error of the mass balance (:attr:`~barrierflow.engine.ledger.Ledger.relative_error`)
that a result of the exact paths may have.

An exact solution of the linear network conserves mass to rounding (1e-16 per operation; 93 % of
the exact runs of the adversarial sweep, tests/benchmarks/adversarial_sweep.py, close their ledger
within 1e-10, most within 1e-12), so a larger imbalance shows that the path lost accuracy, and
there the error mostly sits in a small quantity. The modes of a chain are accurate in norm (their
angle to the true ones below :data:`~barrierflow.engine.exact_chain.MODE_ANGLE_LIMIT`), not in
each component; a central compartment of a few microlitres between a barrier and a large
compartment, or a body compartment weakly coupled to the skin, is made of components far below
that norm: extreme patches 1105, 1786, 1882, 1893, 2453 and 2473 of the sweep returned an
eliminated amount or a concentration 17 to 9,400 times the contract off scipy's Radau, their
ledgers off by 4e-9 to 9e-7. The contract's strictest column (a cumulative amount within 1e-6 of a
floor of 1e-4 of the run's largest amount, the sweep's ``FLOOR``) allows 1e-10 of that amount,
hence this limit.

:func:`~barrierflow.engine.solve.solve` computes a chain run beyond it again with every row
through the rational approximation (``ExactIntegrator(rational_rows=True)``: its shifted solves
keep those components; the six cases close their ledgers to 2e-12..1e-10 and agree with Radau
within 1.2e-2 of the contract); a run still beyond it, or one of the modes or matrix-exponential
paths, fails its check and goes to the robust integrator like any other (extreme patch 2482, a
patch of 36 nL on a stratum corneum of 6e-4 cm^2/s, rates up to 5e11 1/h: wrong on both kinds of
rows). A subject of a population beyond it is computed again on its own through ``solve``."""


def exact_balance_findings(rel: float) -> list[str]:
    """The finding of an exact run whose mass balance is off by ``rel`` (relative,
    :func:`~barrierflow.engine.ledger.rows_relative_error`), more than :data:`EXACT_BALANCE_LIMIT`
    (empty when it is not)."""
    if rel <= EXACT_BALANCE_LIMIT:
        return []
    return [f"the mass balance is off by {rel:.2g} of the amount moved, more than an exact solution rounds to "
            f"({EXACT_BALANCE_LIMIT:g})"]


@dataclass(frozen=True)
class ExactIntegrator(Integrator):
    """Exact solution between events for linear models (see the module docstring).

    Parameters
    ----------
    method : {"auto", "chain", "modes", "expm"}
        ``chain``: the compiled solution of chain networks (:mod:`barrierflow.engine.exact_chain`);
        ``modes``: eigen-decomposition of the symmetrised network (not for transfers);
        ``expm``: matrix exponentials of the augmented matrix; ``auto`` (default): chain when the
        network is one, else modes when it is symmetric, else expm.
    rational_rows : bool
        On the chain path, every output row through the rational approximation of the exponential
        (:func:`~barrierflow.engine.exact_chain._rational_row`, O(n) solves per row) instead of the
        slow modes: the run :func:`~barrierflow.engine.solve.solve` takes when the modes' result
        does not conserve mass to :data:`EXACT_BALANCE_LIMIT` (see there). Default False.
    """

    method: str = "auto"
    rational_rows: bool = False
    name: str = field(init=False, default="exact")

    def __post_init__(self) -> None:
        if self.method not in ("auto", "chain", "modes", "expm"):
            raise ScenarioError.single("integrator method", repr(self.method),
                                       "must be one of auto, chain, modes, expm")

    def working_memory(self, model: CompiledModel) -> int:
        """Bytes of working arrays of the path :func:`exact_plan` takes for ``model``."""
        plan, size = exact_plan(model, self.method)
        n = model.n_state
        if plan == "chain":
            return 8 * size * size + 8 * 40 * n + 8 * 12 * len(model.link_p)
        if plan == "modes":
            return 8 * (2 * n * n + 4 * size * size)
        return 8 * 10 * (n + 1) * (n + 1)

    def run(self, plan: RunPlan) -> Integration:
        """Run the whole regimen exactly.

        Raises
        ------
        ScenarioError
            If the model is not linear (saturable elimination), or ``method="modes"`` is asked of a
            network with one-way transfers.
        """
        m = plan.model
        refuse_vehicle_terms(m, self.name)
        if not m.is_linear:
            raise ScenarioError.single("integrator", "'exact'",
                                       "needs a linear model; saturable elimination (vmax, km) makes it nonlinear")
        marks, times, ev = plan.marks, plan.times, plan.events
        n_t, nc = len(times), m.n_comp
        stats = RunStats()
        base = m.arrays
        s = start_events(base, len(ev.time))
        order = chain_order(m) if self.method in ("auto", "chain") else None
        if order is None and self.method == "chain":
            raise ScenarioError.single("integrator method", "'chain'",
                                       "needs a network whose states form chains (no transfers, at most two "
                                       "neighbours per state, no loops)")
        if order is not None:
            full = plan.full
            if full:
                states = np.empty((n_t, m.n_state))
                taps = empty_taps(m.n_state)
            else:
                states = np.empty((1, m.n_state))  # work space of one row
                taps = new_buffers(taps_of(m), n_t, m.n_state)
            ev_dosed = np.empty((n_t, nc))
            ev_removed = np.empty((n_t, nc))
            st = np.zeros(6, dtype=np.int64)
            # (a cut of 0: no modes, every row through the rational approximation)
            cut = 0.0 if self.rational_rows else _FAST / plan.mode_time
            code = chain_schedule(marks, times, tuple(ev), tuple(base), tuple(s), order, cut, jacobian_size(m),
                                  m.y0.copy(), states, ev_dosed, ev_removed, st, full, taps)
            stats.add(st)
            if code != 0:
                return Integration(states[:0] if full else None, ev_dosed[:0], ev_removed[:0], -1,
                                   "the exact path does not apply: the network's modes are too ill-conditioned to "
                                   "separate (time scales too far apart within one connected part)", stats,
                                   s.moved.copy(), rows=None if full else Rows.from_buffers(m, taps, 0))
            if plan.progress is not None:
                plan.progress(1.0)
            if full:
                return Integration(states, ev_dosed, ev_removed, 0, "the run finished", stats, s.moved.copy())
            return Integration(None, ev_dosed, ev_removed, 0, "the run finished", stats, s.moved.copy(),
                               rows=Rows.from_buffers(m, taps, n_t), last=taps[8])
        work = working_copy(base)  # the links as the events leave them (a closed face)
        use_modes = self.method in ("auto", "modes") and structurally_symmetric(m)
        if self.method == "modes" and not use_modes:
            raise ScenarioError.single("integrator method", "'modes'",
                                       "needs a symmetric network; one-way transfers need method 'expm'")
        rho = stiffness(m)
        longest = plan.longest
        if rho * longest > STIFFNESS_LIMIT:
            return Integration(np.empty((0, m.n_state)), np.empty((0, nc)), np.empty((0, nc)), -1,
                               f"the exact path does not apply: the network is too stiff for it (rates up to "
                               f"{rho:.3g} 1/h over dosing intervals of up to {longest:.3g} h)", stats,
                               s.moved.copy())
        states = np.empty((n_t, m.n_state))
        ev_dosed = np.empty((n_t, nc))
        ev_removed = np.empty((n_t, nc))
        y = m.y0.copy()
        infusion, clamp, dosed, removed = s.infusion, s.clamp, s.dosed, s.removed
        modes: dict[bytes, _Modes | None] = {}
        inert = np.ones(m.n_dyn, dtype=bool)  # no link, transfer or loss acts on these states
        inert[m.link_p] = False
        inert[m.link_q] = False
        inert[m.tr_from] = False
        inert[m.tr_to] = False  # (a transfer's receiver fills: random case 1812 kept it at zero)
        inert[m.loss_rate != 0.0] = False
        jac: dict[bytes, np.ndarray] = {}
        linked: dict[bytes, CompiledModel] = {s.closed.tobytes(): m}  # the model with the faces as they are
        row, ei = 0, 0
        n_int = len(marks) - 1
        tau_min = plan.mode_time
        full = m
        for k in range(n_int):
            t0, t1 = marks[k], marks[k + 1]
            ei = int(apply_events(t0, ei, ev, work, base, y, s))
            end = int(rows_until(times, row, t1, k == n_int - 1))
            tau = times[row:end] - t0
            faces = s.closed.tobytes()
            if faces not in linked:
                linked[faces] = full.with_arrays(work._replace(link_a=work.link_a.copy(), link_b=work.link_b.copy(),
                                                               link_c=work.link_c.copy(), link_d=work.link_d.copy()))
            m = linked[faces]
            key = clamp.tobytes() + faces
            if key not in jac:
                jac[key] = _jacobian(m, clamp)
                stats.jacobian_evaluations += 1
            a = jac[key]
            g = _forcing(m, y, infusion, clamp)
            md = None
            if use_modes:
                if key not in modes:
                    modes[key] = _symmetric_modes(m, a, clamp, _FAST / tau_min)
                    stats.lu_decompositions += 1
                md = modes[key]
                if md is None:
                    return Integration(states[:row], ev_dosed[:row], ev_removed[:row], -1,
                                       "the exact path does not apply: the network's modes are too ill-conditioned "
                                       "to separate (time scales too far apart within one connected part)", stats,
                                       s.moved.copy())
            if md is not None:
                want = np.append(tau, t1 - t0)
                t_min = want[want > 0.0].min()
                ks = int(np.searchsorted(-md.lam * t_min, -_FAST))  # modes not yet decayed at t_min
                x0 = md.t * y[md.free]
                gd = g[md.free]
                fast = _fast_terms(md, ks, x0, md.t * gd if np.any(gd != 0.0) else None)
                if fast is None:
                    nq = m.n_state - m.n_dyn
                    fast = (np.zeros(len(md.free)), np.zeros(nq), np.zeros(nq))
                buf = np.empty((end - row + 1, m.n_state))
                modal_outputs(md.lam[:ks], md.qt[:ks], md.qyt[:ks], md.wt[:ks], md.t, md.free, md.fixed, y, g, want,
                              m.n_dyn, *fast, buf)
                states[row:end] = buf[:-1]
                last = buf[-1:]
            else:
                out = _advance_expm(m, a, g, y, np.append(tau, t1 - t0), clamp)
                states[row:end] = out[:-1]
                last = out[-1:]
            # states that nothing touches keep their value exactly (the scalings would round it)
            keep = inert & (g[: m.n_dyn] == 0.0)
            states[row:end, : m.n_dyn][:, keep] = y[: m.n_dyn][keep]
            last[0, : m.n_dyn][keep] = y[: m.n_dyn][keep]
            y = last[0].copy()
            ev_dosed[row:end] = dosed
            ev_removed[row:end] = removed
            stats.steps += 1
            stats.intervals += 1
            row = end
            if plan.progress is not None:
                plan.progress(float(t1) / plan.duration if plan.duration > 0 else 1.0)
        return Integration(states, ev_dosed, ev_removed, 0, "the run finished", stats, s.moved.copy())


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def modal_outputs(lam, qt, qyt, wt, tvec, free, fixed, y0, g, tau, nd, yfast, qconst, qslope, out):
    """States at local times ``tau`` (h, non-decreasing) from ``y0`` into ``out``, mode by mode.

    ``lam`` (the modes kept, slowest first), ``qt`` their eigenvectors as rows, ``qyt`` and ``wt``
    the state and quadrature-rate patterns of each mode, ``tvec`` the symmetrising scale of the
    free states, ``fixed`` the clamped compartments, ``g`` the forcing of the interval, and the
    constant parts of the decayed modes (``yfast`` on the free states, ``qconst + qslope * tau``
    on the quadratures).
    """
    nm = lam.shape[0]
    nf = free.shape[0]
    nqd = wt.shape[1]
    n_t = tau.shape[0]
    j0 = 0
    n = y0.shape[0]
    while j0 < n_t and tau[j0] <= 0.0:
        for r in range(n):
            out[j0, r] = y0[r]
        j0 += 1
    z0 = np.zeros(nm)
    gz = np.zeros(nm)
    has_g = False
    for r in range(nf):
        if g[free[r]] != 0.0:
            has_g = True
    for i in range(nm):
        a = 0.0
        b = 0.0
        for r in range(nf):
            a += qt[i, r] * (tvec[r] * y0[free[r]])
            if has_g:
                b += qt[i, r] * (tvec[r] * g[free[r]])
        z0[i] = a
        gz[i] = b
    ys = np.empty(nf)
    qs = np.empty(nqd)
    for j in range(j0, n_t):
        tj = tau[j]
        for r in range(nf):
            ys[r] = yfast[r]
        for r in range(nqd):
            qs[r] = qconst[r] + qslope[r] * tj
        for i in range(nm):
            el = lam[i]
            x = el * tj
            ex = math.exp(x)
            if abs(x) > 0.5:
                p1 = (ex - 1.0) / el
            else:
                p1 = tj * _phi1(x)
            zs = ex * z0[i]
            zi = p1 * z0[i]
            if has_g:
                zs += p1 * gz[i]
                zi += tj * tj * _phi2(x) * gz[i]
            for r in range(nf):
                ys[r] += qyt[i, r] * zs
            for r in range(nqd):
                qs[r] += wt[i, r] * zi
        for r in range(nf):
            out[j, free[r]] = ys[r]
        for r in range(fixed.shape[0]):
            out[j, fixed[r]] = y0[fixed[r]]
        for r in range(nqd):
            out[j, nd + r] = y0[nd + r] + qs[r] + g[nd + r] * tj


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def _matmul(a, b):
    out = np.zeros((a.shape[0], b.shape[1]))
    for i in range(a.shape[0]):
        for k in range(a.shape[1]):
            v = a[i, k]
            if v != 0.0:
                for j in range(b.shape[1]):
                    out[i, j] += v * b[k, j]
    return out


def _advance_expm(m: CompiledModel, a: np.ndarray, g: np.ndarray, y0: np.ndarray, tau: np.ndarray,
                  clamp: np.ndarray) -> np.ndarray:
    """States at local times ``tau`` (h, non-decreasing, >= 0) by matrix exponentials."""
    n = m.n_state
    sc = m.scale
    aug = np.zeros((n + 1, n + 1))
    # on states divided by their magnitude scale, so that the rounding of the exponential, which
    # is relative to its norm, is relative to each state's own magnitude
    aug[:n, :n] = a * sc[None, :] / sc[:, None]
    # a clamped compartment stays at its value: its couplings are already in g (the rates at it)
    aug[:n, : m.n_comp][:, np.flatnonzero(clamp)] = 0.0
    aug[:n, n] = g / sc
    prop = _Propagator(aug)
    out = np.empty((len(tau), n))
    z = np.append(y0 / sc, 1.0)
    t_prev = 0.0
    for i, ti in enumerate(tau):
        if ti > t_prev:
            z = prop.step(ti - t_prev) @ z
            z[n] = 1.0
            t_prev = ti
        out[i] = z[:n] * sc
    return out


DEFAULT_EXACT = ExactIntegrator()
"""The exact integrator with its default options, made once (the default's choice returns it; a
frozen dataclass, so one instance serves every run)."""
