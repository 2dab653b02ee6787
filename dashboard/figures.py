"""Figures as plain functions of arrays: what the callbacks show, and what the tests call.

Every function returns a plotly figure as a plain dict (``{"data": [...], "layout": {...}}``),
with axis titles that carry their units. Runs are told apart by line dash as well as by name,
compartments and barriers by colour (see :mod:`dashboard.palette`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from barrierflow.units import unit_factor

from .palette import GRID, INK, LAYER_FILLS, MUTED, color, dash
from .runs import RunData

__all__ = [
    "AMOUNT_UNITS",
    "CONCENTRATION_UNITS",
    "TIME_UNITS",
    "balance_figure",
    "balance_parts",
    "concentration_figure",
    "dose_timeline_figure",
    "empty_figure",
    "flux_figure",
    "measured_traces",
    "permeated_figure",
    "profile_figure",
    "stack_figure",
    "steady_profile_figure",
    "wide_range",
]

TIME_UNITS = ("h", "min", "d")
CONCENTRATION_UNITS = ("mg/L", "mg/mL", "ug/mL", "ug/L", "ng/mL", "ng/L")
MOLAR_CONCENTRATION_UNITS = ("umol/L", "nmol/L")
AMOUNT_UNITS = ("mg", "ug", "ng")
UM_PER_CM = 1e4


def _layout(title: str, xtitle: str, ytitle: str, *, log: bool = False, height: int = 360,
            legend: bool = True) -> dict[str, Any]:
    return {
        "title": {"text": title, "x": 0.01, "xanchor": "left", "font": {"size": 15, "color": INK}},
        "height": height,
        "margin": {"l": 72, "r": 18, "t": 46, "b": 56},
        "paper_bgcolor": "#ffffff",
        "plot_bgcolor": "#ffffff",
        "font": {"family": "system-ui, -apple-system, 'Segoe UI', sans-serif", "size": 13, "color": INK},
        "xaxis": {"title": {"text": xtitle}, "gridcolor": GRID, "zeroline": False, "showline": True,
                  "linecolor": MUTED, "ticks": "outside", "exponentformat": "power", "automargin": True},
        "yaxis": {"title": {"text": ytitle, "standoff": 8}, "gridcolor": GRID, "zeroline": False, "showline": True,
                  "linecolor": MUTED, "ticks": "outside", "type": "log" if log else "linear",
                  "exponentformat": "power", "automargin": True},
        "showlegend": legend,
        # outside the plotting area at the right: never over a curve or an axis title
        "legend": {"orientation": "v", "x": 1.02, "xanchor": "left", "y": 1.0, "yanchor": "top", "font": {"size": 12},
                   "bgcolor": "rgba(255,255,255,0)"},
        "hovermode": "closest",
        "uirevision": title,
    }


def _rgba(hex_color: str, alpha: float) -> str:
    h = hex_color.lstrip("#")
    r, g, b = (int(h[i:i + 2], 16) for i in (0, 2, 4))
    return f"rgba({r},{g},{b},{alpha})"


def empty_figure(message: str, height: int = 300) -> dict[str, Any]:
    """A blank figure carrying a short message (before the first run, for instance)."""
    layout = _layout("", "", "", height=height, legend=False)
    layout["xaxis"].update(visible=False)
    layout["yaxis"].update(visible=False)
    layout["annotations"] = [{"text": message, "showarrow": False, "xref": "paper", "yref": "paper",
                              "x": 0.5, "y": 0.5, "font": {"size": 14, "color": MUTED}}]
    return {"data": [], "layout": layout}


def _label(item: str, run: RunData, many: bool) -> str:
    return f"{item} · {run.name}" if many else item


LOG_DECADES_BELOW = 3.0
"""A logarithmic axis reaches this many decades below the lowest peak among its curves, so that
every curve's rise and fall shows (and no curve is drawn below the axis)."""
LOG_DECADES_MOST = 9.0
"""... but never spans more decades than this."""


