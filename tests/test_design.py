"""Sampling design (barrierflow.studies.design): D-optimal times and the expected CVs.

The check against something outside the design: repeated fits to experiments simulated from
Crank's series (Crank, The Mathematics of Diffusion, 2nd ed., 1975, eq. 4.24a) on a schedule
scatter as much as the design predicts (within 25 %).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from test_fit import DK, C, D, K, L, cell, crank_q

from barrierflow.cli import main
from barrierflow.errors import ScenarioError
from barrierflow.model.experiment import Experiment, Series
from barrierflow.studies.design import _candidates, design, read_times, read_window
from barrierflow.studies.fit import fit


def simulated_cvs(schedule, noise, floor, n_rep, repeats=100):
    """SD of ln(estimate) over repeated fits to Crank-series data on ``schedule`` (noise sd = noise*max(Q, floor))."""
    t = np.array(schedule.times)
    q = crank_q(t, L, D, K * C)
    sigma = noise * np.maximum(q, floor)
    s = cell(d=D, k=K)
    logs = []
    for seed in range(repeats):
        rng = np.random.default_rng(seed)
        series = tuple(Series("permeated", "membrane", str(i + 1),
                              tuple(np.maximum(q + sigma * rng.standard_normal(len(t)), 0.0)), "mg/cm^2")
                       for i in range(n_rep))
        r = fit(s, Experiment(tuple(t), series), DK, weights="1/y^2", profile=False, replicates=False)
        logs.append([math.log(p.estimate) for p in r.parameters])
    sd = np.std(logs, axis=0, ddof=1)
    return np.sqrt(np.expm1(sd**2))


@pytest.mark.slow
def test_expected_cvs_agree_with_repeated_fits_within_25_percent():
    d = design(cell(d=D, k=K), DK, samples=8, window=(0.0, 12.0), schedule=(1, 2, 3, 4, 6, 8, 10, 12),
               replicates=3, noise=0.05)
    for schedule in (d.proposed, d.user):
        got = simulated_cvs(schedule, d.noise, d.floor, 3)
        ratio = np.array(schedule.cv) / got
        assert np.all(np.abs(ratio - 1) < 0.25), (schedule.times, schedule.cv, got)
    # the proposed schedule is the better one, and better than its own replicates of the user's
    assert d.proposed.log_det > d.user.log_det and all(a < b for a, b in zip(d.proposed.cv, d.user.cv, strict=True))


def test_one_parameter_design_takes_the_most_informative_times():
    # with one parameter the determinant is the sum of the times' information, so the optimum of 3
    # times is the best trio of a brute force over the candidates (each time's information read as
    # the design of that time alone)
    d = design(cell(d=D, k=K), [DK[0]], samples=3, window=(0.0, 6.0), candidates=25)
    cands = _candidates(0.0, 6.0, 25, "h")
    one = {t: design(cell(d=D, k=K), [DK[0]], samples=1, window=(0.0, 6.0), candidates=25, schedule=(t,)).user.log_det
           for t in cands}
    best = max(math.log(sum(math.exp(one[t]) for t in trio)) for trio in itertools.combinations(cands, 3))
    assert len(d.proposed.times) == 3
    assert d.proposed.log_det == pytest.approx(best, rel=1e-9)


def test_a_gap_spreads_the_samples():
    d = design(cell(d=D, k=K), DK, samples=6, window=(0.0, 12.0), min_gap=1.0)
    t = np.array(d.proposed.times)
    assert np.all(np.diff(t) >= 1.0 - 1e-9)
    with pytest.raises(ScenarioError, match="do not fit in the window"):
        design(cell(d=D, k=K), DK, samples=6, window=(0.0, 4.0), min_gap=1.0)


def test_design_refusals():
    with pytest.raises(ScenarioError, match=r"must be a whole number >= 2 \(one sample per parameter at least"):
        design(cell(), DK, samples=1)
    with pytest.raises(ScenarioError, match="did you mean 'permeated:membrane'"):
        design(cell(), DK, observable="permeated:membrane2")
    with pytest.raises(ScenarioError, match="shapes the run"):
        design(cell(), ["scenario.duration"])


def test_reading_windows_and_schedules():
    assert read_window("0:24h") == (0.0, 24.0)
    assert read_window("30 min:2 d") == (0.5, 48.0)
    assert read_times("0.5, 1, 2,4 h") == (0.5, 1.0, 2.0, 4.0)
    assert read_times("30 min, 1 h, 1 d") == (0.5, 1.0, 24.0)
    with pytest.raises(ScenarioError, match="write the window as START:END"):
        read_window("24h")
    with pytest.raises(ScenarioError, match="must start at 0 or later and end after it starts"):
        read_window("5:1h")
    with pytest.raises(ScenarioError, match="the times must be >= 0 and increase"):
        read_times("1, 4, 2 h")
    with pytest.raises(ScenarioError, match="cannot read '2 kg' as a time"):
        read_times("1 h, 2 kg")


def test_design_command(tmp_path, capsys):
    from pathlib import Path

    scenario = Path(__file__).resolve().parents[1] / "scenarios" / "diffusion_cell.toml"
    code = main(["design", str(scenario), "--free", DK[0], "--free", DK[1], "--samples", "6", "--window", "0:24h",
                 "--schedule", "1,2,4,8,12,24 h", "--replicates", "3", "--noise", "5%", "--json",
                 str(tmp_path / "d.json"), "--no-progress"])
    out = capsys.readouterr().out
    assert code == 0 and "proposed times (D-optimal):" in out and "expected CV, yours" in out
    assert (tmp_path / "d.json").is_file()
    assert main(["design", str(scenario), "--free", DK[0], "--window", "24h"]) == 2
    assert "write the window as START:END" in capsys.readouterr().err
    assert main(["design", str(scenario), "--free", DK[0], "--noise", "-1"]) == 2
