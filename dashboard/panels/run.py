"""Run: validation of the draft, duration and output step, the run button, the runs of the session."""

from __future__ import annotations

import time
from typing import Any

from dash import Input, Output, State, ctx, dcc, html, no_update
from dash.exceptions import PreventUpdate

from barrierflow.errors import BarrierflowError, SolverError

from .. import draft as D
from .. import ids
from .. import view as V
from ..jobs import WorkerFailed
from ..runs import RunArchive, execute, new_record, run_key
from .common import message_list


def layout(initial: dict[str, Any], view: dict[str, Any] | None = None) -> html.Div:
    """The run card's body (ticked runs and reference as in ``view``, see :mod:`dashboard.view`)."""
    head = initial["scenario"]
    return html.Div([
        html.Div([
            html.Div([
                html.Label("Duration of the run", htmlFor=ids.DURATION, className="field-label"),
                dcc.Input(id=ids.DURATION, type="text", debounce=True, value=head["duration"],
                          className="field-input", placeholder="e.g. 7 d"),
                html.Span("time, e.g. 24 h, 7 d", className="field-hint"),
                html.Div(id=ids.scenario_message("duration"), className="field-message"),
            ], className="run-field"),
            html.Div([
                html.Label("Output every", htmlFor=ids.OUTPUT_STEP, className="field-label"),
                dcc.Input(id=ids.OUTPUT_STEP, type="text", debounce=True, value=head["output_step"],
                          className="field-input", placeholder="e.g. 15 min"),
                html.Span("time; empty: 500 equal steps", className="field-hint"),
                html.Div(id=ids.scenario_message("output_step"), className="field-message"),
                html.Div(id=ids.OUTPUT_TIMES_NOTE, className="fine-print"),
            ], className="run-field"),
            html.Div([
                html.Label("Name of the run", htmlFor=ids.RUN_NAME, className="field-label"),
                dcc.Input(id=ids.RUN_NAME, type="text", debounce=True, value="", className="field-input",
                          placeholder="run 1"),
                html.Span("shown in legends and tables", className="field-hint"),
            ], className="run-field"),
            html.Div([
                html.Button("Run", id=ids.RUN, className="btn primary big",
                            title="run the scenario as it is on the screen"),
                html.Button("Run the last valid version instead", id=ids.RUN_LAST, className="btn warn-outline",
                            style={"display": "none"},
                            title="the screen has problems: run the version before those edits; the run's name "
                                  "and the runs list say so"),
                html.Button("Cancel", id=ids.CANCEL, className="btn", disabled=True),
                dcc.Store(id=ids.RUN_REQUEST),
            ], className="run-buttons"),
        ], className="run-row"),
        html.Div([
            html.Progress(id=ids.PROGRESS, value="0", max="100", className="progress"),
            html.Span(id=ids.PROGRESS_TEXT, className="progress-text"),
        ], className="progress-row"),
        html.Div(id=ids.RUN_STATUS, className="run-status", role="status"),
        html.Div(id=ids.PROBLEMS, className="problems", role="alert"),
        html.Div([
            html.Div([
                html.Label("Runs of this session: tick two or more to compare them in every plot",
                           className="field-label"),
                dcc.Checklist(id=ids.RUN_PICK, options=[], value=V.get(view, ids.RUN_PICK), className="run-pick"),
                html.Div("No runs yet.", id="runs-empty", className="empty-note"),
            ], className="runs-list"),
            html.Div([
                html.Label("Reference run for ratios", htmlFor=ids.REFERENCE, className="field-label"),
                dcc.Dropdown(id=ids.REFERENCE, options=[], value=V.get(view, ids.REFERENCE), clearable=False,
                             className="reference-pick"),
                html.Div([
                    html.Button("Edit this run's scenario", id=ids.OPEN_RUN, className="btn small",
                                title="open the scenario of the reference run in the editor"),
                    html.Button("Forget all runs", id=ids.RUNS_CLEAR, className="btn danger-outline small"),
                ], className="toolbar"),
            ], className="runs-reference"),
        ], className="runs-row"),
    ])


SCREEN = "screen"
LAST_VALID = "last valid version"