def compartment_sides(runs: Sequence[RunData], compartments: Sequence[str]) -> tuple[list[str], list[str]]:
    """Split compartments into the application side and the receiving side with the body.

    The application side is every compartment that passes substance on through a barrier or a
    transfer and receives none through one (a patch, a donor chamber, a gut depot); all others
    (a receptor, plasma, tissues) are on the receiving side. When either side would be empty the
    first list is empty (one panel).
    """
    sends, receives = set(), set()
    for run in runs:
        for kind, a, b in run.links:
            if kind in ("barrier", "transfer"):
                sends.add(a)
                receives.add(b)
    applied = [c for c in compartments if c in sends and c not in receives]
    others = [c for c in compartments if c not in applied]
    if not applied or not others:
        return [], list(compartments)
    return applied, others


def _peak(y: Sequence[float]) -> float:
    finite = [v for v in y if v is not None and np.isfinite(v) and v > 0]
    return max(finite, default=0.0)


def log_range(traces: Sequence[Mapping[str, Any]]) -> list[float] | None:
    """The range (log10) of a logarithmic axis that shows every curve: from
    :data:`LOG_DECADES_BELOW` decades below the lowest peak to a little above the highest
    (at most :data:`LOG_DECADES_MOST` decades). None when no curve has a value above 0."""
    peaks = [p for p in (_peak(t["y"]) for t in traces) if p > 0]
    if not peaks:
        return None
    top = float(np.log10(max(peaks)))
    bottom = max(float(np.log10(min(peaks))) - LOG_DECADES_BELOW, top - LOG_DECADES_MOST)
    return [bottom, top + 0.3]


MEASURED_SYMBOLS = ("circle-open", "square-open", "diamond-open", "triangle-up-open", "x-thin-open", "cross-thin-open")
"""Marker of each replicate of measured data (by the order of the replicate tags)."""


def measured_traces(experiment: Any, quantity: str, targets: Sequence[str], *, unit: str, time_unit: str = "h",
                    molar_mass: float | None = None, per_time: bool = False, colours: Mapping[str, str] | None = None,
                    axis: Mapping[str, str] | None = None) -> list[dict[str, Any]]:
    """Markers of the measured series of ``quantity`` (``"conc"``, ``"amount"``, ``"permeated"`` or
    ``"flux"``) on ``targets``, to overlay the predicted curves.

    ``experiment`` is a :class:`barrierflow.model.experiment.Experiment` (values in internal
    units); they are drawn in ``unit`` (for the flux: ``unit`` per cm² per ``time_unit``, with
    ``per_time``). Each replicate has its own marker, each target the colour of its curve
    (``colours``) and the y axis of its panel (``axis``: target -> "y2"). Missing values are
    left out.
    """
    if experiment is None:
        return []
    ft = unit_factor("time", time_unit)
    times = np.asarray(experiment.times, dtype=float) * ft
    kinds = {"conc": "concentration", "amount": "amount", "permeated": "amount", "flux": "amount"}
    fy = unit_factor(kinds[quantity], unit, molar_mass) / (ft if per_time else 1.0)
    shown_unit = unit if quantity in ("conc", "amount") else (f"{unit}/cm²" if quantity == "permeated"
                                                              else f"{unit}/(cm² {time_unit})")
    reps = sorted({s.replicate for s in experiment.series})
    out = []
    first: set[str] = set()
    for series in experiment.series:
        if series.quantity != quantity or series.target not in targets:
            continue
        y = np.asarray(series.values, dtype=float) * fy
        keep = np.isfinite(y)
        out.append({
            "type": "scatter", "mode": "markers", "x": times[keep].tolist(), "y": y[keep].tolist(),
            "name": f"{series.observable} measured", "legendgroup": f"measured {series.observable}",
            "showlegend": series.observable not in first,
            "yaxis": (axis or {}).get(series.target, "y"),
            "marker": {"symbol": MEASURED_SYMBOLS[reps.index(series.replicate) % len(MEASURED_SYMBOLS)], "size": 8,
                       "color": (colours or {}).get(series.target, INK), "line": {"width": 1.6}},
            "hovertemplate": f"{series.name} (measured)<br>%{{x:.4g}} {time_unit}: %{{y:.4g}} {shown_unit}"
                             "<extra></extra>"})
        first.add(series.observable)
    return out


