"""Variability: give parameters a spread, run N subjects, see the bands, the distributions and the drivers.

The researcher picks parameters from the path list of the last valid scenario (the same
vocabulary as ``[[vary]]`` and ``--vary``), gives each a distribution (log-normal or normal by
its CV, uniform by its range) and runs N subjects in the background, with progress. The worker
runs :func:`barrierflow.studies.run_population` (5th, 50th and 95th percentiles) and, with two
or more parameters, :func:`barrierflow.studies.sobol_indices` (N = 128 base samples) on the
same distributions; the page shows the band of a trace over time, the histogram of a metric
over the subjects and the parameters ranked by their total Sobol index for a metric (bootstrap
intervals as error bars). The packed result is kept in the server's run archive; the page
keeps only its key.

Below, a what-if sweep: one or two parameters over a range (linear or log steps) run by
:func:`barrierflow.studies.run_sweep`, with a metric drawn as a line (one parameter) or a
heatmap (two).
"""

from __future__ import annotations

import hashlib
import json
import math
import time
from typing import Any

import numpy as np
from dash import ALL, Input, Output, State, ctx, dcc, html, no_update
from dash.exceptions import PreventUpdate

import barrierflow
from barrierflow.errors import BarrierflowError
from barrierflow.model import Variation
from barrierflow.model.paths import parameter_paths

from .. import ids
from ..figures import _layout, _rgba, empty_figure
from ..jobs import WorkerFailed
from ..palette import color

__all__ = ["DISTRIBUTIONS", "band_figure", "histogram_figure", "layout", "path_options", "ranking_figure",
           "register", "simulate", "spec", "sweep", "sweep_figure"]

PERCENTILES = (5.0, 50.0, 95.0)
SOBOL_N = 128
MAX_SUBJECTS = 20_000
DISTRIBUTIONS = {
    "lognormal": ("log-normal: median = the scenario's value", "CV, e.g. 0.3 for 30 %"),
    "normal": ("normal: mean = the scenario's value", "CV, e.g. 0.2"),
    "uniform": ("uniform between two values", "range with units, e.g. 5 L/h..20 L/h"),
}


# ---------------------------------------------------------------- pure helpers (tests call them)
def spec(path: str, distribution: str, spread: str) -> str:
    """The ``--vary`` text of one row of the panel: ``PATH=lognormal:cv=0.3`` or ``PATH=uniform:low=..,high=..``."""
    spread = (spread or "").strip()
    if distribution == "uniform":
        lo, _, hi = spread.partition("..")
        return f"{path}=uniform:low={lo.strip()},high={hi.strip()}"
    return f"{path}={distribution}:cv={spread}"


def path_options(toml: str | None) -> list[dict[str, str]]:
    """The parameters of a scenario that can vary: label with the current value, value the path."""
    if not toml:
        return []
    try:
        scenario = barrierflow.loads(toml)
    except BarrierflowError:
        return []
    out = []
    for p in parameter_paths(scenario, structural=False):
        if p.kind == "count" or p.table == "substance":
            continue
        value = p.get(scenario)
        unit = p.file_unit(scenario)
        shown = f"{p.to_file_unit(value, scenario):.4g} {unit}".strip() if value is not None else ""
        out.append({"label": f"{p.text} ({shown})", "value": p.text})
    return out


