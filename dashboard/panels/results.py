"""Results: curves, barrier fluxes, profiles, mass balance, metrics, comparison and export."""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import dash_ag_grid as dag
from dash import Input, Output, State, ctx, dcc, html, no_update
from dash.exceptions import PreventUpdate

from barrierflow.errors import BarrierflowError
from barrierflow.model import OutputUnits

from .. import figures as F
from .. import ids
from .. import view as V
from ..fitting import read_data
from ..runs import RunArchive, RunData, metric_rows_in
from ..sessions import current_id
from .common import GRAPH_CONFIG, decode_upload, graph, labelled, message_list

RESULT_GRAPHS = (ids.CONC_FIGURE, ids.FLUX_FIGURE, ids.PERMEATED_FIGURE, ids.PROFILE_FIGURE, ids.BALANCE_FIGURE)


def fetch_runs(picked: Sequence[str] | None, runs: Sequence[Mapping[str, Any]] | None,
          archive: RunArchive, sessions: Any = None) -> list[RunData]:
    """The packed runs that are ticked, in the order of the session (failed runs left out).

    A run the archive no longer holds is taken from the browser's session (``sessions``, a
    :class:`dashboard.sessions.SessionStore`) when it is kept there, else simulated again.
    """
    chosen = set(picked or [])
    kept = None
    if sessions is not None:
        sid = current_id()
        kept = (lambda rec: sessions.get_run(sid, rec["key"], rec["name"])) if sid else None
    out = []
    for r in runs or []:
        if r["id"] in chosen and not r.get("error"):
            data = archive.fetch(r, kept)
            if data is not None:
                out.append(data)
    return out


def _show(value: Any) -> str:
    """A table value as text: numbers to four significant digits, the rest as they are."""
    if value is None:
        return ""
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return format(value, ".4g")
    return str(value)


def compare_rows(runs: Sequence[RunData], reference: int = 0,
                 units: OutputUnits | None = None) -> tuple[list[dict[str, Any]], list[str]]:
    """Rows of the side-by-side metrics table, and the run names, in ``units`` (default: each
    run's scenario units).

    Each row holds ``part``, ``id``, ``metric`` (the label), ``name`` (the analysis package's
    name), ``unit``; for run i, ``v<i>`` the value shown (four significant digits) and ``f<i>``
    the full value; for every run but the reference, ``r<i>`` (shown) and ``q<i>`` (full) its
    value divided by the reference run's (empty where that is not a number).
    """
    names = [r.name for r in runs]
    table: dict[tuple[str, str, str, str], dict[str, Any]] = {}
    raw: dict[tuple[str, str, str, str], dict[int, Any]] = {}
    for i, run in enumerate(runs):
        for m in rows_in(run, units):
            k = (m["part"], m["id"], m["name"], m["unit"])
            row = table.setdefault(k, {"part": m["part"], "id": m["id"], "name": m["name"], "metric": m["metric"],
                                       "unit": m["unit"], "note": ""})
            if not row["note"] and m.get("note"):
                row["note"] = f"{run.name}: {m['note']}" if len(runs) > 1 else m["note"]
            raw.setdefault(k, {})[i] = m["value"]
    rows = []
    for k, row in table.items():
        values = raw[k]
        for i in range(len(runs)):
            v = values.get(i)
            row[f"v{i}"], row[f"f{i}"] = _show(v), "" if v is None else repr(v)
            if i != reference:
                r = ratio(v, values.get(reference))
                row[f"r{i}"], row[f"q{i}"] = _show(r), "" if r is None else repr(r)
        rows.append(row)
    return rows, names


def ratio(value: Any, reference: Any) -> float | None:
    """value / reference for two finite numbers with a reference other than 0, else None."""
    numbers = all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in (value, reference))
    if not numbers or reference == 0 or not (math.isfinite(value) and math.isfinite(reference)):
        return None
    return value / reference


