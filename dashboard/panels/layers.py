"""A barrier's layer stack: the editable grid, a drawing to scale and the steady state beside it."""

from __future__ import annotations

import math
from typing import Any

import dash_ag_grid as dag
from dash import Input, Output, State, ctx, html, no_update
from dash.exceptions import PreventUpdate

from barrierflow.errors import ScenarioError
from barrierflow.model import Barrier, Compartment
from barrierflow.units import format_quantity

from .. import draft as D
from .. import ids
from ..figures import stack_figure, steady_profile_figure
from .common import edited_rows, graph, message_list

COLUMNS = [
    ("name", "Name", "free text", 118),
    ("thickness", "Thickness", "length, e.g. 15 um", 92),
    ("diffusivity", "Diffusivity", "area/time, e.g. 1e-9 cm^2/s", 112),
    ("partition", "K", "partition coefficient: bare number, e.g. 10", 62),
    ("cells", "Cells", "whole number; empty: the engine's choice", 62),
    ("degradation_rate", "Degradation", "rate, per time, e.g. 0.1 1/h; empty: none", 104),
    ("initial_concentration", "Loaded", "concentration in the layer at the start, e.g. 5 mg/mL; empty: 0", 96),
]


def column_defs() -> list[dict[str, Any]]:
    """Columns of the layer grid: every cell is text with its unit, flagged when refused."""
    cols: list[dict[str, Any]] = [{
        "headerName": "#", "valueGetter": {"function": "params.node.rowIndex + 1"}, "width": 46,
        "editable": False, "sortable": False, "cellClass": "row-number", "suppressMovable": True}]
    for name, label, hint, width in COLUMNS:
        cols.append({
            "field": name, "headerName": label, "headerTooltip": hint, "editable": True, "minWidth": width,
            "flex": 1, "sortable": False, "suppressMovable": True,
            "cellClassRules": {"cell-invalid": f"params.data._errors && params.data._errors.{name}"},
            "tooltipValueGetter": {"function": f"params.data._errors ? params.data._errors.{name} : null"},
        })
    return cols


def grid_rows(d: dict[str, Any], link_key: str, messages: dict[str, list[str]] | None = None) -> list[dict]:
    """Rows of the layer grid for a barrier, each with ``_errors`` (field -> message) when refused."""
    link = D.find(d, link_key)
    if link is None or link.get("kind") != "barrier":
        return []
    messages = messages or {}
    rows = []
    for i, layer in enumerate(link.get("layers", [])):
        row = {k: layer.get(k, "") for k in ("key", *D.LAYER_FIELDS)}
        errs = {}
        for name in D.LAYER_FIELDS:
            found = messages.get(f"y:{link_key}:{i}:{name}")
            if found:
                errs[name] = " ".join(found)
        row["_errors"] = errs or None
        rows.append(row)
    return rows


def layer_messages(d: dict[str, Any], link_key: str, messages: dict[str, list[str]]) -> list[str]:
    """Every message about the layers of a barrier, in order."""
    link = D.find(d, link_key)
    out = []
    for i in range(len(link.get("layers", [])) if link else 0):
        for name in D.LAYER_FIELDS:
            out += messages.get(f"y:{link_key}:{i}:{name}", [])
        out += messages.get(f"y:{link_key}:{i}:layer", [])
    out += messages.get(f"l:{link_key}:layers", [])
    return out


def barrier_model(d: dict[str, Any], link_key: str) -> tuple[Barrier | None, Compartment | None, Compartment | None]:
    """The barrier (and its two compartments) built from the draft alone, or None where refused.

    The steady state needs only these three, so it updates even while another part of the
    scenario (a dose, say) has a problem.
    """
    doc = D.to_document(d)
    link = D.find(d, link_key)
    if link is None:
        return None, None, None
    idx = [x["key"] for x in d["links"] if x["kind"] == "barrier"].index(link_key)
    table = doc["barrier"][idx]
    mm = None
    sub = doc.get("substance", {})
    try:
        if "molar_mass" in sub:
            from barrierflow.units import parse_quantity

            mm = parse_quantity(sub["molar_mass"], "molar_mass")
    except Exception:  # a bad molar mass is reported at its field
        mm = None
    try:
        barrier = Barrier.from_mapping(table)
    except ScenarioError:
        barrier = None
    comps = {}
    for end in ("from", "to"):
        c = D.find(d, link[end])
        comps[end] = None
        if c is not None:
            i = d["compartments"].index(c)
            try:
                comps[end] = Compartment.from_mapping(doc["compartment"][i], mm)
            except ScenarioError:
                comps[end] = None
    return barrier, comps["from"], comps["to"]


