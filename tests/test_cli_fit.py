"""`barrierflow fit` as the extension contract describes it (shared spec, extensions.md, Commands).

The data file is the invented example of the README (data/diffusion_cell_replicates.csv).
"""

from __future__ import annotations

import json
from pathlib import Path

import barrierflow as bf
from barrierflow.cli import WEIGHT_NAMES, main
from barrierflow.studies.fit import WEIGHTS

ROOT = Path(__file__).resolve().parents[1]
SCENARIO = ROOT / "scenarios" / "diffusion_cell.toml"
DATA = ROOT / "data" / "diffusion_cell_replicates.csv"
FREE = ["--free", "barrier.membrane.layer.1.diffusivity", "--free", "barrier.membrane.layer.1.partition=1:100"]


def test_fit_prints_the_table_and_writes_the_fitted_scenario_report_and_residuals(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    code = main(["fit", str(SCENARIO), str(DATA), *FREE, "--weights", "1/y^2", "--json", "report.json",
                 "--residuals", "obs.csv", "--no-progress"])
    out = capsys.readouterr().out
    assert code == 0
    assert "barrier.membrane.layer.1.diffusivity" in out and "95% CI (profile)" in out and "time-lag" in out
    assert "replicates fitted one by one (3)" in out and "research estimates" in out.lower()
    # default name of the fitted scenario: the scenario's stem with -fitted.toml, in the current folder
    fitted = bf.load(tmp_path / "diffusion_cell-fitted.toml")
    doc = json.loads((tmp_path / "report.json").read_text())
    # the REPORT.json keys of the contract, values in the scenario file's units (cm^2/s here)
    d = doc["parameters"]["barrier.membrane.layer.1.diffusivity"]
    assert set(d) >= {"estimate", "unit", "se", "ci95"} and d["unit"] == "cm^2/s"
    assert {"converged", "aic", "n_observations"} <= set(doc) and doc["n_observations"] == 35
    assert fitted.barrier("membrane").layers[0].diffusivity == \
        bf.ParamPath.parse("barrier.membrane.layer.1.diffusivity").from_unit(float(f"{d['estimate']:.6g}"), "cm^2/s")
    assert doc["parameters"]["barrier.membrane.layer.1.partition"]["bounds"] == [1.0, 100.0]
    lines = (tmp_path / "obs.csv").read_text().splitlines()
    assert lines[0].startswith("time [h],observable,replicate,unit,observed,predicted") and len(lines) == 36
    assert lines[1].split(",")[3] == "ug/cm^2"
    # the fitted scenario runs other regimens at once
    assert bf.simulate(fitted).status == 0


def test_fit_refuses_a_bad_data_file_naming_row_and_column(tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text(DATA.read_text().replace("3,7.13,", "3,-7.13,"))
    assert main(["fit", str(SCENARIO), str(bad), *FREE, "-o", str(tmp_path / "f.toml")]) == 2
    err = capsys.readouterr().err
    assert "bad.csv: row 9, column 'permeated:membrane#1 [ug/cm^2]': got -7.13; must be a number >= 0" in err
    assert not (tmp_path / "f.toml").exists()


def test_fit_refuses_bad_paths_and_options(tmp_path, capsys):
    assert main(["fit", str(SCENARIO), str(DATA), "--free", "barrier.membrane.layer.1.difusivity",
                 "-o", str(tmp_path / "f.toml")]) == 2
    err = capsys.readouterr().err
    assert "--free: got 'barrier.membrane.layer.1.difusivity'; did you mean 'barrier.membrane.layer.1.diffusivity'?" \
        in err
    assert main(["fit", str(SCENARIO), str(DATA), *FREE, "--weights", "1/x"]) == 2
    assert "invalid choice: '1/x'" in capsys.readouterr().err
    assert main(["fit", str(SCENARIO), str(DATA)]) == 2  # --free is required
    assert not (tmp_path / "f.toml").exists()


def test_the_weight_names_of_the_command_line_are_those_of_the_fit():
    assert WEIGHT_NAMES == WEIGHTS