def compare_columns(names: Sequence[str], reference: int = 0) -> list[dict[str, Any]]:
    """Columns of the metrics table: the metric, each run's value, the ratios to the reference.

    Values are shown to four significant digits; hovering a value shows it in full.
    """
    cols: list[dict[str, Any]] = [
        {"field": "part", "headerName": "Part", "width": 120, "pinned": "left"},
        {"field": "id", "headerName": "Id", "width": 120, "pinned": "left"},
        {"field": "metric", "headerName": "Metric", "minWidth": 230, "flex": 2, "pinned": "left",
         "tooltipField": "name"},
        {"field": "unit", "headerName": "Unit", "width": 130},
    ]
    for i, name in enumerate(names):
        label = f"{name} (reference)" if i == reference and len(names) > 1 else name
        cols.append({"field": f"v{i}", "headerName": label, "minWidth": 120, "flex": 1, "tooltipField": f"f{i}",
                     "type": "rightAligned"})
    for i, name in enumerate(names):
        if i != reference:
            cols.append({"field": f"r{i}", "headerName": f"{name} ÷ {names[reference]}", "minWidth": 140, "flex": 1,
                         "tooltipField": f"q{i}", "type": "rightAligned", "cellClass": "ratio-cell"})
    cols.append({"field": "note", "headerName": "Note", "minWidth": 200, "flex": 2, "tooltipField": "note"})
    return cols


def comparison_csv(runs: Sequence[RunData], reference: int = 0, units: OutputUnits | None = None) -> str:
    """The metrics of the runs as CSV, one row per run and metric, with the ratio to the reference
    run, in ``units`` (default: each run's scenario units)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["run", "scenario", "kind", "id", "metric", "unit", "value", "ratio_to_reference", "note"])
    ref = {(m["part"], m["id"], m["name"]): m["value"] for m in rows_in(runs[reference], units)} if runs else {}
    for run in runs:
        for m in rows_in(run, units):
            v = m["value"]
            r = ratio(v, ref.get((m["part"], m["id"], m["name"])))
            if isinstance(v, str):  # a yes/no metric as shown: a number in the file
                v = {"yes": 1, "no": 0}.get(v, v)
            text = "" if v is None else (v if isinstance(v, str) else format(float(v), ".10g"))
            w.writerow([run.name, run.scenario_name, m["part"], m["id"], m["name"], m["unit"], text,
                        "" if r is None else format(r, ".10g"), m.get("note", "")])
    return buf.getvalue()


def concentration_units(molar: bool) -> list[str]:
    """Concentration units offered (molar ones when the substance has a molar mass)."""
    return list(F.CONCENTRATION_UNITS) + (list(F.MOLAR_CONCENTRATION_UNITS) if molar else [])


@dataclass(frozen=True)
class Units:
    """The units every plot and the metrics table use, and the choices offered."""

    time: str
    concentration: str
    amount: str
    concentration_options: list[str]
    amount_options: list[str]

    @property
    def output(self) -> OutputUnits:
        """As the model's output units (areas in cm², as in the plots)."""
        return OutputUnits(time=self.time, concentration=self.concentration, amount=self.amount, area="cm^2")


def units_of(runs: Sequence[RunData], concentration: str | None, amount: str | None, time: str | None) -> Units:
    """The units chosen, or where none is chosen (or it does not apply to these runs) those of the
    first run's scenario (its ``[output]`` table), for the plots and the metrics table alike."""
    first = next((r.output_units for r in runs if r.output_units is not None), None) or OutputUnits()
    molar = bool(runs) and all(r.molar_mass for r in runs)
    conc_options = concentration_units(molar)
    if first.concentration not in conc_options and (molar or "mol" not in first.concentration):
        conc_options.append(first.concentration)
    amount_options = list(F.AMOUNT_UNITS)
    if first.amount not in amount_options and (molar or "mol" not in first.amount):
        amount_options.append(first.amount)
    conc = concentration if concentration in conc_options else (
        first.concentration if first.concentration in conc_options else "mg/L")
    amt = amount if amount in amount_options else (first.amount if first.amount in amount_options else "mg")
    return Units(time or "h", conc, amt, conc_options, amount_options)


