"""The app factory and its page: built twice without clashes, served without a CDN, callbacks work.

Checks against outside references: Dash's own HTTP interface (the layout and callback
endpoints a browser uses), and the model library for what the run panel reports.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

import barrierflow
from dashboard import CAUTION, create_app, ids
from dashboard import draft as D
from dashboard.panels.run import LAST_VALID, SCREEN, make_run
from dashboard.runs import RunArchive

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def app(tmp_path_factory):
    return create_app(ROOT / "scenarios" / "daily_patch.toml", cache_dir=tmp_path_factory.mktemp("cache"))


def _ids(component, out):
    cid = getattr(component, "id", None)
    if cid is not None:
        out.append(json.dumps(cid, sort_keys=True) if isinstance(cid, dict) else cid)
    children = getattr(component, "children", None)
    if isinstance(children, (list, tuple)):
        for c in children:
            _ids(c, out)
    elif children is not None and hasattr(children, "to_plotly_json"):
        _ids(children, out)
    return out


def test_two_apps_in_one_process_have_their_own_callbacks(tmp_path, app):
    other = create_app(None, cache_dir=tmp_path)
    assert len(other.callback_map) == len(app.callback_map) > 30
    assert set(other.callback_map) == set(app.callback_map)


def test_component_ids_are_unique_and_named_in_the_ids_module(app):
    found = _ids(app.layout() if callable(app.layout) else app.layout, [])
    assert len(found) == len(set(found)), [i for i in found if found.count(i) > 1]
    known = {v for k, v in vars(ids).items() if k.isupper() and isinstance(v, str)}
    for must in (ids.DRAFT, ids.CANVAS, ids.LAYER_GRID, ids.DOSE_GRID, ids.RUN, ids.CONC_FIGURE, ids.PROFILE_SLIDER):
        assert must in found and must in known


def test_the_page_is_served_locally_with_the_caution(app):
    client = app.server.test_client()
    page = client.get("/").get_data(as_text=True)
    assert "/assets/style.css" in page
    for cdn in ("unpkg.com", "cdn.jsdelivr", "cdn.plot.ly", "googleapis"):
        assert cdn not in page
    layout = client.get("/_dash-layout").get_data(as_text=True)
    assert CAUTION in layout
    assert "Research estimates" in CAUTION and "regulatory" in CAUTION


def test_the_validation_callback_answers_over_http(app):
    d = D.draft_from_scenario(barrierflow.load(ROOT / "scenarios" / "daily_patch.toml"), "daily_patch.toml")
    comp = next(c for c in d["compartments"] if c["id"] == "central")
    d = D.update_compartment(d, comp["key"], {"volume": "-15 L"})
    body = {
        "output": f"..{ids.CHECK}.data...{ids.VALID}.data..",
        "outputs": [{"id": ids.CHECK, "property": "data"}, {"id": ids.VALID, "property": "data"}],
        "inputs": [{"id": ids.DRAFT, "property": "data", "value": d}],
        "changedPropIds": [f"{ids.DRAFT}.data"],
        "state": [],
    }
    response = app.server.test_client().post("/_dash-update-component", json=body)
    assert response.status_code == 200
    found = response.get_json()["response"][ids.CHECK]["data"]
    assert found["ok"] is False
    assert found["messages"][f"c:{comp['key']}:volume"] == [
        "daily_patch.toml: compartment 'central' volume: got -15 L; must be > 0"]


def test_make_run_runs_the_screen_and_reuses_an_identical_run(tmp_path):
    archive = RunArchive(tmp_path)
    text = (ROOT / "scenarios" / "membrane_washoff.toml").read_text()
    scenario = barrierflow.loads(text)
    d = D.draft_from_scenario(scenario, "membrane_washoff.toml")
    _s, found = D.check(d)
    found["missing"] = []
    runs, status = make_run(SCREEN, found, None, "", [], archive)
    assert [(r["name"], r["source"]) for r in runs] == [("run 1", "screen")]
    assert "run 1 done" in status[0].children and "simulated" in status[0].children
    runs, status = make_run(SCREEN, found, None, "again", runs, archive)
    assert [r["id"] for r in runs] == ["r1", "r2"] and runs[1]["name"] == "again"
    assert "reused" in status[0].children
    data = archive.get(runs[1]["key"])
    expected = barrierflow.simulate(scenario)
    assert data.conc["receptor"][-1] == pytest.approx(float(expected.concentration("receptor")[-1]), rel=1e-12)


def test_run_refuses_a_screen_with_problems_naming_the_fields_and_labels_the_last_valid_version(tmp_path):
    archive = RunArchive(tmp_path)
    d = D.draft_from_scenario(barrierflow.load(ROOT / "scenarios" / "membrane_washoff.toml"), "m.toml")
    _s, good = D.check(d)
    valid = {"toml": good["toml"], "file": "m.toml"}
    skin = next(x for x in d["links"] if x["kind"] == "barrier")
    bad = D.set_layers(d, skin["key"], [dict(layer, thickness="-5 um") for layer in skin["layers"]])
    _s, found = D.check(bad)
    runs, status = make_run(SCREEN, found, valid, "", [], archive)
    assert runs == []
    text = " ".join(part.children for part in status)
    assert text.startswith("Not run: the scenario on the screen has 2 problems. Fix these fields: barrier 'silicone' "
                           "layer 1 thickness; barrier 'silicone' layer 2 thickness.")
    assert "Run the last valid version instead" in text
    runs, status = make_run(LAST_VALID, found, valid, "", [], archive)
    assert [(r["name"], r["source"]) for r in runs] == [("run 1 (last valid version)", "last valid version")]
    assert "not what is on the screen" in status[-1].children


def test_a_new_empty_scenario_cannot_run_and_says_what_is_missing(tmp_path):
    archive = RunArchive(tmp_path)
    _s, found = D.check(D.new_draft())
    runs, status = make_run(SCREEN, found, None, "", [], archive)
    assert runs == [] and "compartment" in status[0].children
    d, _ = D.add_compartment(D.new_draft(), "donor")
    scenario, found = D.check(d)
    found["missing"] = D.missing_to_run(scenario)
    runs, status = make_run(SCREEN, found, None, "", [], archive)
    assert runs == [] and status[0].children.startswith("Nothing to run yet: No substance anywhere")
    runs, status = make_run(LAST_VALID, found, None, "", [], archive)
    assert runs == [] and "no valid version" in status.children
    assert (ids.RUN_LAST, LAST_VALID) == ("run-last-valid", "last valid version")  # as written in the page's script