def steady_summary(barrier: Barrier | None, src: Compartment | None, dst: Compartment | None):
    """The steady state of a barrier between its compartments' starting conditions (or None)."""
    if barrier is None:
        return None
    from barrierflow.analysis.steady import barrier_steady

    c_from = src.starting_concentration if src is not None else 0.0
    k_from = src.partition if src is not None else 1.0
    k_to = dst.partition if dst is not None else 1.0
    return barrier_steady(barrier, c_from, k_from, 0.0, k_to, points_per_layer=21)


def _q(value: float, unit: str) -> str:
    if value is None or not math.isfinite(value):
        return "–"
    return f"{value:.4g} {unit}"


def steady_table(s: Any, barrier: Barrier | None) -> Any:
    """The steady-state numbers of a barrier as a small table."""
    if s is None:
        return html.Div("Fix the layer values (or the area) to see the steady state.", className="empty-note")
    total = s.resistance
    rows = [
        ("Permeability P", f"{s.permeability:.4g} cm/h  ({s.permeability / 3600:.4g} cm/s)"),
        ("Steady flux J", f"{s.steady_flux:.4g} mg/(cm² h)  with the source at "
                          f"{format_quantity(s.c_from, 'concentration', 'mg/mL')}, perfect sink"),
        ("Steady rate", f"{s.steady_flux * s.area:.4g} mg/h through {format_quantity(s.area, 'area', 'cm^2')}"),
        ("Lag time", _q(s.lag_time, "h")),
        ("Total resistance R", _q(total, "h/cm")),
    ]
    if s.fraction_through < 1:
        rows.append(("Fraction that crosses", f"{s.fraction_through:.4g} (the rest degrades)"))
    body = [html.Tr([html.Th(k), html.Td(v)]) for k, v in rows]
    per_layer = [html.Tr([html.Td(f"{i + 1}. {ly.name or f'layer {i + 1}'}"),
                          html.Td(f"{r:.4g} h/cm"), html.Td(f"{100 * r / total:.1f} %" if total > 0 else "–")])
                 for i, (ly, r) in enumerate(zip(s.layers, s.resistances, strict=True))]
    notes = [html.Li(n) for n in s.notes]
    return html.Div([
        html.Table(html.Tbody(body), className="kv-table", id="steady-numbers"),
        html.Table([html.Thead(html.Tr([html.Th("Layer"), html.Th("Resistance L/(D K)"), html.Th("Share")])),
                    html.Tbody(per_layer)], className="small-table"),
        html.Ul(notes, className="notes") if notes else None,
        html.Div("Held source at the 'from' compartment's starting concentration, perfect sink on the 'to' side.",
                 className="fine-print"),
    ])


def layout() -> html.Div:
    """The layer section of the properties card (shown for barriers)."""
    return html.Div([
        html.H3("Layers, from the 'from' side"),
        html.Div([
            html.Button("+ Layer", id=ids.LAYER_ADD, className="btn"),
            html.Button("Remove selected layer", id=ids.LAYER_REMOVE, className="btn danger-outline"),
            html.Button("↑ Move up", id=ids.LAYER_UP, className="btn"),
            html.Button("↓ Move down", id=ids.LAYER_DOWN, className="btn"),
        ], className="toolbar"),
        dag.AgGrid(
            id=ids.LAYER_GRID, columnDefs=column_defs(), rowData=[],
            defaultColDef={"resizable": True, "singleClickEdit": False},
            getRowId="params.data.key",
            dashGridOptions={"rowSelection": {"mode": "singleRow", "checkboxes": False, "enableClickSelection": True},
                             "domLayout": "autoHeight", "stopEditingWhenCellsLoseFocus": True,
                             "tooltipShowDelay": 200, "singleClickEdit": False,
                             "rowClassRules": {"row-default": f"params.data.name === '{D.DEFAULT_LAYER_NAME}'"}},
            className="layer-grid", style={"width": "100%"}),
        html.Div("Double-click a cell (or select it and press Enter) to edit; every value carries its unit.",
                 className="fine-print"),
        html.Div(id=ids.LAYER_MESSAGES, className="field-message block", role="alert"),
        html.Div([
            html.Div([graph(ids.STACK_FIGURE)], className="stack-box"),
            html.Div([html.H3("Steady state"), html.Div(id=ids.STEADY_TABLE),
                      graph(ids.STEADY_FIGURE)], className="steady-box"),
        ], className="layer-extras"),
    ], id="form-layers", className="form", style={"display": "none"})


def _selected_barrier(selected: str | None, d: dict[str, Any]) -> str | None:
    if not selected or not selected.startswith("l:"):
        return None
    item = D.find(d, selected[2:])
    return item["key"] if item is not None and item["kind"] == "barrier" else None