def concentration_figure(runs: Sequence[RunData], *, compartments: Sequence[str] | None = None,
                         quantity: str = "concentration", unit: str = "mg/L", time_unit: str = "h",
                         scale: str = "auto", split: bool = True, log: bool | None = None,
                         measured: Any = None) -> dict[str, Any]:
    """Concentration (or amount) against time in each compartment, for one or more runs.

    By default the application side (a patch, a donor) and the receiving side with the body get
    a panel each, with a shared time axis and an axis of their own (see :func:`compartment_sides`),
    so that a concentrated patch never flattens or hides plasma. On a logarithmic axis every curve
    with a value above 0 is drawn within the range (:func:`log_range`); a curve that is 0
    throughout is named in a note instead (it cannot be drawn on a log axis), never left in the
    legend alone.

    Parameters
    ----------
    runs : sequence of RunData
        Overlaid; the first is drawn solid, the others dashed, dotted, ...
    compartments : sequence of str, optional
        Which compartments (default: all of the runs).
    quantity : {"concentration", "amount"}
    unit : str
        A concentration unit (``"mg/L"``, ``"umol/L"`` with a molar mass) or an amount unit.
    time_unit : str
    scale : {"auto", "linear", "log"}
        "auto": each panel logarithmic when its curves' peaks differ by more than 100 times.
    split : bool
        One panel per side (when the network has two sides), else one panel.
    log : bool, optional
        Old spelling of ``scale`` (True: "log", False: "linear").
    measured : Experiment, optional
        Measured data: its ``conc`` (or, for amounts, ``amount``) series of these compartments
        are drawn as markers over the curves (see :func:`measured_traces`).
    """
    if log is not None:
        scale = "log" if log else "linear"
    if not runs:
        return empty_figure("Run the scenario to see the curves.")
    kind = "amount" if quantity == "amount" else "concentration"
    ft = unit_factor("time", time_unit)
    if compartments is not None:
        order = list(compartments)
    else:
        order = []
        for run in runs:
            order += [c for c in run.compartments if c not in order]
    applied, others = compartment_sides(runs, order) if split else ([], order)
    panels = [("application side", applied), ("receiving side and body", others)] if applied else [("", others)]
    many = len(runs) > 1
    colour = {cid: color(i) for i, cid in enumerate(order)}
    data: list[dict[str, Any]] = []
    layout = _layout("Amount in each compartment" if kind == "amount" else "Concentration in each compartment",
                     f"time [{time_unit}]", f"{kind} [{unit}]", height=380 if len(panels) == 1 else 520)
    gap = 0.1
    height = (1.0 - gap * (len(panels) - 1)) / len(panels)
    notes = []
    base_y = layout.pop("yaxis")
    for p_i, (side, cids) in enumerate(panels):
        axis = "" if p_i == 0 else str(p_i + 1)
        traces = []
        for r_i, run in enumerate(runs):
            fy = unit_factor(kind, unit, run.molar_mass)
            for cid in cids:
                if cid not in run.conc:
                    continue
                y = (run.amount if kind == "amount" else run.conc)[cid] * fy
                traces.append({
                    "type": "scatter", "mode": "lines", "x": (run.times * ft).tolist(),
                    "y": [None if not np.isfinite(v) else float(v) for v in y],
                    "name": _label(cid, run, many), "legendgroup": cid, "yaxis": f"y{axis}", "xaxis": "x",
                    "line": {"color": colour[cid], "dash": dash(r_i), "width": 2.2},
                    "hovertemplate": f"{cid} · {run.name}<br>%{{x:.4g}} {time_unit}: %{{y:.4g}} {unit}<extra></extra>",
                })
        molar = next((r.molar_mass for r in runs if r.molar_mass), None)
        traces += measured_traces(measured, "amount" if kind == "amount" else "conc", cids, unit=unit,
                                  time_unit=time_unit, molar_mass=molar, colours=colour,
                                  axis={c: f"y{axis}" for c in cids})
        peaks = [_peak(t["y"]) for t in traces]
        positive = [p for p in peaks if p > 0]
        log = scale == "log" or (scale == "auto" and len(positive) > 1 and max(positive) / min(positive) > 100)
        yaxis = dict(base_y, type="log" if log else "linear", anchor="x")
        if len(panels) > 1:
            top = 1.0 - p_i * (height + gap)
            yaxis["domain"] = [max(0.0, round(top - height, 9)), min(1.0, round(top, 9))]
            notes.append({"text": f"<b>{side.capitalize()}</b>: {', '.join(cids)}", "showarrow": False,
                          "xref": "paper", "yref": "paper", "x": 0, "y": top, "xanchor": "left",
                          "yanchor": "bottom", "font": {"size": 12, "color": MUTED}})
        if log:
            zero = sorted({t["legendgroup"] for t, pk in zip(traces, peaks, strict=True) if pk <= 0})
            traces = [t for t, pk in zip(traces, peaks, strict=True) if pk > 0]
            rng = log_range(traces)
            if rng is not None:
                yaxis["range"] = rng
                yaxis["autorange"] = False
            if zero:
                notes.append({"text": f"0 throughout (not drawn on a log axis): {', '.join(zero)}",
                              "showarrow": False, "xref": "paper", "yref": "paper", "x": 1.0, "xanchor": "right",
                              "y": (yaxis.get("domain") or [0, 1])[0], "yanchor": "bottom",
                              "font": {"size": 11, "color": MUTED}})
        layout[f"yaxis{axis}"] = yaxis
        data += traces
    if len(panels) > 1:
        layout["margin"]["t"] = 64
        layout["xaxis"]["anchor"] = f"y{len(panels)}"
    layout["annotations"] = notes
    return {"data": data, "layout": layout}