def refusal(found: dict[str, Any], has_valid: bool) -> list[Any]:
    """Why Run refuses the scenario on the screen: its problems, field by field, or what is missing."""
    if not found.get("ok"):
        fields = []
        for p in found.get("problems", []):
            place = p.get("field") or p.get("path") or "the file"
            if place not in fields:
                fields.append(place)
        n = len(found.get("all", []))
        head = (f"Not run: the scenario on the screen has {n} problem{'s' if n != 1 else ''}. "
                f"Fix {'this field' if len(fields) == 1 else 'these fields'}: {'; '.join(fields)}.")
        tail = (" Or choose “Run the last valid version instead” to run the version before these edits, under a "
                "name that says so.") if has_valid else ""
        return [html.Span(head, className="bad"), html.Span(tail, className="warn")]
    missing = found.get("missing") or []
    return [html.Span("Nothing to run yet: " + " ".join(missing), className="bad")]


def make_run(mode: str, found: dict[str, Any] | None, valid: dict[str, Any] | None, name: str | None,
             runs: list[dict[str, Any]] | None, archive: RunArchive,
             progress: Any = None, compute: Any = None) -> tuple[list[dict[str, Any]], Any]:
    """Run the scenario on the screen (``mode`` "screen") or, on request, its last valid version.

    The scenario on the screen runs only when it is valid and has something to run (``found``,
    from :func:`dashboard.draft.check` with ``missing``); otherwise nothing runs and the status
    names the fields to fix. ``mode`` "last valid version" runs ``valid`` (the last valid
    version of the open scenario) under a name that says so, and its record says so too.
    ``compute(toml, name, file, progress)`` makes the run (default: :func:`dashboard.runs.execute`
    in this process; the app passes one that runs it in a worker process).

    Returns
    -------
    runs : list of dict
        The run records, the new one last (unchanged when nothing ran).
    status : component
        What to tell the researcher.
    """
    runs = list(runs or [])
    found = found or {"ok": False, "all": [], "problems": []}
    has_valid = bool(valid and valid.get("toml"))
    if mode == LAST_VALID:
        if not has_valid:
            return runs, html.Span("Nothing to run: this scenario has no valid version yet.", className="bad")
        toml, file = valid["toml"], valid.get("file")
    else:
        if not found.get("ok") or found.get("missing"):
            return runs, refusal(found, has_valid)
        toml, file = found["toml"], found.get("file")
    number = 1 + max((int(r["id"][1:]) for r in runs), default=0)
    name = (name or "").strip() or f"run {number}"
    if mode == LAST_VALID:
        name = f"{name} ({LAST_VALID})"
    key = run_key(toml)
    started = time.perf_counter()
    data = archive.get(key)
    reused = data is not None
    error = ""
    if data is None:
        try:
            data = (compute or execute)(toml, name, file, progress)
        except SolverError as err:
            error = f"The numerical solution failed: {err}"
        except (BarrierflowError, WorkerFailed) as err:
            error = str(err)
        else:
            archive.put(key, data)
    elapsed = time.perf_counter() - started
    record = new_record(f"r{number}", name, toml, file, data, error, source=mode)
    runs.append(record)
    parts = []
    if error:
        parts.append(html.Span(f"{name} failed. {error}", className="bad"))
    else:
        how = "the same scenario was run before; its result is reused" if reused else \
            f"simulated in {data.stats.get('wall_time_s', elapsed):.2f} s"
        parts.append(html.Span(f"{name} done: {data.scenario_name or 'unnamed scenario'}, "
                               f"{len(data.times)} output times, {how}.", className="good"))
        if data.status != 0:
            parts.append(html.Span(f" The run stopped early: {data.message}", className="bad"))
    if mode == LAST_VALID:
        parts.append(html.Span(" This run is the last valid version of the scenario, not what is on the screen.",
                               className="warn"))
    return runs, parts


