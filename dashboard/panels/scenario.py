"""The scenario bar: open an example, a scenario file or a project file, start empty, save the
scenario as TOML or the whole session (scenario and runs) as a project file."""

from __future__ import annotations

import base64
from pathlib import Path
from typing import Any

from dash import ALL, Input, Output, State, ctx, dcc, html, no_update
from dash.exceptions import PreventUpdate

import barrierflow
from barrierflow.errors import ScenarioError

from .. import draft as D
from .. import ids
from .. import view as V
from ..project import SUFFIX, project_text, read_project
from ..runs import imported_key, new_record
from ..server import DEFAULT_MAX_UPLOAD, format_size
from .common import decode_upload, message_list
from .network import canvas_positions, element_options
from .results import fetch_runs


def layout(examples: dict[str, str], initial: dict[str, Any]) -> html.Div:
    """The bar above the editor. ``examples`` maps a file path to its label."""
    options = [{"label": label, "value": path} for path, label in examples.items()]
    opened = next((o["value"] for o in options if Path(o["value"]).name == initial["file"]), None)
    first = opened or (options[0]["value"] if options else None)
    return html.Div([
        html.Div([
            html.Label("Example scenario", htmlFor=ids.EXAMPLE, className="field-label"),
            html.Div([
                dcc.Dropdown(id=ids.EXAMPLE, options=options, value=first,
                             clearable=False, className="example-pick", placeholder="pick an example"),
                html.Button("Open example", id=ids.OPEN_EXAMPLE, className="btn"),
            ], className="field-line"),
        ], className="bar-group"),
        html.Div([
            html.Label("Your own file", className="field-label"),
            dcc.Upload(id=ids.UPLOAD, children=html.Button("Open a scenario or project file…", className="btn",
                                                           tabIndex=-1),
                       accept=".toml,.json,text/plain,application/json", multiple=False, className="upload"),
        ], className="bar-group"),
        html.Div([
            html.Label("Start again", className="field-label"),
            html.Button("New empty scenario", id=ids.NEW, className="btn"),
        ], className="bar-group"),
        html.Div([
            html.Label("Scenario name", htmlFor=ids.SCENARIO_NAME, className="field-label"),
            dcc.Input(id=ids.SCENARIO_NAME, type="text", debounce=True, value=initial["scenario"]["name"],
                      className="field-input wide", placeholder="free text"),
        ], className="bar-group grow"),
        html.Div([
            html.Label("File name", htmlFor=ids.FILE_NAME, className="field-label"),
            html.Div([
                dcc.Input(id=ids.FILE_NAME, type="text", debounce=True, value=initial["file"],
                          className="field-input", placeholder="untitled.toml"),
                html.Button("Save as TOML", id=ids.SAVE, className="btn primary-outline",
                            title="the scenario alone, as a scenario file"),
                html.Button("Save project", id=ids.SAVE_PROJECT, className="btn primary-outline",
                            title="the scenario with the runs of this session (traces, metrics, names), "
                                  "to reopen here or on another computer"),
            ], className="field-line"),
        ], className="bar-group"),
        dcc.Download(id=ids.SAVE_DOWNLOAD),
        html.Div(id=ids.OPEN_MESSAGE, className="open-message", role="status"),
        html.Details([
            html.Summary("Substance and units of the exported traces"),
            html.Div([
                html.Div([compact_field("substance", name, *D.SUBSTANCE_LABELS[name],
                                        value=initial["substance"].get(name, ""),
                                        hint=SUBSTANCE_HINTS[name]) for name in D.SUBSTANCE_FIELDS],
                         className="compact-row"),
                html.Div([compact_field("output", name, *D.OUTPUT_LABELS[name],
                                        value=initial["output"].get(name, ""), hint=OUTPUT_HINTS[name])
                          for name in D.OUTPUT_FIELDS], className="compact-row"),
            ]),
        ], className="more-settings", open=bool(initial["substance"].get("molar_mass") or initial["output"])),
    ], className="scenario-bar")


