"""Property tests: every path on the default grid agrees with scipy's Radau on a refined grid.

The other property tests (test_properties_paths.py) compare the paths with Radau on the SAME grid:
they hold the time integration. These hold the default grid as well. Random valid networks
(``tests/random_networks.py``, invented scenarios, drawn by hypothesis with the "ci" profile of
test_properties_paths.py) whose layers all take the engine's default grid run on each path on
that grid; the reference is scipy's Radau IIA at rtol 1e-10 (Hairer and Wanner, Solving
Ordinary Differential Equations II, 2nd ed., 1996, sec. IV.8) on a grid with every default cell
cut into ``SPLIT`` equal cells. A finite-volume grid converges in the cell width (second order
on a smooth grid; LeVeque, Finite Volume Methods for Hyperbolic Problems, 2002, sec. 4.2 for the
conservative form), so the refined grid stands in for the exact solution of the diffusion
equations: its own distance from the limit is a small part of the default grid's (the reliability
sweep prints both, ``tests/benchmarks/reliability_sweep.py --refined``).

What is compared is what does not depend on the grid: every compartment's concentration and
every cumulative amount (eliminated, degraded, permeated, supplied, infused), at every output
time, each divided by its magnitude scale (``CompiledModel.scale``). The documented accuracy of
a run (README, "Accuracy of a run"; ``engine.grid``): each layer's steady fluxes and slowest mode
within ``GRID_TOLERANCE`` (1e-3), its uptake at the time scale of the output step within
``UPTAKE_TOLERANCE`` and the time integration within 1e-4; together, every such quantity within
``REFINED_TOL`` (1e-3) of its scale.
"""

from __future__ import annotations

import dataclasses
import math
import random

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from random_networks import random_scenario
from test_properties_parts import assert_separate_network_changes_nothing
from test_properties_paths import trusted

from barrierflow import ScenarioError, SolverError
from barrierflow.engine import ScipyIntegrator, solve
from barrierflow.engine.exact import ExactIntegrator
from barrierflow.engine.grid import Grid
from barrierflow.engine.rosenbrock import RosenbrockIntegrator

REFINED_TOL = 1e-3
SPLIT = 3


@dataclasses.dataclass(frozen=True)
class SplitGrid(Grid):
    """The default grid with every cell cut into ``split`` equal cells (the reference grid)."""

    split: int = SPLIT

    def widths(self, layer, timescale: float = math.inf) -> np.ndarray:
        w = Grid().widths(layer, timescale)
        return np.repeat(w / self.split, self.split)


def grid_free(tr) -> np.ndarray:
    """The states that do not depend on the grid: compartments, then the cumulative amounts."""
    m = tr.model
    return np.concatenate([tr.states[:, : m.n_comp], tr.states[:, m.n_dyn:]], axis=1)


def refined_error(tr, ref) -> float:
    """The largest deviation of a grid-free state from the reference, over its scale."""
    m = tr.model
    scale = np.concatenate([m.scale[: m.n_comp], m.scale[m.n_dyn:]])
    assert np.array_equal(tr.times, ref.times)
    return float(np.max(np.abs(grid_free(tr) - grid_free(ref)) / scale, initial=0.0))


def refined_reference(s):
    return solve(s, ScipyIntegrator("Radau", rtol=1e-10, atol=1e-13), grid=SplitGrid())


def network(rng: random.Random, **kw):
    """A small random network with one barrier or more, every layer on the default grid."""
    return random_scenario(rng, max_comp=4, small_grid=True, default_grid=True, max_barriers=2, min_barriers=1,
                           **kw)


@settings(max_examples=150)
@given(st.randoms(use_true_random=False))
def test_every_path_on_the_default_grid_agrees_with_radau_on_a_refined_grid(rng: random.Random):
    s = network(rng)
    tr = solve(s)  # the default: the guard, the default grid
    trusted(tr)
    ref = refined_reference(s)
    assert refined_error(tr, ref) <= REFINED_TOL, tr.integrator
    try:
        ro = solve(s, RosenbrockIntegrator(), fallback=False)
    except SolverError:
        ro = None  # refused loudly: allowed for an integrator chosen by hand
    if ro is not None:
        trusted(ro)
        assert refined_error(ro, ref) <= REFINED_TOL, "rodas4"
    if not tr.model.is_linear:
        return
    for method in ("chain", "modes", "expm"):
        try:
            ex = solve(s, ExactIntegrator(method), fallback=False, raise_on_failure=False)
        except ScenarioError:
            continue  # the method does not fit the structure (not a chain, not symmetric)
        if ex.status != 0:
            assert "does not apply" in ex.message or "could not be trusted" in ex.message
            continue
        trusted(ex)
        assert refined_error(ex, ref) <= REFINED_TOL, method


