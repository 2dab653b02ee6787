"""The run's set-up in one compiled pass gives what its rules give one by one.

`solve` snaps the output times onto the events, computes the chain path's mode time and the
longest dosing interval in one compiled pass (`solve._set_up`). Each number must be what its own
rule gives (`solve._snap` with merging, `exact.mode_time`, the largest difference of the interval
bounds), to the last bit: internal consistency of one pass with the rules it joins (common
practice: a fast path held to its plain reference), on the shipped invented scenarios, seeded
random networks (every dose kind) and output times within the snapping tolerance of an event,
some of which merge.
"""

from __future__ import annotations

import importlib
import random
from pathlib import Path

import numpy as np
import pytest
from random_networks import random_scenario

import barrierflow as bf
from barrierflow.engine import compile_scenario
from barrierflow.engine.exact import RATIONAL_ROWS, mode_time
from barrierflow.engine.schedule import build_schedule

solve_m = importlib.import_module("barrierflow.engine.solve")

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"


def _marks(scenario):
    model = compile_scenario(scenario)
    events = [e for e in build_schedule(scenario, model.comp_index) if e.time < scenario.duration]
    return np.array(sorted({e.time for e in events} | {0.0, scenario.duration}), dtype=np.float64)


def _check(times: np.ndarray, marks: np.ndarray, duration: float, label: str) -> bool:
    tol = 1e-9 * max(duration, 1.0)
    got, increasing, cut, longest = solve_m._set_up(times, marks, tol, np.int64(RATIONAL_ROWS))
    want = solve_m._snap(times, marks, tol, merge=True)
    if not increasing:
        got = np.unique(got)
    assert got.dtype == want.dtype and np.array_equal(got, want), label
    if increasing:
        assert cut == mode_time(want, marks), label
    assert longest == float((marks[1:] - marks[:-1]).max()), label
    return bool(increasing)


@pytest.mark.parametrize("name", sorted(p.name for p in SCENARIOS.glob("*.toml")))
def test_shipped_scenarios(name):
    s = bf.load(SCENARIOS / name)
    _check(s.output_array(), _marks(s), s.duration, name)


def test_random_networks_and_times_near_events():
    rng = random.Random(20261205)
    merged = 0
    for k in range(60):
        s = random_scenario(rng)
        marks = _marks(s)
        times = s.output_array()
        _check(times, marks, s.duration, f"random network {k}")
        # output times just before and after each event, within the snapping tolerance and beyond
        tol = 1e-9 * max(s.duration, 1.0)
        near = np.concatenate([marks[1:-1] - 0.5 * tol, marks[1:-1] + 0.5 * tol, marks[1:-1] + 3 * tol])
        extra = np.union1d(times, near[(near > 0) & (near < s.duration)])
        merged += not _check(extra, marks, s.duration, f"random network {k}, times near events")
    assert merged > 0  # the merging branch was taken