def wide_range(runs: Sequence[RunData], compartments: Sequence[str] | None = None,
               quantity: str = "concentration", spread: float = 100.0) -> bool:
    """True when the compartments' peak values differ by more than ``spread`` times.

    The "auto" axis of a concentration panel is then logarithmic, so that a dilute
    compartment (plasma) is not drawn flat beside a concentrated one (a patch).
    """
    peaks = []
    for run in runs:
        traces = run.amount if quantity == "amount" else run.conc
        for cid in compartments or run.compartments:
            if cid in traces:
                top = float(np.nanmax(traces[cid])) if traces[cid].size else 0.0
                if np.isfinite(top) and top > 0:
                    peaks.append(top)
    return bool(peaks) and max(peaks) / min(peaks) > spread


def flux_figure(runs: Sequence[RunData], *, barriers: Sequence[str] | None = None, amount_unit: str = "mg",
                time_unit: str = "h", measured: Any = None) -> dict[str, Any]:
    """Flux into each barrier's ``to`` compartment against time, mass per cm^2 per ``time_unit``
    (with the ``flux`` series of ``measured`` data as markers)."""
    return _barrier_figure(runs, barriers, amount_unit, time_unit, "flux", f"{amount_unit}/(cm² {time_unit})",
                           "Run the scenario to see the flux through each barrier.",
                           "Flux into the receiving compartment", "flux",
                           per_time=1.0 / unit_factor("time", time_unit), measured=measured)


def permeated_figure(runs: Sequence[RunData], *, barriers: Sequence[str] | None = None, amount_unit: str = "mg",
                     time_unit: str = "h", measured: Any = None) -> dict[str, Any]:
    """Cumulative amount per area that has crossed each barrier (net), against time (with the
    ``permeated`` series of ``measured`` data as markers)."""
    return _barrier_figure(runs, barriers, amount_unit, time_unit, "permeated", f"{amount_unit}/cm²",
                           "Run the scenario to see the cumulative amount permeated.",
                           "Cumulative amount permeated (net)", "permeated", measured=measured)


def _barrier_figure(runs: Sequence[RunData], barriers: Sequence[str] | None, amount_unit: str, time_unit: str,
                    attr: str, unit: str, empty_text: str, title: str, y_name: str,
                    per_time: float = 1.0, measured: Any = None) -> dict[str, Any]:
    """One line per barrier and run of the per-area trace ``attr`` (``flux`` or ``permeated``)."""
    if not runs:
        return empty_figure(empty_text)
    ft = unit_factor("time", time_unit)
    fa = unit_factor("amount", amount_unit)
    order = list(barriers) if barriers is not None else list(runs[0].barriers)
    many = len(runs) > 1
    data = []
    for r_i, run in enumerate(runs):
        for b_i, bid in enumerate(order):
            b = run.barriers.get(bid)
            if b is None:
                continue
            data.append({
                "type": "scatter", "mode": "lines", "x": (run.times * ft).tolist(),
                "y": (getattr(b, attr) * fa * per_time).tolist(), "name": _label(f"{bid} → {b.to_id}", run, many),
                "legendgroup": bid, "line": {"color": color(b_i), "dash": dash(r_i), "width": 2.2},
                "hovertemplate": f"{bid} · {run.name}<br>%{{x:.4g}} {time_unit}: %{{y:.4g}} "
                                 f"{unit}<extra></extra>"})
    if not data:
        return empty_figure("This scenario has no barrier.")
    molar = next((r.molar_mass for r in runs if r.molar_mass), None)
    data += measured_traces(measured, attr, order, unit=amount_unit, time_unit=time_unit, molar_mass=molar,
                            per_time=attr == "flux", colours={bid: color(i) for i, bid in enumerate(order)})
    return {"data": data, "layout": _layout(title, f"time [{time_unit}]", f"{y_name} [{unit}]")}


