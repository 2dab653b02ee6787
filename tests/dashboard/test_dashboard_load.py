"""Load test on loopback: 20 sessions at once edit and run their own scenarios.

The dashboard is served by waitress (as ``barrierflow serve`` serves it) in this process, and
20 clients (:mod:`dash_client`, each its own browser with its own cookies) open the page at
the same moment, change the patch's starting concentration of the demo scenario (each its own
value, except that four of them type the same one and so send identical requests), validate,
run in the background, read their concentration plot back, have the page's work kept in their
session and load the page again. Checked: no request fails, no run is lost, every plot shows
its own session's number and every reloaded page its own scenario and run (no cross-talk). The median and
95th percentile of the request times are printed (``-s`` shows them).

The count and the time are bounded: 20 sessions, each of a handful of requests, within
:data:`TIME_LIMIT_S` seconds.
"""

from __future__ import annotations

import statistics
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pytest
from dash_client import DashClient, Timing

from dashboard import create_app, ids
from dashboard import draft as D
from dashboard import view as V
from dashboard.runs import warm_up
from dashboard.server import make_server

ROOT = Path(__file__).resolve().parents[2]
SESSIONS = 20
IDENTICAL = 4  # sessions 0..3 type the same value and send identical requests
TIME_LIMIT_S = 60.0

CHECK = [f"{ids.CHECK}.data", f"{ids.VALID}.data"]
RUN = [f"{ids.RUNS}.data", f"{ids.RUN_STATUS}.children", f"{ids.RUN_NAME}.value"]
SAVE = [f"{ids.SAVED}.data", f"{ids.SESSION_CONFLICT}.style", f"{ids.SESSION_NOTE}.children"]


def _percentile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    k = min(len(ordered) - 1, max(0, round(q / 100 * (len(ordered) - 1))))
    return ordered[k]


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    app = create_app(ROOT / "scenarios" / "daily_patch.toml", cache_dir=tmp_path_factory.mktemp("load-cache"),
                     poll_ms=100)
    # the worker processes load the compiled engine before the sessions start (as `barrierflow
    # serve` has them do at start), so that the figures are those of a running server
    app.server.extensions["barrierflow"].workers.warm(warm_up, wait=True)
    server = make_server(app, "127.0.0.1", 0, threads=8)
    thread = threading.Thread(target=server.run, name="waitress", daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.effective_port}/", app
    finally:
        server.close()
        thread.join(timeout=10)


def _callback_state(app, outputs: list[str]) -> list[str]:
    """The "id.prop" of the states of the callback with these outputs (in the app's order)."""
    key = ".." + "...".join(outputs) + ".."
    return [f"{s['id']}.{s['property']}" for s in app.callback_map[key]["state"]]


def _callback_of(app, output: str) -> tuple[list[str], list[str], list[str]]:
    """Outputs, inputs and states ("id.prop") of the callback that has ``output`` among its outputs."""
    for key, spec in app.callback_map.items():
        outs = key.strip(".").split("...") if key.startswith("..") else [key]
        if output in outs:
            return (outs, [f"{i['id']}.{i['property']}" for i in spec["inputs"]],
                    [f"{s['id']}.{s['property']}" for s in spec["state"]])
    raise KeyError(output)


