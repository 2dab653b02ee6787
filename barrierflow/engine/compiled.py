"""Compile a scenario into flat arrays: the only form the numerical kernels see.

State vector layout (all float64)::

    y = [ compartment concentrations (n_comp), mg/mL
          cell concentrations of every resolved barrier, barrier after barrier (n_cells), mg/mL
          | cumulative amounts, mg:
          eliminated per compartment (n_comp)
          degraded per barrier (n_bar)
          permeated per barrier, the amount that entered its `to` compartment (n_bar)
          supplied per compartment by a clamp: a held compartment or a hold dose (n_comp)
          infused per compartment (n_comp)
          lost to the air per compartment (n_comp)
          sampled per compartment, booked by the sample events (n_comp) ]

The first ``n_dyn = n_comp + n_cells`` entries are the dynamic states; the rest are
quadratures that never feed back. Every transport process is written on the potential
u = y / K (continuous at interfaces) and on amounts: a state of capacity V (mL; a compartment's
volume, or a cell's area times width) changes as dy/dt = (sum of amount rates) / V.

A *link* j joins states p and q: the amount rate leaving p is ``a u_p - b u_q`` and the rate
entering q is ``c u_p - d u_q`` (mL/h times mg/mL). Storage-free links have a = b = c = d = G;
a quasi-steady barrier with degradation in a layer has a != c, the difference degraded. A link
from a compartment to itself with only ``a`` set is a first-order loss counted in its quadrature:
the clearance of a compartment that also loses substance to the air, or whose volume changes,
is written so (rate = CL C = CL K u, whatever the volume).

The lab's protocol adds to the arrays: the barrier links of each compartment (its faces, which a
remove that ends contact closes), the evaporation of volatile vehicles (a rate and a residual
volume) and the solubility limit of compartments that may exceed it. A model with evaporation,
a solubility limit or samples without replacement has ``vehicle_terms``: its volumes change
with time or it holds undissolved solid, which only the scipy integrators run
(:mod:`barrierflow.engine.vehicle`).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from functools import cached_property
from itertools import accumulate

import numpy as np
from numba import njit
from numba.extending import register_jitable

from ..model import Barrier, Scenario
from ..model.cohort import Diverging, cohort_size, decide
from .arrays import ModelArrays
from .grid import DEFAULT_GRID, Grid, response_time
from .schedule import RegimenBounds, regimen_bounds
from .twoport import stack_two_port

__all__ = ["BarrierGrid", "CompiledModel", "ModelArrays", "chain_walk", "compile_scenario", "limited_compartments",
           "taps_arrays"]


@register_jitable
def state_layout(n_comp, n_bar, n_cells):
    """Where each part of the full state vector starts (the one home of this layout).

    The state vector holds, in order: the compartments' concentrations (n_comp, mg/mL), the
    barrier cells' concentrations (n_cells, mg/mL; with the compartments, the n_dyn dynamic
    states), then cumulative amounts (mg): eliminated per compartment (n_comp), degraded per
    barrier (n_bar), permeated per barrier (n_bar), then four blocks of n_comp from ``q_supply``
    on (what a clamp supplied, what was infused, what went to the air, what samples took).
    Callable from Python and from compiled code (numba compiles it into its caller).

    Parameters
    ----------
    n_comp, n_bar, n_cells : int
        Numbers of compartments, barriers and barrier cells.

    Returns
    -------
    tuple of int
        ``(n_dyn, q_elim, q_degr, q_perm, q_supply, q_lost, n_state)``: the number of dynamic
        states, the offsets of the eliminated, degraded, permeated, supplied and lost amounts,
        and the length of the full state vector.
    """
    n_dyn = n_comp + n_cells
    q_elim = n_dyn
    q_degr = n_dyn + n_comp
    q_perm = q_degr + n_bar
    q_supply = q_perm + n_bar
    q_lost = q_supply + 2 * n_comp
    n_state = q_supply + 4 * n_comp
    return n_dyn, q_elim, q_degr, q_perm, q_supply, q_lost, n_state


@dataclass(frozen=True)
class BarrierGrid:
    """Where one barrier's cells sit in the state vector, and their geometry.

    Attributes
    ----------
    barrier_id : str
    start, stop : int
        Slice of the state vector holding the cells (empty for a steady barrier).
    widths : ndarray, cm
    centres : ndarray, cm (from the ``from`` face)
    layer_of_cell : ndarray of int
    interfaces : tuple of float, cm (0, each interface, total thickness)
    in_link, out_link : int
        Index of the link at the ``from`` face and at the ``to`` face.
    """

    barrier_id: str
    start: int
    stop: int
    widths: np.ndarray
    centres: np.ndarray
    layer_of_cell: np.ndarray
    interfaces: tuple[float, ...]
    in_link: int
    out_link: int


@dataclass(frozen=True, eq=False)
class CompiledModel:
    """A scenario as flat arrays (see the module docstring for the layout).

    ``arrays`` (:class:`~barrierflow.engine.arrays.ModelArrays`) holds every number, in internal
    units; each of its fields is also an attribute of the model (``model.capacity`` is
    ``model.arrays.capacity``). ``comp_index`` and ``barrier_index`` map ids to positions;
    ``grids`` say where each barrier's cells sit.
    """

    arrays: ModelArrays
    comp_ids: tuple[str, ...]
    barrier_ids: tuple[str, ...]
    grids: tuple[BarrierGrid, ...]
    comp_index: dict[str, int] = field(default_factory=dict)
    barrier_index: dict[str, int] = field(default_factory=dict)

    def __post_init__(self) -> None:
        # every field of ``arrays`` is also an attribute of the model, under the same name, and so
        # are the sizes and offsets below, computed once (the instance dictionary at once: a frozen
        # dataclass's setattr costs a call per field; a property a call per use, and a run reads
        # them many times)
        d = self.__dict__
        d.update(zip(ModelArrays._fields, self.arrays, strict=True))
        n_comp, n_dyn, n_bar = self.arrays.n_comp, self.arrays.n_dyn, self.arrays.area.shape[-1]
        _, q_elim, q_degr, q_perm, _, q_lost, n_state = state_layout(n_comp, n_bar, n_dyn - n_comp)
        d.update(n_cells=n_dyn - n_comp, n_bar=n_bar, n_state=n_state, q_elim=q_elim, q_degr=q_degr, q_perm=q_perm,
                 q_lost=q_lost)

    #: Number of barrier cells.
    n_cells: int = field(init=False, repr=False, compare=False)
    #: Number of barriers.
    n_bar: int = field(init=False, repr=False, compare=False)
    #: Length of the full state vector.
    n_state: int = field(init=False, repr=False, compare=False)
    # offsets of the cumulative amounts (q_supply, q_infused and q_sampled are fields of ``arrays``)
    #: Offset of the eliminated amounts.
    q_elim: int = field(init=False, repr=False, compare=False)
    #: Offset of the degraded amounts.
    q_degr: int = field(init=False, repr=False, compare=False)
    #: Offset of the permeated amounts.
    q_perm: int = field(init=False, repr=False, compare=False)
    #: Offset of the amounts lost to the air.
    q_lost: int = field(init=False, repr=False, compare=False)

    def with_arrays(self, arrays: ModelArrays) -> CompiledModel:
        """The same model with other numbers (for example the links as a run's events left them)."""
        return dataclasses.replace(self, arrays=arrays)

    @cached_property
    def is_linear(self) -> bool:
        """True without saturable elimination (and without the terms of :attr:`vehicle_terms`)."""
        return len(self.mm_state) == 0 and not self.vehicle_terms

    @cached_property
    def vehicle_terms(self) -> bool:
        """True when a volume changes over time (evaporation, samples without replacement) or a
        compartment that is not held may hold undissolved solid (a solubility limit): only the
        scipy integrators, through :mod:`barrierflow.engine.vehicle`, run such a model. (A held
        compartment above the solubility is a saturated reservoir: its potential is the solubility,
        which its partition entry gives; it stays linear.)"""
        if self.evap_rate.ndim == 1:  # one model: a few compartments, read as plain numbers
            return (any(x > 0 for x in self.evap_rate.tolist())
                    or any(math.isfinite(x) and not h for x, h in zip(self.solubility.tolist(), self.held.tolist(),
                                                                       strict=True))
                    or any(self.shrinking.tolist()))
        return bool(np.any(self.evap_rate > 0) or np.any(np.isfinite(self.solubility) & ~self.held)
                    or np.any(self.shrinking))


def _two_port(barrier: Barrier) -> tuple[float, float, float, float]:
    """Quasi-steady amount-rate coefficients (per area) of a barrier (see :mod:`.twoport`), cm/h."""
    return stack_two_port(barrier.layers)


# ---------------------------------------------------------------- values, one or one per subject
# A scenario may hold one value per subject in a field (an array of shape (n, 1), see
# barrierflow.model.cohort.stacked); everything below is written with element-wise arithmetic so
# that a subject's row is, operation for operation, what its own scenario gives.
def _row(values: list) -> np.ndarray:
    """One value per item as a row: (k,), or (n, k) when an item holds one value per subject."""
    try:  # plain numbers (a single scenario): one conversion
        out = np.array(values, dtype=np.float64)
    except ValueError:  # numbers beside arrays of one value per subject
        out = None
    if out is not None and out.ndim == 1:
        return out
    n = next((x.shape[0] for x in values if isinstance(x, np.ndarray) and x.ndim == 2), None)
    if n is None:
        return np.array(values, dtype=np.float64).reshape(len(values))
    out = np.empty((n, len(values)))
    for j, x in enumerate(values):
        out[:, j] = x[:, 0] if isinstance(x, np.ndarray) and x.ndim == 2 else x
    return out


def _join(parts: list[np.ndarray]) -> np.ndarray:
    """Rows (each (k_i,) or (n, k_i)) joined along the last axis."""
    for p in parts:
        if p.ndim != 1:
            break
    else:
        return np.concatenate(parts) if parts else np.zeros(0)
    n = next((p.shape[0] for p in parts if p.ndim == 2), None)
    if n is None:
        return np.concatenate(parts) if parts else np.zeros(0)
    return np.concatenate([np.broadcast_to(p, (n, p.shape[-1])) for p in parts], axis=1)


def _sum(terms) -> float | np.ndarray:
    """Left-to-right sum (of numbers or of one value per subject)."""
    total = 0.0
    for x in terms:
        total = total + x
    return total


def _larger(a, b):
    """The larger of two values (per subject where they hold one each)."""
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        return np.maximum(a, b)
    return max(a, b)


def _or_zero(x):
    return 0.0 if x is None else x


def _common(flags: np.ndarray) -> np.ndarray:
    """The one pattern of yes/no of every subject (rows of ``flags``); Diverging where they differ."""
    if flags.ndim == 1:
        return flags
    same = (flags == flags[0]).all(axis=1)
    if not same.all():
        raise Diverging(same)
    return flags[0]


def _part_of_compartments(s: Scenario) -> list[int]:
    """The connected part of each compartment (through barriers, exchanges and transfers)."""
    index = {c.id: i for i, c in enumerate(s.compartments)}
    parent = list(range(len(s.compartments)))

    def find(a: int) -> int:
        while parent[a] != a:
            parent[a] = parent[parent[a]]
            a = parent[a]
        return a

    for link in (*s.barriers, *s.exchanges, *s.transfers):
        a, b = find(index[link.from_id]), find(index[link.to_id])
        if a != b:
            parent[max(a, b)] = min(a, b)
    return [find(i) for i in range(len(s.compartments))]


def _mass_scale(s: Scenario, doses: RegimenBounds, part: list[int]) -> list:
    """An amount per compartment, mg, that bounds what its connected part of the network can move.

    Present at start plus every dose; each clamped level (a held compartment over the run, a hold
    dose over its duration) adds what it could give: its potential times the steady uptake of
    every link it touches over that time, the storage of the barriers it touches, and what
    transfers, clearance and saturable elimination could take from it meanwhile. Where the part
    can hold and lose less than that (its links' steady uptake counts a finite neighbour as a
    sink), the clamp adds instead what filling the part to its potential and the part's sinks
    could take (:func:`_clamp_fill`). A part that moves nothing gets 1 mg. ``doses``:
    :func:`~barrierflow.engine.schedule.regimen_bounds` of ``s``; ``part``:
    :func:`_part_of_compartments` of ``s``.
    """
    comps = {c.id: c for c in s.compartments}
    pos = {c.id: i for i, c in enumerate(s.compartments)}
    total: list = [0.0] * len(s.compartments)

    def add(cid: str, amount) -> None:
        total[part[pos[cid]]] += amount

    for c in s.compartments:
        if not c.held and c.volume is not None:
            add(c.id, c.initial_concentration * c.volume)
    for b in s.barriers:
        add(b.from_id, b.area * _sum(x.initial_concentration * x.thickness for x in b.layers))
    clamps: list = []  # (compartment, concentration, time held)
    for c in s.compartments:
        if c.held:
            clamps.append((c.id, c.held_concentration, s.duration))
    for cid, amount in doses.added:
        add(cid, amount)
    clamps.extend(doses.clamps)
    uptake: dict = {c.id: 0.0 for c in s.compartments}   # mL/h per unit potential
    storage: dict = {c.id: 0.0 for c in s.compartments}  # mL per unit potential
    for b in s.barriers:
        a, _, _, d = _two_port(b)
        uptake[b.from_id] += a * b.area
        uptake[b.to_id] += d * b.area
        if b.model != "steady":
            cap = b.area * _sum(x.partition * x.thickness for x in b.layers)
            storage[b.from_id] += cap
            storage[b.to_id] += cap
    for e in s.exchanges:
        uptake[e.from_id] += e.flow
        uptake[e.to_id] += e.flow
    fill = _clamp_fill(s, part, pos, clamps, uptake, doses)
    for cid, conc, span in clamps:
        c = comps[cid]
        u = conc / c.partition
        own = conc * (c.clearance * span + _sum(t.rate for t in s.transfers if t.from_id == cid)
                      * _or_zero(c.volume) * span)
        if c.vmax is not None:
            own += c.vmax * span
        amount = u * (uptake[cid] * span + storage[cid])
        if fill is not None:
            storage_p, sinks_p, removal_p, outflow_p = fill
            k = part[pos[cid]]
            # the part filled to the clamp's potential, what its sinks (every other clamp among
            # them) take at that potential over the time held, what its removals take
            others = sorted({x for x, _, _ in clamps if x != cid and part[pos[x]] == k})
            other = _sum(uptake[x] for x in others)
            filled = u * (storage_p[k] + (sinks_p[k] + other) * span + removal_p[k]) + outflow_p[k] * span
            amount = _smaller(amount, filled)
        add(cid, amount + own)
    out = []
    for i in range(len(s.compartments)):
        x = total[part[i]]
        out.append(np.where(x > 0, x, 1.0) if isinstance(x, np.ndarray) else (x if x > 0 else 1.0))
    return out


def _clamp_fill(s: Scenario, part: list[int], pos: dict, clamps: list, uptake: dict, doses) -> tuple | None:
    """Per connected part, what a clamp at potential u can fill and lose: ``(storage, sinks,
    removals, outflow)`` with u * (storage + sinks * span + removals) + outflow * span the most it
    gives over ``span`` (None when the part's volumes change or a solubility limits it: the bound
    then rests on the links' uptake alone).

    By superposition (the model is linear between events, each event a linear map) a clamp gives
    at most what it gives with every other source at zero, where each other clamp is a sink at 0;
    then no potential exceeds u (the maximum principle of the diffusive links; a transfer's amount
    is counted as lost where it leaves). storage: every free compartment's V K and every resolved
    barrier's area sum(K L), mL; sinks, mL/h: clearance CL K, loss to the air V K rate, transfers
    out V K rate, degradation in resolved layers k area K L and a steady barrier's degraded
    conductance (a - c + d - b) area; removals, mL: V K of each remove, replace and sample (its
    aliquot) in the run; outflow: saturable elimination, vmax (mg/h). Without this the steady
    uptake of a clamp's links counts a small neighbour as a sink: a hold beside a 1 uL
    compartment through an exchange of 82 L/h made a bound of 2,400 mg for 5e-4 mg moved, and
    tolerances that left the held supply 1e-3 off scipy's Radau.
    """
    if s.substance.solubility is not None or any(c.evaporates for c in s.compartments) or doses.shrink:
        return None
    if not clamps:
        return None
    n = len(s.compartments)
    storage: list = [0.0] * n
    sinks: list = [0.0] * n
    removal: list = [0.0] * n
    outflow: list = [0.0] * n
    comps = {c.id: c for c in s.compartments}
    for c in s.compartments:
        k = part[pos[c.id]]
        if c.held:
            continue
        vk = _or_zero(c.volume) * c.partition
        storage[k] = storage[k] + vk
        sinks[k] = sinks[k] + c.clearance * c.partition + c.loss_rate * vk
        if c.vmax is not None:
            outflow[k] = outflow[k] + c.vmax
    for t in s.transfers:
        c = comps[t.from_id]
        k = part[pos[c.id]]
        sinks[k] = sinks[k] + t.rate * _or_zero(c.volume) * c.partition
    for b in s.barriers:
        k = part[pos[b.from_id]]
        if b.model == "steady":
            a, bb, cc, d = _two_port(b)
            sinks[k] = sinks[k] + (a - cc + d - bb) * b.area
        else:
            storage[k] = storage[k] + b.area * _sum(x.partition * x.thickness for x in b.layers)
            sinks[k] = sinks[k] + b.area * _sum(x.degradation_rate * x.partition * x.thickness for x in b.layers)
    for d in s.doses:
        if d.kind in ("remove", "replace", "sample"):
            c = comps[d.target]
            k = part[pos[c.id]]
            v = d.volume if d.kind == "sample" else _or_zero(c.volume)
            removal[k] = removal[k] + len(d.start_times(s.duration)) * v * c.partition
    return storage, sinks, removal, outflow


POTENTIAL_MARGIN = 10.0
"""A compartment's scale takes :func:`_potential_bound` only where it is at least this many times
below the amount bound (closer, the two agree within the slack of the magnitude check, and the
tolerances stay as they were: the benchmark's star of 64, whose patches' potential bound is
3.85e3 against 4.48e3 mg/mL, keeps its scales and its steps)."""


def _potential_bound(s: Scenario, doses, part: list[int]) -> list | None:
    """A bound of each compartment's concentration, mg/mL, from the potentials its part's sources
    can reach (math.inf where none holds), or None when no part has one. ``doses``:
    :func:`~barrierflow.engine.schedule.regimen_bounds` of ``s``; ``part``:
    :func:`_part_of_compartments` of ``s``.

    Without transfers (which move amount whatever the potentials) and vehicle terms, every link is
    driven by the potential u = C/K and every other loss only lowers it, so by superposition (the
    model is linear between events, each event a linear map; saturable elimination only lowers
    it) no potential in a part exceeds the sum of what its sources can each set: the largest
    starting potential (compartments and loaded layers), each bolus or infusion's whole amount
    over its compartment's V K, each refill and hold's concentration over K (every time it
    applies), each held compartment's. A compartment's concentration is at most K times that.
    The part's amount bound over a small volume can be far above it: a 1 uL compartment in a part
    whose hold supplied 7e5 mg got a scale of 2.5e10 mg/mL, an absolute tolerance of 75 mg/mL, and
    the default (RODAS4) reported 9.4 mg/mL where scipy's Radau had 2e-5, a degraded amount of
    -0.38 mg and a removed amount 700 times Radau's.
    """
    if s.substance.solubility is not None or any(c.evaporates for c in s.compartments) or doses.shrink:
        return None
    comps = {c.id: c for c in s.compartments}
    if any(comps[cid].volume is None for cid, _ in doses.added):
        return None
    pos = {c.id: i for i, c in enumerate(s.compartments)}
    n = len(s.compartments)
    start: list = [0.0] * n  # the largest starting potential of each part
    added: list = [0.0] * n  # the sum of the sources' potentials
    pumped = [False] * n     # a part with a transfer
    for t in s.transfers:
        pumped[part[pos[t.from_id]]] = True
        pumped[part[pos[t.to_id]]] = True
    for c in s.compartments:
        k = part[pos[c.id]]
        if c.held:
            added[k] = added[k] + c.held_concentration / c.partition
        elif c.volume is not None:
            start[k] = _larger(start[k], c.initial_concentration / c.partition)
    for b in s.barriers:
        k = part[pos[b.from_id]]
        for x in b.layers:
            start[k] = _larger(start[k], x.initial_concentration / x.partition)
    for cid, amount in doses.added:  # boluses, infusions, and refills and holds as conc * V each time
        c = comps[cid]
        k = part[pos[cid]]
        added[k] = added[k] + amount / (c.volume * c.partition)
    out: list = []
    for c in s.compartments:
        k = part[pos[c.id]]
        u = start[k] + added[k]
        if pumped[k] or c.volume is None:
            out.append(math.inf)
        elif isinstance(u, np.ndarray):
            out.append(np.where(u > 0, c.partition * u, math.inf))
        else:  # a part that moves nothing keeps the amount bound
            out.append(c.partition * u if u > 0 else math.inf)
    return out


def _smaller(a, b):
    """The smaller of two values (per subject where they hold one each)."""
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        return np.minimum(a, b)
    return min(a, b)


def limited_compartments(s: Scenario, doses: RegimenBounds | None = None) -> set[str]:
    """The compartments whose solute may exceed the solubility (times their partition), so that
    the limit must be computed there; empty without ``[substance] solubility``.

    A compartment exceeds it only through what is put into it, never through diffusion or
    exchange from phases held at or below it (the potential of a diffusive network has no
    maximum inside): so it is limited when it starts above; when it evaporates; when a refill
    or hold puts it above; when a bolus, infusion or transfer feeds it and either a clamp above
    zero could supply without end or all the substance of the run (every initial amount and dose)
    in its smallest volume would exceed it; or when a layer starts above its own solubility and
    that amount could. A held compartment is limited when held above it. ``doses``:
    :func:`~barrierflow.engine.schedule.regimen_bounds` of ``s`` when the caller has it.
    """
    sol = s.substance.solubility
    if sol is None:
        return set()
    doses = doses or regimen_bounds(s)
    total = 0.0
    clamps = any(c.held and decide(c.held_concentration > 0) for c in s.compartments)
    clamps |= any(held and decide(conc > 0) for _, conc, held in doses.levels)
    for c in s.compartments:
        if not c.held and c.volume is not None:
            total += c.initial_concentration * c.volume
    over_layer = False
    for b in s.barriers:
        for layer in b.layers:
            total += layer.initial_concentration * layer.thickness * b.area
            over_layer |= decide(layer.initial_concentration / layer.partition > sol)
    for _, amount in doses.added:
        total += amount
    fed = {t.to_id for t in s.transfers} | doses.fed
    out = set()
    for c in s.compartments:
        cap = sol * c.partition
        if c.held:
            if decide(c.held_concentration > cap):
                out.add(c.id)
            continue
        smallest = c.volume
        if c.evaporates:
            out.add(c.id)
            continue
        smallest = _larger(smallest - doses.shrink.get(c.id, 0.0), 1e-300)
        if (decide(c.initial_concentration > cap) or any(cid == c.id and decide(conc > cap)
                                                          for cid, conc, _ in doses.levels)
                or (c.id in fed and (clamps or decide(total / smallest > cap)))
                or (over_layer and decide(total / smallest > cap))):
            out.add(c.id)
    return out


def compile_scenario(scenario: Scenario, grid: Grid | None = None,
                     layer_widths: dict[tuple[int, int], np.ndarray] | None = None) -> CompiledModel:
    """Turn a validated scenario into the flat arrays of a :class:`CompiledModel`.

    One scenario is compiled by :func:`_compile_one` (the arrays in one compiled pass); many
    subjects of one (a stacked scenario) by :func:`compile_elementwise`, whose arithmetic is the
    same operation for operation, so that subject i's row is bit for bit its own scenario's model
    (tests/test_population_arrays.py and tests/test_compile_one.py hold the two to that).

    Parameters
    ----------
    scenario : Scenario
        One scenario, or many subjects of one (:func:`barrierflow.model.cohort.stacked`: fields
        holding one value per subject). For the latter the model's value fields hold one row per
        subject (arrays (n, k)) and its structure (indices, sizes) is shared; a value that decides
        the structure (a clearance of zero or not, the cells of a degrading layer) and differs
        between subjects raises :class:`~barrierflow.model.cohort.Diverging`.
    grid : Grid or None
        Default grid of layers without ``cells`` (``Grid()`` when None).
    layer_widths : dict, optional
        (barrier index, layer index) to the cell widths of that layer relative to its thickness,
        in place of the default grid (subjects compiled one by one that share one grid).
    """
    grid = grid or DEFAULT_GRID
    if cohort_size(scenario) is None:
        return _compile_one(scenario, grid, layer_widths or {})
    return compile_elementwise(scenario, grid, layer_widths)


def compile_elementwise(scenario: Scenario, grid: Grid | None = None,
                        layer_widths: dict[tuple[int, int], np.ndarray] | None = None) -> CompiledModel:
    """:func:`compile_scenario` in element-wise numpy arithmetic: a stacked scenario (one value per
    subject in its varied fields) or one scenario (the reference :func:`_compile_one` is held to,
    bit for bit)."""
    grid = grid or DEFAULT_GRID
    layer_widths = layer_widths or {}
    n_sub = cohort_size(scenario)
    lead: tuple[int, ...] = () if n_sub is None else (n_sub,)
    comps = scenario.compartments
    n_comp = len(comps)
    comp_index = {c.id: i for i, c in enumerate(comps)}
    bars = scenario.barriers
    n_bar = len(bars)

    # per-state pieces (compartments first, then each resolved barrier's cells), joined at the end
    cap_parts = [_row([c.volume if c.volume is not None else 1.0 for c in comps])]
    invk_parts = [_row([1.0 / c.partition for c in comps])]
    # volumes that change (evaporation, samples without replacement) and losses to the air take
    # the first-order loss of their compartment; its clearance then goes to a link of its own
    doses = regimen_bounds(scenario)
    shrink = doses.shrink
    shrinking = np.array([c.id in shrink for c in comps], dtype=np.bool_)
    own_loss = np.array([c.evaporates or bool(shrinking[i]) or decide(c.loss_rate > 0) for i, c in enumerate(comps)],
                        dtype=np.bool_)
    loss_parts = [_row([c.loss_rate if own_loss[i] else (c.clearance / c.volume if c.volume is not None else 0.0)
                        for i, c in enumerate(comps)])]
    # (barrier index, first cell state, one past the last, widths, layer of each cell, partition
    # coefficient of each cell)
    grids_tmp = []
    tau = response_time(scenario)  # the time scale the default grid resolves
    offset = n_comp
    for bi, b in enumerate(bars):
        if b.model == "steady":
            grids_tmp.append((bi, offset, offset, np.zeros(0), np.zeros(0, dtype=np.int64), np.zeros(0)))
            continue
        widths = [layer_widths[(bi, li)] * layer.thickness if (bi, li) in layer_widths else grid.widths(layer, tau)
                  for li, layer in enumerate(b.layers)]
        w = _join(widths)
        lay_idx = np.arange(len(widths), dtype=np.int64).repeat([x.shape[-1] for x in widths])
        part = _row([x.partition for x in b.layers])[..., lay_idx]
        grids_tmp.append((bi, offset, offset + w.shape[-1], w, lay_idx, part))
        cap_parts.append(b.area * w)
        invk_parts.append(1.0 / part)
        loss_parts.append(_row([x.degradation_rate for x in b.layers])[..., lay_idx])
        offset += w.shape[-1]
    n_cells = offset - n_comp
    n_dyn, q_elim0, q_degr0, q_perm0, q_supply0, q_lost0, n_state = state_layout(n_comp, n_bar, n_cells)

    # links, in order: each barrier's links (one for a steady barrier; the from face, the cell
    # faces, the to face for a resolved one), then the exchanges, then the clearances that go to
    # links of their own; the two states, what each degrades and tracks (ints), and the rates
    ends: list[np.ndarray] = []     # (k, 4): p, q, loss, track
    rates: list[list[np.ndarray]] = [[], [], [], []]  # a, b, c, d: rows (k,) or (n, k)
    n_link = 0
    loss_to_parts = [np.where(own_loss, np.arange(q_lost0, q_lost0 + n_comp), np.arange(q_elim0, q_elim0 + n_comp))
                     .astype(np.int64)]
    grids = []
    faces: list[list[int]] = [[] for _ in range(n_comp)]  # the barrier links touching each compartment
    chain_g = np.zeros(lead + (max(n_cells, 1),))
    in_chain = []  # (first, one past the last) link index of each barrier's links between its cells
    for bi, start, stop, w, lay_idx, part in grids_tmp:
        b = bars[bi]
        p_from = comp_index[b.from_id]
        p_to = comp_index[b.to_id]
        ends_at = _row([x.thickness for x in b.layers]).cumsum(axis=-1)
        interfaces = (0.0, *(ends_at if ends_at.ndim == 1 else np.moveaxis(ends_at, -1, 0)))
        if b.model == "steady":
            a, bb, c, d = (v * b.area for v in _two_port(b))
            ends.append(np.array([[p_from, p_to, q_degr0 + bi if decide(a != c) else -1, q_perm0 + bi]],
                                 dtype=np.int64))
            for k, v in enumerate((a, bb, c, d)):
                rates[k].append(_row([v]))
            grids.append(BarrierGrid(b.id, start, stop, w, w, lay_idx, interfaces, n_link, n_link))
            faces[p_from].append(n_link)
            faces[p_to].append(n_link)
            n_link += 1
            continue
        dif = _row([x.diffusivity for x in b.layers])[..., lay_idx]
        half_res = w / (2 * dif * part)  # h/cm
        nb = w.shape[-1]
        # one row per subject when the cells or the area hold one value per subject (the area
        # alone may: its cells are then shared)
        g = np.empty((nb + 1,) if half_res.ndim == 1 and not isinstance(b.area, np.ndarray) else
                     np.broadcast_shapes(np.shape(b.area)[:-1], half_res.shape[:-1]) + (nb + 1,))
        g[..., :1] = b.area / half_res[..., :1]
        g[..., 1:nb] = b.area / (half_res[..., :-1] + half_res[..., 1:])
        g[..., nb:] = b.area / half_res[..., -1:]
        blk = np.full((nb + 1, 4), -1, dtype=np.int64)
        blk[:, 0] = np.arange(start - 1, stop)
        blk[0, 0] = p_from
        blk[:, 1] = np.arange(start, stop + 1)
        blk[nb, 1] = p_to
        blk[nb, 3] = q_perm0 + bi
        ends.append(blk)
        for k in range(4):
            rates[k].append(g)
        chain_g[..., start - n_comp:stop - n_comp - 1] = g[..., 1:nb]
        in_chain.append((n_link + 1, n_link + nb))
        loss_to_parts.append(np.full(nb, q_degr0 + bi, dtype=np.int64))
        centres = w.cumsum(axis=-1) - w / 2
        grids.append(BarrierGrid(b.id, start, stop, w, centres, lay_idx, interfaces, n_link, n_link + nb))
        faces[p_from].append(n_link)
        faces[p_to].append(n_link + nb)
        n_link += nb + 1
    for e in scenario.exchanges:
        p, q = comp_index[e.from_id], comp_index[e.to_id]
        ends.append(np.array([[p, q, -1, -1]], dtype=np.int64))
        for k in range(4):
            rates[k].append(_row([e.flow]))
    for i, c in enumerate(comps):
        if own_loss[i] and decide(c.clearance != 0):  # clearance as a loss link: CL C = CL K u
            ends.append(np.array([[i, i, q_elim0 + i, -1]], dtype=np.int64))
            for k, v in enumerate((c.clearance * c.partition, 0.0, 0.0, 0.0)):
                rates[k].append(_row([v]))
    lk = np.concatenate(ends) if ends else np.zeros((0, 4), dtype=np.int64)
    link_p, link_q, link_loss, link_track = np.ascontiguousarray(lk.T)  # one copy, a row per column
    link_a, link_b, link_c, link_d = (_join(r) if r else np.zeros(0) for r in rates)

    mm = [(i, c.vmax, c.km) for i, c in enumerate(comps) if c.vmax is not None and decide(c.vmax != 0)]
    tr = [(comp_index[t.from_id], comp_index[t.to_id], t.rate) for t in scenario.transfers]

    y0 = np.zeros(lead + (n_state,))
    y0[..., :n_comp] = _row([c.starting_concentration for c in comps])
    for (bi, start, stop, _, lay_idx, _) in grids_tmp:  # loaded layers
        y0[..., start:stop] = _row([x.initial_concentration for x in bars[bi].layers])[..., lay_idx]
    part_of = _part_of_compartments(scenario)  # the connected part of each compartment
    m_list = _mass_scale(scenario, doses, part_of)
    m_ref = _row(m_list)  # per compartment: its part's bound
    cap = _join(cap_parts)
    inv_k = _join(invk_parts)
    scale = np.empty(lead + (n_state,))
    scale[..., :n_comp] = m_ref / cap[..., :n_comp]
    bound = _potential_bound(scenario, doses, part_of)
    if bound is not None:  # where it is far tighter (see POTENTIAL_MARGIN)
        tight = _row(bound)
        scale[..., :n_comp] = np.where(tight * POTENTIAL_MARGIN < scale[..., :n_comp], tight, scale[..., :n_comp])
    scale[..., :n_comp] = np.maximum(scale[..., :n_comp], _row([c.starting_concentration for c in comps]))
    for (bi, start, stop, _, _, part) in grids_tmp:
        # the potential u = C/K inside a layer lies between its two sides' (a maximum principle):
        # a cell's concentration is bounded by the larger side potential times its own K
        b = bars[bi]
        p_from, p_to = comp_index[b.from_id], comp_index[b.to_id]
        side_u = np.maximum(scale[..., p_from:p_from + 1] * inv_k[..., p_from:p_from + 1],
                            scale[..., p_to:p_to + 1] * inv_k[..., p_to:p_to + 1])
        scale[..., start:stop] = side_u * part
    # each cumulative amount takes its part's bound: per compartment (eliminated, supplied,
    # infused) or the part of the barrier's 'from' compartment (degraded, permeated)
    bar_ref = _row([m_list[comp_index[b.from_id]] for b in bars])
    scale[..., q_elim0:q_degr0] = m_ref
    scale[..., q_degr0:q_perm0] = bar_ref
    scale[..., q_perm0:q_supply0] = bar_ref
    scale[..., q_supply0:q_supply0 + n_comp] = m_ref
    for k in (1, 2, 3):  # infused, lost, sampled
        scale[..., q_supply0 + k * n_comp:q_supply0 + (k + 1) * n_comp] = m_ref
    for (_, start, stop, _, _, _) in grids_tmp:  # a loaded layer: at least its own concentration
        scale[..., start:stop] = np.maximum(scale[..., start:stop], y0[..., start:stop])
    limited = limited_compartments(scenario, doses)
    sol = scenario.substance.solubility
    if lead and inv_k.ndim == 1:
        inv_k = np.broadcast_to(inv_k, lead + inv_k.shape).copy()
    for i, c in enumerate(comps):  # a saturated reservoir: its potential C/K is the solubility
        if c.held and c.id in limited:
            inv_k[..., i:i + 1] = _row([sol / c.held_concentration])
    face_ptr = np.array([0, *accumulate(len(f) for f in faces)], dtype=np.int64)

    other = np.ones(len(lk), dtype=np.bool_)
    for j0, j1 in in_chain:
        other[j0:j1] = False
    loss_rate = _join(loss_parts)

    def full(x: np.ndarray) -> np.ndarray:  # a value field: one contiguous, writable row per subject
        if not lead and type(x) is np.ndarray and x.dtype == np.float64:  # one scenario: as it is
            return x
        x = np.asarray(x, dtype=np.float64)
        return np.array(np.broadcast_to(x, lead + x.shape[-1:]), order="C") if lead else x

    arrays = ModelArrays(
        n_comp=n_comp, n_dyn=n_dyn, q_supply=q_supply0, q_infused=q_supply0 + n_comp,
        q_sampled=q_supply0 + 3 * n_comp, capacity=full(cap), inv_capacity=full(1.0 / cap),
        inv_partition=full(inv_k), link_p=link_p, link_q=link_q,
        link_a=full(link_a), link_b=full(link_b), link_c=full(link_c), link_d=full(link_d),
        link_loss=link_loss, link_track=link_track,
        chain_g=full(chain_g), other_links=other.nonzero()[0].astype(np.int64, copy=False),
        loss_rate=full(loss_rate), loss_to=np.concatenate(loss_to_parts),
        lossy=_common(loss_rate != 0.0).nonzero()[0].astype(np.int64, copy=False),
        mm_state=np.array([m[0] for m in mm], dtype=np.int64),
        mm_vmax=full(_row([m[1] for m in mm])),
        mm_km=full(_row([m[2] for m in mm])),
        tr_from=np.array([t[0] for t in tr], dtype=np.int64),
        tr_to=np.array([t[1] for t in tr], dtype=np.int64),
        tr_rate=full(_row([t[2] for t in tr])),
        held=np.array([c.held for c in comps], dtype=np.bool_),
        has_volume=np.array([c.volume is not None for c in comps], dtype=np.bool_),
        area=full(_row([b.area for b in bars])),
        y0=full(y0), scale=full(scale),
        face_ptr=face_ptr, face_link=np.array([j for f in faces for j in f], dtype=np.int64),
        evap_rate=full(_row([_or_zero(c.evaporation_rate) for c in comps])),
        residual=full(_row([_or_zero(c.residual_volume) for c in comps])),
        solubility=full(_row([sol * c.partition if c.id in limited else np.inf for c in comps])),
        shrinking=shrinking)
    return CompiledModel(arrays, comp_ids=tuple(c.id for c in comps), barrier_ids=tuple(b.id for b in bars),
                         grids=tuple(grids), comp_index=comp_index,
                         barrier_index={b.id: i for i, b in enumerate(bars)})


# ---------------------------------------------------------------- rules a run reads from the model
@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def chain_walk(nd, held, link_p, link_q, link_b, link_c):
    """The dynamic states (``nd``) not held (``held``: of the compartments) in chain order, walking
    each chain from an end; ``[-1]`` when a link's two rates differ (``link_b``, ``link_c``, beyond
    rounding: the network is not symmetric), a state has a third neighbour or the links close a
    loop."""
    for j in range(link_b.shape[0]):
        if abs(link_b[j] - link_c[j]) > 1e-12 * max(abs(link_b[j]), abs(link_c[j])):
            return np.full(1, -1, dtype=np.int64)
    nbr = np.full((nd, 2), -1, dtype=np.int64)
    off = np.zeros(nd, dtype=np.bool_)
    for i in range(held.shape[0]):
        off[i] = held[i]
    alive = 0
    for i in range(nd):
        if not off[i]:
            alive += 1
    for j in range(link_p.shape[0]):
        a = link_p[j]
        z = link_q[j]
        if a == z or off[a] or off[z] or nbr[a, 0] == z or nbr[a, 1] == z:
            continue
        if nbr[a, 1] >= 0 or nbr[z, 1] >= 0:
            return np.full(1, -1, dtype=np.int64)  # a third neighbour: not a chain
        nbr[a, 0 if nbr[a, 0] < 0 else 1] = z
        nbr[z, 0 if nbr[z, 0] < 0 else 1] = a
    seen = np.zeros(nd, dtype=np.bool_)
    order = np.empty(alive, dtype=np.int64)
    k = 0
    for start in range(nd):
        if off[start] or seen[start] or nbr[start, 1] >= 0:
            continue
        prev = -1
        cur = start
        while cur >= 0 and not seen[cur]:
            seen[cur] = True
            order[k] = cur
            k += 1
            nxt = -1
            for e in range(2):
                c = nbr[cur, e]
                if c >= 0 and c != prev and not seen[c]:
                    nxt = c
                    break
            prev = cur
            cur = nxt
    if k != alive:  # a loop
        return np.full(1, -1, dtype=np.int64)
    return order




@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def taps_arrays(nc, nd, n_state, link_p, link_q, ends):
    """:func:`~barrierflow.engine.exported.taps_of`'s ``keep, pos, bstart, bstop`` in one compiled
    pass: every compartment, the two states of each barrier's face links (``ends``: per barrier
    its first and last link, first cell and one past its last), every cumulative amount,
    increasing (the one rule of which states a run keeps; :func:`_assemble` applies it too)."""
    n_bar = ends.shape[0] // 4
    kept = np.zeros(n_state, dtype=np.bool_)
    for i in range(nc):
        kept[i] = True
    for i in range(nd, n_state):
        kept[i] = True
    bstart = np.empty(n_bar, dtype=np.int64)
    bstop = np.empty(n_bar, dtype=np.int64)
    for b in range(n_bar):
        for k in range(2):
            link = ends[4 * b + k]
            kept[link_p[link]] = True
            kept[link_q[link]] = True
        bstart[b] = ends[4 * b + 2]
        bstop[b] = ends[4 * b + 3]
    n_keep = 0
    for i in range(n_state):
        n_keep += kept[i]
    keep = np.empty(n_keep, dtype=np.int64)
    pos = np.full(n_state, -1, dtype=np.int64)
    j = 0
    for i in range(n_state):
        if kept[i]:
            keep[j] = i
            pos[i] = j
            j += 1
    return keep, pos, bstart, bstop


# ---------------------------------------------------------------- one scenario, in one compiled pass
# The columns of the per-compartment numbers that _compile_one hands to _assemble
_C_CAP, _C_INVK, _C_LOSS, _C_START, _C_MREF, _C_TIGHT, _C_CLEAR, _C_EVAP, _C_RESID, _C_SOL, _C_SATK = range(11)
_CF = 11
_C_OWN, _C_SHRINK, _C_HELD, _C_VOL, _C_CLINK, _C_SAT = range(6)
_CI = 6
# the fields of _assemble's three buffers, in order (with the grids' centres and the layers' ends,
# the barriers' first states and first links; and what a run reads of the model besides: the
# inverse scales, the chain order and the kept states of exported.taps_of)
_F_FIELDS = ("capacity", "inv_capacity", "inv_partition", "link_a", "link_b", "link_c", "link_d", "chain_g",
             "loss_rate", "y0", "scale", "evap_rate", "residual", "solubility", "area", "centres", "ends",
             "inv_scale")
_I_FIELDS = ("link_p", "link_q", "link_loss", "link_track", "other_links", "loss_to", "lossy", "face_ptr",
             "face_link", "layer_of_cell", "bstart", "blink", "chain_order", "keep", "tap_pos", "tap_bstart",
             "tap_bstop")
_B_FIELDS = ("held", "has_volume", "shrinking")


def _compile_one(scenario: Scenario, grid: Grid, layer_widths: dict[tuple[int, int], np.ndarray]) -> CompiledModel:
    """:func:`compile_scenario` of one scenario: the decisions and the per-compartment numbers in
    Python (a few compartments, read as plain numbers), every array of the model in one compiled
    pass (:func:`_assemble`), by the arithmetic of :func:`compile_elementwise` operation for
    operation. A cold numpy call costs several microseconds; the element-wise build makes about
    a hundred of them for one scenario."""
    comps = scenario.compartments
    bars = scenario.barriers
    n_comp, n_bar = len(comps), len(bars)
    comp_index = {c.id: i for i, c in enumerate(comps)}
    doses = regimen_bounds(scenario)
    shrink = doses.shrink
    part_of = _part_of_compartments(scenario)
    m_list = _mass_scale(scenario, doses, part_of)
    bound = _potential_bound(scenario, doses, part_of)
    limited = limited_compartments(scenario, doses)
    sol = scenario.substance.solubility
    inf = math.inf
    cf: list[float] = []
    ci: list[int] = []
    mm_i, mm_v, mm_k = [], [], []
    vehicle = False  # CompiledModel.vehicle_terms, from the same numbers as the model's arrays
    for i, c in enumerate(comps):
        vol = c.volume
        shrinking = c.id in shrink
        own = c.evaporates or shrinking or c.loss_rate > 0
        saturated = c.held and c.id in limited  # a saturated reservoir: its potential C/K is the solubility
        evap = _or_zero(c.evaporation_rate)
        c_sol = sol * c.partition if c.id in limited else inf
        cf += (vol if vol is not None else 1.0, 1.0 / c.partition,
               c.loss_rate if own else (c.clearance / vol if vol is not None else 0.0), c.starting_concentration,
               m_list[i], bound[i] if bound is not None else inf, c.clearance * c.partition,
               evap, _or_zero(c.residual_volume), c_sol, sol / c.held_concentration if saturated else 0.0)
        ci += (own, shrinking, c.held, vol is not None, own and c.clearance != 0, saturated)
        vehicle = vehicle or evap > 0 or (math.isfinite(c_sol) and not c.held) or shrinking
        if c.vmax is not None and c.vmax != 0:
            mm_i.append(i)
            mm_v.append(c.vmax)
            mm_k.append(c.km)
    tau = response_time(scenario)  # the time scale the default grid resolves
    lf: list[float] = []  # per layer of every barrier: thickness, diffusivity, partition, degradation, loading
    bf: list[float] = []  # per barrier: area and a steady barrier's coefficients a, b, c, d
    bi: list[int] = []    # per barrier: from, to, steady, layers, a steady barrier's degradation (a != c)
    widths = []
    cells: list[int] = []  # per layer (0 in a steady barrier)
    for b_i, b in enumerate(bars):
        steady = b.model == "steady"
        coef = (0.0, 0.0, 0.0, 0.0)
        if steady:
            coef = tuple(v * b.area for v in _two_port(b))
        bf += (b.area, *coef)
        bi += (comp_index[b.from_id], comp_index[b.to_id], steady, len(b.layers), coef[0] != coef[2])
        for l_i, x in enumerate(b.layers):
            lf += (x.thickness, x.diffusivity, x.partition, x.degradation_rate, x.initial_concentration)
            if steady:
                cells.append(0)
                continue
            widths.append(layer_widths[(b_i, l_i)] * x.thickness if (b_i, l_i) in layer_widths
                          else grid.widths(x, tau))
            cells.append(len(widths[-1]))
    n_lay = len(lf) // 5
    ex = []
    exf = []
    for e in scenario.exchanges:
        ex += (comp_index[e.from_id], comp_index[e.to_id])
        exf.append(e.flow)
    w_all = np.concatenate(widths) if widths else np.zeros(0)
    n_cells = len(w_all)
    n_dyn, _, _, _, q_supply, _, n_state = state_layout(n_comp, n_bar, n_cells)
    n_link = n_cells + n_bar + len(exf) + sum(ci[_C_CLINK::_CI])  # (see _assemble)
    # every array in three buffers (float, int, bool), each a run of views (a compiled call boxes
    # each array it returns through an interpreted call, about 1 us apiece on a cold run)
    sizes = (n_dyn, n_dyn, n_dyn, n_link, n_link, n_link, n_link, max(n_cells, 1), n_dyn, n_state, n_state, n_comp,
             n_comp, n_comp, n_bar, n_cells, n_lay, n_state,  # floats: _F_FIELDS
             n_link, n_link, n_link, n_link, n_link, n_dyn, n_dyn, n_comp + 1, 2 * n_bar, n_cells, n_bar + 1,
             n_bar, n_dyn, n_state, n_state, n_bar, n_bar,  # ints: _I_FIELDS (other_links, lossy,
             # chain_order and keep: room for all, the first n_other, n_lossy, n_order, n_keep used)
             n_comp, n_comp, n_comp)  # bools: _B_FIELDS
    nf, ni = len(_F_FIELDS), len(_I_FIELDS)
    off = [0, *accumulate(sizes[:nf]), 0, *accumulate(sizes[nf:nf + ni]), 0, *accumulate(sizes[nf + ni:])]
    fo, io, bo = off[:nf + 1], off[nf + 1:nf + ni + 2], off[nf + ni + 2:]
    fb, ib, bb = np.empty(fo[-1]), np.empty(io[-1], dtype=np.int64), np.empty(bo[-1], dtype=np.bool_)
    n_other, n_lossy, n_order, n_keep = _assemble(
        np.array(cf, dtype=np.float64).reshape(n_comp, _CF), np.array(ci, dtype=np.int64).reshape(n_comp, _CI),
        np.array(lf, dtype=np.float64).reshape(n_lay, 5), np.array(cells, dtype=np.int64), w_all,
        np.array(bf, dtype=np.float64).reshape(n_bar, 5),
        np.array(bi, dtype=np.int64).reshape(n_bar, 5), np.array(ex, dtype=np.int64).reshape(-1, 2),
        np.array(exf, dtype=np.float64), POTENTIAL_MARGIN, fb, ib, bb, np.array(off, dtype=np.int64))
    (cap, inv_cap, inv_k, link_a, link_b, link_c, link_d, chain_g, loss_rate, y0, scale, evap, residual, solubility,
     area, centres, ends, inv_scale) = (fb[fo[k]:fo[k + 1]] for k in range(nf))
    (link_p, link_q, link_loss, link_track, other, loss_to, lossy, face_ptr, face_link, lay_idx, bstart,
     blink, order, keep, tap_pos, tap_bstart, tap_bstop) = (ib[io[k]:io[k + 1]] for k in range(ni))
    other, lossy = other[:n_other], lossy[:n_lossy]
    held, has_volume, shrinking = (bb[bo[k]:bo[k + 1]] for k in range(3))
    tr = scenario.transfers
    arrays = ModelArrays(
        n_comp, n_dyn, q_supply, q_supply + n_comp, q_supply + 3 * n_comp, cap, inv_cap, inv_k, link_p, link_q,
        link_a, link_b, link_c, link_d, link_loss, link_track, chain_g, other, loss_rate, loss_to, lossy,
        np.array(mm_i, dtype=np.int64), np.array(mm_v, dtype=np.float64), np.array(mm_k, dtype=np.float64),
        np.array([comp_index[t.from_id] for t in tr], dtype=np.int64),
        np.array([comp_index[t.to_id] for t in tr], dtype=np.int64), np.array([t.rate for t in tr], dtype=np.float64),
        held, has_volume, area, y0, scale, face_ptr, face_link, evap, residual, solubility, shrinking)
    grids = []
    lay0 = 0
    for b_i, b in enumerate(bars):
        n_l = len(b.layers)
        interfaces = (0.0, *ends[lay0:lay0 + n_l])
        lay0 += n_l
        start, stop, link = int(bstart[b_i]), int(bstart[b_i + 1]), int(blink[b_i])
        if b.model == "steady":
            w = np.zeros(0)
            grids.append(BarrierGrid(b.id, start, stop, w, w, np.zeros(0, dtype=np.int64), interfaces, link, link))
            continue
        lo, hi = start - n_comp, stop - n_comp
        grids.append(BarrierGrid(b.id, start, stop, w_all[lo:hi], centres[lo:hi], lay_idx[lo:hi], interfaces, link,
                                 link + hi - lo))
    model = CompiledModel(arrays, comp_ids=tuple(comp_index), barrier_ids=tuple(b.id for b in bars),
                          grids=tuple(grids), comp_index=comp_index,
                          barrier_index={b.id: i for i, b in enumerate(bars)})
    # what exact_chain.chain_order and exported.taps_of would compute from the model (their memos),
    # by the same compiled rules (chain_walk, taps_arrays) in the same pass; the model's
    # vehicle_terms and is_linear from the numbers its arrays hold (read as plain numbers above:
    # their properties read them back from the arrays, some 25 us of a cold run)
    d = model.__dict__
    d["vehicle_terms"] = bool(vehicle)
    d["is_linear"] = not mm_i and not vehicle
    d["_chain_order"] = order[:n_order] if n_order >= 0 and model.is_linear and not len(tr) else None
    d["_taps_parts"] = (keep[:n_keep], tap_pos, tap_bstart, tap_bstop, inv_scale)
    return model


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def _assemble(cf, ci, lf, cells, w, bf, bi, ex, exf, margin, fb, ib, bb, off):
    """Every array of one scenario's model (see :func:`_compile_one` for the columns of the
    arguments), by the arithmetic of :func:`compile_elementwise`, operation for operation, into
    the buffers ``fb``, ``ib``, ``bb`` (float, int, bool: the fields :data:`_F_FIELDS`,
    :data:`_I_FIELDS`, :data:`_B_FIELDS` one after the other, from the offsets ``off``), with the
    model's chain order (:func:`chain_walk`), kept states (:func:`taps_arrays`) and inverse scales;
    returns how many other links, lossy states, states in chain order (-1: not a chain) and kept
    states there are (the first of the room given to each)."""
    nf = len(_F_FIELDS)
    ni = len(_I_FIELDS)
    fo = off[:nf + 1]
    io = off[nf + 1:nf + ni + 2]
    bo = off[nf + ni + 2:]
    cap = fb[fo[0]:fo[1]]
    inv_cap = fb[fo[1]:fo[2]]
    inv_k = fb[fo[2]:fo[3]]
    link_a = fb[fo[3]:fo[4]]
    link_b = fb[fo[4]:fo[5]]
    link_c = fb[fo[5]:fo[6]]
    link_d = fb[fo[6]:fo[7]]
    chain_g = fb[fo[7]:fo[8]]
    loss_rate = fb[fo[8]:fo[9]]
    y0 = fb[fo[9]:fo[10]]
    scale = fb[fo[10]:fo[11]]
    evap = fb[fo[11]:fo[12]]
    residual = fb[fo[12]:fo[13]]
    solubility = fb[fo[13]:fo[14]]
    area_out = fb[fo[14]:fo[15]]
    centres = fb[fo[15]:fo[16]]
    ends = fb[fo[16]:fo[17]]
    link_p = ib[io[0]:io[1]]
    link_q = ib[io[1]:io[2]]
    link_loss = ib[io[2]:io[3]]
    link_track = ib[io[3]:io[4]]
    other_links = ib[io[4]:io[5]]
    loss_to = ib[io[5]:io[6]]
    lossy = ib[io[6]:io[7]]
    face_ptr = ib[io[7]:io[8]]
    face_link = ib[io[8]:io[9]]
    lay_idx = ib[io[9]:io[10]]
    bstart = ib[io[10]:io[11]]
    blink = ib[io[11]:io[12]]
    order_out = ib[io[12]:io[13]]
    keep_out = ib[io[13]:io[14]]
    pos_out = ib[io[14]:io[15]]
    bstart_out = ib[io[15]:io[16]]
    bstop_out = ib[io[16]:io[17]]
    inv_scale = fb[fo[17]:fo[18]]
    held = bb[bo[0]:bo[1]]
    has_volume = bb[bo[1]:bo[2]]
    shrinking = bb[bo[2]:bo[3]]
    nc = cf.shape[0]
    n_bar = bf.shape[0]
    n_cells = w.shape[0]
    nd, q_elim, q_degr, q_perm, q_supply, q_lost, n_state = state_layout(nc, n_bar, n_cells)
    # the cells: each barrier's range of states, first link, layers
    part = np.empty(n_cells)  # partition coefficient of each cell
    dif = np.empty(n_cells)
    kdeg = np.empty(n_cells)
    c0 = np.empty(n_cells)
    n_link = 0
    n_clink = 0
    for p in range(nc):
        n_clink += ci[p, _C_CLINK]
    lay = 0
    cell = 0
    for b in range(n_bar):
        bstart[b] = nc + cell
        blink[b] = n_link
        acc = 0.0
        for li in range(bi[b, 3]):
            acc = acc + lf[lay + li, 0]
            ends[lay + li] = acc
        if bi[b, 2]:  # steady: one link
            n_link += 1
            lay += bi[b, 3]
            continue
        c_start = cell
        for li in range(bi[b, 3]):
            x = lay + li
            for _ in range(cells[x]):
                lay_idx[cell] = li
                part[cell] = lf[x, 2]
                dif[cell] = lf[x, 1]
                kdeg[cell] = lf[x, 3]
                c0[cell] = lf[x, 4]
                cell += 1
        acc = 0.0
        for a in range(c_start, cell):
            acc = acc + w[a]
            centres[a] = acc - w[a] / 2
        n_link += cell - c_start + 1
        lay += bi[b, 3]
    bstart[n_bar] = nc + cell
    # per-state numbers
    for p in range(nc):
        cap[p] = cf[p, _C_CAP]
        inv_k[p] = cf[p, _C_INVK]
        loss_rate[p] = cf[p, _C_LOSS]
    for b in range(n_bar):
        area = bf[b, 0]
        for s in range(bstart[b], bstart[b + 1]):
            a = s - nc
            cap[s] = area * w[a]
            inv_k[s] = 1.0 / part[a]
            loss_rate[s] = kdeg[a]
    for s in range(nd):
        inv_cap[s] = 1.0 / cap[s]
    # links: each barrier's (its faces and cells, or one for a steady barrier), the exchanges, the
    # clearances that go to links of their own
    n_ex = ex.shape[0]
    n_all = n_link + n_ex + n_clink
    for j in range(n_all):
        link_loss[j] = -1
        link_track[j] = -1
    other = np.ones(n_all, dtype=np.bool_)
    for a in range(chain_g.shape[0]):
        chain_g[a] = 0.0
    n_face = np.zeros(nc, dtype=np.int64)
    for b in range(n_bar):
        p_from = bi[b, 0]
        p_to = bi[b, 1]
        j0 = blink[b]
        n_face[p_from] += 1
        n_face[p_to] += 1
        if bi[b, 2]:
            link_p[j0] = p_from
            link_q[j0] = p_to
            link_loss[j0] = q_degr + b if bi[b, 4] else -1
            link_track[j0] = q_perm + b
            link_a[j0] = bf[b, 1]
            link_b[j0] = bf[b, 2]
            link_c[j0] = bf[b, 3]
            link_d[j0] = bf[b, 4]
            continue
        area = bf[b, 0]
        start = bstart[b]
        stop = bstart[b + 1]
        nb = stop - start
        # half resistances w / (2 D K), h/cm, and the conductances area / (sum of the two halves)
        h_prev = w[start - nc] / (2.0 * dif[start - nc] * part[start - nc])
        g = area / h_prev
        link_p[j0] = p_from
        link_q[j0] = start
        link_a[j0] = g
        link_b[j0] = g
        link_c[j0] = g
        link_d[j0] = g
        for k in range(1, nb):
            a = start - nc + k
            h = w[a] / (2.0 * dif[a] * part[a])
            g = area / (h_prev + h)
            j = j0 + k
            link_p[j] = start + k - 1
            link_q[j] = start + k
            link_a[j] = g
            link_b[j] = g
            link_c[j] = g
            link_d[j] = g
            chain_g[a - 1] = g
            other[j] = False
            h_prev = h
        g = area / h_prev
        j = j0 + nb
        link_p[j] = stop - 1
        link_q[j] = p_to
        link_track[j] = q_perm + b
        link_a[j] = g
        link_b[j] = g
        link_c[j] = g
        link_d[j] = g
    for e in range(n_ex):
        j = n_link + e
        link_p[j] = ex[e, 0]
        link_q[j] = ex[e, 1]
        link_a[j] = exf[e]
        link_b[j] = exf[e]
        link_c[j] = exf[e]
        link_d[j] = exf[e]
    j = n_link + n_ex
    for p in range(nc):
        if ci[p, _C_CLINK]:  # clearance as a loss link: CL C = CL K u
            link_p[j] = p
            link_q[j] = p
            link_loss[j] = q_elim + p
            link_a[j] = cf[p, _C_CLEAR]
            link_b[j] = 0.0
            link_c[j] = 0.0
            link_d[j] = 0.0
            j += 1
    # the barrier links touching each compartment, barrier after barrier
    face_ptr[0] = 0
    for p in range(nc):
        face_ptr[p + 1] = face_ptr[p] + n_face[p]
    fill = face_ptr[:nc].copy()
    for b in range(n_bar):
        j0 = blink[b]
        face_link[fill[bi[b, 0]]] = j0
        fill[bi[b, 0]] += 1
        face_link[fill[bi[b, 1]]] = j0 + bstart[b + 1] - bstart[b]
        fill[bi[b, 1]] += 1
    n_other = 0
    for j in range(n_all):
        n_other += other[j]
    k = 0
    for j in range(n_all):
        if other[j]:
            other_links[k] = j
            k += 1
    for p in range(nc):
        loss_to[p] = q_lost + p if ci[p, _C_OWN] else q_elim + p
    for b in range(n_bar):
        for s in range(bstart[b], bstart[b + 1]):
            loss_to[s] = q_degr + b
    n_lossy = 0
    for s in range(nd):
        n_lossy += loss_rate[s] != 0.0
    k = 0
    for s in range(nd):
        if loss_rate[s] != 0.0:
            lossy[k] = s
            k += 1
    # the initial state and the magnitude scales
    for s in range(n_state):
        y0[s] = 0.0
    for p in range(nc):
        y0[p] = cf[p, _C_START]
        s0 = cf[p, _C_MREF] / cap[p]
        tight = cf[p, _C_TIGHT]
        if tight * margin < s0:  # where the potential bound is far tighter
            s0 = tight
        st = cf[p, _C_START]
        scale[p] = s0 if s0 >= st or s0 != s0 else st  # np.maximum
    for b in range(n_bar):
        p_from = bi[b, 0]
        p_to = bi[b, 1]
        u_from = scale[p_from] * inv_k[p_from]
        u_to = scale[p_to] * inv_k[p_to]
        side_u = u_from if u_from >= u_to or u_from != u_from else u_to  # np.maximum
        for s in range(bstart[b], bstart[b + 1]):
            y0[s] = c0[s - nc]
            scale[s] = side_u * part[s - nc]
    for p in range(nc):
        m_ref = cf[p, _C_MREF]
        scale[q_elim + p] = m_ref
        for k in range(4):  # supplied, infused, lost, sampled
            scale[q_supply + k * nc + p] = m_ref
    for b in range(n_bar):
        bar_ref = cf[bi[b, 0], _C_MREF]
        scale[q_degr + b] = bar_ref
        scale[q_perm + b] = bar_ref
    for s in range(nc, nd):  # a loaded layer: at least its own concentration
        x = scale[s]
        y = y0[s]
        scale[s] = x if x >= y or x != x else y
    for p in range(nc):
        if ci[p, _C_SAT]:  # a saturated reservoir: its potential C/K is the solubility
            inv_k[p] = cf[p, _C_SATK]
    for p in range(nc):
        held[p] = ci[p, _C_HELD] != 0
        has_volume[p] = ci[p, _C_VOL] != 0
        shrinking[p] = ci[p, _C_SHRINK] != 0
        evap[p] = cf[p, _C_EVAP]
        residual[p] = cf[p, _C_RESID]
        solubility[p] = cf[p, _C_SOL]
    for b in range(n_bar):
        area_out[b] = bf[b, 0]
    for s in range(n_state):
        inv_scale[s] = 1.0 / scale[s]
    walk = chain_walk(nd, held, link_p, link_q, link_b, link_c)
    n_order = walk.shape[0]
    if n_order and walk[0] < 0:
        n_order = -1
    for a in range(max(n_order, 0)):
        order_out[a] = walk[a]
    ends_t = np.empty(4 * n_bar, dtype=np.int64)  # as taps_of takes them from the grids
    for b in range(n_bar):
        ends_t[4 * b] = blink[b]
        ends_t[4 * b + 1] = blink[b] + bstart[b + 1] - bstart[b]
        ends_t[4 * b + 2] = bstart[b]
        ends_t[4 * b + 3] = max(bstart[b], min(bstart[b + 1], nd))
    keep, pos, tb0, tb1 = taps_arrays(nc, nd, n_state, link_p, link_q, ends_t)
    for a in range(keep.shape[0]):
        keep_out[a] = keep[a]
    for a in range(n_state):
        pos_out[a] = pos[a]
    for b in range(n_bar):
        bstart_out[b] = tb0[b]
        bstop_out[b] = tb1[b]
    return n_other, n_lossy, n_order, keep.shape[0]