def _layer_shapes(interfaces: Sequence[float], names: Sequence[str]) -> tuple[list[dict], list[dict]]:
    """Shaded bands for the layers and dotted lines at the interfaces (x in um)."""
    shapes, notes = [], []
    xs = [x * UM_PER_CM for x in interfaces]
    for i in range(len(xs) - 1):
        shapes.append({"type": "rect", "xref": "x", "yref": "paper", "x0": xs[i], "x1": xs[i + 1],
                       "y0": 0, "y1": 1, "fillcolor": LAYER_FILLS[i % len(LAYER_FILLS)], "opacity": 0.75,
                       "line": {"width": 0}, "layer": "below"})
        name = names[i] if i < len(names) else f"layer {i + 1}"
        notes.append({"x": (xs[i] + xs[i + 1]) / 2, "y": 1.0, "xref": "x", "yref": "paper", "yanchor": "bottom",
                      "text": name, "showarrow": False, "font": {"size": 11, "color": MUTED}})
    for x in xs[1:-1]:
        shapes.append({"type": "line", "xref": "x", "yref": "paper", "x0": x, "x1": x, "y0": 0, "y1": 1,
                       "line": {"color": MUTED, "width": 1, "dash": "dot"}})
    return shapes, notes


def profile_figure(runs: Sequence[RunData], barrier: str, time: float, *, unit: str = "mg/mL",
                   time_unit: str = "h", steady: Any = None) -> dict[str, Any]:
    """Concentration through a barrier at the saved time nearest to ``time`` (h).

    Each layer is drawn as its own line through the cell centres, so that the jump at an
    interface (from the partition coefficients) shows as a step between two lines; the layers
    are shaded and named. ``steady`` (a :class:`barrierflow.analysis.steady.BarrierSteady`) adds
    the steady profile, dotted.
    """
    runs = [r for r in runs if barrier in r.barriers]
    if not runs:
        return empty_figure("Run a scenario with this barrier to see its profile.")
    first = runs[0].barriers[barrier]
    if first.model == "steady" or first.profile_x.size == 0:
        return empty_figure(f"Barrier '{barrier}' is quasi-steady: it stores nothing, so it has no profile.")
    ft = unit_factor("time", time_unit)
    many = len(runs) > 1
    data = []
    shown_time = None
    for r_i, run in enumerate(runs):
        b = run.barriers[barrier]
        k = int(np.argmin(np.abs(b.profile_times - time)))
        shown_time = b.profile_times[k] if shown_time is None else shown_time
        fy = unit_factor("concentration", unit, run.molar_mass)
        x_um = b.profile_x * UM_PER_CM
        conc = b.profile_conc[k] * fy
        for layer in range(len(b.interfaces) - 1):
            sel = b.profile_layer == layer
            if not np.any(sel):
                continue
            data.append({
                "type": "scatter", "mode": "lines+markers" if sel.sum() <= 40 else "lines",
                "x": x_um[sel].tolist(), "y": conc[sel].tolist(),
                "name": _label(f"at {b.profile_times[k] * ft:.4g} {time_unit}", run, many),
                "legendgroup": run.name, "showlegend": layer == 0,
                "line": {"color": color(r_i), "dash": dash(r_i), "width": 2.4}, "marker": {"size": 4},
                "hovertemplate": f"{run.name}, {b.layer_names[layer]}<br>x = %{{x:.4g}} µm: %{{y:.4g}} {unit}"
                                 "<extra></extra>"})
    if steady is not None and getattr(steady, "profile", None) is not None:
        fy = unit_factor("concentration", unit, runs[0].molar_mass)
        p = steady.profile
        xs = np.asarray(p.x) * UM_PER_CM
        cs = np.asarray(p.conc) * fy
        ls = np.asarray(p.layer)
        for layer in sorted(set(ls.tolist())):
            sel = ls == layer
            data.append({"type": "scatter", "mode": "lines", "x": xs[sel].tolist(), "y": cs[sel].tolist(),
                         "name": "steady state (held source, perfect sink)", "legendgroup": "steady",
                         "showlegend": layer == 0, "line": {"color": INK, "dash": "dot", "width": 1.6},
                         "hovertemplate": f"steady<br>x = %{{x:.4g}} µm: %{{y:.4g}} {unit}<extra></extra>"})
    layout = _layout(f"Concentration through '{barrier}' at {shown_time * ft:.4g} {time_unit}",
                     f"depth from the '{first.from_id}' side [µm]", f"concentration in the layer [{unit}]")
    layout["uirevision"] = f"profile-{barrier}"
    shapes, notes = _layer_shapes(first.interfaces, first.layer_names)
    layout["shapes"] = shapes
    layout["annotations"] = notes
    layout["margin"]["t"] = 64
    layout["xaxis"]["range"] = [0, first.interfaces[-1] * UM_PER_CM]
    top = max((max(t["y"]) for t in data if t["y"]), default=1.0)
    layout["yaxis"]["range"] = [0, top * 1.08 if top > 0 else 1.0]
    return {"data": data, "layout": layout}