def simulate(toml: str, specs: list[str], n: int, seed: int, file: str | None = None,
             progress: Any = None) -> dict[str, Any]:
    """Run the population (and the Sobol ranking) in a worker; a packed, picklable result."""
    from barrierflow.studies import run_population, sobol_indices, with_variability

    scenario = with_variability(barrierflow.loads(toml, file), specs)
    started = time.perf_counter()
    share = 0.7 if len(scenario.vary) > 1 else 1.0

    def step(done: int, total: int, offset: float = 0.0, part: float = share) -> None:
        if progress is not None:
            progress(offset + part * done / max(total, 1))

    pop = run_population(scenario, n, seed, percentiles=PERCENTILES, keep_subjects=True, progress=step)
    ranking: dict[str, Any] = {}
    if len(scenario.vary) > 1:
        res = sobol_indices(scenario, SOBOL_N, seed=seed, resamples=50,
                            progress=lambda d, t: step(d, t, share, 1.0 - share))
        for j, metric in enumerate(res.metrics):
            ranking[metric] = {"params": [p.text for p in res.params],
                               **{k: res.indices[k][:, j].tolist() for k in ("total", "total_ci95", "first_order")}}
    traces = {name: pop.bands[i].tolist() for i, name in enumerate(pop.trace_names)}
    metrics = {}
    for j, name in enumerate(pop.subjects.metrics.names):
        col = pop.subjects.metrics.values[:, j]
        if np.isfinite(col).sum() >= 2 and np.nanmax(col) > np.nanmin(col):
            metrics[name] = {"unit": pop.subjects.metrics.units[j], "values": col.tolist()}
    return {
        "n": n, "seed": seed, "failed": pop.n_failed, "time_header": pop.time_header, "times": pop.times.tolist(),
        "percentiles": list(PERCENTILES), "traces": traces, "metrics": metrics, "ranking": ranking,
        "specs": [v.to_option() for v in scenario.vary], "scenario": scenario.name,
        "failures": [f"subject {f.subject}: {f.message}" for f in pop.failures[:5]],
        "wall_s": time.perf_counter() - started,
    }


def band_figure(result: dict[str, Any] | None, trace: str | None, log: bool = False) -> dict[str, Any]:
    """The 5th-95th percentile band of a trace with its median, over time."""
    if not result or not trace or trace not in result.get("traces", {}):
        return empty_figure("Run a population to see the bands of its traces.")
    lo, mid, hi = (np.asarray(b, dtype=float) for b in result["traces"][trace])
    t = result["times"]
    name, _, unit = trace.partition(" [")
    q = result["percentiles"]
    c = color(0)
    data = [
        {"x": t, "y": hi.tolist(), "mode": "lines", "line": {"width": 0}, "name": f"p{q[2]:g}",
         "showlegend": False, "hoverinfo": "skip"},
        {"x": t, "y": lo.tolist(), "mode": "lines", "line": {"width": 0}, "fill": "tonexty",
         "fillcolor": _rgba(c, 0.25), "name": f"p{q[0]:g} to p{q[2]:g}"},
        {"x": t, "y": mid.tolist(), "mode": "lines", "line": {"color": c, "width": 2}, "name": f"median (p{q[1]:g})"},
    ]
    lay = _layout(f"{name}: {result['n']:,} subjects", result["time_header"], f"{name} [{unit}" if unit else name,
                  log=log)
    return {"data": data, "layout": lay}


def histogram_figure(result: dict[str, Any] | None, metric: str | None) -> dict[str, Any]:
    """The distribution of a metric over the subjects that finished."""
    if not result or not metric or metric not in result.get("metrics", {}):
        return empty_figure("Run a population to see the distribution of its metrics.")
    entry = result["metrics"][metric]
    x = [v for v in entry["values"] if v is not None and math.isfinite(v)]
    unit = entry["unit"]
    data = [{"type": "histogram", "x": x, "nbinsx": 40, "marker": {"color": color(1)}, "name": metric}]
    lay = _layout(f"{metric}: {len(x):,} subjects", f"{metric} [{unit}]" if unit else metric, "subjects",
                  legend=False)
    lay["bargap"] = 0.04
    return {"data": data, "layout": lay}


def ranking_figure(result: dict[str, Any] | None, metric: str | None) -> dict[str, Any]:
    """The parameters ranked by their total Sobol index for a metric (first order beside it)."""
    if not result or not metric:
        return empty_figure("Run a population to rank the parameters.")
    r = result.get("ranking", {}).get(metric)
    if r is None:
        text = ("Give two or more parameters a spread to rank them." if not result.get("ranking") else
                f"No ranking for {metric} (it does not vary, or a run failed).")
        return empty_figure(text)
    total = np.nan_to_num(np.asarray(r["total"], dtype=float))
    order = np.argsort(total)  # the largest at the top of a horizontal bar chart
    names = [r["params"][i] for i in order]
    data = [
        {"type": "bar", "orientation": "h", "y": names, "x": [float(total[i]) for i in order], "name": "total",
         "marker": {"color": color(0)},
         "error_x": {"type": "data", "array": [float(np.nan_to_num(r["total_ci95"][i])) for i in order]}},
        {"type": "bar", "orientation": "h", "y": names,
         "x": [float(np.nan_to_num(r["first_order"][i])) for i in order], "name": "first order",
         "marker": {"color": color(1)}},
    ]
    lay = _layout(f"What drives {metric} (Sobol indices, N = {SOBOL_N})", "index (share of the variance)", "")
    lay["barmode"] = "group"
    lay["margin"]["l"] = 260
    return {"data": data, "layout": lay}


