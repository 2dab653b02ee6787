"""`barrierflow run` as the command-line contract describes it (shared spec, cli.md)."""

from __future__ import annotations

import csv
import json
import shutil
from pathlib import Path

from barrierflow.cli import main

ROOT = Path(__file__).resolve().parents[1]


def test_run_writes_csv_and_sidecar_with_default_name(tmp_path, capsys, monkeypatch):
    src = tmp_path / "given" / "cell.toml"
    src.parent.mkdir()
    shutil.copy(ROOT / "scenarios" / "diffusion_cell.toml", src)
    monkeypatch.chdir(tmp_path)
    assert main(["run", str(src), "--no-progress"]) == 0
    out = capsys.readouterr().out
    # default output: the scenario's file name with .csv, in the current folder
    assert (tmp_path / "cell.csv").is_file() and (tmp_path / "cell.json").is_file()
    assert "Cmax" in out and "tmax" in out and "AUC" in out and "peak flux" in out and "permeated" in out
    assert "mass balance: relative error" in out
    assert "research estimates" in out.lower()
    side = json.loads((tmp_path / "cell.json").read_text())
    assert side["mass_balance_mg"]["relative_error"] < 1e-6
    assert side["software"]["name"] == "barrierflow"
    rows = list(csv.reader(open(tmp_path / "cell.csv")))
    assert rows[0][0] == "time [h]"


def test_run_refuses_bad_input_with_status_2_and_no_traceback(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    text = (ROOT / "scenarios" / "diffusion_cell.toml").read_text()
    bad.write_text(text.replace('thickness = "', 'thickness = "-', 1))
    assert main(["run", str(bad), "-o", str(tmp_path / "x.csv")]) == 2
    err = capsys.readouterr().err
    assert "bad.toml: barrier" in err and "thickness: got -" in err and "must be > 0" in err
    assert "Traceback" not in err
    assert not (tmp_path / "x.csv").exists()


def test_run_with_a_named_integrator_and_grid(tmp_path, capsys):
    out = tmp_path / "o.csv"
    assert main(["run", str(ROOT / "scenarios" / "membrane_washoff.toml"), "-o", str(out),
                 "--integrator", "radau", "--cells", "12"]) == 0
    side = json.loads(out.with_suffix(".json").read_text())
    assert side["solver"]["integrator"] == "scipy-Radau"
    assert side["solver"]["grid_defaults"]["cells_per_layer"] == 12


def test_run_unknown_integrator_is_refused(tmp_path, capsys):
    code = main(["run", str(ROOT / "scenarios" / "membrane_washoff.toml"), "-o", str(tmp_path / "o.csv"),
                 "--integrator", "euler"])
    assert code == 2
    assert "integrator: got 'euler'" in capsys.readouterr().err


def test_unwritable_output_is_refused_before_simulating(tmp_path, capsys, monkeypatch):
    import barrierflow.analysis

    def never(*a, **k):  # the run must not start
        raise AssertionError("simulated although the output cannot be written")

    monkeypatch.setattr(barrierflow.analysis, "simulate", never)
    scen = str(ROOT / "scenarios" / "diffusion_cell.toml")
    assert main(["run", scen, "-o", str(tmp_path / "missing" / "x.csv")]) == 2
    assert "the folder" in capsys.readouterr().err
    assert main(["run", scen, "-o", str(tmp_path / "x.json")]) == 2
    assert "does not end in .json" in capsys.readouterr().err


def test_solver_failure_exits_3_with_one_message(tmp_path, capsys, monkeypatch):
    import barrierflow.analysis
    from barrierflow import SolverError

    def failing(*a, **k):
        raise SolverError("the solution failed at t = 2 h (dosing interval 1), near barrier 'm': injected",
                          time=2.0, part="barrier 'm'")

    monkeypatch.setattr(barrierflow.analysis, "simulate", failing)
    code = main(["run", str(ROOT / "scenarios" / "diffusion_cell.toml"), "-o", str(tmp_path / "x.csv")])
    err = capsys.readouterr().err
    assert code == 3
    assert err.strip() == "the solution failed at t = 2 h (dosing interval 1), near barrier 'm': injected"


def test_integrator_names_in_the_help_are_the_engine_table():
    from barrierflow.cli import INTEGRATOR_NAMES
    from barrierflow.engine import INTEGRATORS

    assert set(INTEGRATOR_NAMES) == set(INTEGRATORS)