@settings(max_examples=30)
@given(st.randoms(use_true_random=False), st.floats(1e-3, 1e5),
       st.one_of(st.just(0.0), st.floats(1e-18, 10.0)))
def test_on_the_default_grid_a_compartment_no_link_touches_never_changes(rng: random.Random, volume: float,
                                                                         conc: float):
    # conservation in a closed, unreactive volume (common practice)
    from barrierflow import Compartment

    s = network(rng)
    s2 = dataclasses.replace(s, compartments=(*s.compartments, Compartment("untouched", volume=volume,
                                                                           initial_concentration=conc)))
    tr = solve(s2)
    trusted(tr)
    i = tr.model.comp_index["untouched"]
    assert np.all(tr.states[:, i] == conc)
    assert np.all(tr.states[:, tr.model.q_elim + i] == 0.0)


@settings(max_examples=30)
@given(st.randoms(use_true_random=False))
def test_on_the_default_grid_adding_a_separate_network_changes_nothing_else(rng: random.Random):
    s = network(rng)
    assert_separate_network_changes_nothing(s, network(rng, prefix="z", duration=s.duration))


@settings(max_examples=60)
@given(st.floats(0.01, 100.0), st.floats(1e-4, 0.3), st.floats(1e-12, 1e-5), st.floats(0.01, 100.0),
       st.integers(5, 40), st.floats(0.5, 500.0))
def test_a_small_compartment_emptying_into_a_deep_layer_follows_the_closed_form(
        uptake: float, depth: float, dif_cm2_s: float, partition: float, steps: int, duration: float):
    # A well-stirred compartment of volume V against a layer that the substance crosses only in
    # part within the run (sqrt(D T) = depth x the thickness, at most 0.3: the far face has not
    # seen it, erfc(1 / (2 x 0.3)) < 0.02 of the way; it acts as a semi-infinite medium). By the
    # Laplace transform of V dC/dt = -A D K du/dx at x = 0: C / C0 = exp(a^2 t) erfc(a sqrt(t)),
    # a = A K sqrt(D) / V (the same form as Carslaw and Jaeger, Conduction of Heat in Solids, 2nd
    # ed., 1959, sec. 2.9, a semi-infinite solid heated by a well-stirred fluid; section number
    # from memory). uptake = a^2 T, from 0.01 (the layer takes a little) to 100 (nearly all).
    # The default grid checked for its steady fluxes and slowest mode alone had face cells far
    # wider than the depth reached within an output step here: off by up to 9.2e-3 of C0 on 260
    # such draws (3.6e-4 with the uptake check of engine.grid).
    from scipy.special import erfcx

    from barrierflow import Barrier, Compartment, Layer, Scenario

    dif = dif_cm2_s * 3600.0
    thickness = math.sqrt(dif * duration) / depth
    if not 1e-4 <= thickness <= 0.5:  # the plausible range of a thickness: keep the draw, move the time
        thickness = min(max(thickness, 1e-4), 0.5)
        duration = (depth * thickness) ** 2 / dif
        if not 1e-3 <= duration <= 1e5:
            return
    area, volume = 1.0, 1.0
    a = math.sqrt(uptake / duration)  # 1/sqrt(h)
    area = a * volume / (partition * math.sqrt(dif))
    if not 1e-3 <= area <= 1e4:
        return
    s = Scenario(name="small compartment on a deep layer (invented)", duration=duration,
                 output_step=duration / steps,
                 compartments=(Compartment("donor", volume=volume, initial_concentration=1.0),
                               Compartment("sink", held_concentration=0.0)),
                 barriers=(Barrier("b", "donor", "sink", area, (Layer(thickness, dif, partition),)),))
    tr = solve(s)
    trusted(tr)
    t = tr.times
    exact = erfcx(a * np.sqrt(t))
    assert np.max(np.abs(tr.states[:, 0] - exact)) <= REFINED_TOL, tr.integrator