SUBSTANCE_HINTS = {
    "name": "free text",
    "molar_mass": "enables molar units, e.g. 250 g/mol",
    "solubility": "in the reference phase; enables the sink warning",
    "log_kow": "bare number (log10)",
}
OUTPUT_HINTS = {
    "time": "default h",
    "concentration": "default mg/L",
    "amount": "default mg",
    "area": "flux and permeated per this area; default cm^2",
}


def compact_field(scope: str, name: str, label: str, kind: str, example: str, *, value: str = "",
                  hint: str = "") -> html.Div:
    """A small labelled input with a hint and its message line (substance and output units)."""
    return html.Div([
        html.Label(label, className="field-label"),
        dcc.Input(id=ids.field(scope, name), type="text", value=value, debounce=True, placeholder=f"e.g. {example}",
                  className="field-input", spellCheck=False, autoComplete="off"),
        html.Div(hint, className="field-hint"),
        html.Div(id=ids.field_message(scope, name), className="field-message", role="alert"),
    ], className="compact-field")


def open_example(path: str) -> dict[str, Any]:
    """A draft of an example file (examples are valid by construction; see tests)."""
    scenario = barrierflow.load(path)
    return D.draft_from_scenario(scenario, Path(path).name)


def is_project(filename: str | None, contents: str) -> bool:
    """True for an upload that is a project file (its name ends in .json, or its text starts with "{")."""
    if (filename or "").lower().endswith(".json"):
        return True
    try:
        head = base64.b64decode(contents.split(",", 1)[1][:16] + "==")
    except (ValueError, IndexError):
        return False
    return head.lstrip(b"\xef\xbb\xbf \t\r\n").startswith(b"{")


def open_upload(contents: str, filename: str | None,
                limit: int = DEFAULT_MAX_UPLOAD) -> tuple[dict[str, Any] | None, list[str]]:
    """A draft of an uploaded file, and its problems (the draft keeps whatever the file holds).

    A file above ``limit`` bytes is refused (None and the message), whatever its contents.
    """
    try:
        name, raw = decode_upload(contents, filename, limit)
    except ValueError as err:
        return None, [str(err)]
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        return None, [f"{name}: file: got unreadable contents; expected a UTF-8 TOML scenario file"]
    try:
        scenario = barrierflow.loads(text, name)
    except ScenarioError:
        d, problems = D.draft_from_toml(text, name)
        return d, [str(p) for p in problems]
    return D.draft_from_scenario(scenario, name), []