def sweep(toml: str, axes: list[list[Any]], file: str | None = None, progress: Any = None) -> dict[str, Any]:
    """Run a sweep in a worker: ``axes`` is a list of ``[path, "LO..HI", steps, log]``; a packed result."""
    from barrierflow.studies import run_sweep

    scenario = barrierflow.loads(toml, file)
    texts = [f"{path}={rng}" for path, rng, _, _ in axes]
    started = time.perf_counter()
    res = run_sweep(scenario, texts, steps=[int(a[2]) for a in axes],
                    spacing=["log" if a[3] else "linear" for a in axes],
                    progress=(lambda d, t: progress(d / max(t, 1))) if progress is not None else None)
    metrics = {}
    for j, name in enumerate(res.metrics.names):
        col = res.metrics.values[:, j]
        if np.isfinite(col).any():
            metrics[name] = {"unit": res.metrics.units[j],
                             "grid": np.where(np.isfinite(col), col, np.nan).reshape(res.shape).tolist()}
    return {"axes": [{"path": a.param.text, "unit": u, "values": res.axis_values(i).tolist(), "log": a.spacing == "log"}
                     for i, (a, u) in enumerate(zip(res.axes, res.units, strict=True))],
            "metrics": metrics, "failed": int((~res.ok).sum()), "points": len(res.points),
            "scenario": scenario.name, "wall_s": time.perf_counter() - started}


def sweep_figure(result: dict[str, Any] | None, metric: str | None) -> dict[str, Any]:
    """A metric over the sweep: a line over one parameter, a heatmap over two."""
    if not result or not metric or metric not in result.get("metrics", {}):
        return empty_figure("Run a sweep to see a metric over one or two parameters.")
    entry = result["metrics"][metric]
    label = f"{metric} [{entry['unit']}]" if entry["unit"] else metric
    ax = result["axes"]

    def title(a: dict[str, Any]) -> str:
        return f"{a['path']} [{a['unit']}]" if a["unit"] else a["path"]

    if len(ax) == 1:
        data = [{"x": ax[0]["values"], "y": entry["grid"], "mode": "lines+markers", "name": metric,
                 "line": {"color": color(0)}}]
        lay = _layout(f"{metric} over {ax[0]['path']}", title(ax[0]), label, legend=False)
        if ax[0]["log"]:
            lay["xaxis"]["type"] = "log"
        return {"data": data, "layout": lay}
    data = [{"type": "heatmap", "x": ax[1]["values"], "y": ax[0]["values"], "z": entry["grid"],
             "colorscale": "Viridis", "colorbar": {"title": {"text": label, "side": "right"}},
             "hovertemplate": f"{ax[0]['path']} %{{y:.4g}}<br>{ax[1]['path']} %{{x:.4g}}<br>{metric} %{{z:.4g}}"
                              "<extra></extra>"}]
    lay = _layout(f"{metric} over {ax[0]['path']} and {ax[1]['path']}", title(ax[1]), title(ax[0]), legend=False)
    for key, a in (("xaxis", ax[1]), ("yaxis", ax[0])):
        if a["log"]:
            lay[key]["type"] = "log"
    return {"data": data, "layout": lay}


