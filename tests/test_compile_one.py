"""One scenario compiled in one compiled pass equals the element-wise build, bit for bit.

`compile_scenario` builds a single scenario's arrays with `compiled._assemble` (numba) and a
population's with the element-wise numpy arithmetic of `compile_elementwise`; the two must give
the same model, every field, dtype and grid, to the last bit (the reference of the population
tests is each subject's own single compile, so any difference would show there as well). The
check is internal consistency of two builds of the same formulas (common practice: a fast path
held to its plain reference), over the shipped invented scenarios and seeded random networks
(held reservoirs, steady barriers, degrading layers, transfers, saturable elimination, every
dose kind). The one-pass build also gives, ahead, the chain order and the kept states a run
reads (`exact_chain.chain_order`, `exported.taps_of`): they equal what the run computes from the
element-wise model.
"""

from __future__ import annotations

import random
from pathlib import Path

import numpy as np
import pytest
from random_networks import random_scenario

import barrierflow as bf
from barrierflow.engine import arrays, compile_scenario
from barrierflow.engine.compiled import compile_elementwise
from barrierflow.engine.exact_chain import chain_order
from barrierflow.engine.exported import taps_of
from barrierflow.engine.grid import Grid
from barrierflow.errors import BarrierflowError

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"
ALL = sorted(p.name for p in SCENARIOS.glob("*.toml"))


def _same_model(a, b, label):
    for name in arrays.ModelArrays._fields:
        x, y = getattr(a.arrays, name), getattr(b.arrays, name)
        if isinstance(y, np.ndarray):
            assert isinstance(x, np.ndarray) and x.dtype == y.dtype and x.shape == y.shape, (label, name)
            assert np.array_equal(x, y, equal_nan=True), (label, name)
            if x.dtype.kind == "f":  # signed zeros too
                assert np.array_equal(np.signbit(x), np.signbit(y)), (label, name)
        else:
            assert x == y and type(x) is type(y), (label, name)
    assert (a.comp_ids, a.barrier_ids, a.comp_index, a.barrier_index) == (b.comp_ids, b.barrier_ids, b.comp_index,
                                                                          b.barrier_index), label
    assert len(a.grids) == len(b.grids), label
    for ga, gb in zip(a.grids, b.grids, strict=True):
        assert (ga.barrier_id, ga.start, ga.stop, ga.in_link, ga.out_link) == (
            gb.barrier_id, gb.start, gb.stop, gb.in_link, gb.out_link), label
        assert ga.interfaces == gb.interfaces, label
        assert [type(v) for v in ga.interfaces] == [type(v) for v in gb.interfaces], label
        for name in ("widths", "centres", "layer_of_cell"):
            x, y = getattr(ga, name), getattr(gb, name)
            assert x.dtype == y.dtype and np.array_equal(x, y), (label, ga.barrier_id, name)
    # what the one-pass build computes ahead for a run (the chain order, the kept states) is what
    # the run would compute from the element-wise model
    assert "_chain_order" in a.__dict__ and "_chain_order" not in b.__dict__, label
    # and its vehicle_terms and is_linear, set ahead from the scenario's numbers, are what the
    # properties give from the element-wise model's arrays
    for name in ("vehicle_terms", "is_linear"):
        assert name in a.__dict__ and name not in b.__dict__, (label, name)
    assert (a.vehicle_terms, a.is_linear) == (b.vehicle_terms, b.is_linear), label
    assert type(a.vehicle_terms) is bool and type(a.is_linear) is bool, label
    oa, ob = chain_order(a), chain_order(b)
    assert (oa is None) == (ob is None), label
    assert oa is None or (oa.dtype == ob.dtype and np.array_equal(oa, ob)), label
    ta, tb = taps_of(a), taps_of(b)
    for name in ("keep", "pos", "bstart", "bstop", "inv_scale"):
        x, y = getattr(ta, name), getattr(tb, name)
        assert x.dtype == y.dtype and x.shape == y.shape and np.array_equal(x, y), (label, name)


@pytest.mark.parametrize("name", ALL)
def test_one_scenario_compiles_as_the_elementwise_build(name):
    s = bf.load(SCENARIOS / name)
    _same_model(compile_scenario(s, Grid()), compile_elementwise(s, Grid()), name)


def test_shared_layer_widths_compile_as_the_elementwise_build():
    # simulate_many's form: each layer's widths relative to its thickness given
    s = bf.load(SCENARIOS / "benchmark_patch.toml")
    widths = {(0, li): np.linspace(1.0, 2.0, 5 + li) / np.linspace(1.0, 2.0, 5 + li).sum() for li in range(3)}
    _same_model(compile_scenario(s, Grid(), widths), compile_elementwise(s, Grid(), widths), "given widths")


@pytest.mark.parametrize("seed", range(0, 240, 3))
def test_random_networks_compile_as_the_elementwise_build(seed):
    for k in range(3):  # small grids, the default grid, either
        s = random_scenario(random.Random(seed + k), small_grid=k == 0, default_grid=k == 1)
        try:
            want = compile_elementwise(s, Grid())
        except BarrierflowError as e:  # the same refusal, word for word
            with pytest.raises(type(e)) as got:
                compile_scenario(s, Grid())
            assert str(got.value) == str(e)
            continue
        _same_model(compile_scenario(s, Grid()), want, f"random network {seed + k}")