def register(app: Any, services: Any) -> None:
    """Attach the layer section's callbacks."""

    @app.callback(
        Output("form-layers", "style"),
        Output(ids.LAYER_GRID, "rowData"),
        Output(ids.LAYER_GRID, "selectedRows"),
        Input(ids.SELECT, "value"),
        Input(ids.LOADED, "data"),
        State(ids.DRAFT, "data"),
        State(ids.CHECK, "data"),
    )
    def show(selected, _loaded, d, found):
        key = _selected_barrier(selected, d)
        if key is None:
            return {"display": "none"}, [], []
        rows = grid_rows(d, key, (found or {}).get("messages"))
        # a barrier that still has only the layer it was made with shows that layer selected
        untouched = len(rows) == 1 and rows[0]["name"] == D.DEFAULT_LAYER_NAME
        return {}, rows, rows[:1] if untouched else []

    @app.callback(
        Output(ids.DRAFT, "data", allow_duplicate=True),
        Output(ids.LAYER_GRID, "rowData", allow_duplicate=True),
        Output(ids.DELETE_NOTE, "children", allow_duplicate=True),
        Input(ids.LAYER_GRID, "cellValueChanged"),
        Input(ids.LAYER_ADD, "n_clicks"),
        Input(ids.LAYER_REMOVE, "n_clicks"),
        Input(ids.LAYER_UP, "n_clicks"),
        Input(ids.LAYER_DOWN, "n_clicks"),
        State(ids.LAYER_GRID, "selectedRows"),
        State(ids.SELECT, "value"),
        State(ids.DRAFT, "data"),
        prevent_initial_call=True,
    )
    def edit(changed, _add, _remove, _up, _down, picked, selected, d):
        key = _selected_barrier(selected, d)
        if key is None:
            raise PreventUpdate
        link = D.find(d, key)
        keys = [layer["key"] for layer in link["layers"]]
        index = keys.index(picked[0]["key"]) if picked and picked[0].get("key") in keys else None
        trigger = ctx.triggered_id
        if trigger == ids.LAYER_GRID:
            rows = edited_rows(changed, link["layers"], D.LAYER_FIELDS)
            if rows is None:
                raise PreventUpdate
            return D.set_layers(d, key, rows), no_update, no_update
        note = no_update
        if trigger == ids.LAYER_ADD:
            new = D.add_layer(d, key, after=index)
        elif trigger == ids.LAYER_REMOVE:
            if index is None:
                raise PreventUpdate
            new = D.remove_layer(d, key, index)
            layer = link["layers"][index]
            note = (f"Removed layer {index + 1}{' (' + layer['name'] + ')' if layer.get('name') else ''} of barrier "
                    f"'{link.get('id') or ''}'. Undo (↶ at the top, or Ctrl+Z) brings it back.")
        elif trigger in (ids.LAYER_UP, ids.LAYER_DOWN):
            if index is None:
                raise PreventUpdate
            new = D.move_layer(d, key, index, -1 if trigger == ids.LAYER_UP else 1)
        else:
            raise PreventUpdate
        _, found = D.check(new)
        return new, grid_rows(new, key, found["messages"]), note

    @app.callback(
        Output(ids.LAYER_MESSAGES, "children"),
        Output(ids.STACK_FIGURE, "figure"),
        Output(ids.STEADY_TABLE, "children"),
        Output(ids.STEADY_FIGURE, "figure"),
        Output(ids.LAYER_GRID, "rowData", allow_duplicate=True),
        Input(ids.CHECK, "data"),
        Input(ids.SELECT, "value"),
        State(ids.DRAFT, "data"),
        State(ids.LAYER_GRID, "rowData"),
        prevent_initial_call=True,
    )
    def extras(found, selected, d, rows):
        key = _selected_barrier(selected, d)
        if key is None:
            raise PreventUpdate
        msgs = (found or {}).get("messages", {})
        barrier, src, dst = barrier_model(d, key)
        try:
            s = steady_summary(barrier, src, dst)
        except (ValueError, ArithmeticError):
            s = None
        link = D.find(d, key)
        stack = []
        from barrierflow.units import parse_quantity

        for layer in link["layers"]:
            try:
                t = parse_quantity(layer.get("thickness", ""), "length")
            except Exception:  # refused values are drawn as missing and flagged in the grid
                t = None
            stack.append({"name": layer.get("name"), "thickness": t})
        names = [ly.get("name") or f"layer {i + 1}" for i, ly in enumerate(link["layers"])]
        new_rows = grid_rows(d, key, msgs)
        marks = [r.get("_errors") for r in new_rows]
        old_marks = [r.get("_errors") for r in (rows or [])]
        same_rows = [r.get("key") for r in new_rows] == [r.get("key") for r in (rows or [])]
        return (message_list(layer_messages(d, key, msgs)), stack_figure(stack), steady_table(s, barrier),
                steady_profile_figure(s, names=names), no_update if (same_rows and marks == old_marks) else new_rows)