# ---------------------------------------------------------------- layout
def layout() -> html.Div:
    """The variability card's body."""
    return html.Div([
        html.P("Give parameters a spread (between people, sites or membrane batches), run many subjects, and see "
               "the 5-95 % band of every trace, the distribution of every metric and which parameters drive it.",
               className="fine-print"),
        html.Div([
            html.Div([
                html.Label("Parameter", htmlFor=ids.VARY_PATH, className="field-label"),
                dcc.Dropdown(id=ids.VARY_PATH, options=[], placeholder="pick a parameter of the scenario",
                             className="vary-path"),
            ], className="vary-field wide"),
            html.Div([
                html.Label("Distribution", htmlFor=ids.VARY_DIST, className="field-label"),
                dcc.Dropdown(id=ids.VARY_DIST, value="lognormal", clearable=False,
                             options=[{"label": v[0], "value": k} for k, v in DISTRIBUTIONS.items()]),
            ], className="vary-field"),
            html.Div([
                html.Label("Spread", htmlFor=ids.VARY_SPREAD, className="field-label"),
                dcc.Input(id=ids.VARY_SPREAD, type="text", value="0.3", className="field-input", debounce=False),
                html.Span(DISTRIBUTIONS["lognormal"][1], id=ids.VARY_HINT, className="field-hint"),
            ], className="vary-field"),
            html.Button("Add", id=ids.VARY_ADD, className="btn"),
        ], className="vary-row"),
        html.Div(id=ids.VARY_MESSAGE, className="field-message", role="alert"),
        html.Div(id=ids.VARY_LIST, className="vary-list"),
        html.Div([
            html.Div([
                html.Label("Subjects", htmlFor=ids.VARY_N, className="field-label"),
                dcc.Input(id=ids.VARY_N, type="number", value=200, min=2, max=MAX_SUBJECTS, step=1,
                          className="field-input small"),
            ], className="vary-field"),
            html.Div([
                html.Label("Seed", htmlFor=ids.VARY_SEED, className="field-label"),
                dcc.Input(id=ids.VARY_SEED, type="number", value=1, min=0, step=1, className="field-input small"),
            ], className="vary-field"),
            html.Div([
                html.Button("Run population", id=ids.VARY_RUN, className="btn primary"),
                html.Button("Cancel", id=ids.VARY_CANCEL, className="btn", disabled=True),
            ], className="run-buttons"),
        ], className="vary-row"),
        html.Div([
            html.Progress(id=ids.VARY_PROGRESS, value="0", max="100", className="progress"),
            html.Span(id=ids.VARY_PROGRESS_TEXT, className="progress-text"),
        ], className="progress-row"),
        html.Div(id=ids.VARY_STATUS, className="run-status", role="status"),
        html.Div([
            html.Div([
                html.Div([
                    html.Label("Trace", htmlFor=ids.VARY_TRACE, className="field-label"),
                    dcc.Dropdown(id=ids.VARY_TRACE, options=[], clearable=False),
                    dcc.Checklist(id=ids.VARY_LOG, options=[{"label": " log scale", "value": "log"}], value=[]),
                ], className="vary-pick"),
                dcc.Graph(id=ids.VARY_BANDS, figure=band_figure(None, None), config={"displaylogo": False}),
            ], className="vary-plot"),
            html.Div([
                html.Div([
                    html.Label("Metric", htmlFor=ids.VARY_METRIC, className="field-label"),
                    dcc.Dropdown(id=ids.VARY_METRIC, options=[], clearable=False),
                ], className="vary-pick"),
                dcc.Graph(id=ids.VARY_HISTOGRAM, figure=histogram_figure(None, None), config={"displaylogo": False}),
                dcc.Graph(id=ids.VARY_RANKING, figure=ranking_figure(None, None), config={"displaylogo": False}),
            ], className="vary-plot"),
        ], className="vary-plots"),
        html.H3("What-if sweep", className="sub-head"),
        html.P("Set one or two parameters to a grid of values (the other values stay the scenario's) and see a "
               "metric over it: a line for one parameter, a heatmap for two.", className="fine-print"),
        *[_axis_row(k) for k in (1, 2)],
        html.Div([
            html.Button("Run sweep", id=ids.SWEEP_RUN, className="btn primary"),
            html.Button("Cancel", id=ids.SWEEP_CANCEL, className="btn", disabled=True),
            html.Progress(id=ids.SWEEP_PROGRESS, value="0", max="100", className="progress"),
        ], className="vary-row"),
        html.Div(id=ids.SWEEP_STATUS, className="run-status", role="status"),
        html.Div([
            html.Label("Metric", htmlFor=ids.SWEEP_METRIC, className="field-label"),
            dcc.Dropdown(id=ids.SWEEP_METRIC, options=[], clearable=False),
        ], className="vary-pick"),
        dcc.Graph(id=ids.SWEEP_FIGURE, figure=sweep_figure(None, None), config={"displaylogo": False}),
        dcc.Store(id=ids.VARY_STORE, data=[]),
        dcc.Store(id=ids.VARY_RESULT),
        dcc.Store(id=ids.SWEEP_RESULT),
    ])


