"""Fit to data: upload a lab's replicate data, see it over the open scenario, fit, adopt the values.

The data file is the one ``barrierflow fit`` reads (see :mod:`barrierflow.io.experiment`); the
fit is :func:`barrierflow.fit`, run in a worker process from a background callback (with a
progress bar and a cancel button); the figures and the packing are in :mod:`dashboard.fitting`.
"Adopt" writes the estimates into the draft at the fields their paths name, so the editor, the
checks and the next run see them at once.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

from dash import Input, Output, State, ctx, dcc, html, no_update
from dash.exceptions import PreventUpdate

from barrierflow.errors import BarrierflowError, DataError, SolverError

from .. import draft as D
from .. import ids
from ..fitting import (
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
from ..jobs import Cancelled, WorkerFailed
from .common import graph, labelled, message_list
from .scenario import decode_upload

WEIGHT_OPTIONS = [
    {"label": "none (equal weights)", "value": "none"},
    {"label": "1/y", "value": "1/y"},
    {"label": "1/y² (constant relative error)", "value": "1/y^2"},
    {"label": "replicate variance at each time", "value": "replicate"},
]


def layout(examples: dict[str, str] | None = None) -> html.Div:
    """The fit card's body."""
    examples = example_data() if examples is None else examples
    return html.Div([
        html.Div([
            dcc.Upload(id=ids.FIT_UPLOAD, children=html.Button("Upload data CSV…", className="btn", tabIndex=-1),
                       accept=".csv,text/csv", multiple=False),
            dcc.Dropdown(id=ids.FIT_EXAMPLE, options=[{"label": v, "value": k} for k, v in examples.items()],
                         value=next(iter(examples), None), clearable=False, className="fit-example",
                         placeholder="example data"),
            html.Button("Open example data", id=ids.FIT_OPEN_EXAMPLE, className="btn"),
        ], className="toolbar"),
        html.Div("A CSV with a 'time [h]' column and one column per replicate, named like the traces: "
                 "'permeated:<barrier>#1 [ug/cm^2]' or 'conc:<compartment>#2 [ug/mL]'. Blank cells are missing "
                 "values. The example data are invented.", className="fine-print"),
        html.Div(id=ids.FIT_DATA_NOTE, className="fit-data-note", role="status"),
        html.Div([
            labelled("Parameters to estimate",
                     dcc.Dropdown(id=ids.FIT_FREE, options=[], value=[], multi=True, className="fit-free",
                                  placeholder="choose parameters of the open scenario")),
            labelled("Bounds (optional)",
                     dcc.Textarea(id=ids.FIT_BOUNDS, value="", className="fit-bounds", rows=2,
                                  placeholder="barrier.membrane.layer.1.partition=1:100"),
                     hint="one PATH=LO:HI a line, in the scenario file's unit or with a unit"),
            labelled("Weights", dcc.Dropdown(id=ids.FIT_WEIGHTS, options=WEIGHT_OPTIONS, value="1/y^2",
                                             clearable=False, className="fit-weights")),
            labelled("Also", dcc.Checklist(id=ids.FIT_OPTIONS,
                                           options=[{"label": " profile-likelihood intervals", "value": "profile"},
                                                    {"label": " each replicate alone", "value": "replicates"}],
                                           value=["profile", "replicates"], className="fit-options")),
            labelled("Posterior (MCMC steps)", dcc.Input(id=ids.FIT_MCMC, type="number", min=0, step=100, value=0,
                                                         className="field-input fit-mcmc"),
                     hint="0: none; 1000 to 2000 for a posterior-predictive band"),
        ], className="fit-settings"),
        html.Div([
            html.Button("Fit", id=ids.FIT_RUN, className="btn primary big"),
            html.Button("Cancel", id=ids.FIT_CANCEL, className="btn", disabled=True),
            html.Progress(id=ids.FIT_PROGRESS, value="0", max="100", className="progress"),
        ], className="run-buttons"),
        html.Div(id=ids.FIT_STATUS, className="run-status", role="status"),
        html.Div([
            labelled("Observable", dcc.Dropdown(id=ids.FIT_OBSERVABLE, options=[], value=None, clearable=False,
                                                className="fit-observable")),
        ], className="fit-observable-row"),
        graph(ids.FIT_FIGURE, fit_figure(None, None, None, None)),
        graph(ids.FIT_RESIDUALS, residual_figure(None, None)),
        html.Div(id=ids.FIT_TABLE, className="fit-table"),
        html.Div(id=ids.FIT_WARNINGS, className="fit-warnings", role="alert"),
        html.Div([
            html.Button("Adopt the fitted values into the scenario", id=ids.FIT_ADOPT, className="btn primary",
                        disabled=True),
            html.Button("Report (JSON)", id=ids.FIT_EXPORT_REPORT, className="btn small", disabled=True),
            html.Button("Fitted scenario (TOML)", id=ids.FIT_EXPORT_TOML, className="btn small", disabled=True),
            html.Button("Observed vs predicted (CSV)", id=ids.FIT_EXPORT_RESIDUALS, className="btn small",
                        disabled=True),
        ], className="toolbar"),
        html.Div(id=ids.FIT_ADOPT_NOTE, className="run-status", role="status"),
        dcc.Download(id=ids.FIT_DOWNLOAD),
        dcc.Store(id=ids.FIT_DATA),
        dcc.Store(id=ids.FIT_PREVIEW),
        dcc.Store(id=ids.FIT_RESULT),
    ], className="fit-panel")


