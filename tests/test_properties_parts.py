"""Property tests over random valid networks: parts that no link joins do not affect each other.

Invented networks from ``tests/random_networks.py``, drawn by hypothesis (see
test_properties_paths.py for the profile). A compartment that no link touches and no dose names
never changes (conservation in a closed, unreactive volume; common practice), and adding a
separate network to a file leaves the rest of the results as they were, within the documented
tolerance of the path (1e-4 of each state's scale for RODAS4, whose error control weighs every
state; the exact paths decompose each connected part on its own and agree to rounding).
"""

from __future__ import annotations

import dataclasses
import random

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from random_networks import random_scenario
from test_properties_paths import DEFAULT_TOL, trusted

from barrierflow import Compartment
from barrierflow.engine import solve


@settings(max_examples=60)
@given(st.randoms(use_true_random=False), st.floats(1e-3, 1e5),
       st.one_of(st.just(0.0), st.floats(1e-18, 10.0)))
def test_a_compartment_that_no_link_touches_never_changes(rng: random.Random, volume: float, conc: float):
    s = random_scenario(rng, small_grid=True)
    alone = Compartment("untouched", volume=volume, initial_concentration=conc)
    s2 = dataclasses.replace(s, compartments=(*s.compartments, alone))
    tr = solve(s2)
    trusted(tr)
    i = tr.model.comp_index["untouched"]
    assert np.all(tr.states[:, i] == conc)
    assert np.all(tr.states[:, tr.model.q_elim + i] == 0.0)


@settings(max_examples=60)
@given(st.randoms(use_true_random=False))
def test_adding_a_separate_network_changes_nothing_else(rng: random.Random):
    s = random_scenario(rng, small_grid=True)
    other = random_scenario(rng, small_grid=True, prefix="z", duration=s.duration)
    assert_separate_network_changes_nothing(s, other)


def assert_separate_network_changes_nothing(s, other) -> None:
    """``s`` alone and ``s`` joined by ``other`` (no link between them, the same output times)."""
    joined = dataclasses.replace(
        s, compartments=s.compartments + other.compartments, barriers=s.barriers + other.barriers,
        exchanges=s.exchanges + other.exchanges, transfers=s.transfers + other.transfers,
        doses=s.doses + other.doses)
    a = solve(s)
    b = solve(joined)
    trusted(a)
    trusted(b)
    ma, mb = a.model, b.model
    # the rows of the first network's own output times (the joined file has the union of both
    # networks' event times among its rows when an output grid snaps to them, within 1e-9 of the
    # run: the nearest row)
    rows = np.abs(b.times[:, None] - a.times[None, :]).argmin(axis=0)
    assert np.allclose(b.times[rows], a.times, rtol=0.0, atol=2e-9 * max(s.duration, 1.0))
    # an integrator with error control (RODAS4, or the split path's RODAS4 on the slow modes) steps
    # differently with the other network's states in its error measure: its tolerance
    tol = DEFAULT_TOL if "rodas" in a.integrator + b.integrator or "split" in (a.integrator, b.integrator) else 1e-9
    for cid, i in ma.comp_index.items():
        j = mb.comp_index[cid]
        assert np.max(np.abs(b.states[rows, j] - a.states[:, i])) <= tol * ma.scale[i], cid
    for bid, k in ma.barrier_index.items():
        g_a, g_b = ma.grids[k], mb.grids[mb.barrier_index[bid]]
        cells_a = a.states[:, g_a.start:g_a.stop]
        cells_b = b.states[rows, g_b.start:g_b.stop]
        assert np.all(np.abs(cells_b - cells_a) <= tol * ma.scale[g_a.start:g_a.stop]), bid