def session(base: str, app, index: int, timing: Timing) -> dict:
    """One researcher: open, edit the patch's concentration, validate, run, read the plot."""
    client = DashClient(base, timing)
    client.open()
    draft = client.prop(ids.DRAFT, "data")
    page = client.prop(ids.PAGE, "data")
    value = 20.0 if index < IDENTICAL else 10.0 + index
    patch = D.compartment_by_id(draft, "patch")
    draft = D.update_compartment(draft, patch["key"], {"initial_concentration": f"{value:g} mg/mL"})
    answer = client.call(CHECK, {f"{ids.DRAFT}.data": draft}, kind="validate")
    found, valid = answer[ids.CHECK]["data"], answer[ids.VALID]["data"]
    assert found["ok"], found["all"]
    state_ids = _callback_state(app, RUN)
    values = {f"{ids.VALID}.data": valid, f"{ids.CHECK}.data": found, f"{ids.RUN_NAME}.value": "",
              f"{ids.RUNS}.data": [], f"{ids.PAGE}.data": page, f"{ids.DRAFT}.data": draft}
    request = {"mode": "screen", "nonce": "same" if index < IDENTICAL else f"load-{index}"}
    answer = client.call(RUN, {f"{ids.RUN_REQUEST}.data": request}, {k: values[k] for k in state_ids}, kind="run",
                         background=True)
    runs = (answer.get(ids.RUNS) or {}).get("data") or []
    if not runs or runs[-1].get("error"):
        return {"index": index, "value": value, "runs": runs, "shown": None}
    outputs, input_ids, state_ids = _callback_of(app, f"{ids.CONC_FIGURE}.figure")
    chosen = {f"{ids.RUNS}.data": runs, f"{ids.RUN_PICK}.value": [runs[-1]["id"]], f"{ids.CONC_UNIT}.value": "mg/mL",
              f"{ids.CONC_SCALE}.value": "linear", f"{ids.COMPARTMENT_PICK}.value": ["patch"]}
    sent = {k: chosen.get(k, client.prop(k.rsplit(".", 1)[0], k.rsplit(".", 1)[1])) for k in input_ids + state_ids}
    answer = client.call(outputs, {k: sent[k] for k in input_ids}, {k: sent[k] for k in state_ids}, kind="plot",
                         changed=[f"{ids.RUN_PICK}.value"])
    traces = answer[ids.CONC_FIGURE]["figure"]["data"]
    shown = next(t["y"][0] for t in traces if t["name"].startswith("patch"))
    # the page keeps its work in the browser's session, then is loaded again
    values.update({f"{ids.RUNS}.data": runs, f"{ids.SAVED}.data": client.prop(ids.SAVED, "data")})
    layout_values = {f"{cid}.value": client.prop(cid, "value") for cid in V.SETTINGS}
    state = {k: values.get(k, layout_values.get(k)) for k in _callback_state(app, SAVE)}
    answer = client.call(SAVE, {f"{ids.EDITS}.data": {"n": 1}, f"{ids.KEEP_THIS}.n_clicks": None}, state,
                         kind="save")
    assert answer[ids.SAVED]["data"]["conflict"] is False
    client.open()
    kept = D.compartment_by_id(client.prop(ids.DRAFT, "data"), "patch")["initial_concentration"]
    kept_runs = [(r["name"], r["key"]) for r in client.prop(ids.RUNS, "data")]
    return {"index": index, "value": value, "runs": runs, "shown": shown, "kept": kept, "kept_runs": kept_runs}


def test_twenty_sessions_edit_and_run_their_own_scenarios(served):
    base, app = served
    timing = Timing()
    barrier = threading.Barrier(SESSIONS)

    def one(i: int) -> dict:
        barrier.wait(timeout=30)  # every session starts at the same moment
        return session(base, app, i, timing)

    started = time.perf_counter()
    with ThreadPoolExecutor(max_workers=SESSIONS) as pool:
        results = list(pool.map(one, range(SESSIONS)))
    elapsed = time.perf_counter() - started

    requests = [t for kind, ts in timing.seconds.items() if "until done" not in kind for t in ts]
    runs = timing.seconds.get("run (until done)", [])
    print(f"\nload test: {SESSIONS} sessions at once ({IDENTICAL} with identical inputs), {len(requests)} requests "
          f"in {elapsed:.1f} s; failed requests {len(timing.failures)}; "
          f"lost runs {sum(1 for r in results if r['shown'] is None)}")
    print(f"  request time p50 {statistics.median(requests) * 1e3:.0f} ms, "
          f"p95 {_percentile(requests, 95) * 1e3:.0f} ms (max {max(requests) * 1e3:.0f} ms)")
    if runs:
        print(f"  run, click to result: p50 {statistics.median(runs):.2f} s, p95 {_percentile(runs, 95):.2f} s")
    for kind in sorted(timing.seconds):
        ts = timing.seconds[kind]
        print(f"  {kind:22s} n={len(ts):3d}  p50 {statistics.median(ts) * 1e3:7.0f} ms  "
              f"p95 {_percentile(ts, 95) * 1e3:7.0f} ms")

    assert not timing.failures, timing.failures[:5]
    lost = [r["index"] for r in results if r["shown"] is None]
    assert not lost, f"sessions {lost} lost their run"
    for r in results:
        # the plot shows this session's own starting concentration (mg/mL), not another's
        assert r["shown"] == pytest.approx(r["value"], rel=1e-12), r
        assert [x["name"] for x in r["runs"]] == ["run 1"]
        assert r["kept"] == f"{r['value']:g} mg/mL"
        assert r["kept_runs"] == [(x["name"], x["key"]) for x in r["runs"]]
    assert elapsed < TIME_LIMIT_S