def _toml_of(runs: Sequence[RunData]) -> str | None:
    return runs[0].toml if runs else None


def measured_data(kept: Mapping[str, Any] | None, runs: Sequence[RunData]) -> Any:
    """The measured data the page keeps (``{"name", "text"}``), read by the one reader of data
    files (molar units with the first run's molar mass), or None (none kept, or it does not read)."""
    if not kept:
        return None
    try:
        return read_data(kept["text"], kept["name"], _toml_of(runs))
    except BarrierflowError:
        return None


def measured_note(experiment: Any) -> str:
    """What is drawn of measured data, and where."""
    where = {"conc": "concentrations", "amount": "concentrations (as amounts)", "permeated": "permeated",
             "flux": "flux"}
    parts = [f"{o} ({len(experiment.of(o))} replicate{'s' if len(experiment.of(o)) != 1 else ''}) on the "
             f"{where.get(o.split(':')[0], 'plots')} plot" for o in experiment.observables]
    name = Path(experiment.source).name if experiment.source else "data"
    return f"{name}: {'; '.join(parts)}; markers over the predicted curves (a marker per replicate)."


def rows_in(run: RunData, units: OutputUnits | None) -> list[dict[str, Any]]:
    """A run's metrics rows in ``units`` (the scenario's own when None or when the run has no table)."""
    if units is None or run.metrics_table is None:
        return list(run.metrics)
    return metric_rows_in(run.metrics_table, units)


def _radio(id: str, options: Sequence[tuple[str, str]], value: str) -> dcc.RadioItems:
    # ``value`` is the saved view setting (see dashboard.view)
    return dcc.RadioItems(id=id, options=[{"label": f" {lab}", "value": v} for v, lab in options], value=value,
                          inline=True, className="radio")


