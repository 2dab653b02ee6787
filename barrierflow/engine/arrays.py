"""The one structure that carries a compiled model into compiled code, and how kernels compile.

:class:`ModelArrays` is a named tuple of the model's numbers and arrays (numba types it field by
field, and caches kernels that take it); :func:`~barrierflow.engine.compiled.compile_scenario`
builds it, every kernel takes it as one argument (``m``) and reads its fields by name. To add
a number the kernels need: a field here (with its line in :func:`subject`), its value in
``compile_scenario``, its use in a kernel.

Calls from Python: numba types a named tuple in Python on every call (about 1.5 us for this
one, against 0.4 us for the same values as a plain tuple); the few entries that Python calls in
a loop (:func:`~barrierflow.engine.kernels.rates`, :func:`~barrierflow.engine.kernels.
jacobian_coo`) pass ``tuple(m)`` and name it again inside (``ModelArrays(*mt)``, free there).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import NamedTuple

import numpy as np
from numba import njit

__all__ = ["CHANGING", "INNER", "SHARED", "ModelArrays", "larger", "numpy_sum", "smaller", "stack_arrays", "subject",
           "working_copy"]

#: Options of the kernels that only compiled code calls: no Python or C-callable wrappers. Each
#: compiled caller links in (and LLVM optimises and emits again) the whole code library of every
#: callee, wrappers included; leaving the unused wrappers out shortens the first-ever compile.
INNER = dict(cache=True, error_model="numpy", no_cpython_wrapper=True, no_cfunc_wrapper=True)


@njit(inline="always")
def larger(a, b):
    """``max(a, b)`` of two numbers as numba's builtin gives it (``b`` where ``b > a``, else ``a``:
    the same value for a NaN and for signed zeros), written out: numba compiles the builtin as a
    function of its own and calls it for every element, which keeps a loop out of vector lanes (a
    barrier's content and its clipped content over 150 cells: 53 ns with the builtin, 12 ns so)."""
    return b if b > a else a


@njit(inline="always")
def smaller(a, b):
    """``min(a, b)`` of two numbers as numba's builtin gives it (``b`` where ``b < a``, else ``a``),
    written out for the reason of :func:`larger`."""
    return b if b < a else a


@njit(inline="always")
def _block_sum(a, lo, n):
    """numpy's sum of ``a[lo:lo + n]`` for ``n`` up to 128 (its base case): below 8 one running
    sum; else eight running sums over the whole multiples of eight, joined pairwise, then the rest
    one by one."""
    if n < 8:
        res = 0.0
        for i in range(lo, lo + n):
            res += a[i]
        return res
    r0 = a[lo]
    r1 = a[lo + 1]
    r2 = a[lo + 2]
    r3 = a[lo + 3]
    r4 = a[lo + 4]
    r5 = a[lo + 5]
    r6 = a[lo + 6]
    r7 = a[lo + 7]
    m = lo + n - n % 8
    i = lo + 8
    while i < m:
        r0 += a[i]
        r1 += a[i + 1]
        r2 += a[i + 2]
        r3 += a[i + 3]
        r4 += a[i + 4]
        r5 += a[i + 5]
        r6 += a[i + 6]
        r7 += a[i + 7]
        i += 8
    res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while i < lo + n:
        res += a[i]
        i += 1
    return res


@njit(**INNER)
def numpy_sum(a, lo, n):
    """``a[lo:lo + n].sum()`` bit for bit as numpy computes it for a contiguous float64 array, in
    compiled code: pairwise summation (a range above 128 values cut in two at a multiple of eight
    below its middle, each half summed so, the halves added; up to 128 values :func:`_block_sum`),
    the whole added to 0.0 (the reduction's start: a sum of negative zeros is 0.0). The recursion
    is written out with a stack (the tree's depth is below 64). tests/test_engine_paths.py holds it
    to numpy's sum on random arrays of every length up to 600 and a few longer ones."""
    if n <= 128:
        return 0.0 + _block_sum(a, lo, n)
    # a depth-first walk of the halving tree: each frame a range and its state (0: new, 1: its left
    # half being summed, 2: its left half's sum in val, its right half being summed)
    s_lo = np.empty(64, dtype=np.int64)
    s_n = np.empty(64, dtype=np.int64)
    s_st = np.zeros(64, dtype=np.int64)
    s_val = np.zeros(64)
    top = 0
    s_lo[0] = lo
    s_n[0] = n
    while True:
        f_lo = s_lo[top]
        f_n = s_n[top]
        if f_n > 128:  # a new range: its left half first
            n2 = f_n // 2
            n2 -= n2 % 8
            s_st[top] = 1
            top += 1
            s_lo[top] = f_lo
            s_n[top] = n2
            s_st[top] = 0
            continue
        v = _block_sum(a, f_lo, f_n)
        top -= 1
        while top >= 0:  # hand the sum to the ranges above
            if s_st[top] == 1:  # a left half: keep it, sum the right half
                s_val[top] = v
                s_st[top] = 2
                p_n = s_n[top]
                n2 = p_n // 2
                n2 -= n2 % 8
                top += 1
                s_lo[top] = s_lo[top - 1] + n2
                s_n[top] = p_n - n2
                s_st[top] = 0
                break
            v = s_val[top] + v  # a right half: join it to its left half
            top -= 1
        if top < 0:
            return 0.0 + v


class ModelArrays(NamedTuple):
    """Every number of a compiled model, as the kernels take it: one named tuple of arrays.

    Built in one place, :func:`~barrierflow.engine.compiled.compile_scenario`; a population
    stacks the subjects' tuples field by field (:func:`stack_arrays`) and takes subject ``i``
    back with :func:`subject`. States are indexed as in :mod:`barrierflow.engine.compiled`;
    ``n_state = n_dyn + 3 n_comp + 2 n_bar``.

    Attributes
    ----------
    n_comp : int
        Number of compartments.
    n_dyn : int
        Number of dynamic states (compartments, then the cells of every resolved barrier).
    q_supply, q_infused, q_sampled : int
        Offsets of the clamp supplies, the infused amounts and the sampled amounts (the last
        block) in the state vector.
    capacity : ndarray (n_dyn,), mL
        Volume of each compartment (1 without one), area times width of each cell.
    inv_capacity : ndarray (n_dyn,), 1/mL
        1 / capacity (whatever changes a volume changes both).
    inv_partition : ndarray (n_dyn,)
        1/K of each state: its potential is u = y / K.
    link_p, link_q : ndarray of int (n_link,)
        The two states of each link (barrier faces, cell faces, steady barriers, exchanges).
    link_a, link_b, link_c, link_d : ndarray (n_link,), mL/h
        Leaving p: ``a u_p - b u_q``; entering q: ``c u_p - d u_q``.
    link_loss : ndarray of int (n_link,)
        State index of the amount a link degrades (``a u_p - b u_q`` minus what enters q), or -1.
    link_track : ndarray of int (n_link,)
        State index that counts what a link brings into q, or -1.
    chain_g : ndarray (max(n_cells, 1),), mL/h
        Conductance between cell i and cell i + 1 of the same barrier (0 where a barrier ends):
        the links inside barriers, which the rate kernel runs as one vectorised sweep.
    other_links : ndarray of int
        Every link not in ``chain_g`` (barrier faces, steady barriers, exchanges).
    loss_rate : ndarray (n_dyn,), 1/h
        First-order loss of each state (clearance / volume; a layer's degradation rate).
    loss_to : ndarray of int (n_dyn,)
        State index of the amount each loss goes to (eliminated or degraded).
    lossy : ndarray of int
        The states with a first-order loss.
    mm_state : ndarray of int (n_mm,)
        Compartments with saturable elimination (Michaelis-Menten).
    mm_vmax : ndarray (n_mm,), mg/h
    mm_km : ndarray (n_mm,), mg/mL
    tr_from, tr_to : ndarray of int (n_tr,)
        One-way first-order transfers between compartments.
    tr_rate : ndarray (n_tr,), 1/h
    held : ndarray of bool (n_comp,)
        Compartments held at their concentration for the whole run.
    has_volume : ndarray of bool (n_comp,)
        False for a held compartment without a volume (its capacity is 1 but holds nothing).
    area : ndarray (n_bar,), cm^2
    y0 : ndarray (n_state,)
        The initial state (mg/mL; the cumulative amounts 0).
    scale : ndarray (n_state,)
        Magnitude of each state, which absolute tolerances and checks are relative to.
    face_ptr : ndarray of int (n_comp + 1,)
        ``face_link[face_ptr[p]:face_ptr[p + 1]]`` are the barrier links touching compartment p
        (the faces a remove that ends contact closes).
    face_link : ndarray of int
    evap_rate : ndarray (n_comp,), mL/h
        Evaporation of a volatile vehicle (0: none).
    residual : ndarray (n_comp,), mL
        The volume an evaporating vehicle leaves.
    solubility : ndarray (n_comp,), mg/mL
        Solubility times partition where the dissolved part may be limited (inf: no limit).
    shrinking : ndarray of bool (n_comp,)
        Samples without replacement shrink the compartment's volume.
    """

    n_comp: int
    n_dyn: int
    q_supply: int
    q_infused: int
    q_sampled: int
    capacity: np.ndarray
    inv_capacity: np.ndarray
    inv_partition: np.ndarray
    link_p: np.ndarray
    link_q: np.ndarray
    link_a: np.ndarray
    link_b: np.ndarray
    link_c: np.ndarray
    link_d: np.ndarray
    link_loss: np.ndarray
    link_track: np.ndarray
    chain_g: np.ndarray
    other_links: np.ndarray
    loss_rate: np.ndarray
    loss_to: np.ndarray
    lossy: np.ndarray
    mm_state: np.ndarray
    mm_vmax: np.ndarray
    mm_km: np.ndarray
    tr_from: np.ndarray
    tr_to: np.ndarray
    tr_rate: np.ndarray
    held: np.ndarray
    has_volume: np.ndarray
    area: np.ndarray
    y0: np.ndarray
    scale: np.ndarray
    face_ptr: np.ndarray
    face_link: np.ndarray
    evap_rate: np.ndarray
    residual: np.ndarray
    solubility: np.ndarray
    shrinking: np.ndarray


#: The fields the events of a run may change (a closed face, a volume): a run works on copies.
CHANGING = ("capacity", "inv_capacity", "link_a", "link_b", "link_c", "link_d")

#: The fields that give the structure (which states, links, losses): subjects of one population
#: share them; every other array field holds values, one row per subject when stacked.
_CHANGING_AT = tuple(ModelArrays._fields.index(k) for k in CHANGING)  # their positions in the tuple

SHARED = ("link_p", "link_q", "link_loss", "link_track", "other_links", "loss_to", "lossy", "mm_state", "tr_from",
          "tr_to", "held", "has_volume", "face_ptr", "face_link", "shrinking")


def working_copy(arrays: ModelArrays) -> ModelArrays:
    """``arrays`` with its own copies of the fields events change (:data:`CHANGING`), for one run;
    the original stays the reference the event rules restore from."""
    fields = list(arrays)
    for i in _CHANGING_AT:
        fields[i] = fields[i].copy()
    return ModelArrays._make(fields)


@njit(**INNER)
def working_arrays(b):
    """:func:`working_copy` in compiled code (the same rule: its own copies of the fields of
    :data:`CHANGING`, the others shared), one line per field, in order: a compiled run loop makes
    its copy itself (``exact_chain.chain_schedule``), so that its caller passes the model's arrays
    once."""
    return ModelArrays(
        b.n_comp, b.n_dyn, b.q_supply, b.q_infused, b.q_sampled, b.capacity.copy(), b.inv_capacity.copy(),
        b.inv_partition, b.link_p, b.link_q, b.link_a.copy(), b.link_b.copy(), b.link_c.copy(), b.link_d.copy(),
        b.link_loss, b.link_track, b.chain_g, b.other_links, b.loss_rate, b.loss_to, b.lossy,
        b.mm_state, b.mm_vmax, b.mm_km, b.tr_from, b.tr_to, b.tr_rate, b.held,
        b.has_volume, b.area, b.y0, b.scale, b.face_ptr, b.face_link, b.evap_rate,
        b.residual, b.solubility, b.shrinking)


def stack_arrays(arrays: Sequence[ModelArrays]) -> ModelArrays:
    """The arrays of many subjects of one structure, stacked: each value field gains a first axis
    (the subject); the structure (:data:`SHARED`, and the sizes and offsets) is the first
    subject's, which every subject must share (ValueError otherwise).

    (:func:`~barrierflow.engine.compiled.compile_scenario` of a stacked scenario gives this form
    directly, without a model per subject.)
    """
    first = arrays[0]
    for name in SHARED:
        if not all(np.array_equal(getattr(a, name), getattr(first, name)) for a in arrays[1:]):
            raise ValueError(f"the subjects differ in their structure ({name})")
    return ModelArrays(*(np.ascontiguousarray(np.stack([a[k] for a in arrays]))
                         if isinstance(v, np.ndarray) and name not in SHARED else v
                         for k, (name, v) in enumerate(zip(ModelArrays._fields, first, strict=True))))


@njit(**INNER)
def subject(stack, i):
    """Subject ``i`` of :func:`stack_arrays` (views, no copies): one line per field, in order; the
    fields of :data:`SHARED` are every subject's."""
    s = stack
    return ModelArrays(
        s.n_comp, s.n_dyn, s.q_supply, s.q_infused, s.q_sampled, s.capacity[i], s.inv_capacity[i],
        s.inv_partition[i], s.link_p, s.link_q, s.link_a[i], s.link_b[i], s.link_c[i], s.link_d[i],
        s.link_loss, s.link_track, s.chain_g[i], s.other_links, s.loss_rate[i], s.loss_to, s.lossy,
        s.mm_state, s.mm_vmax[i], s.mm_km[i], s.tr_from, s.tr_to, s.tr_rate[i], s.held,
        s.has_volume, s.area[i], s.y0[i], s.scale[i], s.face_ptr, s.face_link, s.evap_rate[i],
        s.residual[i], s.solubility[i], s.shrinking)