def free_list(chosen: list[str] | None, bounds_text: str | None) -> list[str]:
    """The ``--free`` texts: each chosen path, with its bounds line when one is given; bounds lines of
    paths not chosen free those too."""
    lines = [ln.strip() for ln in (bounds_text or "").splitlines() if ln.strip()]
    by_path = {ln.partition("=")[0].strip(): ln for ln in lines}
    out = [by_path.pop(p, p) for p in (chosen or [])]
    return out + list(by_path.values())


def parameter_table(fitted: dict[str, Any]) -> Any:
    """The estimates as a table: value, SE, CV, both intervals, the time-lag value, replicates."""
    params = fitted["report"]["parameters"]

    def g(v: Any) -> str:
        return "" if v is None else f"{v:.4g}"

    head = ["parameter", "estimate", "unit", "SE", "CV", "95 % CI (Jacobian)", "95 % CI (profile)", "time-lag",
            "replicates: mean ± SD (CV)"]
    rows = []
    for path, p in params.items():
        ci = p.get("ci95")
        pci = p.get("profile_ci95")
        reps = p.get("replicates")
        rows.append(html.Tr([
            html.Td(path, className="mono"), html.Td(g(p["estimate"])), html.Td(p["unit"] or "-"), html.Td(g(p["se"])),
            html.Td(f"{100 * p['cv']:.3g} %" if p.get("cv") is not None else ""),
            html.Td(f"{g(ci[0])} to {g(ci[1])}" if ci else ""),
            html.Td(f"{g(pci[0]) or 'open'} to {g(pci[1]) or 'open'}" if pci else ""),
            html.Td(g(p.get("time_lag"))),
            html.Td(f"{g(reps['mean'])} ± {g(reps['sd'])} ({100 * reps['cv']:.3g} %)"
                    if reps and reps.get("sd") is not None and reps.get("cv") is not None else ""),
        ]))
    r = fitted["report"]
    summary = (f"{'Converged' if r['converged'] else 'Did not converge'} ({r['message']}); {r['n_observations']} "
               f"values, weights {r['weights']}; weighted RSS {r['weighted_rss']:.4g}, R² {r['r_squared']:.4f}, "
               f"AIC {r['aic']:.2f}, BIC {r['bic']:.2f}.")
    return html.Div([
        html.Table([html.Thead(html.Tr([html.Th(h) for h in head])), html.Tbody(rows)], className="data-table"),
        html.Div(summary, className="fine-print"),
    ])