def layout(view: dict[str, Any] | None = None) -> html.Div:
    """The results card's body, its controls set as in ``view`` (see :mod:`dashboard.view`)."""
    conc_tab = html.Div([
        html.Div([
            labelled("Show", _radio(ids.CONC_QUANTITY, [("concentration", "concentration"), ("amount", "amount")],
                                    V.get(view, ids.CONC_QUANTITY))),
            labelled("Panels", _radio(ids.CONC_SPLIT, [("side", "application side and body apart"),
                                                       ("one", "one plot")], V.get(view, ids.CONC_SPLIT))),
            labelled("Axis", _radio(ids.CONC_SCALE, [("auto", "auto"), ("linear", "linear"), ("log", "logarithmic")],
                                    V.get(view, ids.CONC_SCALE))),
            labelled("Compartments", dcc.Dropdown(id=ids.COMPARTMENT_PICK, options=[], multi=True,
                                                  value=V.get(view, ids.COMPARTMENT_PICK),
                                                  className="barrier-pick", placeholder="all compartments")),
        ], className="controls"),
        graph(ids.CONC_FIGURE, F.empty_figure("Run the scenario to see the curves.")),
    ])
    barrier_tab = html.Div([
        html.Div([
            labelled("Barriers", dcc.Dropdown(id=ids.BARRIER_PICK, options=[], multi=True,
                                              value=V.get(view, ids.BARRIER_PICK),
                                              className="barrier-pick", placeholder="all barriers")),
            html.Div("Amounts per cm² of barrier, in the amount unit chosen above.", className="fine-print"),
        ], className="controls"),
        html.Div([graph(ids.FLUX_FIGURE, F.empty_figure("Run the scenario to see the flux.")),
                  graph(ids.PERMEATED_FIGURE, F.empty_figure("Run the scenario to see the permeated amount."))],
                 className="two-plots"),
    ])
    profile_tab = html.Div([
        html.Div([
            labelled("Barrier", dcc.Dropdown(id=ids.PROFILE_BARRIER, options=[], clearable=False,
                                             value=V.get(view, ids.PROFILE_BARRIER),
                                             className="barrier-one")),
            labelled("Steady profile", dcc.Checklist(id=ids.PROFILE_STEADY, value=V.get(view, ids.PROFILE_STEADY),
                                                     className="radio",
                                                     options=[{"label": " draw it too (dotted)", "value": "on"}])),
            html.Div([html.Button("▶ Play", id=ids.PROFILE_PLAY, className="btn"),
                      dcc.Interval(id=ids.PROFILE_TICK, interval=180, disabled=True)], className="play-box"),
        ], className="controls"),
        html.Div([
            html.Label("Time of the profile (saved output time)", htmlFor=ids.PROFILE_SLIDER, className="field-label"),
            html.Div(dcc.Slider(id=ids.PROFILE_SLIDER, min=0, max=1, step=1, value=0, marks=None,
                                updatemode="drag", allow_direct_input=False), className="slider-box"),
            html.Div(id=ids.PROFILE_TIME, className="profile-time", role="status"),
        ], className="slider-row"),
        graph(ids.PROFILE_FIGURE, F.empty_figure("Run a scenario with a barrier to see its profile.")),
    ])
    balance_tab = html.Div([
        html.Div([
            html.Div("Each ticked run in its own panel (up to four), on one amount axis, in the amount unit chosen "
                     "above.", className="fine-print"),
        ], className="controls"),
        graph(ids.BALANCE_FIGURE, F.empty_figure("Run the scenario to see where the dose goes.")),
    ])
    metrics_tab = html.Div([
        html.Div([
            labelled("Find a metric", dcc.Input(id=ids.METRICS_FILTER, type="search", debounce=False,
                                                placeholder="e.g. Cmax, lag, skin", className="field-input")),
            html.Div("Metrics of each ticked run, side by side, in the units chosen above (the same as the "
                     "plots); with two or more runs, the ratio of each to the reference run (chosen in the run "
                     "panel).", className="fine-print"),
        ], className="controls"),
        dag.AgGrid(id=ids.METRICS_GRID, columnDefs=compare_columns([]), rowData=[],
                   defaultColDef={"resizable": True, "sortable": True, "filter": True},
                   dashGridOptions={"domLayout": "normal", "tooltipShowDelay": 200},
                   className="metrics-grid", style={"height": "420px", "width": "100%"}),
        html.Div(id=ids.WARNINGS, className="warnings", role="status"),
    ])
    time_row = html.Div([
        html.Span("Units of every plot and of the metrics table:", className="toolbar-label strong"),
        labelled("Time", _radio(ids.TIME_UNIT, [("h", "hours"), ("min", "minutes"), ("d", "days")],
                                V.get(view, ids.TIME_UNIT))),
        labelled("Concentration", dcc.Dropdown(id=ids.CONC_UNIT, options=list(F.CONCENTRATION_UNITS),
                                               value=V.get(view, ids.CONC_UNIT), clearable=False,
                                               placeholder="as the scenario", className="unit-pick")),
        labelled("Amount", dcc.Dropdown(id=ids.AMOUNT_UNIT, options=list(F.AMOUNT_UNITS),
                                        value=V.get(view, ids.AMOUNT_UNIT), clearable=False,
                                        placeholder="as the scenario", className="unit-pick")),
    ], className="controls units-row")
    tabs = dcc.Tabs(id=ids.RESULT_TABS, value=V.get(view, ids.RESULT_TABS), children=[
        dcc.Tab(label="Concentrations", value="conc", children=conc_tab),
        dcc.Tab(label="Barriers: flux and permeated", value="barrier", children=barrier_tab),
        dcc.Tab(label="Profile through a barrier", value="profile", children=profile_tab),
        dcc.Tab(label="Mass balance", value="balance", children=balance_tab),
        dcc.Tab(label="Metrics and comparison", value="metrics", children=metrics_tab),
    ], className="result-tabs")
    export = html.Div([
        html.Span("Export", className="toolbar-label strong"),
        dcc.Dropdown(id=ids.EXPORT_RUN, options=[], clearable=False, className="run-one", placeholder="run"),
        html.Button("Traces CSV", id=ids.EXPORT_CSV, className="btn"),
        html.Button("Sidecar JSON", id=ids.EXPORT_SIDECAR, className="btn"),
        html.Button("Metrics CSV", id=ids.EXPORT_METRICS, className="btn"),
        html.Button("Comparison CSV (ticked runs)", id=ids.EXPORT_COMPARISON, className="btn"),
        html.Span("Plot images:", className="toolbar-label"),
        _radio(ids.IMAGE_FORMAT, [("png", "PNG"), ("svg", "SVG")], V.get(view, ids.IMAGE_FORMAT)),
        html.Span("(camera button at the top right of each plot)", className="fine-print"),
        dcc.Download(id=ids.EXPORT_DOWNLOAD),
    ], className="toolbar export-bar")
    measured_row = html.Div([
        html.Span("Measured data", className="toolbar-label strong"),
        dcc.Upload(id=ids.MEASURED_UPLOAD, accept=".csv,text/csv,text/plain", multiple=False, className="upload",
                   children=html.Button("Drop or choose a data file (CSV)…", className="btn", tabIndex=-1)),
        html.Button("Remove", id=ids.MEASURED_CLEAR, className="btn small"),
        html.Span(id=ids.MEASURED_NOTE, className="fine-print", role="status"),
    ], className="toolbar measured-row",
        title="a data file as barrierflow fit reads it: a time column, then columns named like the traces with a "
              "replicate tag, such as 'permeated:skin#1 [ug/cm^2]'; shown as markers over the curves")
    return html.Div([time_row, measured_row, tabs, export])


