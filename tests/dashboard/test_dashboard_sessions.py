"""Each browser's work kept on the server (dashboard.sessions) and the run encoding it uses.

The numbers compared here come from barrierflow's own simulation of an invented demo
scenario; what is checked is that the kept copy reads back bit for bit (IEEE 754 float64
written as bytes), and that the files are JSON (RFC 8259) that never holds code.
"""

from __future__ import annotations

import json
import os
import time
from pathlib import Path

import numpy as np
import pytest

import barrierflow
from dashboard import create_app, ids
from dashboard import draft as D
from dashboard.runs import execute
from dashboard.sessions import COOKIE, SessionStore, valid_id

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def demo_run():
    scenario = barrierflow.load(ROOT / "scenarios" / "daily_patch.toml")
    return execute(scenario.to_toml(), "run 1", "daily_patch.toml")


def test_a_session_saves_reads_back_and_refuses_a_stale_revision(tmp_path):
    store = SessionStore(tmp_path)
    sid = store.new_id()
    assert valid_id(sid) and store.load(sid) is None
    draft = D.new_draft("mine.toml")
    first = store.save(sid, {"draft": draft, "runs": [], "view": {}}, base=0)
    assert first["revision"] == 1 and not first["conflict"]
    assert store.load(sid)["draft"] == draft
    # the same state again: nothing written, the revision stays
    assert store.save(sid, {"draft": draft, "runs": [], "view": {}}, base=1)["revision"] == 1
    other = D.set_scenario(draft, name="changed in another tab")
    assert store.save(sid, {"draft": other, "runs": [], "view": {}}, base=1)["revision"] == 2
    # a page still based on revision 1 is refused, unless it insists
    stale = D.set_scenario(draft, name="this tab")
    assert store.save(sid, {"draft": stale, "runs": [], "view": {}}, base=1) == {"revision": 2, "conflict": True}
    assert store.load(sid)["draft"]["scenario"]["name"] == "changed in another tab"
    assert store.save(sid, {"draft": stale, "runs": [], "view": {}}, base=1, force=True)["revision"] == 3
    assert store.load(sid)["draft"]["scenario"]["name"] == "this tab"


def test_saves_of_one_page_never_conflict_and_a_stale_one_is_dropped(tmp_path):
    store = SessionStore(tmp_path)
    sid = store.new_id()
    states = [{"draft": D.set_scenario(D.new_draft(), name=f"edit {n}"), "runs": [], "view": {}} for n in range(4)]
    assert store.save(sid, states[1], base=0, writer="page-a", edits=1)["revision"] == 1
    # two saves of the same page in flight, both based on revision 1; the later edit arrives first
    assert store.save(sid, states[3], base=1, writer="page-a", edits=3)["revision"] == 2
    stale = store.save(sid, states[2], base=1, writer="page-a", edits=2)
    assert stale == {"revision": 2, "conflict": False, "saved": None}
    assert store.load(sid)["draft"]["scenario"]["name"] == "edit 3"
    # another page based on revision 1 is refused
    assert store.save(sid, states[0], base=1, writer="page-b", edits=9)["conflict"] is True


def test_session_ids_are_checked_before_they_name_a_folder(tmp_path):
    store = SessionStore(tmp_path)
    for bad in ("../../etc", "abc", "A" * 32, None, 7):
        assert not valid_id(bad)
        assert store.load(bad) is None
    with pytest.raises(ValueError, match="session id"):
        store.save("../x", {"draft": {}}, base=None)


def test_old_sessions_are_removed_when_the_store_starts(tmp_path):
    store = SessionStore(tmp_path)
    old, new = store.new_id(), store.new_id()
    for sid in (old, new):
        store.save(sid, {"draft": D.new_draft(), "runs": [], "view": {}}, base=0)
    past = time.time() - 40 * 86400
    os.utime(tmp_path / old / "state.json", (past, past))
    SessionStore(tmp_path, keep_days=30)
    assert not (tmp_path / old).exists() and (tmp_path / new).exists()


def test_a_kept_run_reads_back_bit_for_bit(tmp_path, demo_run):
    store = SessionStore(tmp_path)
    sid = store.new_id()
    store.put_run(sid, "k1", demo_run)
    assert store.has_run(sid, "k1")
    back = store.get_run(sid, "k1", "renamed")
    assert back.name == "renamed"
    assert np.array_equal(back.times, demo_run.times)
    for c in demo_run.compartments:
        for name in ("conc", "amount", "eliminated", "removed", "dosed"):
            assert np.array_equal(getattr(back, name)[c], getattr(demo_run, name)[c])
    for bid, b in demo_run.barriers.items():
        assert np.array_equal(back.barriers[bid].profile_conc, b.profile_conc)
        assert np.array_equal(back.barriers[bid].flux, b.flux)
    assert back.metrics == demo_run.metrics and back.metrics_csv == demo_run.metrics_csv
    assert back.mass_balance == demo_run.mass_balance and back.warnings == demo_run.warnings
    assert set(back.steady) == set(demo_run.steady)
    # the file is JSON holding no code: the run's scenario as TOML text and numbers
    doc = json.loads((tmp_path / sid / "runs" / "k1.json").read_text())
    assert doc["scenario_toml"] == demo_run.toml
    store.forget_runs(sid, keep=set())
    assert not store.has_run(sid, "k1")


def test_the_layout_of_a_browser_is_its_session(tmp_path):
    app = create_app(ROOT / "scenarios" / "daily_patch.toml", cache_dir=tmp_path)
    client = app.server.test_client()
    client.get("/")
    sid = client.get_cookie(COOKIE).value
    assert valid_id(sid)
    store = SessionStore(tmp_path / "sessions")
    layout = client.get("/_dash-layout").get_json()
    draft = _find(layout, ids.DRAFT)["props"]["data"]
    central = D.compartment_by_id(draft, "central")
    edited = D.update_compartment(draft, central["key"], {"volume": "12 L"})
    store.save(sid, {"draft": edited, "valid": None, "runs": [], "view": {ids.TIME_UNIT: "d"}}, base=0)
    layout = client.get("/_dash-layout").get_json()
    assert D.compartment_by_id(_find(layout, ids.DRAFT)["props"]["data"], "central")["volume"] == "12 L"
    assert _find(layout, ids.TIME_UNIT)["props"]["value"] == "d"
    # another browser (no cookie) gets the demo as opened
    fresh = app.server.test_client().get("/_dash-layout").get_json()
    assert D.compartment_by_id(_find(fresh, ids.DRAFT)["props"]["data"], "central")["volume"] == "15 L"


def _find(node, cid):
    if isinstance(node, dict):
        props = node.get("props")
        if isinstance(props, dict) and props.get("id") == cid:
            return node
        for v in (props.values() if isinstance(props, dict) else node.values()):
            found = _find(v, cid)
            if found is not None:
                return found
    elif isinstance(node, list):
        for v in node:
            found = _find(v, cid)
            if found is not None:
                return found
    return None
