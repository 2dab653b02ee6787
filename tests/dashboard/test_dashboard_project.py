"""Project files: the scenario with its runs, read back exactly and checked like a scenario file.

The runs are simulations by barrierflow of invented demo scenarios; what is checked is the file
format: JSON (RFC 8259) read without executing or simulating anything, float64 values written
as bytes (IEEE 754) and read back bit for bit, and every problem of a damaged file reported in
the pattern ``<file>: <field path>: got <value>; <what was expected>``.
"""

from __future__ import annotations

import base64
import copy
import json
import zlib
from pathlib import Path

import numpy as np
import pytest

import barrierflow
from barrierflow.errors import ScenarioError
from dashboard.project import encode_array, project_text, read_project
from dashboard.runs import execute

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def project():
    runs = []
    for name, k in (("run 1", "4.0"), ("K doubled", "8.0")):
        text = (ROOT / "scenarios" / "diffusion_cell.toml").read_text().replace("partition = 4.0", f"partition = {k}")
        toml = barrierflow.loads(text).to_toml()
        runs.append(({"name": name, "source": "screen", "created": "10:00:00", "file": "diffusion_cell.toml",
                      "wall_time_s": 0.1}, execute(toml, name, "diffusion_cell.toml")))
    body = project_text(runs[1][1].toml, "diffusion_cell.toml", {"donor": (110.0, 80.0)}, runs,
                        {"picked": [0, 1], "reference": 0, "settings": {"time-unit": "min"}})
    return body, runs


def test_a_project_reads_back_exactly_without_simulating(project, monkeypatch):
    body, runs = project

    def no_simulation(*args, **kwargs):
        raise AssertionError("reading a project must not simulate")

    monkeypatch.setattr(barrierflow, "simulate", no_simulation)
    opened = read_project(body, "study.bfproject.json")
    assert opened["file"] == "diffusion_cell.toml" and opened["toml"] == runs[1][1].toml
    assert opened["positions"] == {"donor": [110.0, 80.0]}
    assert opened["view"] == {"picked": [0, 1], "reference": 0, "settings": {"time-unit": "min"}}
    assert [rec["name"] for rec, _ in opened["runs"]] == ["run 1", "K doubled"]
    for (_, before), (_, after) in zip(runs, opened["runs"], strict=True):
        assert np.array_equal(after.times, before.times)
        assert np.array_equal(after.barriers["membrane"].permeated, before.barriers["membrane"].permeated)
        assert np.array_equal(after.barriers["membrane"].profile_conc, before.barriers["membrane"].profile_conc)
        assert after.metrics == before.metrics and after.metrics_csv == before.metrics_csv
        assert after.toml == before.toml and after.status == before.status == 0


def _damaged(body: str, change) -> str:
    doc = json.loads(body)
    change(doc)
    return json.dumps(doc)


def _problems(text: str) -> list[str]:
    with pytest.raises(ScenarioError) as err:
        read_project(text, "study.bfproject.json")
    return [str(p) for p in err.value.problems]


def test_every_problem_of_a_damaged_project_is_named(project):
    body, _ = project
    short = encode_array(np.zeros(10))

    def change(doc):
        doc["runs"][0]["data"]["conc"]["receptor"] = short
        doc["runs"][1]["data"]["compartments"] = ["donor", "elsewhere"]
        doc["runs"][1]["name"] = 7

    found = _problems(_damaged(body, change))
    assert "study.bfproject.json: runs[1] data conc.receptor: got 10 values; expected 577 values (one per output " \
           "time)" in found
    assert any(p.startswith("study.bfproject.json: runs[2] data compartments: got [\"donor\", \"elsewhere\"]; "
                            "expected those of its scenario") for p in found)
    assert "study.bfproject.json: runs[2] name: got 7; expected text" in found


def test_a_run_whose_scenario_is_invalid_is_refused_with_the_scenario_message(project):
    body, _ = project

    def change(doc):
        doc["runs"][0]["data"]["scenario_toml"] = doc["runs"][0]["data"]["scenario_toml"].replace(
            'thickness = "20 um"', 'thickness = "-20 um"')

    found = _problems(_damaged(body, change))
    assert found == ["study.bfproject.json, runs[1] scenario: barrier 'membrane' layer 1 thickness: got -20 um; "
                     "must be > 0"]


def test_not_a_project_is_refused_at_once():
    assert _problems("[scenario]\nname = 'a TOML file'") == [
        "study.bfproject.json: file: got text that is not JSON (Expecting value: line 1 column 2 (char 1)); expected "
        "a project file (JSON, ending .bfproject.json)"]
    assert _problems('{"format": "something else"}') == [
        'study.bfproject.json: format: got something else; expected "barrierflow project" (a project file saved by '
        'the dashboard)']
    assert "NaN is not a number JSON allows" in _problems('{"format": NaN}')[0]
    deep = '{"format": "barrierflow project", "x": ' + "[" * 5000 + "]" * 5000 + "}"
    assert "nesting" in _problems(deep)[0]


def test_an_array_that_inflates_beyond_its_shape_is_refused(project):
    body, _ = project
    bomb = {"dtype": "float64", "shape": [577],
            "zlib_base64": base64.b64encode(zlib.compress(b"\0" * (50 * 1024 * 1024))).decode()}

    def change(doc):
        doc["runs"][0]["data"]["times"] = bomb

    found = _problems(_damaged(body, change))
    assert found[0].startswith("study.bfproject.json: runs[1] data times: got ")
    assert "expected zlib-compressed base64 of 577 float64 values" in found[0]


def test_a_project_without_runs_is_a_scenario_with_its_problems_kept(project):
    body, runs = project

    def change(doc):
        doc["runs"] = []
        doc["scenario"]["toml"] = copy.copy(doc["scenario"]["toml"]).replace('area = "0.64 cm^2"', 'area = "-1 cm^2"')

    opened = read_project(_damaged(body, change), "study.bfproject.json")
    assert opened["runs"] == [] and 'area = "-1 cm^2"' in opened["toml"]  # opened as typed, problems shown there


def test_measured_data_travel_with_the_project_and_are_read_by_the_one_reader(project):
    body, runs = project
    text = (ROOT / "data" / "diffusion_cell_replicates.csv").read_text()
    doc = json.loads(body)
    with_data = project_text(doc["scenario"]["toml"], "diffusion_cell.toml", {}, runs, {},
                             {"name": "cells.csv", "text": text})
    assert read_project(with_data, "study.bfproject.json")["measured"] == {"name": "cells.csv", "text": text}
    broken = project_text(doc["scenario"]["toml"], "diffusion_cell.toml", {}, runs, {},
                          {"name": "cells.csv", "text": text.replace("0.167", "-0.167")})
    found = _problems(broken)
    assert len(found) == 1 and found[0].startswith("study.bfproject.json, measured cells.csv: row ")
    assert "-0.167" in found[0]