def steady_profile_figure(steady: Any, *, unit: str = "mg/mL", molar_mass: float | None = None,
                          names: Sequence[str] = (), height: int = 230) -> dict[str, Any]:
    """The steady profile of one barrier (a ``BarrierSteady``), layers shaded."""
    if steady is None:
        return empty_figure("Fix the layer values to see the steady state.", height=height)
    fy = unit_factor("concentration", unit, molar_mass)
    p = steady.profile
    xs = np.asarray(p.x) * UM_PER_CM
    cs = np.asarray(p.conc) * fy
    ls = np.asarray(p.layer)
    data = []
    for layer in sorted(set(ls.tolist())):
        sel = ls == layer
        data.append({"type": "scatter", "mode": "lines", "x": xs[sel].tolist(), "y": cs[sel].tolist(),
                     "showlegend": False, "line": {"color": color(0), "width": 2.4},
                     "hovertemplate": f"x = %{{x:.4g}} µm: %{{y:.4g}} {unit}<extra></extra>"})
    layout = _layout("Steady profile", "depth [µm]", f"conc. [{unit}]", height=height, legend=False)
    layout["margin"] = {"l": 64, "r": 10, "t": 52, "b": 44}
    interfaces = [0.0] + [float(x) for x in np.cumsum([ly.thickness for ly in steady.layers])]
    shapes, notes = _layer_shapes(interfaces, names or [ly.name for ly in steady.layers])
    layout["shapes"], layout["annotations"] = shapes, notes
    layout["xaxis"]["range"] = [0, interfaces[-1] * UM_PER_CM]
    return {"data": data, "layout": layout}


def stack_figure(layers: Sequence[Mapping[str, Any]], height: int = 150) -> dict[str, Any]:
    """A drawing of a barrier's layer stack to scale (thickness in um), ``from`` side at the left.

    ``layers`` are mappings with ``name`` and ``thickness`` (cm, or None when not valid).
    """
    data = []
    total = 0.0
    for i, layer in enumerate(layers):
        t = layer.get("thickness")
        name = layer.get("name") or f"layer {i + 1}"
        if t is None or not np.isfinite(t) or t <= 0:
            continue
        t_um = t * UM_PER_CM
        data.append({"type": "bar", "orientation": "h", "x": [t_um], "y": ["stack"], "base": [total],
                     "name": f"{i + 1}. {name} ({t_um:.4g} µm)",
                     "marker": {"color": LAYER_FILLS[i % len(LAYER_FILLS)], "line": {"color": INK, "width": 1.2},
                                "pattern": {"shape": ("", "/", ".", "x", "\\", "+")[i % 6], "fgcolor": MUTED,
                                            "size": 6, "solidity": 0.15}},
                     "hovertemplate": f"{name}: {t_um:.4g} µm<extra></extra>"})
        total += t_um
    if not data:
        return empty_figure("No layer with a valid thickness.", height=height)
    layout = _layout("Layer stack to scale", "depth from the 'from' side [µm]", "", height=height)
    layout.update(barmode="overlay", bargap=0.25)
    rows = (len(data) + 1) // 2
    layout["margin"] = {"l": 16, "r": 16, "t": 34, "b": 58 + 20 * rows}
    layout["legend"] = {"orientation": "h", "yref": "container", "y": 0, "yanchor": "bottom", "x": 0,
                        "font": {"size": 11}}
    layout["yaxis"].update(type="category", showticklabels=False, showline=False, ticks="")
    layout["xaxis"]["range"] = [0, total]
    layout["height"] = height + 20 * rows
    return {"data": data, "layout": layout}


