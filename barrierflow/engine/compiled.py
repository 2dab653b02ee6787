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

import numpy as np

from ..model import Barrier, Scenario
from .arrays import ModelArrays
from .grid import Grid
from .schedule import regimen_bounds
from .twoport import stack_two_port

__all__ = ["BarrierGrid", "CompiledModel", "ModelArrays", "compile_scenario", "limited_compartments"]


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
        # every field of ``arrays`` is also an attribute of the model, under the same name
        for name, value in zip(ModelArrays._fields, self.arrays, strict=True):
            object.__setattr__(self, name, value)

    def with_arrays(self, arrays: ModelArrays) -> CompiledModel:
        """The same model with other numbers (for example the links as a run's events left them)."""
        return dataclasses.replace(self, arrays=arrays)

    @property
    def n_cells(self) -> int:
        """Number of barrier cells."""
        return self.n_dyn - self.n_comp

    @property
    def n_bar(self) -> int:
        """Number of barriers."""
        return len(self.area)

    @property
    def n_state(self) -> int:
        """Length of the full state vector."""
        return self.n_dyn + 5 * self.n_comp + 2 * self.n_bar

    # offsets of the cumulative amounts (q_supply, q_infused and q_sampled are fields of ``arrays``)
    @property
    def q_elim(self) -> int:
        """Offset of the eliminated amounts."""
        return self.n_dyn

    @property
    def q_degr(self) -> int:
        """Offset of the degraded amounts."""
        return self.n_dyn + self.n_comp

    @property
    def q_perm(self) -> int:
        """Offset of the permeated amounts."""
        return self.n_dyn + self.n_comp + self.n_bar

    @property
    def q_lost(self) -> int:
        """Offset of the amounts lost to the air."""
        return self.n_dyn + 3 * self.n_comp + 2 * self.n_bar

    @property
    def is_linear(self) -> bool:
        """True without saturable elimination (and without the terms of :attr:`vehicle_terms`)."""
        return len(self.mm_state) == 0 and not self.vehicle_terms

    @property
    def vehicle_terms(self) -> bool:
        """True when a volume changes over time (evaporation, samples without replacement) or a
        compartment that is not held may hold undissolved solid (a solubility limit): only the
        scipy integrators, through :mod:`barrierflow.engine.vehicle`, run such a model. (A held
        compartment above the solubility is a saturated reservoir: its potential is the solubility,
        which its partition entry gives; it stays linear.)"""
        return bool(np.any(self.evap_rate > 0) or np.any(np.isfinite(self.solubility) & ~self.held)
                    or np.any(self.shrinking))


def _two_port(barrier: Barrier) -> tuple[float, float, float, float]:
    """Quasi-steady amount-rate coefficients (per area) of a barrier (see :mod:`.twoport`), cm/h."""
    return stack_two_port(barrier.layers)


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


def _mass_scale(s: Scenario) -> list[float]:
    """An amount per compartment, mg, that bounds what its connected part of the network can move.

    Present at start plus every dose; each clamped level (a held compartment over the run, a hold
    dose over its duration) adds what it could give: its potential times the steady uptake of
    every link it touches over that time, the storage of the barriers it touches, and what
    transfers, clearance and saturable elimination could take from it meanwhile. A part that
    moves nothing gets 1 mg.
    """
    comps = {c.id: c for c in s.compartments}
    part = _part_of_compartments(s)
    pos = {c.id: i for i, c in enumerate(s.compartments)}
    total = [0.0] * len(s.compartments)

    def add(cid: str, amount: float) -> None:
        total[part[pos[cid]]] += amount

    for c in s.compartments:
        if not c.held and c.volume:
            add(c.id, c.initial_concentration * c.volume)
    for b in s.barriers:
        add(b.from_id, b.area * math.fsum(x.initial_concentration * x.thickness for x in b.layers))
    clamps: list[tuple[str, float, float]] = []  # (compartment, concentration, time held)
    for c in s.compartments:
        if c.held:
            clamps.append((c.id, c.held_concentration, s.duration))
    doses = regimen_bounds(s)
    for cid, amount in doses.added:
        add(cid, amount)
    clamps.extend(doses.clamps)
    uptake: dict[str, float] = {c.id: 0.0 for c in s.compartments}   # mL/h per unit potential
    storage: dict[str, float] = {c.id: 0.0 for c in s.compartments}  # mL per unit potential
    for b in s.barriers:
        a, _, _, d = _two_port(b)
        uptake[b.from_id] += a * b.area
        uptake[b.to_id] += d * b.area
        if b.model != "steady":
            cap = b.area * math.fsum(x.partition * x.thickness for x in b.layers)
            storage[b.from_id] += cap
            storage[b.to_id] += cap
    for e in s.exchanges:
        uptake[e.from_id] += e.flow
        uptake[e.to_id] += e.flow
    for cid, conc, span in clamps:
        c = comps[cid]
        u = conc / c.partition
        amount = u * (uptake[cid] * span + storage[cid])
        amount += conc * (c.clearance * span + sum(t.rate for t in s.transfers if t.from_id == cid)
                          * (c.volume or 0.0) * span)
        if c.vmax:
            amount += c.vmax * span
        add(cid, amount)
    return [total[part[i]] if total[part[i]] > 0 else 1.0 for i in range(len(s.compartments))]


