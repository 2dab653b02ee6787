"""Metrics that know when they apply: the terminal phase, the time-lag method, the fraction absorbed.

Sources beside each check:
- Gibaldi, M. and Perrier, D., Pharmacokinetics, 2nd ed., 1982, ch. 1: one compartment with
  first-order elimination decays as exp(-CL t / V); the terminal slope of non-compartmental
  analysis is taken only after absorption and infusions have ended (also Gabrielsson and Weiner,
  Pharmacokinetic and Pharmacodynamic Data Analysis, 4th ed., 2006, ch. 2; common practice).
- Crank, J., The Mathematics of Diffusion, 2nd ed., 1975, eq. 4.24a/4.24b: the time lag
  L^2 / (6 D) and the steady flux D K C / L of an initially empty membrane between a constant
  source and a sink; the method needs that steady state (a closed receptor that is no sink biases
  it: OECD Test Guideline 428, 2004, on sink conditions; the 10 % is common practice).
- The fraction absorbed is the amount that crossed into the receiving side over the amount
  applied (OECD Test Guideline 428 mass balance; common practice): the truth is computed here
  from the run's own receptor amount and the dose as written.
"""

from __future__ import annotations

import csv
import io
import math

import numpy as np

import barrierflow as bf
from barrierflow import Barrier, Compartment, Dose, Layer, Scenario
from barrierflow.analysis.metrics import CSV_COLUMNS, last_input_end


# ----------------------------------------------------------------------------- terminal phase
def _patch(remove_at=None, duration=48.0):
    # a patch on a storage-free skin into a body of 10 L cleared at 2 L/h (k = 0.2 1/h)
    skin = Layer(0.002, 3.6e-6, 2.0)
    doses = (Dose("patch", "remove", at=remove_at, ends_contact=True),) if remove_at is not None else ()
    return Scenario(name="patch (invented)", duration=duration, output_step=0.25,
                    compartments=(Compartment("patch", volume=1.0, initial_concentration=20.0),
                                  Compartment("body", volume=10_000.0, clearance=2000.0)),
                    barriers=(Barrier("skin", "patch", "body", 10.0, (skin,), model="steady"),), doses=doses)


def test_no_terminal_phase_while_the_patch_is_on():
    res = bf.simulate(_patch())
    body = res.metrics().compartment("body")
    for name in ("half_life", "lambda_z", "auc_inf", "auc_extrapolated_percent"):
        assert math.isnan(getattr(body, name)), name
        assert "neither taken off nor exhausted" in body.notes[name] and "'patch'" in body.notes[name]
    rows = {(r[1], r[2]): r for r in csv.reader(io.StringIO(res.metrics().to_csv()))}
    assert rows[("body", "half_life")][3] == "" and "an input still acts" in rows[("body", "half_life")][5]


def test_the_terminal_phase_after_the_patch_is_removed():
    # Gibaldi & Perrier: after the input ends the body decays with k = CL / V = 0.2 1/h
    res = bf.simulate(_patch(remove_at=24.0))
    met = res.metrics()
    assert met.input_end == 24.0
    body = met.compartment("body")
    assert abs(body.lambda_z - 0.2) <= 1e-6 * 0.2 and abs(body.half_life - math.log(2) / 0.2) <= 1e-5
    assert body.terminal_start >= 24.0 and "half_life" not in body.notes


def test_an_exhausted_formulation_ends_its_input():
    # eye drops: a drop drains from the tear film in minutes; once less than 0.1 % of it is
    # left the input has ended and the terminal phase of the aqueous humour stands
    cornea = Layer(0.05, 3.6e-4, 1.0, cells=10)
    s = Scenario(name="one drop (invented)", duration=24.0, output_step=0.1,
                 compartments=(Compartment("tears", volume=0.007, clearance=0.1),
                               Compartment("aqueous", volume=0.3, clearance=0.01)),
                 barriers=(Barrier("cornea", "tears", "aqueous", 1.0, (cornea,)),),
                 doses=(Dose("tears", "bolus", at=0.0, amount=0.05),))
    res = bf.simulate(s)
    end, why = last_input_end(s, res)
    assert end is not None and 0 < end < 4.0 and why == ""
    aq = res.metrics().compartment("aqueous")
    assert aq.half_life == aq.half_life and aq.terminal_start >= end


def test_an_infusion_ends_its_input_at_its_end():
    s = Scenario(name="infusion (invented)", duration=24.0, output_step=0.25,
                 compartments=(Compartment("body", volume=10_000.0, clearance=2000.0),),
                 doses=(Dose("body", "infusion", at=0.0, rate=50.0, duration=2.0),))
    res = bf.simulate(s)
    assert last_input_end(s, res) == (2.0, "")
    assert abs(res.metrics().compartment("body").lambda_z - 0.2) <= 1e-6


# ----------------------------------------------------------------------------- time-lag method
def _cell(*, donor_volume=None, receptor_volume=None, duration=48.0, c=2.0):
    membrane = Layer(0.002, 7.2e-7, 4.0, cells=40)                   # lag 0.926 h (Crank)
    donor = (Compartment("donor", held_concentration=c) if donor_volume is None
             else Compartment("donor", volume=donor_volume, initial_concentration=c))
    receptor = (Compartment("receptor", held_concentration=0.0) if receptor_volume is None
                else Compartment("receptor", volume=receptor_volume))
    return Scenario(name="cell (invented)", duration=duration, output_step=0.1, compartments=(donor, receptor),
                    barriers=(Barrier("m", "donor", "receptor", 1.0, (membrane,)),))