def balance_parts(run: RunData) -> tuple[list[tuple[str, np.ndarray]], np.ndarray]:
    """Where the substance of a run is at each time (mg), and what entered in all (mg).

    The parts are the amount in each (non-held) compartment and inside each resolved barrier,
    what was eliminated, degraded, removed (replace and remove doses), taken by samples, lost to
    the air and taken up by held sinks. What entered is the starting amount, the doses and what held sources supplied.
    Their sum equals what entered when mass is conserved.
    """
    parts: list[tuple[str, np.ndarray]] = []
    for cid in run.compartments:
        if not run.held.get(cid):
            parts.append((f"in {cid}", run.amount[cid]))
    for bid, b in run.barriers.items():
        if b.model != "steady":
            parts.append((f"inside barrier {bid}", b.content))
    zeros = np.zeros_like(run.times)
    parts += [("eliminated", sum((run.eliminated[c] for c in run.compartments), zeros)),
              ("degraded in barriers", sum((b.degraded for b in run.barriers.values()), zeros)),
              ("removed (replace, remove)", sum((run.removed[c] for c in run.compartments), zeros))]
    if run.sampled and any(np.any(v) for v in run.sampled.values()):
        parts.append(("taken by samples", sum((run.sampled[c] for c in run.compartments), zeros)))
    if run.lost and any(np.any(v) for v in run.lost.values()):
        parts.append(("lost to the air", sum((run.lost[c] for c in run.compartments), zeros)))
    entered = np.full_like(run.times, run.initial_amount)
    for cid in run.compartments:
        dosed = run.dosed[cid]
        if run.held.get(cid):
            parts.append((f"taken up by held {cid}", np.maximum(-dosed, 0.0)))
            entered = entered + np.maximum(dosed, 0.0)
        else:
            entered = entered + dosed
    return parts, entered


