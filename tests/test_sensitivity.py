"""Sweeps and sensitivity: against closed forms and published Sobol indices."""

from __future__ import annotations

import csv
import io
import math

import numpy as np
import pytest

import barrierflow as bf
from barrierflow.cli import SENSITIVITY_METHODS, main
from barrierflow.studies import (
    Marginal,
    local_sensitivity,
    morris_screening,
    run_sweep,
    sobol_indices,
    sobol_of_function,
)
from barrierflow.studies.sensitivity import METHODS

BOLUS = """
# An invented one-compartment body for the tests.
[scenario]
name = "invented IV bolus, one compartment"
duration = "12 h"
output_step = "30 min"
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
[[vary]]
path = "compartment.central.clearance"
distribution = "lognormal"
cv = 0.3
[[vary]]
path = "compartment.central.volume"
distribution = "lognormal"
cv = 0.3
"""


@pytest.fixture(scope="module")
def bolus():
    return bf.loads(BOLUS, "bolus.toml")


def test_sobol_indices_of_the_ishigami_function():
    # f = sin x1 + a sin^2 x2 + b x3^4 sin x1, x_i uniform on [-pi, pi], a = 7, b = 0.1
    # (Ishigami & Homma, Proc. ISUMA 1990, 398-403). Its variances, as tabulated in Saltelli et al.,
    # Global Sensitivity Analysis: The Primer, Wiley 2008, section 4.9 (S1 = 0.314, 0.442, 0;
    # ST = 0.558, 0.442, 0.244): V = a^2/8 + b pi^4/5 + b^2 pi^8/18 + 1/2, V1 = b pi^4/5 +
    # b^2 pi^8/50 + 1/2, V2 = a^2/8, V3 = 0, V13 = 8 b^2 pi^8/225.
    a, b = 7.0, 0.1
    v = a ** 2 / 8 + b * math.pi ** 4 / 5 + b ** 2 * math.pi ** 8 / 18 + 0.5
    v1 = b * math.pi ** 4 / 5 + b ** 2 * math.pi ** 8 / 50 + 0.5
    v2 = a ** 2 / 8
    v13 = 8 * b ** 2 * math.pi ** 8 / 225
    first = np.array([v1 / v, v2 / v, 0.0])
    total = np.array([(v1 + v13) / v, v2 / v, v13 / v])
    assert np.allclose(first, [0.314, 0.442, 0.0], atol=6e-4) and np.allclose(total, [0.558, 0.442, 0.244], atol=6e-4)

    def ishigami(x):
        return np.sin(x[:, 0]) + a * np.sin(x[:, 1]) ** 2 + b * x[:, 2] ** 4 * np.sin(x[:, 0])

    u = Marginal("uniform", -math.pi, 2 * math.pi)
    res = sobol_of_function(ishigami, [u, u, u], 4096, seed=3)
    for key, want in (("first_order", first), ("total", total)):
        got, ci = res[key][:, 0], res[f"{key}_ci95"][:, 0]
        assert np.all(np.abs(got - want) < np.maximum(3 * ci, 0.02)), (key, got, want, ci)
        assert np.all(ci > 0) and np.all(ci < 0.06)


def test_auc_of_a_one_compartment_bolus_depends_on_clearance_alone(bolus):
    # AUC to infinity of an IV bolus is D / CL whatever the volume (Gibaldi & Perrier,
    # Pharmacokinetics, 2nd ed., 1982, eq. 1.22), and C at t = 0 is D / V whatever the clearance:
    # the total index of CL is 1 for AUCinf, that of V is 1 for Cmax.
    res = sobol_indices(bolus, 256, ["auc_inf:central", "cmax:central"], seed=1)
    assert [p.text for p in res.params] == ["compartment.central.clearance", "compartment.central.volume"]
    st = res.indices["total"]
    assert st[0, 0] == pytest.approx(1.0, abs=0.05) and abs(st[1, 0]) < 0.01
    assert st[1, 1] == pytest.approx(1.0, abs=0.05) and abs(st[0, 1]) < 0.01
    assert res.runs == 256 * 4 and res.failed == 0
    assert res.ranking("auc_inf:central")[0][0] == "compartment.central.clearance"
    text = res.csv_text().splitlines()
    assert text[0] == "parameter,metric,unit,first_order,first_order_ci95,total,total_ci95"


def test_local_coefficients_against_the_closed_form(bolus):
    # ln AUCinf = ln D - ln CL and ln C(0) = ln D - ln V (Gibaldi & Perrier 1982, eqs. 1.11, 1.22)
    res = local_sensitivity(bolus, metrics=["auc_inf:central", "cmax:central", "auc:central"])
    coef = {(p.text, m): res.indices["coefficient"][i, j] for i, p in enumerate(res.params)
            for j, m in enumerate(res.metrics)}
    assert coef[("compartment.central.clearance", "auc_inf:central")] == pytest.approx(-1.0, abs=1e-6)
    assert coef[("compartment.central.volume", "auc_inf:central")] == pytest.approx(0.0, abs=1e-6)
    assert coef[("compartment.central.volume", "cmax:central")] == pytest.approx(-1.0, abs=1e-6)
    assert coef[("dose.1.amount", "cmax:central")] == pytest.approx(1.0, abs=1e-6)
    # AUC over 12 h: D/CL (1 - exp(-k T)), k = CL/V: d ln AUC / d ln CL = -1 + k T e^(-kT) / (1 - e^(-kT))
    kt = 5.0 / 10.0 * 12.0
    assert coef[("compartment.central.clearance", "auc:central")] == pytest.approx(
        -1 + kt * math.exp(-kt) / (1 - math.exp(-kt)), abs=1e-5)
    assert res.settings["step"] == pytest.approx((3e-10) ** (1 / 3))   # the exact path's accuracy, 1e-10
    assert "compartment.central.partition" in [p.text for p in res.params]