def register(app: Any, services: Any) -> None:
    """Attach the fit panel's callbacks."""
    limit = services.max_upload

    @app.callback(
        Output(ids.FIT_DATA, "data"),
        Output(ids.FIT_DATA_NOTE, "children"),
        Output(ids.FIT_UPLOAD, "contents"),
        Input(ids.FIT_UPLOAD, "contents"),
        Input(ids.FIT_OPEN_EXAMPLE, "n_clicks"),
        State(ids.FIT_UPLOAD, "filename"),
        State(ids.FIT_EXAMPLE, "value"),
        State(ids.VALID, "data"),
        prevent_initial_call=True,
    )
    def take_data(contents, _n, filename, example, valid):
        if ctx.triggered_id == ids.FIT_OPEN_EXAMPLE:
            if not example:
                raise PreventUpdate
            name, text = Path(example).name, Path(example).read_text(encoding="utf-8")
        else:
            if not contents:
                raise PreventUpdate
            try:
                name, raw = decode_upload(contents, filename or "data.csv", limit)
                text = raw.decode("utf-8-sig")
            except ValueError as err:
                return no_update, html.Span(str(err), className="bad"), None
        try:
            e = read_data(text, name, (valid or {}).get("toml"))
        except DataError as err:
            return no_update, [html.Span(f"{name} was not read:", className="bad"),
                               message_list([str(p) for p in err.problems])], None
        return {"name": name, "text": text}, html.Span(data_summary(e), className="good"), None

    @app.callback(
        Output(ids.FIT_FREE, "options"),
        Output(ids.FIT_FREE, "value"),
        Output(ids.FIT_OBSERVABLE, "options"),
        Output(ids.FIT_OBSERVABLE, "value"),
        Input(ids.VALID, "data"),
        Input(ids.FIT_DATA, "data"),
        State(ids.FIT_FREE, "value"),
        State(ids.FIT_OBSERVABLE, "value"),
    )
    def choices(valid, data, chosen, observable):
        toml = (valid or {}).get("toml")
        e = _experiment(data, toml)
        obs = list(e.observables) if e is not None else []
        obs_value = observable if observable in obs else (obs[0] if obs else None)
        if not toml:
            return [], [], obs, obs_value
        options = free_options(toml)
        known = {o["value"] for o in options}
        keep = [c for c in (chosen or []) if c in known]
        if not keep:
            keep = [p for p in default_free(toml, e) if p in known]
        return options, keep, obs, obs_value

    @app.callback(
        Output(ids.FIT_PREVIEW, "data"),
        Input(ids.FIT_DATA, "data"),
        Input(ids.VALID, "data"),
    )
    def before(data, valid):
        toml = (valid or {}).get("toml")
        if not data or not toml:
            return None
        try:
            return services.workers.call(preview, toml, data["text"], data["name"])
        except (BarrierflowError, WorkerFailed, Cancelled):
            return None

    @app.callback(
        Output(ids.FIT_FIGURE, "figure"),
        Output(ids.FIT_RESIDUALS, "figure"),
        Input(ids.FIT_DATA, "data"),
        Input(ids.FIT_PREVIEW, "data"),
        Input(ids.FIT_RESULT, "data"),
        Input(ids.FIT_OBSERVABLE, "value"),
        State(ids.VALID, "data"),
    )
    def figures(data, before_curves, fitted, observable, valid):
        toml = (valid or {}).get("toml")
        e = _experiment(data, toml)
        mm = _molar_mass(toml)
        return fit_figure(e, observable, before_curves, fitted, mm), residual_figure(fitted, observable)

    @app.callback(
        Output(ids.FIT_RESULT, "data"),
        Output(ids.FIT_STATUS, "children"),
        Input(ids.FIT_RUN, "n_clicks"),
        State(ids.VALID, "data"),
        State(ids.FIT_DATA, "data"),
        State(ids.FIT_FREE, "value"),
        State(ids.FIT_BOUNDS, "value"),
        State(ids.FIT_WEIGHTS, "value"),
        State(ids.FIT_OPTIONS, "value"),
        State(ids.FIT_MCMC, "value"),
        State(ids.PAGE, "data"),  # part of the job key: two pages never share a job
        background=True,
        manager=services.manager,
        progress=[Output(ids.FIT_PROGRESS, "value")],
        progress_default=["0"],
        running=[
            (Output(ids.FIT_RUN, "disabled"), True, False),
            (Output(ids.FIT_CANCEL, "disabled"), False, True),
            (Output(ids.FIT_PROGRESS, "className"), "progress running", "progress"),
        ],
        cancel=[Input(ids.FIT_CANCEL, "n_clicks")],
        interval=services.poll_ms,
        prevent_initial_call=True,
    )
    def run_fit(set_progress, _n, valid, data, chosen, bounds, weights, options, mcmc, _page):
        toml = (valid or {}).get("toml")
        if not toml:
            return no_update, html.Span("The scenario has never been valid: fix its problems first.", className="bad")
        if not data:
            return no_update, html.Span("Upload a data file (or open the example data) first.", className="bad")
        free = free_list(chosen, bounds)
        if not free:
            return no_update, html.Span("Choose at least one parameter to estimate.", className="bad")
        last = [0.0]

        def progress(fraction: float) -> None:
            now = time.perf_counter()
            if now - last[0] > 0.2 or fraction >= 1.0:
                last[0] = now
                set_progress([f"{100 * fraction:.0f}"])

        options = options or []
        started = time.perf_counter()
        try:
            packed = services.workers.call(
                execute_fit, toml, valid.get("file"), data["text"], data["name"], free, weights or "none",
                "profile" in options, "replicates" in options, int(mcmc or 0), progress=progress)
        except SolverError as err:
            return no_update, html.Span(f"The model could not be run: {err}", className="bad")
        except BarrierflowError as err:
            problems = [str(p) for p in getattr(err, "problems", ())] or [str(err)]
            return no_update, [html.Span("The fit was refused:", className="bad"), message_list(problems)]
        except WorkerFailed as err:
            return no_update, html.Span(str(err), className="bad")
        took = time.perf_counter() - started
        r = packed["report"]
        cls = "good" if r["converged"] else "warn"
        return packed, html.Span(f"Fitted {len(packed['estimates'])} parameter(s) to {packed['data']} in {took:.2f} s "
                                 f"({r['evaluations']} runs of the model).", className=cls)

    @app.callback(
        Output(ids.FIT_STATUS, "children", allow_duplicate=True),
        Input(ids.FIT_CANCEL, "n_clicks"),
        prevent_initial_call=True,
    )
    def cancelled(_n):
        return html.Span("The fit was cancelled.", className="warn")

    @app.callback(
        Output(ids.FIT_TABLE, "children"),
        Output(ids.FIT_WARNINGS, "children"),
        Output(ids.FIT_ADOPT, "disabled"),
        Output(ids.FIT_EXPORT_REPORT, "disabled"),
        Output(ids.FIT_EXPORT_TOML, "disabled"),
        Output(ids.FIT_EXPORT_RESIDUALS, "disabled"),
        Input(ids.FIT_RESULT, "data"),
    )
    def show(fitted):
        if not fitted:
            return "", "", True, True, True, True
        warnings = fitted["report"]["warnings"]
        shown = [html.Div("Warnings", className="problems-head"), message_list(warnings)] if warnings else ""
        return parameter_table(fitted), shown, False, False, False, False

    @app.callback(
        Output(ids.DRAFT, "data", allow_duplicate=True),
        Output(ids.LOADED, "data", allow_duplicate=True),
        Output(ids.FIT_ADOPT_NOTE, "children"),
        Input(ids.FIT_ADOPT, "n_clicks"),
        State(ids.FIT_RESULT, "data"),
        State(ids.DRAFT, "data"),
        prevent_initial_call=True,
    )
    def adopt(n, fitted, d):
        if not fitted or not d:
            raise PreventUpdate
        try:
            new, note = adopt_estimates(d, fitted)
        except KeyError as err:
            return no_update, no_update, html.Span(f"Not adopted: {err.args[0]} (the open scenario is not the one "
                                                   "that was fitted).", className="bad")
        return new, {"gen": new["gen"], "adopted": n}, html.Span(note, className="good")

    @app.callback(
        Output(ids.FIT_DOWNLOAD, "data"),
        Input(ids.FIT_EXPORT_REPORT, "n_clicks"),
        Input(ids.FIT_EXPORT_TOML, "n_clicks"),
        Input(ids.FIT_EXPORT_RESIDUALS, "n_clicks"),
        State(ids.FIT_RESULT, "data"),
        State(ids.DRAFT, "data"),
        prevent_initial_call=True,
    )
    def export(_a, _b, _c, fitted, d):
        if not fitted:
            raise PreventUpdate
        import json

        stem = Path((d or {}).get("file") or "scenario.toml").stem
        if ctx.triggered_id == ids.FIT_EXPORT_REPORT:
            return dcc.send_string(json.dumps(fitted["report"], indent=2, allow_nan=False) + "\n",
                                   f"{stem}-fit-report.json")
        if ctx.triggered_id == ids.FIT_EXPORT_TOML:
            return dcc.send_string(fitted["fitted_toml"], f"{stem}-fitted.toml")
        return dcc.send_string(fitted["residuals_csv"], f"{stem}-observed-vs-predicted.csv")


def adopt_estimates(d: dict[str, Any], fitted: dict[str, Any]) -> tuple[dict[str, Any], str]:
    """The draft with the fitted values written at their fields (6 significant digits, the file's units).

    Raises
    ------
    KeyError
        When the draft has no field at an estimate's path.
    """
    new = d
    for est in fitted["estimates"]:
        new = D.set_at_path(new, est["path"], est["text"])
    shown = "; ".join(f"{e['label']} = {e['text']}" for e in fitted["estimates"])
    return new, f"Adopted into the open scenario: {shown}. Run it to see the fitted model."


def _experiment(data: dict[str, Any] | None, toml: str | None):
    if not data:
        return None
    try:
        return read_data(data["text"], data["name"], toml)
    except DataError:
        return None


def _molar_mass(toml: str | None) -> float | None:
    if not toml:
        return None
    import barrierflow

    try:
        return barrierflow.loads(toml).substance.molar_mass
    except BarrierflowError:
        return None
