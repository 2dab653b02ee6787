"""Practitioner warnings: sink condition, solubility, steady state never seen, coarse output.

References
----------
- OECD Test Guideline 428, Skin absorption: in vitro method (2004): the solubility of the test
  substance in the receptor fluid must not limit absorption. Keeping the receptor below 10 % of
  the solubility is common practice (not a number from the guideline).
- The time of the crossing is checked against the closed form for a storage-free barrier
  (model = "steady") feeding a well-mixed receptor from a held donor:
  C(t) = C_d (1 - exp(-A t / (V R))), a first-order approach to equilibrium (Crank 1975, ch. 4,
  the plane sheet in quasi-steady state between two well-stirred solutions; from memory).
- Lag time l^2/(6D): Crank, The Mathematics of Diffusion, 2nd ed., 1975, eq. 4.24a.
"""

from __future__ import annotations

import math
import re

import barrierflow
from barrierflow import Barrier, Compartment, Dose, Layer, Scenario, Substance
from barrierflow.analysis.warnings import find_warnings, scenario_warnings

MEMBRANE = (Layer(0.002, 7.2e-7, 4.0, cells=30),)          # lag 0.9259 h


def _cell(*, solubility=None, receptor_volume=0.5, duration=24.0, step=0.05, c_donor=2.0,
          model="resolved", layers=MEMBRANE, receptor_partition=1.0, doses=()):
    return Scenario(
        name="cell", duration=duration, output_step=step,
        substance=Substance(solubility=solubility),
        compartments=(Compartment("donor", held_concentration=c_donor),
                      Compartment("receptor", volume=receptor_volume, partition=receptor_partition)),
        barriers=(Barrier("m", "donor", "receptor", 1.0, layers, model=model),),
        doses=tuple(doses))


def _time_in(message: str) -> float:
    m = re.search(r"at ([0-9.eE+-]+) h", message)
    assert m, message
    return float(m.group(1))


def test_sink_condition_lost_at_the_closed_form_time():
    # storage-free barrier: C(t) = C_d (1 - exp(-A t / (V R))); 10 % of S = 0.05 mg/mL. The donor
    # is held at 2 mg/mL, above the solubility (0.5 mg/mL): a saturated reservoir, whose dissolved
    # part drives (the undissolved excess stays solid), so C_d = 0.5 mg/mL
    layers = (Layer(0.002, 7.2e-7, 4.0),)
    sc = _cell(solubility=0.5, model="steady", layers=layers, step=0.01, duration=40.0)
    r = layers[0].resistance
    t_cross = -(0.5 * r / 1.0) * math.log(1 - 0.05 / 0.5)
    res = barrierflow.simulate(sc)
    sink = [w for w in find_warnings(res) if "no longer a sink" in w]
    assert len(sink) == 1 and "compartment 'receptor'" in sink[0] and "OECD Test Guideline 428" in sink[0]
    assert abs(_time_in(sink[0]) - t_cross) <= 1e-3 * t_cross + 1e-4


def test_sink_condition_compares_c_over_k():
    # a receptor phase with K = 10 dissolves ten times more: the same run stays a sink
    sc = _cell(solubility=0.5, receptor_partition=10.0, duration=5.0)
    res = barrierflow.simulate(sc)
    u = res.concentration("receptor") / 10.0
    assert u.max() < 0.05
    assert not [w for w in find_warnings(res) if "sink" in w]


def test_no_solubility_no_solubility_warnings():
    res = barrierflow.simulate(_cell(solubility=None, duration=5.0))
    assert not [w for w in find_warnings(res) if "solubility" in w]


def test_held_sink_is_never_reported():
    sc = Scenario(name="cell", duration=5.0, output_step=0.05, substance=Substance(solubility=0.5),
                  compartments=(Compartment("donor", held_concentration=0.4),
                                Compartment("receptor", held_concentration=0.0)),
                  barriers=(Barrier("m", "donor", "receptor", 1.0, MEMBRANE),))
    assert find_warnings(barrierflow.simulate(sc)) == ()


def test_dose_above_solubility_before_and_after_the_run():
    sc = Scenario(name="s", duration=5.0, output_step=0.05, substance=Substance(solubility=1.0),
                  compartments=(Compartment("donor", volume=1.0, initial_concentration=3.0),
                                Compartment("receptor", volume=100.0)),
                  barriers=(Barrier("m", "donor", "receptor", 1.0, MEMBRANE),),
                  doses=(Dose("donor", "bolus", at=2.0, amount=2.0),))
    before = scenario_warnings(sc)
    assert any("compartment 'donor': the starting concentration (3000 mg/L)" in w for w in before)
    assert any("dose 1 (bolus on 'donor')" in w for w in before)
    after = find_warnings(barrierflow.simulate(sc))
    sat = [w for w in after if "exceeds the solubility" in w]
    assert len(sat) == 1 and "compartment 'donor'" in sat[0] and "from 0 h on" in sat[0]


def test_lag_time_longer_than_the_run():
    short = _cell(duration=0.5, step=0.01)
    msg = [w for w in scenario_warnings(short) if "never sees steady state" in w]
    assert len(msg) == 1 and "barrier 'm'" in msg[0] and "0.9259 h" in msg[0]
    assert not [w for w in scenario_warnings(_cell(duration=48.0, step=0.05)) if "steady state" in w]
    # a storage-free barrier has no lag (scenario format)
    assert not [w for w in scenario_warnings(_cell(duration=0.5, step=0.01, model="steady")) if "lag" in w]


def test_output_step_against_lag_and_dosing_interval():
    coarse = [w for w in scenario_warnings(_cell(step=0.5)) if "output step" in w]
    assert len(coarse) == 1 and "shortest lag time" in coarse[0] and "5.5 min or less" in coarse[0]
    assert not [w for w in scenario_warnings(_cell(step=0.09)) if "output step" in w]
    # dosing interval 6 h on a storage-free barrier: a tenth is 36 min
    doses = (Dose("receptor", "bolus", at=0.0, amount=0.1, every=6.0),)
    w = [w for w in scenario_warnings(_cell(step=1.0, model="steady", doses=doses)) if "output step" in w]
    assert len(w) == 1 and "dosing interval (6 h)" in w[0] and "36 min or less" in w[0]
    assert not [w for w in scenario_warnings(_cell(step=0.5, model="steady", doses=doses)) if "output step" in w]


def test_warnings_reach_the_result_and_the_sidecar():
    res = barrierflow.simulate(_cell(solubility=0.5, duration=48.0, step=0.5))
    ws = res.warnings()
    assert any("no longer a sink" in w for w in ws) and any("output step" in w for w in ws)
    assert list(ws) == res.sidecar()["warnings"]


def test_output_times_that_miss_part_of_the_run_are_flagged():
    # common practice: metrics read off sampled rows only see the rows; say so when rows miss the run
    from barrierflow import Compartment, Scenario

    s = Scenario(name="sparse rows (invented)", duration=4.0, output_times=(1.0, 2.0),
                 compartments=(Compartment("p", volume=1000.0, initial_concentration=1.0, clearance=1000.0),))
    found = [w for w in barrierflow.simulate(s).warnings() if "output times cover only" in w]
    assert found == ["the output times cover only 1 h to 2 h of the run (0 h to 4 h); Cmax, AUC and the "
                     "other metrics see only those rows"]
    full = Scenario(name="full rows (invented)", duration=4.0, output_step=1.0, compartments=s.compartments)
    assert not [w for w in barrierflow.simulate(full).warnings() if "output times cover only" in w]
