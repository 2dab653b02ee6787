"""Dosing events at the edges of the run and of a hold (the scenario format's conventions)."""

from __future__ import annotations

import numpy as np
import pytest

import barrierflow as bf
from barrierflow import Barrier, Compartment, Dose, Layer, Scenario, ScenarioError
from barrierflow.engine import INTEGRATORS, integrator_from_name


@pytest.mark.parametrize("name", sorted(INTEGRATORS))
def test_a_dose_at_the_end_of_the_run_shows_in_the_last_row(name):
    # Convention of the format: a row at an instantaneous event shows the state just after it;
    # 'every' without 'count' repeats until the end of the run, the end included.
    # (the split path takes only a network with saturable elimination: a negligible one for it)
    extra = {"vmax": 1e-9, "km": 1.0} if name == "split" else {}
    s = Scenario(name="end dose (invented)", duration=4.0, output_step=1.0,
                 compartments=(Compartment("p", volume=1000.0, **extra),),
                 doses=(Dose("p", "bolus", at=0.0, amount=1.0, every=2.0),))
    r = bf.simulate(s, integrator=integrator_from_name(name))
    assert np.allclose(r.amount("p"), [1, 1, 2, 2, 3])
    assert r.dosed("p")[-1] == pytest.approx(3.0)
    assert r.mass_balance.relative_error < 1e-9


def test_output_times_near_an_event_give_one_row():
    # an output time within round-off of an event moves onto it; the two rows become one
    s = Scenario(name="rows (invented)", duration=2.0, output_times=(0.0, 1.0 - 1e-13, 1.0, 2.0),
                 compartments=(Compartment("p", volume=10.0, clearance=1.0),),
                 doses=(Dose("p", "bolus", at=1.0, amount=1.0),))
    r = bf.simulate(s)
    assert list(r.times) == [0.0, 1.0, 2.0]
    assert r.amount("p")[1] == pytest.approx(1.0)


def test_a_bolus_during_a_hold_is_refused():
    with pytest.raises(ScenarioError) as info:
        Scenario(name="conflict (invented)", duration=10.0, compartments=(Compartment("p", volume=1000.0),),
                 doses=(Dose("p", "hold", at=0.0, concentration=1.0, duration=3.0),
                        Dose("p", "bolus", at=1.0, amount=500.0)))
    assert str(info.value) == ("dose 2 at: got 1 h; compartment 'p' is held by dose 1 from 0 h to 3 h; a bolus "
                               "cannot act on a held compartment (move it outside the hold, or end the hold earlier)")


def test_events_at_the_edges_of_a_hold_are_allowed():
    Scenario(name="edges (invented)", duration=10.0, compartments=(Compartment("p", volume=1000.0),),
             doses=(Dose("p", "bolus", at=0.0, amount=5.0), Dose("p", "hold", at=0.0, concentration=1.0, duration=3.0),
                    Dose("p", "remove", at=3.0), Dose("p", "infusion", at=1.0, rate=1.0, duration=1.0)))


def test_a_trajectory_too_large_for_memory_is_refused_before_computing():
    layer = Layer(0.1, 1e-3, cells=100_000)
    s = Scenario(name="huge (invented)", duration=168.0, output_step=1 / 360,
                 compartments=(Compartment("a", volume=1.0), Compartment("b", volume=1.0)),
                 barriers=(Barrier("m", "a", "b", 1.0, (layer, layer)),))
    with pytest.raises(ScenarioError, match=r"scenario output_step: got .* GB of memory, more than the 2.15 GB "
                                            r"allowed \(a grid too large for memory\)"):
        bf.simulate(s)