def register(app: Any, services: Any) -> None:
    """Attach the results panel's callbacks."""
    archive = services.archive

    def fetch(picked, runs):
        return fetch_runs(picked, runs, archive, services.sessions)

    # Each plot's callback also sets its own pickers (unit, compartments, barrier), so that a
    # new run reaches every plot in one step after the run list (no chain of callbacks).
    @app.callback(
        Output(ids.BARRIER_PICK, "options"),
        Output(ids.EXPORT_RUN, "options"),
        Output(ids.EXPORT_RUN, "value"),
        Input(ids.RUN_PICK, "value"),
        State(ids.RUNS, "data"),
    )
    def choices(picked, runs):
        bids: list[str] = []
        for r in fetch(picked, runs):
            bids += [b for b in r.barriers if b not in bids]
        values = [r["id"] for r in runs or [] if r["id"] in set(picked or [])]
        all_opts = [{"label": r["name"], "value": r["id"]} for r in runs or [] if not r.get("error")]
        latest = values[-1] if values else (all_opts[-1]["value"] if all_opts else None)
        return bids, all_opts, latest

    @app.callback(
        Output(ids.CONC_FIGURE, "figure"),
        Output(ids.CONC_UNIT, "options"),
        Output(ids.CONC_UNIT, "value"),
        Output(ids.AMOUNT_UNIT, "options"),
        Output(ids.AMOUNT_UNIT, "value"),
        Output(ids.COMPARTMENT_PICK, "options"),
        Input(ids.RUN_PICK, "value"),
        Input(ids.CONC_QUANTITY, "value"),
        Input(ids.CONC_UNIT, "value"),
        Input(ids.AMOUNT_UNIT, "value"),
        Input(ids.CONC_SCALE, "value"),
        Input(ids.CONC_SPLIT, "value"),
        Input(ids.TIME_UNIT, "value"),
        Input(ids.COMPARTMENT_PICK, "value"),
        Input(ids.MEASURED, "data"),
        State(ids.RUNS, "data"),
    )
    def concentrations(picked, quantity, conc_unit, amount_unit, scale, split, time_unit, cids, measured, runs):
        data = fetch(picked, runs)
        u = units_of(data, conc_unit, amount_unit, time_unit)
        options: list[str] = []
        for r in data:
            options += [c for c in r.compartments if c not in options]
        cids = [c for c in cids or [] if c in options] or None
        figure = F.concentration_figure(data, compartments=cids, quantity=quantity,
                                        unit=u.amount if quantity == "amount" else u.concentration,
                                        time_unit=u.time, scale=scale or "auto", split=split != "one",
                                        measured=measured_data(measured, data))
        return (figure, u.concentration_options, u.concentration if data else conc_unit, u.amount_options,
                u.amount if data else amount_unit, options)

    @app.callback(
        Output(ids.FLUX_FIGURE, "figure"),
        Output(ids.PERMEATED_FIGURE, "figure"),
        Input(ids.RUN_PICK, "value"),
        Input(ids.BARRIER_PICK, "value"),
        Input(ids.AMOUNT_UNIT, "value"),
        Input(ids.TIME_UNIT, "value"),
        Input(ids.MEASURED, "data"),
        State(ids.RUNS, "data"),
    )
    def barriers(picked, bids, amount_unit, time_unit, measured, runs):
        data = fetch(picked, runs)
        u = units_of(data, None, amount_unit, time_unit)
        chosen = bids or None
        experiment = measured_data(measured, data)
        return (F.flux_figure(data, barriers=chosen, amount_unit=u.amount, time_unit=u.time, measured=experiment),
                F.permeated_figure(data, barriers=chosen, amount_unit=u.amount, time_unit=u.time, measured=experiment))

    @app.callback(
        Output(ids.MEASURED, "data"),
        Output(ids.MEASURED_NOTE, "children"),
        Input(ids.MEASURED_UPLOAD, "contents"),
        Input(ids.MEASURED_CLEAR, "n_clicks"),
        State(ids.MEASURED_UPLOAD, "filename"),
        State(ids.RUN_PICK, "value"),
        State(ids.RUNS, "data"),
        State(ids.MEASURED, "data"),
    )
    def measured(contents, _clear, filename, picked, runs, current):
        # the initial call shows what the page kept; an upload replaces it; Remove drops it
        if ctx.triggered_id == ids.MEASURED_CLEAR:
            return None, ""
        if ctx.triggered_id == ids.MEASURED_UPLOAD and contents:
            try:
                name, raw = decode_upload(contents, filename, services.max_upload)
                text = raw.decode("utf-8")
            except (ValueError, UnicodeDecodeError) as err:
                return no_update, html.Span(str(err) if isinstance(err, ValueError) else
                                            f"{filename}: file: got bytes that are not UTF-8; expected a CSV data "
                                            "file", className="bad")
            kept = {"name": name, "text": text}
        else:
            kept = current
        if not kept:
            return no_update if current is None else None, ""
        try:
            experiment = read_data(kept["text"], kept["name"], _toml_of(fetch(picked, runs)))
        except BarrierflowError as err:
            problems = getattr(err, "problems", None) or [err]
            return (no_update if kept is not current else None,
                    [html.Span(f"{kept['name']} was not read: ", className="bad"),
                     message_list([str(p) for p in problems])])
        return kept, measured_note(experiment)


    @app.callback(
        Output(ids.PROFILE_BARRIER, "options"),
        Output(ids.PROFILE_BARRIER, "value"),
        Output(ids.PROFILE_SLIDER, "max"),
        Output(ids.PROFILE_SLIDER, "marks"),
        Output(ids.PROFILE_SLIDER, "value"),
        Input(ids.PROFILE_BARRIER, "value"),
        Input(ids.RUN_PICK, "value"),
        Input(ids.TIME_UNIT, "value"),
        State(ids.RUNS, "data"),
        State(ids.PROFILE_SLIDER, "value"),
        State(ids.PROFILE_SLIDER, "max"),
    )
    def slider(barrier, picked, time_unit, runs, value, old_max):
        runs_data = fetch(picked, runs)
        bids: list[str] = []
        for r in runs_data:
            bids += [b for b in r.barriers if b not in bids]
        barrier = barrier if barrier in bids else (bids[0] if bids else None)
        data = [r for r in runs_data if barrier in r.barriers]
        if not data:
            return bids, barrier, 1, None, 0
        from barrierflow.units import unit_factor

        times = data[0].barriers[barrier].profile_times
        n = len(times) - 1
        ft = unit_factor("time", time_unit)
        marks = {str(int(i)): f"{times[int(i)] * ft:.3g} {time_unit}"
                 for i in sorted({round(n * f) for f in (0, 0.25, 0.5, 0.75, 1.0)})}
        if value is None or old_max != n:
            value = n // 2 if ctx.triggered_id != ids.TIME_UNIT else value
        return bids, barrier, max(n, 1), marks, min(value or 0, n)

    @app.callback(
        Output(ids.PROFILE_FIGURE, "figure"),
        Output(ids.PROFILE_TIME, "children"),
        Input(ids.PROFILE_SLIDER, "value"),
        Input(ids.PROFILE_BARRIER, "value"),
        Input(ids.PROFILE_STEADY, "value"),
        Input(ids.TIME_UNIT, "value"),
        Input(ids.CONC_UNIT, "value"),
        State(ids.RUN_PICK, "value"),
        State(ids.RUNS, "data"),
    )
    def profile(index, barrier, steady_on, time_unit, conc_unit, picked, runs):
        data = [r for r in fetch(picked, runs) if barrier in r.barriers]
        if not data:
            return F.empty_figure("Run a scenario with a barrier to see its profile."), ""
        from barrierflow.units import unit_factor

        times = data[0].barriers[barrier].profile_times
        k = min(int(index or 0), len(times) - 1)
        t = float(times[k])
        steady = None
        if steady_on:
            steady = _steady_of(data[0], barrier)
        ft = unit_factor("time", time_unit)
        u = units_of(data, conc_unit, None, time_unit)
        return (F.profile_figure(data, barrier, t, unit=u.concentration, time_unit=time_unit, steady=steady),
                f"t = {t * ft:.4g} {time_unit} (saved time {k + 1} of {len(times)})")

    app.clientside_callback(
        """
        function(n, value, max) {
            if (value === null || value === undefined) { return 0; }
            return value >= max ? 0 : value + 1;
        }
        """,
        Output(ids.PROFILE_SLIDER, "value", allow_duplicate=True),
        Input(ids.PROFILE_TICK, "n_intervals"),
        State(ids.PROFILE_SLIDER, "value"),
        State(ids.PROFILE_SLIDER, "max"),
        prevent_initial_call=True,
    )

    @app.callback(
        Output(ids.PROFILE_TICK, "disabled"),
        Output(ids.PROFILE_PLAY, "children"),
        Input(ids.PROFILE_PLAY, "n_clicks"),
        State(ids.PROFILE_TICK, "disabled"),
        prevent_initial_call=True,
    )
    def play(_n, disabled):
        return (False, "⏸ Pause") if disabled else (True, "▶ Play")

    @app.callback(
        Output(ids.BALANCE_FIGURE, "figure"),
        Input(ids.RUN_PICK, "value"),
        Input(ids.AMOUNT_UNIT, "value"),
        Input(ids.TIME_UNIT, "value"),
        State(ids.RUNS, "data"),
    )
    def balance(picked, amount_unit, time_unit, runs):
        data = fetch(picked, runs)
        u = units_of(data, None, amount_unit, time_unit)
        return F.balance_figure(data, amount_unit=u.amount, time_unit=u.time)

    @app.callback(
        Output(ids.METRICS_GRID, "rowData"),
        Output(ids.METRICS_GRID, "columnDefs"),
        Output(ids.WARNINGS, "children"),
        Input(ids.RUN_PICK, "value"),
        Input(ids.REFERENCE, "value"),
        Input(ids.TIME_UNIT, "value"),
        Input(ids.CONC_UNIT, "value"),
        Input(ids.AMOUNT_UNIT, "value"),
        State(ids.RUNS, "data"),
    )
    def metrics(picked, reference, time_unit, conc_unit, amount_unit, runs):
        data = fetch(picked, runs)
        order = [r["id"] for r in runs or [] if r["id"] in set(picked or []) and not r.get("error")]
        ref = order.index(reference) if reference in order else 0
        rows, names = compare_rows(data, ref, units_of(data, conc_unit, amount_unit, time_unit).output)
        notes = []
        for r in data:
            for w in r.warnings:
                notes.append(html.Li(f"{r.name}: {w}"))
            mb = r.mass_balance
            notes.append(html.Li(f"{r.name}: mass balance error {mb.get('absolute_error', float('nan')):.3g} mg "
                                 f"({mb.get('relative_error', float('nan')):.2g} relative)", className="fine"))
        return rows, compare_columns(names, ref), html.Ul(notes) if notes else ""

    @app.callback(
        Output(ids.METRICS_GRID, "dashGridOptions"),
        Input(ids.METRICS_FILTER, "value"),
        State(ids.METRICS_GRID, "dashGridOptions"),
        prevent_initial_call=True,
    )
    def find_metric(text, options):
        return {**(options or {}), "quickFilterText": text or ""}

    @app.callback(
        Output(ids.EXPORT_DOWNLOAD, "data"),
        Input(ids.EXPORT_CSV, "n_clicks"),
        Input(ids.EXPORT_SIDECAR, "n_clicks"),
        Input(ids.EXPORT_METRICS, "n_clicks"),
        Input(ids.EXPORT_COMPARISON, "n_clicks"),
        State(ids.EXPORT_RUN, "value"),
        State(ids.RUN_PICK, "value"),
        State(ids.REFERENCE, "value"),
        State(ids.RUNS, "data"),
        State(ids.TIME_UNIT, "value"),
        State(ids.CONC_UNIT, "value"),
        State(ids.AMOUNT_UNIT, "value"),
        prevent_initial_call=True,
    )
    def export(_csv, _side, _met, _cmp, run_id, picked, reference, runs, time_unit, conc_unit, amount_unit):
        trigger = ctx.triggered_id
        if trigger == ids.EXPORT_COMPARISON:
            data = fetch(picked, runs)
            if not data:
                raise PreventUpdate
            order = [r["id"] for r in runs or [] if r["id"] in set(picked or []) and not r.get("error")]
            ref = order.index(reference) if reference in order else 0
            units = units_of(data, conc_unit, amount_unit, time_unit).output
            return dcc.send_string(comparison_csv(data, ref, units), "comparison.csv", type="text/csv")
        record = next((r for r in runs or [] if r["id"] == run_id), None)
        if record is None:
            raise PreventUpdate
        data = fetch_runs([record["id"]], [record], archive, services.sessions)
        if not data:
            raise PreventUpdate
        data = data[0]
        stem = (record.get("file") or "barrierflow-run").removesuffix(".toml")
        if trigger == ids.EXPORT_METRICS:
            if not data.metrics_csv:
                raise PreventUpdate
            return dcc.send_string(data.metrics_csv, f"{stem}-metrics.csv", type="text/csv")
        files = archive.exports(record)
        if trigger == ids.EXPORT_CSV:
            return dcc.send_string(files.csv, f"{stem}.csv", type="text/csv")
        return dcc.send_string(files.sidecar, f"{stem}.json", type="application/json")

    @app.callback(
        [Output(g, "config") for g in RESULT_GRAPHS],
        Input(ids.IMAGE_FORMAT, "value"),
    )
    def image_format(fmt):
        config = dict(GRAPH_CONFIG, toImageButtonOptions={"format": fmt, "scale": 2 if fmt == "png" else 1})
        return [config] * len(RESULT_GRAPHS)


def _steady_of(run: RunData, barrier: str) -> Any:
    """The steady state of a barrier of a run (None when not available)."""
    return run.steady.get(barrier)
