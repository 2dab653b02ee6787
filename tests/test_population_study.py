"""Populations as a study: bands against closed-form quantiles, identical results however the
subjects are chunked and wherever they run, failed subjects, the command and its files."""

from __future__ import annotations

import csv
import dataclasses
import io
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

import barrierflow as bf
from barrierflow.cli import main
from barrierflow.model.paths import with_values
from barrierflow.studies import run_population

ROOT = Path(__file__).resolve().parents[1]

BOLUS = """
# An invented one-compartment body for the tests.
[scenario]
name = "invented IV bolus, one compartment"
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
[[vary]]
path = "compartment.central.clearance"
distribution = "lognormal"
cv = 0.3
"""


@pytest.fixture(scope="module")
def bolus_population():
    s = bf.loads(BOLUS, "bolus.toml")
    return s, run_population(s, 4000, seed=2024, keep_subjects=True, percentiles=(5, 50, 95))


def test_bands_of_a_one_compartment_bolus_against_the_closed_form(bolus_population):
    # C(t) = D/V exp(-CL t / V) for an IV bolus into one compartment with first-order clearance
    # (Gibaldi & Perrier, Pharmacokinetics, 2nd ed., 1982, ch. 1, eq. 1.11). C(t) falls as CL
    # rises, so its q-th percentile is C(t) at the (100 - q)-th percentile of CL.
    s, pop = bolus_population
    D, V = 100.0, 10.0                       # mg, L
    t = pop.times                            # h
    cl = pop.subjects.values[:, 0]           # L/h, as the file wrote the clearance
    exact = D / V * np.exp(-np.outer(cl, t) / V)
    sigma = math.sqrt(math.log(1 + 0.3 ** 2))
    for q in (5, 50, 95):
        band = pop.band("conc:central", q)
        # (1) the same subjects: the sketch's 1 % and the exact solution's round-off
        np.testing.assert_allclose(band, np.percentile(exact, q, axis=0), rtol=0.0101)
        # (2) the population: the quantile of ln C has the standard error of the (100 - q)-th
        # sample quantile of ln CL (sqrt(q (1 - q) / n) / phi(z) sigma; Stuart & Ord, Kendall's
        # Advanced Theory of Statistics vol. 1, 6th ed., 1994, eq. 10.29) times CL t / V
        z = stats.norm.ppf(1 - q / 100)
        cl_q = 5.0 * math.exp(sigma * z)
        closed = D / V * np.exp(-cl_q * t / V)
        se = cl_q * t / V * sigma * math.sqrt(q / 100 * (1 - q / 100) / pop.n_ok) / stats.norm.pdf(z)
        np.testing.assert_array_less(np.abs(np.log(band / closed)), 4 * se + 0.0101)
    # AUC = D / CL (Gibaldi & Perrier 1982, eq. 1.22) over 12 h, the rest extrapolated: the
    # metric auc_inf of each subject against D / CL
    auc_inf = pop.subjects.metrics.column("auc_inf:central")
    np.testing.assert_allclose(auc_inf, D / cl, rtol=1e-6)


def test_a_subject_is_the_single_run_of_its_own_values(bolus_population):
    s, pop = bolus_population
    for k in (1, 777, 4000):
        cl = pop.subjects.values[k - 1, 0]
        alone = bf.simulate(with_values(dataclasses.replace(s, vary=()),
                                        {"compartment.central.clearance": cl * 1000.0}))
        single = dict(((m, i), v) for _, i, m, v, *_ in alone.metrics().to_rows())
        for name, value in zip(pop.subjects.metrics.names, pop.subjects.metrics.values[k - 1], strict=True):
            metric, ident = name.split(":")
            want = single[(metric, ident)]
            if want is None or (isinstance(want, float) and math.isnan(want)):
                assert math.isnan(value)
            else:
                assert value == pytest.approx(float(want), rel=1e-9, abs=1e-12), name


PATCH_STEP = 2.0  # h: the demo patch with coarser output, so that the comparisons stay quick


def _patch():
    s = bf.load("scenarios/daily_patch.toml")
    s = dataclasses.replace(s, output_step=PATCH_STEP)
    vary = ["barrier.skin.layer.1.diffusivity=lognormal:cv=0.4", "compartment.central.clearance=lognormal:cv=0.3",
            "compartment.central.volume=normal:cv=0.15,truncate=5 L..", "barrier.skin.layer.1.partition=uniform:"
            "low=3,high=8"]
    return s, vary, [("barrier.skin.layer.1.diffusivity", "barrier.skin.layer.1.partition", -0.5)]


def _same(a, b) -> None:
    assert a.trace_names == b.trace_names and a.metrics.names == b.metrics.names
    assert np.array_equal(a.bands, b.bands, equal_nan=True)
    assert np.array_equal(a.metrics.values, b.metrics.values, equal_nan=True)
    assert np.array_equal(a.times, b.times)
    assert a.failures == b.failures and a.n_failed == b.n_failed


