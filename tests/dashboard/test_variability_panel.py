"""The variability panel's pieces, called directly: the --vary text of a row, the path list, the
worker's packed result and the figures drawn from it."""

from __future__ import annotations

import numpy as np

from barrierflow.model import Variation
from dashboard.panels import variability as P

BOLUS = """
# An invented one-compartment body for the tests.
[scenario]
name = "invented IV bolus"
duration = "12 h"
output_step = "1 h"
[[compartment]]
id = "central"
volume = "10 L"
clearance = "5 L/h"
[[dose]]
target = "central"
kind = "bolus"
amount = "100 mg"
at = "0 h"
[output]
concentration = "mg/L"
"""


def test_a_row_reads_as_the_command_line_option():
    text = P.spec("compartment.central.clearance", "lognormal", " 0.3 ")
    assert text == "compartment.central.clearance=lognormal:cv=0.3"
    text = P.spec("compartment.central.volume", "uniform", "5 L..20 L")
    assert Variation.parse(text) == Variation("compartment.central.volume", "uniform", low=5000.0, high=20000.0)


def test_the_path_list_comes_from_the_scenario():
    options = P.path_options(BOLUS)
    values = [o["value"] for o in options]
    assert values == ["compartment.central.volume", "compartment.central.initial_concentration",
                      "compartment.central.partition", "compartment.central.clearance",
                      "compartment.central.loss_rate", "dose.1.amount"]
    assert {"label": "compartment.central.clearance (5 L/h)", "value": "compartment.central.clearance"} in options
    assert "scenario.duration" not in values and "dose.1.at" not in values   # they shape the run
    assert P.path_options(None) == [] and P.path_options("not toml") == []


def test_the_worker_result_and_its_figures():
    specs = ["compartment.central.clearance=lognormal:cv=0.3", "compartment.central.volume=lognormal:cv=0.2"]
    steps = []
    packed = P.simulate(BOLUS, specs, 60, 3, progress=steps.append)
    assert steps and steps[-1] == 1.0 and all(0 <= x <= 1 for x in steps)
    assert packed["n"] == 60 and packed["failed"] == 0 and packed["time_header"] == "time [h]"
    lo, mid, hi = (np.array(b) for b in packed["traces"]["conc:central [mg/L]"])
    assert np.all(lo <= mid) and np.all(mid <= hi)
    assert len(packed["metrics"]["auc:central"]["values"]) == 60
    # the ranking: AUC over 12 h is driven by the clearance more than by the volume (AUC to
    # infinity is D/CL, Gibaldi & Perrier, Pharmacokinetics, 2nd ed., 1982, eq. 1.22)
    r = packed["ranking"]["auc:central"]
    assert r["params"] == ["compartment.central.clearance", "compartment.central.volume"]
    assert r["total"][0] > r["total"][1]
    band = P.band_figure(packed, "conc:central [mg/L]")
    assert [t["name"] for t in band["data"]] == ["p95", "p5 to p95", "median (p50)"]
    assert band["layout"]["yaxis"]["title"]["text"] == "conc:central [mg/L]"
    hist = P.histogram_figure(packed, "auc:central")
    assert len(hist["data"][0]["x"]) == 60
    rank = P.ranking_figure(packed, "auc:central")
    assert rank["data"][0]["y"][-1] == "compartment.central.clearance"   # the largest at the top
    assert P.band_figure(None, None)["data"] == [] and P.ranking_figure(packed, "nothing")["data"] == []


def test_a_sweep_and_its_heatmap():
    # AUC to infinity of an IV bolus is D / CL whatever the volume (Gibaldi & Perrier 1982, eq. 1.22)
    packed = P.sweep(BOLUS, [["compartment.central.clearance", "2 L/h..8 L/h", 3, True],
                             ["compartment.central.volume", "5 L..20 L", 2, False]])
    assert packed["points"] == 6 and packed["failed"] == 0
    assert np.allclose(packed["axes"][0]["values"], [2.0, 4.0, 8.0], rtol=1e-12) and packed["axes"][0]["log"]
    grid = np.array(packed["metrics"]["auc_inf:central"]["grid"])
    np.testing.assert_allclose(grid, 100.0 / np.array([[2.0], [4.0], [8.0]]) * np.ones((1, 2)), rtol=1e-6)
    fig = P.sweep_figure(packed, "auc_inf:central")
    assert fig["data"][0]["type"] == "heatmap" and fig["layout"]["yaxis"]["type"] == "log"
    assert fig["layout"]["xaxis"]["title"]["text"] == "compartment.central.volume [L]"
    line = P.sweep_figure(P.sweep(BOLUS, [["compartment.central.clearance", "2 L/h..8 L/h", 3, False]]),
                          "auc_inf:central")
    assert line["data"][0]["mode"] == "lines+markers" and len(line["data"][0]["y"]) == 3
