"""The fit panel's work: read the lab's data, predict, fit in a worker, pack for the page, draw.

Everything here is a plain function (no Dash): :func:`read_data` and :func:`data_summary` run in
the server (reading a small CSV), :func:`preview` and :func:`execute_fit` in a worker process
(:class:`dashboard.jobs.Workers`; they run the engine), and the figures are plain dicts that the
tests call directly. What goes to the page is JSON: values in the data file's units.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

import barrierflow
from barrierflow.io import loads_experiment
from barrierflow.model import parameter_paths
from barrierflow.model.experiment import Experiment
from barrierflow.units import KINDS, convert

from .palette import GRID, INK, MUTED, color

__all__ = ["STAGES", "data_summary", "default_free", "example_data", "execute_fit", "fit_figure",
           "free_options", "preview", "read_data", "residual_figure"]

STAGES = {"fit": (0.0, 0.3), "profile": (0.3, 0.6), "replicates": (0.6, 0.8), "posterior": (0.8, 1.0)}
"""Share of the progress bar per stage of a fit."""


def example_data(folder: str | Path | None = None) -> dict[str, str]:
    """The invented example data files: path -> file name (the project's ``data/`` folder)."""
    folder = Path(folder) if folder else Path(__file__).resolve().parent.parent / "data"
    return {str(p): p.name for p in sorted(folder.glob("*.csv"))} if folder.is_dir() else {}


def read_data(text: str, name: str, toml: str | None = None) -> Experiment:
    """The experiment in an uploaded file (molar units with the scenario's molar mass, when valid).

    Raises
    ------
    barrierflow.DataError
        With every problem, row and column named.
    """
    molar_mass = None
    if toml:
        try:
            molar_mass = barrierflow.loads(toml).substance.molar_mass
        except barrierflow.ScenarioError:
            molar_mass = None
    return loads_experiment(text, name=name, molar_mass=molar_mass)


def data_summary(e: Experiment) -> str:
    """One line: values, replicates, observables with units, time span."""
    obs = ", ".join(f"{o} [{e.of(o)[0].unit}]" for o in e.observables)
    t = e.time_array
    return (f"{Path(e.source).name if e.source else 'data'}: {e.n_observations} values in {len(e.replicates)} "
            f"replicate{'s' if len(e.replicates) != 1 else ''} ({', '.join(e.replicates)}); {obs}; "
            f"{convert(float(t.min()), 'time', e.time_unit):g} to {convert(float(t.max()), 'time', e.time_unit):g} "
            f"{e.time_unit}")


def free_options(toml: str) -> list[dict[str, str]]:
    """Every quantity a fit may free in the scenario, as dropdown options (path, current value)."""
    s = barrierflow.loads(toml)
    out = []
    for p in parameter_paths(s, structural=False):
        if p.kind == "count":
            continue
        v = p.get(s)
        shown = f"{p.to_file_unit(v, s):.4g} {p.file_unit(s)}".strip() if p.kind in KINDS else f"{v:.4g}"
        out.append({"label": f"{p.text} ({shown})", "value": p.text})
    return out


def default_free(toml: str, e: Experiment | None) -> list[str]:
    """D and K of the first layer of the barrier the data observe (or of the only barrier)."""
    s = barrierflow.loads(toml)
    bid = None
    if e is not None:
        for o in e.observables:
            q, t = o.split(":", 1)
            if q in ("permeated", "flux") and any(b.id == t for b in s.barriers):
                bid = t
                break
            into = [b.id for b in s.barriers if b.to_id == t]
            if len(into) == 1:
                bid = into[0]
                break
    if bid is None and len(s.barriers) == 1:
        bid = s.barriers[0].id
    if bid is None:
        return []
    return [f"barrier.{bid}.layer.1.diffusivity", f"barrier.{bid}.layer.1.partition"]


def _in_file_units(e: Experiment, observable: str, values: np.ndarray, molar_mass: float | None) -> list[float]:
    ser = e.of(observable)[0]
    f = convert(1.0, ser.kind, ser.unit, molar_mass)
    return [float(v) * f for v in values]


def preview(toml: str, data_text: str, data_name: str, points: int = 120) -> dict[str, Any]:
    """The open scenario's curves over the span of the data, in the data file's units (a worker's job)."""
    from barrierflow.studies.predict import Predictor

    s = barrierflow.loads(toml)
    e = loads_experiment(data_text, name=data_name, molar_mass=s.substance.molar_mass)
    t = np.linspace(0.0, float(e.time_array.max()), points)
    pred = Predictor(s, (), e.observables, t)([])
    mm = s.substance.molar_mass
    return {"times": [convert(float(x), "time", e.time_unit) for x in t],
            "curves": {o: _in_file_units(e, o, v, mm) for o, v in pred.items()}}


def execute_fit(toml: str, file: str | None, data_text: str, data_name: str, free: Sequence[str], weights: str,
                profile: bool, replicates: bool, mcmc: int,
                progress: Callable[[float], None] | None = None) -> dict[str, Any]:
    """Fit the scenario to the data and pack the result for the page (a worker's job).

    Raises
    ------
    barrierflow.ScenarioError, barrierflow.DataError, barrierflow.SolverError
        As :func:`barrierflow.fit` does.
    """
    s = barrierflow.loads(toml, file)
    e = loads_experiment(data_text, name=data_name, molar_mass=s.substance.molar_mass)

    def staged(stage: str, fraction: float) -> None:
        if progress is not None:
            lo, hi = STAGES.get(stage, (0.0, 1.0))
            progress(lo + (hi - lo) * fraction)

    r = barrierflow.fit(s, e, list(free), weights=weights, profile=profile, replicates=replicates, mcmc=int(mcmc),
                        progress=staged)
    return pack_fit(r)


def pack_fit(r: Any) -> dict[str, Any]:
    """A :class:`barrierflow.FitResult` as JSON for the page (values in the data file's and scenario file's units)."""
    e, s = r.experiment, r.original
    mm = s.substance.molar_mass
    tu = e.time_unit
    curves = {}
    for o, (t, f, lo, hi) in r.curves(points=150).items():
        curves[o] = {"times": [convert(float(x), "time", tu) for x in t], "fit": _in_file_units(e, o, f, mm),
                     "lower": _in_file_units(e, o, lo, mm), "upper": _in_file_units(e, o, hi, mm)}
    posterior = None
    if r.posterior is not None:
        po = r.posterior
        posterior = {o: {"times": [convert(float(x), "time", tu) for x in po.times],
                         **{k: _in_file_units(e, o, band[i], mm)
                            for i, k in enumerate(("p2.5", "p50", "p97.5", "new2.5", "new97.5"))}}
                     for o, band in po.band.items()}
    obs = {"time": [], "observable": [], "replicate": [], "observed": [], "predicted": [], "weighted": []}
    for ob in r.observations:
        ser = e.of(ob.observable)[0]
        f = convert(1.0, ser.kind, ser.unit, mm)
        obs["time"].append(convert(ob.time, "time", tu))
        obs["observable"].append(ob.observable)
        obs["replicate"].append(ob.replicate)
        obs["observed"].append(ob.observed * f)
        obs["predicted"].append(ob.predicted * f)
        obs["weighted"].append(ob.weighted_residual)
    estimates = []
    report = r.as_dict()
    for p in r.parameters:
        entry = report["parameters"][p.text]
        value = entry["estimate"]
        unit = entry["unit"]
        estimates.append({"path": p.text, "label": p.param.label, "value": value, "unit": unit,
                          "text": f"{value:.6g} {unit}".strip()})
    return {"report": report, "text": r.to_text(), "fitted_toml": r.scenario.to_toml(),
            "residuals_csv": r.residuals_csv(), "estimates": estimates, "curves": curves, "posterior": posterior,
            "observations": obs, "time_unit": tu, "units": {o: e.of(o)[0].unit for o in e.observables},
            "data": Path(e.source).name if e.source else "data"}


# ============================================================================ figures
def _layout(title: str, xtitle: str, ytitle: str, height: int = 380) -> dict[str, Any]:
    return {
        "title": {"text": title, "x": 0.01, "xanchor": "left", "font": {"size": 15, "color": INK}},
        "height": height, "margin": {"l": 72, "r": 18, "t": 46, "b": 56},
        "paper_bgcolor": "#ffffff", "plot_bgcolor": "#ffffff",
        "font": {"family": "system-ui, -apple-system, 'Segoe UI', sans-serif", "size": 13, "color": INK},
        "xaxis": {"title": {"text": xtitle}, "gridcolor": GRID, "zeroline": False, "showline": True,
                  "linecolor": MUTED, "ticks": "outside", "automargin": True},
        "yaxis": {"title": {"text": ytitle, "standoff": 8}, "gridcolor": GRID, "zeroline": False, "showline": True,
                  "linecolor": MUTED, "ticks": "outside", "exponentformat": "power", "automargin": True},
        "showlegend": True, "legend": {"orientation": "h", "y": -0.22, "x": 0, "font": {"size": 12}},
        "hovermode": "closest", "uirevision": title,
    }


def _rgba(hex_color: str, alpha: float) -> str:
    h = hex_color.lstrip("#")
    r, g, b = (int(h[i:i + 2], 16) for i in (0, 2, 4))
    return f"rgba({r},{g},{b},{alpha})"


def empty(message: str, height: int = 300) -> dict[str, Any]:
    """A blank figure with a message."""
    layout = _layout("", "", "", height)
    layout["showlegend"] = False
    layout["xaxis"].update(visible=False)
    layout["yaxis"].update(visible=False)
    layout["annotations"] = [{"text": message, "showarrow": False, "xref": "paper", "yref": "paper", "x": 0.5,
                              "y": 0.5, "font": {"size": 14, "color": MUTED}}]
    return {"data": [], "layout": layout}


def fit_figure(e: Experiment | None, observable: str | None, before: Mapping[str, Any] | None,
               fitted: Mapping[str, Any] | None, molar_mass: float | None = None) -> dict[str, Any]:
    """The measured values over the scenario's curve before the fit and the fitted curve with its band.

    Parameters
    ----------
    e : Experiment or None
        The data (markers, one colour and symbol per replicate).
    observable : str
    before : dict, optional
        :func:`preview`'s output: the open scenario's curve (dashed).
    fitted : dict, optional
        :func:`pack_fit`'s output: the fitted curve, its 95 % confidence band (Jacobian), and the
        posterior-predictive band when the fit sampled one.
    molar_mass : float, optional, mg/mmol
        For data written in molar units.
    """
    if e is None or not observable:
        return empty("Upload a data file (or open the example data) to see it here.")
    series = e.of(observable)
    unit = series[0].unit if series else ""
    tu = e.time_unit
    traces: list[dict[str, Any]] = []
    if fitted and observable in (fitted.get("posterior") or {}):
        band = fitted["posterior"][observable]
        traces += [
            {"x": band["times"], "y": band["new2.5"], "mode": "lines", "line": {"width": 0}, "hoverinfo": "skip",
             "showlegend": False, "name": "new measurement, 2.5 %"},
            {"x": band["times"], "y": band["new97.5"], "mode": "lines", "line": {"width": 0}, "fill": "tonexty",
             "fillcolor": _rgba(color(2), 0.15), "name": "95 % of a new measurement (posterior)"},
        ]
    if fitted and observable in fitted.get("curves", {}):
        c = fitted["curves"][observable]
        traces += [
            {"x": c["times"], "y": c["lower"], "mode": "lines", "line": {"width": 0}, "hoverinfo": "skip",
             "showlegend": False, "name": "95 % band, lower"},
            {"x": c["times"], "y": c["upper"], "mode": "lines", "line": {"width": 0}, "fill": "tonexty",
             "fillcolor": _rgba(color(0), 0.22), "name": "95 % confidence band of the fit"},
            {"x": c["times"], "y": c["fit"], "mode": "lines", "line": {"color": color(0), "width": 2.5},
             "name": "fitted"},
        ]
    if before and observable in before.get("curves", {}):
        traces.append({"x": before["times"], "y": before["curves"][observable], "mode": "lines",
                       "line": {"color": INK, "width": 1.5, "dash": "dash"}, "name": "open scenario"})
    symbols = ("circle", "square", "diamond", "triangle-up", "x", "cross", "star", "triangle-down")
    t = [convert(float(x), "time", tu) for x in e.times]
    for i, ser in enumerate(series):
        f = convert(1.0, ser.kind, ser.unit, molar_mass)
        ys = [float(v) * f if math.isfinite(v) else None for v in ser.values]
        traces.append({"x": t, "y": ys, "mode": "markers", "name": f"replicate {ser.replicate}",
                       "marker": {"color": color(i + 1), "symbol": symbols[i % len(symbols)], "size": 8,
                                  "line": {"width": 1, "color": INK}}})
    return {"data": traces, "layout": _layout(f"{observable}: measured and predicted", f"time [{tu}]",
                                              f"{observable} [{unit}]")}


def residual_figure(fitted: Mapping[str, Any] | None, observable: str | None) -> dict[str, Any]:
    """Weighted residuals against time, one colour and symbol per replicate."""
    if not fitted or not observable:
        return empty("The residuals of the fit appear here.", height=260)
    obs = fitted["observations"]
    reps = list(dict.fromkeys(r for r, o in zip(obs["replicate"], obs["observable"], strict=True) if o == observable))
    symbols = ("circle", "square", "diamond", "triangle-up", "x", "cross", "star", "triangle-down")
    traces = []
    for i, rep in enumerate(reps):
        sel = [k for k, (r, o) in enumerate(zip(obs["replicate"], obs["observable"], strict=True))
               if r == rep and o == observable]
        traces.append({"x": [obs["time"][k] for k in sel], "y": [obs["weighted"][k] for k in sel], "mode": "markers",
                       "name": f"replicate {rep}",
                       "marker": {"color": color(i + 1), "symbol": symbols[i % len(symbols)], "size": 8,
                                  "line": {"width": 1, "color": INK}}})
    layout = _layout("weighted residuals", f"time [{fitted['time_unit']}]", "sqrt(w) (observed - predicted)",
                     height=280)
    layout["shapes"] = [{"type": "line", "xref": "paper", "x0": 0, "x1": 1, "y0": 0, "y1": 0,
                         "line": {"color": MUTED, "width": 1}}]
    return {"data": traces, "layout": layout}