def test_the_time_lag_method_where_a_steady_line_exists():
    m = bf.simulate(_cell()).metrics().barrier("m")
    assert abs(m.lag_time - 0.002**2 / (6 * 7.2e-7)) <= 2e-3 * 0.926        # Crank eq. 4.24b
    assert abs(m.steady_flux - 7.2e-7 * 4.0 * 2.0 / 0.002) <= 2e-4 * 2.88e-3
    assert "lag_time" not in m.notes


def test_no_steady_line_from_a_finite_dose_or_a_short_run():
    finite = bf.simulate(_cell(donor_volume=0.01, duration=24.0)).metrics().barrier("m")
    assert math.isnan(finite.lag_time) and math.isnan(finite.steady_flux)
    assert finite.notes["lag_time"].startswith("no steady line: the flux falls")
    short = bf.simulate(_cell(duration=3.0)).metrics().barrier("m")
    assert math.isnan(short.lag_time) and short.notes["lag_time"].startswith("no steady line yet")


def test_a_closed_receptor_above_a_tenth_of_the_donor_is_flagged():
    # C/K of a 0.5 mL receptor passes 10 % of the donor's within the run: no sink
    res = bf.simulate(_cell(receptor_volume=0.5, duration=48.0))
    m = res.metrics().barrier("m")
    assert "biased: the closed receptor 'receptor' rises above 10%" in m.notes["lag_time"]
    assert any("closed receptor 'receptor'" in w for w in res.warnings())
    # a large receptor stays a sink: no flag, and the lag of the sink case
    big = bf.simulate(_cell(receptor_volume=10_000.0)).metrics().barrier("m")
    assert "lag_time" not in big.notes and abs(big.lag_time - 0.926) < 0.01


# ----------------------------------------------------------------------------- fraction absorbed
def _finite(doses, duration=24.0):
    membrane = Layer(0.002, 7.2e-7, 4.0, cells=40)
    return Scenario(name="finite dose (invented)", duration=duration, output_step=0.1,
                    compartments=(Compartment("donor", volume=0.01, initial_concentration=10.0),
                                  Compartment("receptor", volume=5.0)),
                    barriers=(Barrier("m", "donor", "receptor", 1.0, (membrane,)),), doses=tuple(doses))


def test_a_hold_to_zero_wash_off_is_not_subtracted_from_the_dose():
    # a wash that keeps the surface at zero from 2 h on: it takes most of the dose away, and the
    # fraction absorbed is still the receptor's amount over the 0.1 mg applied
    res = bf.simulate(_finite([Dose("donor", "hold", at=2.0, concentration=0.0, duration=22.0)]))
    m = res.metrics().barrier("m")
    truth = res.amount("receptor")[-1] / 0.1
    assert m.applied == 0.1 and abs(m.fraction_absorbed - truth) <= 1e-9 * truth
    # what the old rule gave: the dose less what the hold took (0.1 mg + the negative supply)
    old = res.permeated("m")[-1] / (0.1 + res.dosed("donor")[-1])
    assert old > 3 * truth


def test_every_dose_into_the_donor_counts():
    doses = [Dose("donor", "bolus", at=6.0, amount=0.05), Dose("donor", "replace", at=12.0, concentration=10.0),
             Dose("donor", "remove", at=18.0)]
    res = bf.simulate(_finite(doses))
    m = res.metrics().barrier("m")
    assert abs(m.applied - (0.1 + 0.05 + 0.1)) <= 1e-12                 # start, bolus, refill of 0.01 mL
    assert abs(m.fraction_absorbed - res.amount("receptor")[-1] / m.applied) <= 1e-9
    held = bf.simulate(_cell()).metrics().barrier("m")
    assert math.isnan(held.fraction_absorbed) and "infinite dose" in held.notes["fraction_absorbed"]


def test_a_loaded_patch_matrix_counts_as_applied():
    matrix = Layer(0.01, 3.6e-5, 1.0, cells=20, initial_concentration=5.0)   # 0.05 mg in 1 cm^2
    s = Scenario(name="drug-in-adhesive (invented)", duration=24.0, output_step=0.5,
                 compartments=(Compartment("backing", volume=0.001), Compartment("skin", held_concentration=0.0)),
                 barriers=(Barrier("matrix", "backing", "skin", 1.0, (matrix,)),),
                 doses=(Dose("backing", "remove", at=0.0, ends_contact=True),))
    m = bf.simulate(s).metrics().barrier("matrix")
    assert abs(m.applied - 0.05) <= 1e-15 and 0.5 < m.fraction_absorbed <= 1.0


# ----------------------------------------------------------------------------- the CSV
def test_every_metric_in_the_csv_is_a_number_or_blank():
    res = bf.simulate(_finite([Dose("donor", "bolus", at=12.0, amount=0.05)], duration=30.0))
    rows = list(csv.reader(io.StringIO(res.metrics().to_csv())))
    assert tuple(rows[0]) == CSV_COLUMNS == ("kind", "id", "metric", "value", "unit", "note")
    blanks = 0
    for row in rows[1:]:
        if row[3] == "":
            blanks += 1
            assert row[5], row                      # a blank says why
        else:
            assert math.isfinite(float(row[3])), row
    assert blanks > 0
    steady = next(r for r in rows if r[2] == "steady_state_reached")
    assert steady[3] in ("", "0", "1")
    assert np.isfinite([float(r[3]) for r in rows[1:] if r[3]]).all()