def register(app: Any, services: Any) -> None:
    """Attach the scenario bar's callbacks."""
    limit = services.max_upload

    # The page weighs a file before sending it: one above the limit never leaves the browser.
    # The upload's contents are cleared, so that choosing the same file again is seen.
    app.clientside_callback(
        """
        function(contents, filename, page) {
            const no = window.dash_clientside.no_update;
            if (!contents) { return [no, no, no]; }
            const limit = page.max_upload;
            const comma = contents.indexOf(',');
            const size = Math.floor((contents.length - comma - 1) * 3 / 4);
            const name = (filename || 'uploaded.toml').split('/').pop().split('\\\\').pop();
            if (size > limit + 3) {
                const g = (x) => parseFloat(x.toPrecision(3)).toString();
                const mb = (n) => n >= 1048576 ? g(n / 1048576) + ' MB' : n >= 1024 ? g(n / 1024) + ' kB'
                                 : n + ' bytes';
                const text = name + ': file: got ' + mb(size) + '; the dashboard accepts files up to ' + mb(limit) +
                    ' (start it with --max-upload MB to accept larger ones)';
                return [no, text, null];
            }
            return [{contents: contents, filename: name, at: Date.now()}, no, null];
        }
        """,
        Output(ids.UPLOADED, "data"),
        Output(ids.OPEN_MESSAGE, "children", allow_duplicate=True),
        Output(ids.UPLOAD, "contents"),
        Input(ids.UPLOAD, "contents"),
        State(ids.UPLOAD, "filename"),
        State(ids.PAGE, "data"),
        prevent_initial_call=True,
    )

    shown_settings = [cid for cid in V.SETTINGS if cid not in (ids.SELECT, ids.RUN_PICK, ids.REFERENCE)]

    @app.callback(
        output=dict(
            draft=Output(ids.DRAFT, "data", allow_duplicate=True),
            message=Output(ids.OPEN_MESSAGE, "children"),
            options=Output(ids.SELECT, "options", allow_duplicate=True),
            selected=Output(ids.SELECT, "value", allow_duplicate=True),
            loaded=Output(ids.LOADED, "data"),
            valid=Output(ids.VALID, "data", allow_duplicate=True),
            runs=Output(ids.RUNS, "data", allow_duplicate=True),
            picked=Output(ids.RUN_PICK, "value", allow_duplicate=True),
            reference=Output(ids.REFERENCE, "value", allow_duplicate=True),
            measured=Output(ids.MEASURED, "data", allow_duplicate=True),
            view={cid: Output(cid, "value", allow_duplicate=True) for cid in shown_settings},
        ),
        inputs=dict(
            _ex=Input(ids.OPEN_EXAMPLE, "n_clicks"),
            uploaded=Input(ids.UPLOADED, "data"),
            _new=Input(ids.NEW, "n_clicks"),
            _run=Input(ids.OPEN_RUN, "n_clicks"),
            example=State(ids.EXAMPLE, "value"),
            reference=State(ids.REFERENCE, "value"),
            runs=State(ids.RUNS, "data"),
        ),
        prevent_initial_call=True,
    )
    def open_scenario(_ex, uploaded, _new, _run, example, reference, runs):
        trigger = ctx.triggered_id
        out = {"draft": no_update, "message": no_update, "options": no_update, "selected": no_update,
               "loaded": no_update, "valid": no_update, "runs": no_update, "picked": no_update,
               "reference": no_update, "measured": no_update, "view": {cid: no_update for cid in shown_settings}}
        problems: list[str] = []
        if trigger == ids.OPEN_EXAMPLE:
            if not example:
                raise PreventUpdate
            try:
                d = open_example(example)
            except ScenarioError as err:
                return dict(out, message=message_list([str(p) for p in err.problems]))
            note = f"Opened the example {Path(example).name}."
        elif trigger == ids.UPLOADED:
            if not uploaded or not uploaded.get("contents"):
                raise PreventUpdate
            if is_project(uploaded.get("filename"), uploaded["contents"]):
                return open_project_upload(uploaded, runs or [], out)
            d, problems = open_upload(uploaded["contents"], uploaded.get("filename"), limit)
            if d is None:
                return dict(out, message=message_list(problems))
            note = (f"Opened {d['file']}; it has problems, shown at their fields below."
                    if problems else f"Opened {d['file']}.")
        elif trigger == ids.OPEN_RUN:
            record = next((r for r in runs or [] if r["id"] == reference), None)
            if record is None:
                return dict(out, message="Tick a run first: its scenario opens in the editor.")
            d = D.draft_from_scenario(barrierflow.loads(record["toml"], record.get("file")),
                                      record.get("file") or "untitled.toml")
            note = f"Opened the scenario of {record['name']} for editing."
        else:
            d = D.new_draft()
            note = "Started an empty scenario: add compartments on the canvas."
        message = [html.Span(note)] + ([message_list(problems)] if problems else [])
        # the last valid version is that of the scenario now open (set again once it checks)
        return dict(out, draft=d, message=message, options=element_options(d), selected=D.first_selection(d),
                    loaded={"gen": d["gen"]}, valid=None)

    def open_project_upload(uploaded: dict[str, Any], runs: list[dict[str, Any]], out: dict[str, Any]) -> dict:
        """Open a project file: its scenario in the editor, its runs added to the session's and ticked."""
        try:
            name, raw = decode_upload(uploaded["contents"], uploaded.get("filename"), limit)
            opened = read_project(raw, name)
        except ValueError as err:
            return dict(out, message=message_list([str(err)]))
        except ScenarioError as err:
            head = html.Span(f"{uploaded.get('filename')} was not opened: it has problems.", className="bad")
            return dict(out, message=[head, message_list([str(p) for p in err.problems])])
        d, problems = D.draft_from_toml(opened["toml"], opened["file"])
        for comp in d["compartments"]:
            xy = opened["positions"].get(comp.get("id"))
            if xy is not None:
                d["positions"][comp["key"]] = {"x": xy[0], "y": xy[1]}
        number = max((int(r["id"][1:]) for r in runs if str(r.get("id", "")).startswith("r")), default=0)
        names = {r["name"] for r in runs}
        added = []
        for record, data in opened["runs"]:
            number += 1
            run_name = record["name"] if record["name"] not in names else f"{record['name']} ({name})"
            key = imported_key(data)
            services.archive.put(key, data)
            new = new_record(f"r{number}", run_name, data.toml, record.get("file") or None, data)
            new.update(key=key, source="project file", made_as=record.get("source") or "screen",
                       created=record.get("created") or new["created"], wall_time_s=record.get("wall_time_s"))
            added.append(new)
        view = opened["view"]
        index_of = {i: rec["id"] for i, rec in enumerate(added)}
        picked = [index_of[i] for i in view.get("picked", []) if isinstance(i, int) and i in index_of]
        reference = view.get("reference")
        reference = index_of.get(reference) if isinstance(reference, int) else None
        settings = V.clean(view.get("settings", {}))
        shown = {cid: settings[cid] if settings.get(cid) is not None else no_update for cid in shown_settings}
        n = len(added)
        note = (f"Opened the project {name}: its scenario {d['file']} and {n} run{'s' if n != 1 else ''}"
                + (", ticked as saved." if picked else "."))
        message = [html.Span(note)] + ([html.Span(" Its scenario has problems, shown at their fields below."),
                                        message_list([str(p) for p in problems])] if problems else [])
        return dict(out, draft=d, message=message, options=element_options(d), selected=D.first_selection(d),
                    loaded={"gen": d["gen"]}, valid=None, runs=runs + added, picked=picked or no_update,
                    reference=reference or no_update, view=shown,
                    measured=opened["measured"] if opened["measured"] else no_update)

    @app.callback(
        Output(ids.SAVE_DOWNLOAD, "data", allow_duplicate=True),
        Output(ids.OPEN_MESSAGE, "children", allow_duplicate=True),
        Input(ids.SAVE_PROJECT, "n_clicks"),
        State(ids.DRAFT, "data"),
        State(ids.RUNS, "data"),
        State(ids.CANVAS, "elements"),
        State(ids.MEASURED, "data"),
        *[State(cid, "value") for cid in V.SETTINGS],
        prevent_initial_call=True,
    )
    def save_project(_n, d, runs, elements, measured, *values):
        settings = V.clean(dict(zip(V.SETTINGS, values, strict=True)))
        picked_ids = settings.pop(ids.RUN_PICK, None) or []
        reference_id = settings.pop(ids.REFERENCE, None)
        settings.pop(ids.SELECT, None)
        kept, skipped = [], []
        for record in runs or []:
            data = fetch_runs([record["id"]], [record], services.archive, services.sessions)
            if data:
                kept.append((record, data[0]))
            else:
                skipped.append(record["name"])
        order = [rec["id"] for rec, _ in kept]
        view = {"picked": [order.index(i) for i in picked_ids if i in order],
                "reference": order.index(reference_id) if reference_id in order else None,
                "settings": settings}
        key_to_id = {c["key"]: c.get("id") for c in d["compartments"]}
        positions = {key_to_id[k]: (p["x"], p["y"]) for k, p in canvas_positions(elements).items() if k in key_to_id}
        text, _valid = D.save_text(d)
        body = project_text(text, d.get("file") or "untitled.toml", positions, kept, view, measured)
        stem = (d.get("file") or "untitled.toml").removesuffix(".toml")
        size = len(body.encode())
        notes = [f"Saved the project {stem}{SUFFIX}: the scenario and {len(kept)} run{'s' if len(kept) != 1 else ''} "
                 f"({format_size(size)})."]
        if skipped:
            notes.append(f" Left out (they failed, so there is nothing to keep): {', '.join(skipped)}.")
        if size > limit:
            notes.append(f" It is larger than the {format_size(limit)} this dashboard accepts for upload; to open it "
                         f"again, start the dashboard with --max-upload {size / 1048576 + 1:.0f}.")
        return dcc.send_string(body, f"{stem}{SUFFIX}", type="application/json"), html.Span("".join(notes))

    @app.callback(
        Output(ids.SCENARIO_NAME, "value"),
        Output(ids.FILE_NAME, "value"),
        Input(ids.LOADED, "data"),
        State(ids.DRAFT, "data"),
        prevent_initial_call=True,
    )
    def refresh_bar(_loaded, d):
        return d["scenario"]["name"], d["file"]

    @app.callback(
        Output(ids.DRAFT, "data", allow_duplicate=True),
        Input(ids.SCENARIO_NAME, "value"),
        Input(ids.FILE_NAME, "value"),
        State(ids.DRAFT, "data"),
        prevent_initial_call=True,
    )
    def edit_names(name, file, d):
        new = D.set_scenario(d, name=name or "", file=file or "")
        if new == d:
            raise PreventUpdate
        return new

    @app.callback(
        Output(ids.field("substance", ALL), "value"),
        Output(ids.field("output", ALL), "value"),
        Input(ids.LOADED, "data"),
        State(ids.DRAFT, "data"),
        prevent_initial_call=True,
    )
    def refresh_units(_loaded, d):
        sub = [d["substance"].get(o["id"]["name"], "") for o in ctx.outputs_list[0]]
        out = [d["output"].get(o["id"]["name"], "") for o in ctx.outputs_list[1]]
        return sub, out

    @app.callback(
        Output(ids.DRAFT, "data", allow_duplicate=True),
        Input(ids.field("substance", ALL), "value"),
        Input(ids.field("output", ALL), "value"),
        State(ids.DRAFT, "data"),
        prevent_initial_call=True,
    )
    def edit_units(sub_values, out_values, d):
        sub = {i["id"]["name"]: v or "" for i, v in zip(ctx.inputs_list[0], sub_values, strict=True)}
        out = {i["id"]["name"]: v or "" for i, v in zip(ctx.inputs_list[1], out_values, strict=True)}
        new = D.set_output(D.set_substance(d, **sub), **out)
        if new == d:
            raise PreventUpdate
        return new

    @app.callback(
        Output(ids.field_message("substance", ALL), "children"),
        Output(ids.field_message("output", ALL), "children"),
        Input(ids.CHECK, "data"),
    )
    def unit_messages(found):
        msgs = (found or {}).get("messages", {})
        sub = [" ".join(msgs.get(f"sub:{o['id']['name']}", [])) for o in ctx.outputs_list[0]]
        out = [" ".join(msgs.get(f"o:{o['id']['name']}", [])) for o in ctx.outputs_list[1]]
        return sub, out

    @app.callback(
        Output(ids.SAVE_DOWNLOAD, "data"),
        Input(ids.SAVE, "n_clicks"),
        State(ids.DRAFT, "data"),
        prevent_initial_call=True,
    )
    def save(_n, d):
        text, _valid = D.save_text(d)
        return dcc.send_string(text, d.get("file") or "untitled.toml", type="application/toml")