def test_local_chunked_and_dask_runs_are_bit_identical(tmp_path):
    distributed = pytest.importorskip("distributed")
    s, vary, corr = _patch()
    whole = run_population(s, 48, seed=9, vary=vary, correlate=corr, chunk=48, subjects_csv=tmp_path / "a.csv")
    chunked = run_population(s, 48, seed=9, vary=vary, correlate=corr, chunk=7, subjects_csv=tmp_path / "b.csv")
    _same(whole, chunked)
    assert (tmp_path / "a.csv").read_bytes() == (tmp_path / "b.csv").read_bytes()
    # a dask.distributed cluster on loopback, reached by its address as a real one would be
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False, host="127.0.0.1",
                                  protocol="tcp", dashboard_address=None) as cluster:
        on_cluster = run_population(s, 48, seed=9, vary=vary, correlate=corr, chunk=10,
                                    scheduler=cluster.scheduler_address, subjects_csv=tmp_path / "c.csv")
    _same(whole, on_cluster)
    assert (tmp_path / "a.csv").read_bytes() == (tmp_path / "c.csv").read_bytes()
    assert on_cluster.where.startswith("cluster tcp://127.0.0.1")
    # more subjects with the same seed: the first 48 are the same subjects
    more = run_population(s, 60, seed=9, vary=vary, correlate=corr, keep_subjects=True)
    rows = list(csv.reader(io.StringIO((tmp_path / "a.csv").read_text())))
    assert np.allclose(np.array(rows[1:], dtype=object)[:, 1:5].astype(float), more.subjects.values[:48], rtol=1e-9)


def test_failed_subjects_are_counted_reported_and_left_out(tmp_path):
    # a uniform partition from 5e-7 to 2e-6: values below 1e-6 are outside the model's plausible
    # range, so those subjects are refused; the others run
    s = bf.loads(BOLUS + '[[vary]]\npath = "compartment.central.partition"\ndistribution = "uniform"\n'
                         'low = 5e-7\nhigh = 2e-6\n', "bolus.toml")
    pop = run_population(s, 200, seed=1, keep_subjects=True, subjects_csv=tmp_path / "s.csv")
    partition = pop.subjects.values[:, 1]
    failed = partition < 1e-6
    assert pop.n_failed == failed.sum() > 0 and pop.n_ok == (~failed).sum() > 0
    assert [f.subject for f in pop.failures] == list(np.flatnonzero(failed) + 1)
    first = pop.failures[0]
    assert first.values == tuple(pop.subjects.values[first.subject - 1])
    assert "the model refused its values" in first.message and "plausible range" in first.message
    assert not pop.subjects.ok[failed].any() and np.isnan(pop.subjects.metrics.values[failed]).all()
    # the bands are those of the subjects that ran
    ok = ~failed
    cl = pop.subjects.values[ok, 0]
    exact = 10.0 * np.exp(-np.outer(cl, pop.times) / 10.0)
    np.testing.assert_allclose(pop.band("conc:central", 50), np.percentile(exact, 50, axis=0), rtol=0.0101)
    text = pop.summary()
    assert f"failed: {pop.n_failed}" in text
    assert f"subject {first.subject} failed (compartment.central.clearance" in text
    rows = list(csv.reader(io.StringIO((tmp_path / "s.csv").read_text())))
    assert rows[first.subject][-1].startswith("failed: the model refused its values")
    assert rows[1 + int(np.flatnonzero(ok)[0])][-1] == "ok"


def test_population_command_writes_bands_and_subjects(tmp_path, capsys, monkeypatch):
    f = tmp_path / "bolus.toml"
    f.write_text(BOLUS)
    code = main(["population", str(f), "-n", "50", "--seed", "4", "-o", str(tmp_path / "b.csv"),
                 "--subjects", str(tmp_path / "s.csv"), "--percentiles", "10", "50", "90",
                 "--vary", "compartment.central.volume=lognormal:gsd=1.2", "--no-progress"])
    out = capsys.readouterr().out
    assert code == 0, out
    assert "population of 50 subjects" in out and "finished: 50; failed: 0" in out and "auc:central" in out
    bands = list(csv.reader(io.StringIO((tmp_path / "b.csv").read_text())))
    assert bands[0][:4] == ["time [h]", "conc:central p10 [mg/L]", "conc:central p50 [mg/L]", "conc:central p90 [mg/L]"]
    assert len(bands) == 14  # the header and 13 output times
    subjects = list(csv.reader(io.StringIO((tmp_path / "s.csv").read_text())))
    assert subjects[0][:3] == ["subject", "compartment.central.clearance [L/h]", "compartment.central.volume [L]"]
    assert "cmax:central [mg/L]" in subjects[0] and subjects[0][-1] == "status"
    assert [r[0] for r in subjects[1:]] == [str(k) for k in range(1, 51)]
    # refused options: exit 2, a message naming the option
    assert main(["population", str(f), "-n", "5", "--percentiles", "150", "--no-progress"]) == 2
    assert "percentiles: got 150; numbers from 0 to 100" in capsys.readouterr().err
    assert main(["population", str(f), "-n", "5", "--vary", "compartment.central.volume=lognormal"]) == 2
    assert "--vary 'compartment.central.volume=lognormal' cv: got nothing" in capsys.readouterr().err
    monkeypatch.setattr("barrierflow.studies.runner.CONNECT_TIMEOUT", "1s")
    assert main(["population", str(f), "-n", "5", "--scheduler", "tcp://127.0.0.1:9", "--no-progress"]) == 2
    assert "--scheduler: got 'tcp://127.0.0.1:9'; no dask.distributed scheduler answered there" in \
        capsys.readouterr().err


