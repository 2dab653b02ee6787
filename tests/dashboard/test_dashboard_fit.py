"""The fit panel: its plain functions (data, packing, figures, adopting) and its callbacks over HTTP.

The data are the invented example of the README (data/diffusion_cell_replicates.csv); what the
panel shows is checked against barrierflow.fit itself (the same numbers as the command line).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

import barrierflow
from dashboard import create_app, ids
from dashboard import draft as D
from dashboard.fitting import (
    data_summary,
    default_free,
    example_data,
    execute_fit,
    fit_figure,
    free_options,
    preview,
    read_data,
    residual_figure,
)
from dashboard.panels.fit import adopt_estimates, free_list, parameter_table

ROOT = Path(__file__).resolve().parents[2]
SCENARIO = ROOT / "scenarios" / "diffusion_cell.toml"
DATA = ROOT / "data" / "diffusion_cell_replicates.csv"
FREE = ["barrier.membrane.layer.1.diffusivity", "barrier.membrane.layer.1.partition"]


@pytest.fixture(scope="module")
def toml():
    return barrierflow.load(SCENARIO).to_toml()


@pytest.fixture(scope="module")
def packed(toml):
    return execute_fit(toml, "diffusion_cell.toml", DATA.read_text(), DATA.name, FREE, "1/y^2", True, True, 0)


def test_the_data_and_the_choices(toml):
    assert str(DATA) in example_data()
    e = read_data(DATA.read_text(), DATA.name, toml)
    assert data_summary(e) == ("diffusion_cell_replicates.csv: 35 values in 3 replicates (1, 2, 3); "
                               "permeated:membrane [ug/cm^2]; 0 to 24 h")
    options = free_options(toml)
    values = [o["value"] for o in options]
    assert FREE[0] in values and "barrier.membrane.layer.1.cells" not in values and "scenario.duration" not in values
    assert any(o["label"] == "barrier.membrane.layer.1.diffusivity (2e-10 cm^2/s)" for o in options)
    assert default_free(toml, e) == FREE
    assert free_list(FREE, f"{FREE[1]}=1:100\nbarrier.membrane.area=0.1:1") == [
        FREE[0], f"{FREE[1]}=1:100", "barrier.membrane.area=0.1:1"]


def test_the_packed_fit_is_the_fit_of_the_library(packed):
    s = barrierflow.load(SCENARIO)
    direct = barrierflow.fit(s, barrierflow.load_experiment(DATA), FREE, weights="1/y^2")
    assert packed["report"]["parameters"][FREE[0]]["estimate"] == pytest.approx(
        direct.as_dict()["parameters"][FREE[0]]["estimate"], rel=1e-9)
    assert packed["estimates"][0]["text"].endswith(" cm^2/s") and packed["estimates"][1]["unit"] == ""
    curve = packed["curves"]["permeated:membrane"]
    assert len(curve["times"]) == 150 and all(lo <= f <= hi for lo, f, hi in
                                              zip(curve["lower"], curve["fit"], curve["upper"], strict=True))
    # the curves are in the data file's unit (ug/cm^2): the last fitted value near the measured ~72
    assert 60 < curve["fit"][-1] < 85
    json.dumps(packed, allow_nan=False)  # what goes to the page is plain JSON
    table = parameter_table(packed)
    assert "95 % CI (profile)" in json.dumps(table.to_plotly_json(), default=str)


def test_figures(toml, packed):
    e = read_data(DATA.read_text(), DATA.name, toml)
    before = preview(toml, DATA.read_text(), DATA.name)
    fig = fit_figure(e, "permeated:membrane", before, packed)
    names = [t["name"] for t in fig["data"]]
    assert names[-3:] == ["replicate 1", "replicate 2", "replicate 3"]
    assert "fitted" in names and "open scenario" in names and "95 % confidence band of the fit" in names
    assert fig["layout"]["yaxis"]["title"]["text"] == "permeated:membrane [ug/cm^2]"
    assert fig["data"][-1]["y"][-1] == pytest.approx(73.9)   # the file's own number, in its unit
    res = residual_figure(packed, "permeated:membrane")
    assert [t["name"] for t in res["data"]] == ["replicate 1", "replicate 2", "replicate 3"]
    assert sum(len(t["x"]) for t in res["data"]) == 35
    assert fit_figure(None, None, None, None)["data"] == []


def test_adopting_writes_the_estimates_into_the_draft(toml, packed):
    d = D.draft_from_scenario(barrierflow.load(SCENARIO), "diffusion_cell.toml")
    new, note = adopt_estimates(d, packed)
    scenario, found = D.check(new)
    assert found["ok"]
    fitted = barrierflow.loads(packed["fitted_toml"])
    assert scenario.barrier("membrane").layers[0].diffusivity == fitted.barrier("membrane").layers[0].diffusivity
    assert scenario.barrier("membrane").layers[0].partition == fitted.barrier("membrane").layers[0].partition
    assert note.startswith("Adopted into the open scenario: barrier 'membrane' layer 1 diffusivity = ")
    other = D.draft_from_scenario(barrierflow.load(ROOT / "scenarios" / "daily_patch.toml"), "daily_patch.toml")
    with pytest.raises(KeyError, match="the scenario has no field 'barrier.membrane.layer.1.diffusivity'"):
        adopt_estimates(other, packed)


def test_the_panel_is_on_the_page_and_takes_the_example_data(tmp_path):
    app = create_app(SCENARIO, cache_dir=tmp_path)
    text = repr(app.layout())
    for cid in (ids.FIT_UPLOAD, ids.FIT_FREE, ids.FIT_RUN, ids.FIT_FIGURE, ids.FIT_ADOPT):
        assert f"id='{cid}'" in text
    # the data callback over HTTP, as the page calls it
    client = app.server.test_client()
    client.get("/")
    valid = {"toml": barrierflow.load(SCENARIO).to_toml(), "name": "x", "digest": "", "file": "diffusion_cell.toml"}
    body = {
        "output": f"..{ids.FIT_DATA}.data...{ids.FIT_DATA_NOTE}.children...{ids.FIT_UPLOAD}.contents..",
        "outputs": [{"id": ids.FIT_DATA, "property": "data"}, {"id": ids.FIT_DATA_NOTE, "property": "children"},
                    {"id": ids.FIT_UPLOAD, "property": "contents"}],
        "inputs": [{"id": ids.FIT_UPLOAD, "property": "contents", "value": None},
                   {"id": ids.FIT_OPEN_EXAMPLE, "property": "n_clicks", "value": 1}],
        "state": [{"id": ids.FIT_UPLOAD, "property": "filename", "value": None},
                  {"id": ids.FIT_EXAMPLE, "property": "value", "value": str(DATA)},
                  {"id": ids.VALID, "property": "data", "value": valid}],
        "changedPropIds": [f"{ids.FIT_OPEN_EXAMPLE}.n_clicks"],
    }
    r = client.post("/_dash-update-component", json=body)
    assert r.status_code == 200, r.get_data(as_text=True)[:500]
    got = r.get_json()["response"]
    assert got[ids.FIT_DATA]["data"]["name"] == DATA.name
    assert "35 values in 3 replicates" in json.dumps(got[ids.FIT_DATA_NOTE])