def limited_compartments(s: Scenario) -> set[str]:
    """The compartments whose solute may exceed the solubility (times their partition), so that
    the limit must be computed there; empty without ``[substance] solubility``.

    A compartment exceeds it only through what is put into it, never through diffusion or
    exchange from phases held at or below it (the potential of a diffusive network has no
    maximum inside): so it is limited when it starts above; when it evaporates; when a refill
    or hold puts it above; when a bolus, infusion or transfer feeds it and either a clamp above
    zero could supply without end or all the substance of the run (every initial amount and dose)
    in its smallest volume would exceed it; or when a layer starts above its own solubility and
    that amount could. A held compartment is limited when held above it.
    """
    sol = s.substance.solubility
    if not sol:
        return set()
    doses = regimen_bounds(s)
    total = 0.0
    clamps = any(c.held and c.held_concentration > 0 for c in s.compartments)
    clamps |= any(held and conc > 0 for _, conc, held in doses.levels)
    for c in s.compartments:
        if not c.held and c.volume:
            total += c.initial_concentration * c.volume
    over_layer = False
    for b in s.barriers:
        for layer in b.layers:
            total += layer.initial_concentration * layer.thickness * b.area
            over_layer |= layer.initial_concentration / layer.partition > sol
    for _, amount in doses.added:
        total += amount
    fed = {t.to_id for t in s.transfers} | doses.fed
    out = set()
    for c in s.compartments:
        cap = sol * c.partition
        if c.held:
            if c.held_concentration > cap:
                out.add(c.id)
            continue
        smallest = c.volume
        if c.evaporates:
            out.add(c.id)
            continue
        smallest = max(smallest - doses.shrink.get(c.id, 0.0), 1e-300)
        could = total / smallest > cap
        if (c.initial_concentration > cap or any(cid == c.id and conc > cap for cid, conc, _ in doses.levels)
                or (c.id in fed and (clamps or could)) or (over_layer and could)):
            out.add(c.id)
    return out