DEGRADING = """
# An invented diffusion cell with a metabolising membrane, for the tests.
[scenario]
name = "invented degrading membrane"
duration = "12 h"
output_step = "30 min"
[[compartment]]
id = "donor"
volume = "1 mL"
initial_concentration = "1 mg/mL"
[[compartment]]
id = "receptor"
volume = "5 mL"
[[barrier]]
id = "membrane"
from = "donor"
to = "receptor"
area = "1 cm^2"
  [[barrier.layer]]
  thickness = "200 um"
  diffusivity = "1e-7 cm^2/s"
  degradation_rate = "3 1/h"
[[vary]]
path = "barrier.membrane.layer.1.degradation_rate"
distribution = "lognormal"
cv = 2.0
[[vary]]
path = "barrier.membrane.layer.1.diffusivity"
distribution = "lognormal"
cv = 0.5
"""


def test_subjects_whose_grids_differ_are_still_the_same_in_any_chunk():
    # A degrading layer's default grid follows sqrt(D/k), so subjects ask for different grids;
    # each is computed on its own grid whatever chunk it falls in.
    from barrierflow.engine import compile_scenario
    from barrierflow.studies.distributions import Variability, bare

    def grid_key(scenario):  # the cell widths relative to each barrier's thickness
        return tuple(np.round(g.widths / g.widths.sum(), 12).tobytes() for g in compile_scenario(scenario).grids)

    s = bf.loads(DEGRADING, "cell.toml")
    var = Variability.from_scenario(s)
    values = var.draw(3, 1, 30)
    keys = {grid_key(with_values(bare(s), dict(zip(var.params, row, strict=True)))) for row in values.tolist()}
    assert len(keys) > 1
    a = run_population(s, 30, seed=3, chunk=30, keep_subjects=True)
    b = run_population(s, 30, seed=3, chunk=4, keep_subjects=True)
    _same(a, b)
    assert np.array_equal(a.subjects.metrics.values, b.subjects.metrics.values, equal_nan=True)
    # and subject 5 is its single run
    alone = bf.simulate(with_values(bare(s), dict(zip(var.params, values[4].tolist(), strict=True))))
    assert a.subjects.metrics.column("permeated:membrane")[4] == pytest.approx(
        alone.metrics().barrier("membrane").permeated, rel=1e-6)


def test_a_population_the_model_refuses_names_the_scenario_file(tmp_path, capsys):
    # an evaporating vehicle (its volume changes with time): the compiled population paths refuse
    # it for every subject; the message follows '<file>: <field path>: got <value>; <expected>'
    f = tmp_path / "volatile.toml"
    f.write_text((ROOT / "scenarios" / "finite_dose_in_vitro.toml").read_text())
    assert main(["population", str(f), "-n", "3", "--vary", "barrier.skin.layer.1.diffusivity=lognormal:cv=0.3",
                 "--no-progress", "-o", str(tmp_path / "b.csv")]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"{f.name}: population: got a volume that changes with time, or undissolved solid; "), err
    assert "simulate the subjects one by one" in err and "every subject" not in err


def test_subjects_csv_says_why_a_metric_is_blank(tmp_path):
    # the bolus falls from the start (no input after 0 h): every subject has a terminal phase, but
    # no threshold was given (time_above blank) and there is one dosing interval (no accumulation
    # ratio); the notes column gives those reasons, as the note column of a single run's metrics
    s = bf.loads(BOLUS, "bolus.toml")
    pop = run_population(s, 20, seed=5, keep_subjects=True, subjects_csv=tmp_path / "s.csv")
    rows = list(csv.reader(io.StringIO((tmp_path / "s.csv").read_text())))
    assert rows[0][-2:] == ["notes", "status"]
    alone = bf.simulate(with_values(dataclasses.replace(s, vary=()),
                                    {"compartment.central.clearance": pop.subjects.values[0, 0] * 1000.0}))
    single = {name: note for _, _, name, _, _, note in alone.metrics().to_rows() if note}
    assert set(single) == {"threshold", "time_above", "accumulation_ratio", "steady_state_reached"}
    assert rows[1][-2] == ("threshold:central, time_above:central: no threshold given / accumulation_ratio:central, "
                           "steady_state_reached:central: a single dosing interval")
    assert rows[1][-2] == pop.subjects.metrics.notes[0] == alone.metrics().note_texts()[0]
    # every blank metric of every subject is named in its notes
    names = pop.subjects.metrics.names
    for values, text in zip(pop.subjects.metrics.values, pop.subjects.metrics.notes, strict=True):
        for name, x in zip(names, values, strict=True):
            if np.isnan(x):
                assert name in text