def test_morris_screening_ranks_the_driver(bolus):
    res = morris_screening(bolus, 8, ["auc_inf:central"], seed=2)
    mu = res.indices["mu_star"][:, 0]
    assert mu[0] > 1.0 and mu[1] < 1e-9 * mu[0]     # the volume has no effect on AUCinf at all
    assert res.runs == 8 * 3


def test_a_sweep_over_two_parameters(bolus, tmp_path):
    distributed = pytest.importorskip("distributed")
    res = run_sweep(bolus, ["compartment.central.clearance=1 L/h..16 L/h", "compartment.central.volume=5 L..20 L"],
                    steps=[5, 2], spacing=["log", "linear"])
    assert res.shape == (5, 2)
    np.testing.assert_allclose(res.axis_values(0), [1, 2, 4, 8, 16])
    grid = res.grid("auc_inf:central")
    np.testing.assert_allclose(grid, 100.0 / np.array([1, 2, 4, 8, 16])[:, None] * np.ones((1, 2)), rtol=1e-6)
    np.testing.assert_allclose(res.grid("cmax:central"), 100.0 / np.array([[5, 20]] * 5), rtol=1e-9)
    rows = list(csv.reader(io.StringIO(res.csv_text())))
    assert rows[0][:2] == ["compartment.central.clearance [L/h]", "compartment.central.volume [L]"]
    assert rows[1][:2] == ["1", "5"] and rows[2][:2] == ["1", "20"] and rows[-1][-1] == "ok"
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None) as c:
        again = run_sweep(bolus, ["compartment.central.clearance=1 L/h..16 L/h",
                                  "compartment.central.volume=5 L..20 L"], steps=[5, 2],
                          spacing=["log", "linear"], scheduler=c.scheduler_address)
    assert again.csv_text() == res.csv_text()


@pytest.mark.parametrize("axes, message", [
    (["compartment.central.clearance=0 L/h..4 L/h"], "--over compartment.central.clearance spacing: got log; log "
                                                      "steps need both ends > 0"),
    (["scenario.duration=1 h..2 h"], "--over: got 'scenario.duration'; scenario duration cannot be swept"),
    (["compartment.central.clearance=4 L/h"], "--over: got 'compartment.central.clearance=4 L/h'; PATH=LO..HI"),
    (["compartment.central.clearance=4 mg..5 mg"], "--over compartment.central.clearance: got 4 mg; wrong kind of "
                                                   "unit"),
])
def test_sweep_refusals(bolus, axes, message):
    with pytest.raises(bf.ScenarioError) as info:
        run_sweep(bolus, axes, spacing="log")
    assert str(info.value).startswith(message)


def test_the_commands(bolus, tmp_path, capsys):
    assert SENSITIVITY_METHODS == METHODS
    f = tmp_path / "bolus.toml"
    f.write_text(BOLUS)
    assert main(["sweep", str(f), "--over", "compartment.central.clearance=2 L/h..8 L/h", "--steps", "3",
                 "-o", str(tmp_path / "sw.csv"), "--metric", "auc_inf:central", "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert "sweep of 'invented IV bolus, one compartment': 3 points, 0 failed" in out and "auc_inf:central" in out
    assert (tmp_path / "sw.csv").read_text().startswith("compartment.central.clearance [L/h],cmax:central [mg/L]")
    assert main(["sensitivity", str(f), "-o", str(tmp_path / "se.csv"), "--param", "compartment.central.clearance",
                 "--no-progress"]) == 0
    assert "d ln(metric) / d ln(parameter)" in capsys.readouterr().out
    assert main(["sensitivity", str(f), "--method", "sobol", "-n", "64", "-o", str(tmp_path / "so.csv"),
                 "--metric", "auc_inf:central", "--no-progress"]) == 0
    assert "Sobol indices" in capsys.readouterr().out
    rows = list(csv.reader(io.StringIO((tmp_path / "so.csv").read_text())))
    assert rows[1][:3] == ["compartment.central.clearance", "auc_inf:central", "mg/L*h"]
    # refusals
    assert main(["sensitivity", str(f), "--method", "sobol", "-n", "100", "--no-progress"]) == 2
    assert "-n: got 100; a power of 2 of base samples" in capsys.readouterr().err
    assert main(["sensitivity", str(f), "--method", "morris", "--correlate", "compartment.central.clearance",
                 "compartment.central.volume", "0.5", "--no-progress"]) == 2
    assert "assume independent parameters" in capsys.readouterr().err
    assert main(["sensitivity", str(f), "--metric", "tmax:central", "--no-progress"]) == 2
    assert "--metric: got 'tmax:central'; a metric that changes smoothly" in capsys.readouterr().err