def compile_scenario(scenario: Scenario, grid: Grid | None = None,
                     layer_widths: dict[tuple[int, int], np.ndarray] | None = None) -> CompiledModel:
    """Turn a validated scenario into the flat arrays of a :class:`CompiledModel`.

    Parameters
    ----------
    scenario : Scenario
    grid : Grid or None
        Default grid of layers without ``cells`` (``Grid()`` when None).
    layer_widths : dict, optional
        (barrier index, layer index) to relative cell widths (summing to 1) that replace the
        grid's for that layer (subjects of a population share one grid this way).
    """
    grid = grid or Grid()
    layer_widths = layer_widths or {}
    comps = scenario.compartments
    n_comp = len(comps)
    comp_index = {c.id: i for i, c in enumerate(comps)}
    bars = scenario.barriers
    n_bar = len(bars)

    # per-state pieces (compartments first, then each resolved barrier's cells), joined at the end
    cap_parts = [np.array([c.volume if c.volume else 1.0 for c in comps], dtype=np.float64)]
    invk_parts = [np.array([1.0 / c.partition for c in comps], dtype=np.float64)]
    # volumes that change (evaporation, samples without replacement) and losses to the air take
    # the first-order loss of their compartment; its clearance then goes to a link of its own
    shrinking = np.array([c.id in regimen_bounds(scenario).shrink for c in comps], dtype=np.bool_)
    own_loss = np.array([c.evaporates or bool(shrinking[i]) or c.loss_rate > 0 for i, c in enumerate(comps)],
                        dtype=np.bool_)
    loss_parts = [np.array([c.loss_rate if own_loss[i] else (c.clearance / c.volume if c.volume and c.clearance
                                                              else 0.0) for i, c in enumerate(comps)],
                           dtype=np.float64)]
    # (barrier index, first cell state, one past the last, widths, layer of each cell, partition
    # coefficient of each cell)
    grids_tmp = []
    offset = n_comp
    for bi, b in enumerate(bars):
        if b.model == "steady":
            grids_tmp.append((bi, offset, offset, np.zeros(0), np.zeros(0, dtype=np.int64), np.zeros(0)))
            continue
        widths = [layer_widths[(bi, li)] * layer.thickness if (bi, li) in layer_widths else grid.widths(layer)
                  for li, layer in enumerate(b.layers)]
        w = np.concatenate(widths)
        lay_idx = np.repeat(np.arange(len(widths), dtype=np.int64), [len(x) for x in widths])
        part = np.array([x.partition for x in b.layers], dtype=np.float64)[lay_idx]
        grids_tmp.append((bi, offset, offset + len(w), w, lay_idx, part))
        cap_parts.append(b.area * w)
        invk_parts.append(1.0 / part)
        loss_parts.append(np.array([x.degradation_rate for x in b.layers], dtype=np.float64)[lay_idx])
        offset += len(w)
    n_cells = offset - n_comp
    n_dyn = n_comp + n_cells
    q_elim0 = n_dyn
    q_degr0 = n_dyn + n_comp
    q_perm0 = q_degr0 + n_bar
    q_supply0 = q_perm0 + n_bar
    q_lost0 = q_supply0 + 2 * n_comp
    n_state = q_supply0 + 4 * n_comp

    # links as blocks of columns (p, q, a, b, c, d, loss, track), in order: each barrier's links
    # (one for a steady barrier; the from face, the cell faces, the to face for a resolved one),
    # then the exchanges
    link_blocks: list[np.ndarray] = []
    n_link = 0
    loss_to_parts = [np.where(own_loss, np.arange(q_lost0, q_lost0 + n_comp), np.arange(q_elim0, q_elim0 + n_comp))
                     .astype(np.int64)]
    grids = []
    faces: list[list[int]] = [[] for _ in range(n_comp)]  # the barrier links touching each compartment
    chain_g = np.zeros(max(n_cells, 1))
    in_chain = []  # (first, one past the last) link index of each barrier's links between its cells
    for bi, start, stop, w, lay_idx, part in grids_tmp:
        b = bars[bi]
        p_from = comp_index[b.from_id]
        p_to = comp_index[b.to_id]
        interfaces = (0.0, *[float(x) for x in np.cumsum([x.thickness for x in b.layers])])
        if b.model == "steady":
            a, bb, c, d = (v * b.area for v in _two_port(b))
            link_blocks.append(np.array([[p_from, p_to, a, bb, c, d, q_degr0 + bi if a != c else -1, q_perm0 + bi]],
                                        dtype=np.float64))
            grids.append(BarrierGrid(b.id, start, stop, w, w, lay_idx, interfaces, n_link, n_link))
            faces[p_from].append(n_link)
            faces[p_to].append(n_link)
            n_link += 1
            continue
        dif = np.array([x.diffusivity for x in b.layers])[lay_idx]
        half_res = w / (2 * dif * part)  # h/cm
        nb = len(w)
        blk = np.empty((nb + 1, 8))
        g = np.empty(nb + 1)
        g[0] = b.area / half_res[0]
        g[1:nb] = b.area / (half_res[:-1] + half_res[1:])
        g[nb] = b.area / half_res[-1]
        blk[:, 0] = np.arange(start - 1, stop)
        blk[0, 0] = p_from
        blk[:, 1] = np.arange(start, stop + 1)
        blk[nb, 1] = p_to
        blk[:, 2:6] = g[:, None]
        blk[:, 6:8] = -1
        blk[nb, 7] = q_perm0 + bi
        link_blocks.append(blk)
        chain_g[start - n_comp:stop - n_comp - 1] = g[1:nb]
        in_chain.append((n_link + 1, n_link + nb))
        loss_to_parts.append(np.full(nb, q_degr0 + bi, dtype=np.int64))
        centres = np.cumsum(w) - w / 2
        grids.append(BarrierGrid(b.id, start, stop, w, centres, lay_idx, interfaces, n_link, n_link + nb))
        faces[p_from].append(n_link)
        faces[p_to].append(n_link + nb)
        n_link += nb + 1
    for e in scenario.exchanges:
        p, q = comp_index[e.from_id], comp_index[e.to_id]
        link_blocks.append(np.array([[p, q, e.flow, e.flow, e.flow, e.flow, -1, -1]], dtype=np.float64))
    for i, c in enumerate(comps):
        if own_loss[i] and c.clearance:  # clearance as a loss link: CL C = CL K u
            link_blocks.append(np.array([[i, i, c.clearance * c.partition, 0.0, 0.0, 0.0, q_elim0 + i, -1]],
                                        dtype=np.float64))
    lk = np.concatenate(link_blocks) if link_blocks else np.zeros((0, 8))

    mm = [(i, c.vmax, c.km) for i, c in enumerate(comps) if c.vmax]
    tr = [(comp_index[t.from_id], comp_index[t.to_id], t.rate) for t in scenario.transfers]

    y0 = np.zeros(n_state)
    y0[:n_comp] = [c.starting_concentration for c in comps]
    for (bi, start, stop, _, lay_idx, _) in grids_tmp:  # loaded layers
        y0[start:stop] = np.array([x.initial_concentration for x in bars[bi].layers], dtype=np.float64)[lay_idx]
    m_ref = np.array(_mass_scale(scenario), dtype=np.float64)  # per compartment: its part's bound
    cap = np.concatenate(cap_parts)
    inv_k = np.concatenate(invk_parts)
    scale = np.empty(n_state)
    scale[:n_comp] = m_ref / cap[:n_comp]
    scale[:n_comp] = np.maximum(scale[:n_comp], [c.starting_concentration for c in comps])
    for (bi, start, stop, _, _, part) in grids_tmp:
        # the potential u = C/K inside a layer lies between its two sides' (a maximum principle):
        # a cell's concentration is bounded by the larger side potential times its own K
        b = bars[bi]
        p_from, p_to = comp_index[b.from_id], comp_index[b.to_id]
        side_u = max(scale[p_from] * inv_k[p_from], scale[p_to] * inv_k[p_to])
        scale[start:stop] = side_u * part
    # each cumulative amount takes its part's bound: per compartment (eliminated, supplied,
    # infused) or the part of the barrier's 'from' compartment (degraded, permeated)
    bar_ref = np.array([m_ref[comp_index[b.from_id]] for b in bars], dtype=np.float64)
    scale[q_elim0:q_degr0] = m_ref
    scale[q_degr0:q_perm0] = bar_ref
    scale[q_perm0:q_supply0] = bar_ref
    scale[q_supply0:q_supply0 + n_comp] = m_ref
    for k in (1, 2, 3):  # infused, lost, sampled
        scale[q_supply0 + k * n_comp:q_supply0 + (k + 1) * n_comp] = m_ref
    for (_, start, stop, _, _, _) in grids_tmp:  # a loaded layer: at least its own concentration
        scale[start:stop] = np.maximum(scale[start:stop], y0[start:stop])
    limited = limited_compartments(scenario)
    sol = scenario.substance.solubility
    for i, c in enumerate(comps):  # a saturated reservoir: its potential C/K is the solubility
        if c.held and c.id in limited:
            inv_k[i] = sol / c.held_concentration
    face_ptr = np.zeros(n_comp + 1, dtype=np.int64)
    face_ptr[1:] = np.cumsum([len(f) for f in faces])

    other = np.ones(len(lk), dtype=np.bool_)
    for j0, j1 in in_chain:
        other[j0:j1] = False
    loss_rate = np.concatenate(loss_parts)
    arrays = ModelArrays(
        n_comp=n_comp, n_dyn=n_dyn, q_supply=q_supply0, q_infused=q_supply0 + n_comp,
        q_sampled=q_supply0 + 3 * n_comp, capacity=cap, inv_capacity=1.0 / cap, inv_partition=inv_k,
        link_p=lk[:, 0].astype(np.int64), link_q=lk[:, 1].astype(np.int64),
        link_a=lk[:, 2].copy(), link_b=lk[:, 3].copy(), link_c=lk[:, 4].copy(), link_d=lk[:, 5].copy(),
        link_loss=lk[:, 6].astype(np.int64), link_track=lk[:, 7].astype(np.int64),
        chain_g=chain_g, other_links=np.flatnonzero(other).astype(np.int64),
        loss_rate=loss_rate, loss_to=np.concatenate(loss_to_parts),
        lossy=np.flatnonzero(loss_rate != 0.0).astype(np.int64),
        mm_state=np.array([m[0] for m in mm], dtype=np.int64),
        mm_vmax=np.array([m[1] for m in mm], dtype=np.float64),
        mm_km=np.array([m[2] for m in mm], dtype=np.float64),
        tr_from=np.array([t[0] for t in tr], dtype=np.int64),
        tr_to=np.array([t[1] for t in tr], dtype=np.int64),
        tr_rate=np.array([t[2] for t in tr], dtype=np.float64),
        held=np.array([c.held for c in comps], dtype=np.bool_),
        has_volume=np.array([c.volume is not None for c in comps], dtype=np.bool_),
        area=np.array([b.area for b in bars], dtype=np.float64),
        y0=y0, scale=scale,
        face_ptr=face_ptr, face_link=np.array([j for f in faces for j in f], dtype=np.int64),
        evap_rate=np.array([c.evaporation_rate or 0.0 for c in comps], dtype=np.float64),
        residual=np.array([c.residual_volume or 0.0 for c in comps], dtype=np.float64),
        solubility=np.array([sol * c.partition if c.id in limited else np.inf for c in comps], dtype=np.float64),
        shrinking=shrinking)
    return CompiledModel(arrays, comp_ids=tuple(c.id for c in comps), barrier_ids=tuple(b.id for b in bars),
                         grids=tuple(grids), comp_index=comp_index,
                         barrier_index={b.id: i for i, b in enumerate(bars)})