def register(app: Any, services: Any) -> None:
    """Attach the run panel's callbacks."""
    archive = services.archive

    @app.callback(
        Output(ids.CHECK, "data"),
        Output(ids.VALID, "data"),
        Input(ids.DRAFT, "data"),
    )
    def validate(d):
        scenario, found = D.check(d)
        found["file"] = d.get("file")
        found["missing"] = D.missing_to_run(scenario) if scenario is not None else []
        valid = {"toml": found["toml"], "name": found["name"], "digest": found["digest"], "file": d["file"]}
        return found, (valid if found["ok"] else no_update)

    @app.callback(
        Output(ids.PROBLEMS, "children"),
        Output(ids.RUN_LAST, "style"),
        Output(ids.scenario_message("duration"), "children"),
        Output(ids.scenario_message("output_step"), "children"),
        Output(ids.DURATION, "className"),
        Output(ids.OUTPUT_STEP, "className"),
        Output(ids.OUTPUT_TIMES_NOTE, "children"),
        Input(ids.CHECK, "data"),
        Input(ids.VALID, "data"),
        State(ids.DRAFT, "data"),
    )
    def problems(found, valid, d):
        found = found or {}
        msgs = found.get("messages", {})
        dur = " ".join(msgs.get("s:duration", []))
        step = " ".join(msgs.get("s:output_step", []) + msgs.get("s:output_times", []))
        note = ""
        if d.get("output_times"):
            note = (f"The file gives {len(d['output_times'])} explicit output times; typing a step here "
                    "replaces them.")
        cls = ("field-input invalid" if dur else "field-input", "field-input invalid" if step else "field-input")
        hidden = {"display": "none"}
        if found.get("ok"):
            missing = found.get("missing") or []
            listed = [html.Div("Nothing to run yet: " + " ".join(missing), className="problems-head")] if missing \
                else ""
            return listed, hidden, dur, step, cls[0], cls[1], note
        n = len(found.get("all", []))
        has_valid = bool(valid and valid.get("toml"))
        head = (f"The scenario on the screen has {n} problem{'s' if n != 1 else ''}: Run refuses it until they are "
                "fixed." + (" Its last valid version can still be run (the button beside Run)." if has_valid else ""))
        return ([html.Div(head, className="problems-head"), message_list(found.get("all", []))],
                {} if has_valid else hidden, dur, step, cls[0], cls[1], note)

    @app.callback(
        Output(ids.DURATION, "value"),
        Output(ids.OUTPUT_STEP, "value"),
        Input(ids.LOADED, "data"),
        State(ids.DRAFT, "data"),
        prevent_initial_call=True,
    )
    def refresh(_loaded, d):
        return d["scenario"]["duration"], d["scenario"]["output_step"]

    @app.callback(
        Output(ids.DRAFT, "data", allow_duplicate=True),
        Input(ids.DURATION, "value"),
        Input(ids.OUTPUT_STEP, "value"),
        State(ids.DRAFT, "data"),
        prevent_initial_call=True,
    )
    def edit(duration, step, d):
        changes = {}
        if (duration or "") != d["scenario"]["duration"]:
            changes["duration"] = duration or ""
        if (step or "") != d["scenario"]["output_step"]:
            changes["output_step"] = step or ""
        if not changes:
            raise PreventUpdate
        return D.set_scenario(d, **changes)

    # Which button was pressed becomes a request in the page (with a random nonce, so that every
    # click is a background job of its own); the background run reads what it asks for from it.
    app.clientside_callback(
        """
        function(run, last) {
            const ctx = window.dash_clientside.callback_context;
            const mode = ctx.triggered_id === "run-last-valid" ? "last valid version" : "screen";
            return {mode: mode, nonce: Math.random().toString(36).slice(2) + Date.now().toString(36)};
        }
        """,
        Output(ids.RUN_REQUEST, "data"),
        Input(ids.RUN, "n_clicks"),
        Input(ids.RUN_LAST, "n_clicks"),
        prevent_initial_call=True,
    )

    @app.callback(
        Output(ids.RUNS, "data"),
        Output(ids.RUN_STATUS, "children"),
        Output(ids.RUN_NAME, "value"),
        Input(ids.RUN_REQUEST, "data"),
        State(ids.DRAFT, "data"),
        State(ids.VALID, "data"),
        State(ids.RUN_NAME, "value"),
        State(ids.RUNS, "data"),
        # The page's token is part of the background job's key (a hash of the callback's
        # arguments), with the request's nonce: two pages that run the same scenario under the
        # same name at the same moment never share a job.
        State(ids.PAGE, "data"),
        background=True,
        manager=services.manager,
        progress=[Output(ids.PROGRESS, "value"), Output(ids.PROGRESS_TEXT, "children")],
        progress_default=["0", ""],
        running=[
            (Output(ids.RUN, "disabled"), True, False),
            (Output(ids.RUN_LAST, "disabled"), True, False),
            (Output(ids.CANCEL, "disabled"), False, True),
            (Output(ids.PROGRESS, "className"), "progress running", "progress"),
        ],
        cancel=[Input(ids.CANCEL, "n_clicks")],
        interval=services.poll_ms,
        prevent_initial_call=True,
    )
    def run(set_progress, request, d, valid, name, runs, _page):
        last = [0.0]

        def progress(fraction: float) -> None:
            now = time.perf_counter()
            if now - last[0] > 0.2 or fraction >= 1.0:
                last[0] = now
                set_progress([f"{100 * fraction:.0f}", f"{100 * fraction:.0f} % of the simulated time"])

        def compute(toml, name, file, progress):
            return services.workers.call(execute, toml, name, file, progress=progress)

        mode = (request or {}).get("mode", SCREEN)
        found = None
        if mode == SCREEN:
            # what is on the screen, checked here (the check of the page may lag one edit behind)
            scenario, found = D.check(d)
            found["file"] = d.get("file")
            found["missing"] = D.missing_to_run(scenario) if scenario is not None else []
        new_runs, status = make_run(mode, found, valid, name, runs, archive, progress, compute)
        if len(new_runs) == len(runs or []):
            return no_update, status, no_update  # refused: the name typed stays
        return new_runs, status, ""

    @app.callback(
        Output(ids.RUN_STATUS, "children", allow_duplicate=True),
        Input(ids.CANCEL, "n_clicks"),
        prevent_initial_call=True,
    )
    def cancelled(_n):
        return html.Span("The run was cancelled; the runs list is unchanged.", className="warn")

    @app.callback(
        Output(ids.RUNS, "data", allow_duplicate=True),
        Output(ids.RUN_STATUS, "children", allow_duplicate=True),
        Input(ids.RUNS_CLEAR, "n_clicks"),
        prevent_initial_call=True,
    )
    def clear(_n):
        return [], "All runs of this session were forgotten."

    @app.callback(
        Output(ids.RUN_PICK, "options"),
        Output(ids.RUN_PICK, "value"),
        Output("runs-empty", "style"),
        Output(ids.RUN_NAME, "placeholder"),
        Output(ids.REFERENCE, "options"),
        Output(ids.REFERENCE, "value"),
        Input(ids.RUNS, "data"),
        Input(ids.RUN_PICK, "value"),
        State(ids.REFERENCE, "value"),
    )
    def list_runs(runs, picked, current):
        # one step from a new run to the ticked runs and the reference, so the plots follow at once
        runs = runs or []
        opts = []
        for r in runs:
            took = f", {r['wall_time_s']:.2f} s" if r.get("wall_time_s") is not None else ""
            failed = " (failed)" if r.get("error") or r.get("status") else ""
            origin = {LAST_VALID: " — the last valid version, not the edited screen",
                      "project file": " — from a project file"}.get(r.get("source"), "")
            label = f" {r['name']}{failed}: {r.get('scenario') or r.get('file') or ''} [{r['created']}{took}]{origin}"
            opts.append({"label": label, "value": r["id"], "disabled": bool(r.get("error"))})
        number = 1 + max((int(r["id"][1:]) for r in runs), default=0)
        existing = {r["id"] for r in runs}
        value = [v for v in (picked or []) if v in existing]
        if (ctx.triggered_id == ids.RUNS and runs and runs[-1]["id"] not in value and not runs[-1].get("error")
                and runs[-1].get("source") != "project file"):  # a project's runs come ticked as saved
            value = [runs[-1]["id"]]
        # the earliest ticked run (the baseline) is the reference; the researcher may pick another
        chosen = set(value)
        ref_opts = [{"label": r["name"], "value": r["id"]} for r in runs if r["id"] in chosen]
        reference = ref_opts[0]["value"] if ref_opts else None
        if ctx.triggered_id is None and current in chosen:
            reference = current  # the page was loaded again: the reference it had

        return opts, value, ({"display": "none"} if runs else {}), f"run {number}", ref_opts, reference