def _axis_row(k: int) -> html.Div:
    """One swept parameter: path, range with units, points, log steps (the second is optional)."""
    return html.Div([
        html.Div([
            html.Label(f"Parameter {k}" + (" (optional)" if k == 2 else ""), htmlFor=ids.sweep_field("path", k),
                       className="field-label"),
            dcc.Dropdown(id=ids.sweep_field("path", k), options=[], placeholder="pick a parameter"),
        ], className="vary-field wide"),
        html.Div([
            html.Label("From..to", htmlFor=ids.sweep_field("range", k), className="field-label"),
            dcc.Input(id=ids.sweep_field("range", k), type="text", value="", className="field-input",
                      placeholder="e.g. 5 L/h..40 L/h"),
        ], className="vary-field"),
        html.Div([
            html.Label("Points", htmlFor=ids.sweep_field("steps", k), className="field-label"),
            dcc.Input(id=ids.sweep_field("steps", k), type="number", value=9 if k == 1 else 5, min=2, max=60, step=1,
                      className="field-input small"),
        ], className="vary-field"),
        dcc.Checklist(id=ids.sweep_field("log", k), options=[{"label": " log steps", "value": "log"}], value=[]),
    ], className="vary-row")


# ---------------------------------------------------------------- callbacks
def register(app: Any, services: Any) -> None:
    """Attach the variability panel's callbacks."""
    archive = services.archive

    @app.callback(
        Output(ids.VARY_PATH, "options"),
        Input(ids.VALID, "data"),
    )
    def paths(valid):
        return path_options((valid or {}).get("toml"))

    @app.callback(
        Output(ids.VARY_HINT, "children"),
        Output(ids.VARY_SPREAD, "value"),
        Input(ids.VARY_DIST, "value"),
        prevent_initial_call=True,
    )
    def hint(dist):
        return DISTRIBUTIONS[dist][1], ("" if dist == "uniform" else "0.3")

    @app.callback(
        Output(ids.VARY_STORE, "data"),
        Output(ids.VARY_MESSAGE, "children"),
        Input(ids.VARY_ADD, "n_clicks"),
        Input({"type": ids.VARY_REMOVE, "index": ALL}, "n_clicks"),
        State(ids.VARY_PATH, "value"),
        State(ids.VARY_DIST, "value"),
        State(ids.VARY_SPREAD, "value"),
        State(ids.VARY_STORE, "data"),
        State(ids.VALID, "data"),
        prevent_initial_call=True,
    )
    def edit(_add, removes, path, dist, spread, specs, valid):
        specs = list(specs or [])
        trigger = ctx.triggered_id
        if isinstance(trigger, dict):
            if not any(removes):
                raise PreventUpdate
            i = int(trigger["index"])
            return [s for k, s in enumerate(specs) if k != i], ""
        if not path:
            return no_update, "Pick a parameter first."
        text = spec(path, dist, spread)
        try:
            v = Variation.parse(text)
            if valid and valid.get("toml"):
                from barrierflow.studies import with_variability

                with_variability(barrierflow.loads(valid["toml"]), [v])  # checked against the scenario's values
        except BarrierflowError as err:
            return no_update, str(err)
        kept = [s for s in specs if Variation.parse(s).path != v.path]
        return kept + [v.to_option()], ""

    @app.callback(
        Output(ids.VARY_LIST, "children"),
        Input(ids.VARY_STORE, "data"),
    )
    def show(specs):
        if not specs:
            return html.Span("No parameter has a spread yet.", className="empty-note")
        items = []
        for i, s in enumerate(specs):
            v = Variation.parse(s)
            items.append(html.Span([
                html.Span(f"{v.path.text}: {v.label}"),
                html.Button("×", id={"type": ids.VARY_REMOVE, "index": i}, className="chip-remove",
                            title="remove this spread"),
            ], className="chip"))
        return items

    @app.callback(
        Output(ids.VARY_RESULT, "data"),
        Output(ids.VARY_STATUS, "children"),
        Input(ids.VARY_RUN, "n_clicks"),
        State(ids.VALID, "data"),
        State(ids.VARY_STORE, "data"),
        State(ids.VARY_N, "value"),
        State(ids.VARY_SEED, "value"),
        State(ids.PAGE, "data"),
        background=True,
        manager=services.manager,
        progress=[Output(ids.VARY_PROGRESS, "value"), Output(ids.VARY_PROGRESS_TEXT, "children")],
        progress_default=["0", ""],
        running=[
            (Output(ids.VARY_RUN, "disabled"), True, False),
            (Output(ids.VARY_CANCEL, "disabled"), False, True),
            (Output(ids.VARY_PROGRESS, "className"), "progress running", "progress"),
        ],
        cancel=[Input(ids.VARY_CANCEL, "n_clicks")],
        interval=services.poll_ms,
        prevent_initial_call=True,
    )
    def run(set_progress, _n, valid, specs, n, seed, _page):
        if not valid or not valid.get("toml"):
            return no_update, html.Span("Nothing to run yet: the scenario has never been valid.", className="bad")
        if not specs:
            return no_update, html.Span("Give at least one parameter a spread first.", className="bad")
        try:
            n = int(n)
            seed = int(seed or 0)
        except (TypeError, ValueError):
            return no_update, html.Span("The number of subjects and the seed are whole numbers.", className="bad")
        if not 2 <= n <= MAX_SUBJECTS or seed < 0:
            return no_update, html.Span(f"Subjects: from 2 to {MAX_SUBJECTS:,}; seed: a whole number >= 0 "
                                        "(the command line takes more subjects).", className="bad")
        key = "population:" + hashlib.sha256(json.dumps([valid["toml"], specs, n, seed]).encode()).hexdigest()
        last = [0.0]

        def progress(fraction: float) -> None:
            now = time.perf_counter()
            if now - last[0] > 0.2 or fraction >= 1.0:
                last[0] = now
                set_progress([f"{100 * fraction:.0f}", f"{100 * fraction:.0f} %"])

        packed = archive.get(key)
        if packed is None:
            try:
                packed = services.workers.call(simulate, valid["toml"], specs, n, seed, valid.get("file"),
                                               progress=progress)
            except (BarrierflowError, WorkerFailed) as err:
                return no_update, html.Span(f"The population failed: {err}", className="bad")
            archive.put(key, packed)
        failed = f", {packed['failed']:,} failed ({'; '.join(packed['failures'])})" if packed["failed"] else ""
        return ({"key": key, "traces": list(packed["traces"]), "metrics": list(packed["metrics"]),
                 "ranked": list(packed["ranking"])},
                html.Span(f"{n:,} subjects of {packed['scenario'] or 'the scenario'} done in "
                          f"{packed['wall_s']:.1f} s{failed}.", className="good" if not failed else "warn"))

    @app.callback(
        Output(ids.VARY_STATUS, "children", allow_duplicate=True),
        Input(ids.VARY_CANCEL, "n_clicks"),
        prevent_initial_call=True,
    )
    def cancelled(_n):
        return html.Span("The population was cancelled.", className="warn")

    @app.callback(
        Output(ids.VARY_TRACE, "options"),
        Output(ids.VARY_TRACE, "value"),
        Output(ids.VARY_METRIC, "options"),
        Output(ids.VARY_METRIC, "value"),
        Input(ids.VARY_RESULT, "data"),
        State(ids.VARY_TRACE, "value"),
        State(ids.VARY_METRIC, "value"),
    )
    def pickers(meta, trace, metric):
        if not meta:
            return [], None, [], None
        traces = meta["traces"]
        metrics = meta["metrics"]
        if trace not in traces:
            trace = next((t for t in traces if t.startswith("conc:")), traces[0] if traces else None)
        if metric not in metrics:
            ranked = [m for m in meta.get("ranked", []) if m in metrics and m.startswith("auc:")]
            metric = ranked[0] if ranked else next((m for m in metrics if m.startswith("auc:")),
                                                   metrics[0] if metrics else None)
        return ([{"label": t, "value": t} for t in traces], trace, [{"label": m, "value": m} for m in metrics],
                metric)

    def fetch(meta):
        return archive.get(meta["key"]) if meta else None

    @app.callback(
        Output(ids.VARY_BANDS, "figure"),
        Input(ids.VARY_TRACE, "value"),
        Input(ids.VARY_LOG, "value"),
        Input(ids.VARY_RESULT, "data"),
    )
    def bands(trace, log, meta):
        return band_figure(fetch(meta), trace, "log" in (log or []))

    @app.callback(
        Output(ids.VARY_HISTOGRAM, "figure"),
        Output(ids.VARY_RANKING, "figure"),
        Input(ids.VARY_METRIC, "value"),
        Input(ids.VARY_RESULT, "data"),
    )
    def metric_plots(metric, meta):
        result = fetch(meta)
        return histogram_figure(result, metric), ranking_figure(result, metric)

    @app.callback(
        Output(ids.sweep_field("path", 1), "options"),
        Output(ids.sweep_field("path", 2), "options"),
        Input(ids.VARY_PATH, "options"),
    )
    def sweep_paths(options):
        return options, options

    @app.callback(
        Output(ids.SWEEP_RESULT, "data"),
        Output(ids.SWEEP_STATUS, "children"),
        Input(ids.SWEEP_RUN, "n_clicks"),
        State(ids.VALID, "data"),
        *[State(ids.sweep_field(f, k), "value") for k in (1, 2) for f in ("path", "range", "steps", "log")],
        State(ids.PAGE, "data"),
        background=True,
        manager=services.manager,
        progress=[Output(ids.SWEEP_PROGRESS, "value")],
        progress_default=["0"],
        running=[
            (Output(ids.SWEEP_RUN, "disabled"), True, False),
            (Output(ids.SWEEP_CANCEL, "disabled"), False, True),
        ],
        cancel=[Input(ids.SWEEP_CANCEL, "n_clicks")],
        interval=services.poll_ms,
        prevent_initial_call=True,
    )
    def run_sweep(set_progress, _n, valid, p1, r1, n1, l1, p2, r2, n2, l2, _page):
        if not valid or not valid.get("toml"):
            return no_update, html.Span("Nothing to run yet: the scenario has never been valid.", className="bad")
        axes = []
        for path, rng, steps, log in ((p1, r1, n1, l1), (p2, r2, n2, l2)):
            if not path:
                continue
            try:
                steps = int(steps)
            except (TypeError, ValueError):
                return no_update, html.Span(f"{path}: the number of points is a whole number.", className="bad")
            axes.append([path, (rng or "").strip(), steps, "log" in (log or [])])
        if not axes:
            return no_update, html.Span("Pick a parameter to sweep.", className="bad")
        key = "sweep:" + hashlib.sha256(json.dumps([valid["toml"], axes]).encode()).hexdigest()
        packed = archive.get(key)
        if packed is None:
            try:
                packed = services.workers.call(sweep, valid["toml"], axes, valid.get("file"),
                                               progress=lambda f: set_progress([f"{100 * f:.0f}"]))
            except (BarrierflowError, WorkerFailed) as err:
                return no_update, html.Span(f"The sweep failed: {err}", className="bad")
            archive.put(key, packed)
        failed = f", {packed['failed']} failed" if packed["failed"] else ""
        return ({"key": key, "metrics": list(packed["metrics"])},
                html.Span(f"{packed['points']} points done in {packed['wall_s']:.1f} s{failed}.",
                          className="good" if not failed else "warn"))

    @app.callback(
        Output(ids.SWEEP_METRIC, "options"),
        Output(ids.SWEEP_METRIC, "value"),
        Input(ids.SWEEP_RESULT, "data"),
        State(ids.SWEEP_METRIC, "value"),
    )
    def sweep_metrics(meta, metric):
        if not meta:
            return [], None
        names = meta["metrics"]
        if metric not in names:
            metric = next((m for m in names if m.startswith(("permeated:", "auc:"))), names[0] if names else None)
        return [{"label": m, "value": m} for m in names], metric

    @app.callback(
        Output(ids.SWEEP_FIGURE, "figure"),
        Input(ids.SWEEP_METRIC, "value"),
        Input(ids.SWEEP_RESULT, "data"),
    )
    def sweep_plot(metric, meta):
        return sweep_figure(fetch(meta), metric)