def balance_figure(runs: RunData | Sequence[RunData], *, amount_unit: str = "mg",
                   time_unit: str = "h") -> dict[str, Any]:
    """Where the substance is at each time: stacked areas, with what entered as a dashed line.

    One panel per run, side by side on a shared amount axis (at most four runs). The stack
    meets the line when mass is conserved (see :func:`balance_parts`).
    """
    runs = [runs] if isinstance(runs, RunData) else list(runs)[:4]
    if not runs:
        return empty_figure("Run the scenario to see where the dose goes.")
    ft = unit_factor("time", time_unit)
    fa = unit_factor("amount", amount_unit)
    n = len(runs)
    gap = 0.04
    width = (1 - gap * (n - 1)) / n
    data: list[dict[str, Any]] = []
    colour_of: dict[str, int] = {}
    shown: set[str] = set()
    annotations = []
    for k, run in enumerate(runs):
        axis = "" if k == 0 else str(k + 1)
        t = (run.times * ft).tolist()
        parts, entered = balance_parts(run)
        for label, values in parts:
            if not np.any(np.abs(values) > 0):
                continue
            i = colour_of.setdefault(label, len(colour_of))
            data.append({"type": "scatter", "mode": "lines", "x": t, "y": (values * fa).tolist(), "name": label,
                         "legendgroup": label, "showlegend": label not in shown, "xaxis": f"x{axis}",
                         "yaxis": f"y{axis}", "stackgroup": f"where{k}", "line": {"width": 1.2, "color": color(i)},
                         "fillcolor": _rgba(color(i), 0.55),
                         "fillpattern": {"shape": ("", "/", ".", "x", "\\", "+", "-", "|")[i % 8],
                                         "bgcolor": _rgba(color(i), 0.55), "fgcolor": _rgba("#1d2733", 0.45),
                                         "size": 8, "solidity": 0.15},
                         "hovertemplate": f"{run.name}: {label}<br>%{{x:.4g}} {time_unit}: %{{y:.4g}} {amount_unit}"
                                          "<extra></extra>"})
            shown.add(label)
        data.append({"type": "scatter", "mode": "lines", "x": t, "y": (entered * fa).tolist(),
                     "name": "entered in all (start + doses + held sources)", "legendgroup": "entered",
                     "showlegend": k == 0, "xaxis": f"x{axis}", "yaxis": f"y{axis}",
                     "line": {"color": INK, "dash": "dash", "width": 2},
                     "hovertemplate": f"{run.name}: entered<br>%{{x:.4g}} {time_unit}: %{{y:.4g}} {amount_unit}"
                                      "<extra></extra>"})
        err = run.mass_balance.get("relative_error", float("nan"))
        annotations.append({"text": f"{run.name} (balance error {err:.1e})", "showarrow": False,
                            "xref": f"x{axis} domain", "yref": "paper", "x": 0, "y": 1.0, "xanchor": "left",
                            "yanchor": "bottom", "font": {"size": 13, "color": INK}})
    title = "Where the substance is" + (f": {runs[0].name}" if n == 1 else ", run by run")
    layout = _layout(title, f"time [{time_unit}]", f"amount [{amount_unit}]", height=420)
    layout["uirevision"] = "balance"
    layout["margin"]["t"] = 70
    base_x, base_y = layout["xaxis"], layout["yaxis"]
    for k in range(n):
        axis = "" if k == 0 else str(k + 1)
        x = dict(base_x, domain=[k * (width + gap), k * (width + gap) + width], anchor=f"y{axis}")
        y = dict(base_y, anchor=f"x{axis}")
        if k:
            y.update(matches="y", showticklabels=False, title={"text": ""})
        layout[f"xaxis{axis}"] = x
        layout[f"yaxis{axis}"] = y
    layout["annotations"] = annotations
    return {"data": data, "layout": layout}


def dose_timeline_figure(rows: Sequence[Mapping[str, Any]], duration: float | None, *,
                         time_unit: str = "h") -> dict[str, Any]:
    """A strip showing when each dose event happens.

    ``rows`` are mappings with ``label`` (str), ``kind``, ``starts`` (list of h) and ``length``
    (h or None: an instant). Instants are drawn as markers, infusions and holds as bars.
    """
    if not rows:
        return empty_figure("No doses yet: add one in the table.", height=150)
    ft = unit_factor("time", time_unit)
    symbols = {"bolus": "triangle-down", "replace": "diamond", "remove": "x-thin-open", "infusion": "square",
               "hold": "square", "sample": "triangle-up-open"}
    data = []
    labels = []
    for i, row in enumerate(rows):
        label = row["label"]
        labels.append(label)
        starts = [s * ft for s in row.get("starts", [])]
        length = row.get("length")
        col = color(i)
        if length:
            data.append({"type": "bar", "orientation": "h", "y": [label] * len(starts),
                         "x": [length * ft] * len(starts), "base": starts,
                         "marker": {"color": col, "opacity": 0.45, "line": {"color": col, "width": 1}},
                         "name": label, "showlegend": False, "width": 0.5,
                         "hovertemplate": f"{label}<br>from %{{base:.4g}} {time_unit} for %{{x:.4g}} {time_unit}"
                                          "<extra></extra>"})
        data.append({"type": "scatter", "mode": "markers", "y": [label] * len(starts), "x": starts,
                     "marker": {"symbol": symbols.get(row.get("kind"), "circle"), "size": 11, "color": col,
                                "line": {"color": INK, "width": 1}},
                     "name": label, "showlegend": False,
                     "hovertemplate": f"{label}<br>at %{{x:.4g}} {time_unit}<extra></extra>"})
    layout = _layout("When each dose happens", f"time [{time_unit}]", "", height=110 + 34 * len(rows), legend=False)
    layout["margin"] = {"l": 200, "r": 18, "t": 40, "b": 48}
    layout["yaxis"].update(type="category", autorange="reversed", categoryorder="array", categoryarray=labels)
    layout["barmode"] = "overlay"
    if duration:
        layout["xaxis"]["range"] = [0, duration * ft]
    return {"data": data, "layout": layout}
