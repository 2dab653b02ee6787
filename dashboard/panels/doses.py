"""Dosing: the table of dose events and a timeline strip of when each one happens."""

from __future__ import annotations

from typing import Any

import dash_ag_grid as dag
from dash import Input, Output, State, ctx, html, no_update
from dash.exceptions import PreventUpdate

from barrierflow.errors import ScenarioError, UnitsError
from barrierflow.model import DOSE_KINDS, DOSE_OPTIONS, Dose
from barrierflow.units import parse_quantity

from .. import draft as D
from .. import ids
from ..figures import dose_timeline_figure
from .common import edited_rows, graph, message_list

VALUE_COLUMNS = [
    ("amount", "Amount", "bolus: mass, e.g. 2 mg, or per area of the target's barrier, e.g. 50 ug/cm^2"),
    ("concentration", "Concentration", "replace, hold: e.g. 20 mg/mL"),
    ("rate", "Rate", "infusion: mass per time, e.g. 0.1 mg/h"),
    ("duration", "Duration", "infusion, hold: e.g. 8 h"),
    ("at", "At", "first time, e.g. 0 h"),
    ("every", "Every", "repeat interval, e.g. 24 h; empty: once"),
    ("count", "Count", "how many in all; empty: until the end"),
    ("volume", "Volume", "sample: the aliquot, e.g. 0.5 mL"),
    ("replace", "Replace", "sample: true (the default) refills with fresh medium; false lets the volume shrink"),
    ("fraction", "Fraction", "remove: the share of the content removed, e.g. 0.9; empty: 1"),
    ("ends_contact", "Ends contact", "remove: true makes the barrier faces no-flux afterwards; empty: false"),
]
KIND_HELP = {
    "bolus": "adds the amount at once",
    "infusion": "adds at a constant rate for the duration",
    "hold": "clamps the concentration for the duration (infinite dose)",
    "replace": "empties and refills at the concentration (fresh patch)",
    "remove": "empties the compartment, or a fraction of it (wash-off)",
    "sample": "withdraws an aliquot, replaced by fresh medium unless replace is false",
}


def column_defs(targets: list[str]) -> list[dict[str, Any]]:
    """Columns of the dose grid; cells a kind does not use are greyed."""
    cols: list[dict[str, Any]] = [
        {"headerName": "#", "valueGetter": {"function": "params.node.rowIndex + 1"}, "width": 52, "editable": False,
         "cellClass": "row-number", "suppressMovable": True},
        {"field": "target", "headerName": "Target", "editable": True, "minWidth": 120, "flex": 1,
         "cellEditor": "agSelectCellEditor", "cellEditorParams": {"values": targets},
         "headerTooltip": "the compartment dosed", "suppressMovable": True,
         "cellClassRules": {"cell-invalid": "params.data._errors && params.data._errors.target"},
         "tooltipValueGetter": {"function": "params.data._errors ? params.data._errors.target : null"}},
        {"field": "kind", "headerName": "Kind", "editable": True, "minWidth": 105, "flex": 1,
         "cellEditor": "agSelectCellEditor", "cellEditorParams": {"values": list(DOSE_KINDS)},
         "headerTooltip": "; ".join(f"{k}: {v}" for k, v in KIND_HELP.items()), "suppressMovable": True,
         "cellClassRules": {"cell-invalid": "params.data._errors && params.data._errors.kind"},
         "tooltipValueGetter": {"function": "params.data._errors ? params.data._errors.kind : null"}},
    ]
    for name, label, hint in VALUE_COLUMNS:
        used = [k for k, fields in DOSE_KINDS.items() if name in fields or name in DOSE_OPTIONS.get(k, ())]
        rules = {"cell-invalid": f"params.data._errors && params.data._errors.{name}"}
        if used:
            rules["cell-unused"] = f"!{used!r}.includes(params.data.kind)".replace("'", '"')
        cols.append({"field": name, "headerName": label, "headerTooltip": hint, "editable": True, "minWidth": 95,
                     "flex": 1, "suppressMovable": True, "cellClassRules": rules,
                     "tooltipValueGetter": {"function": f"params.data._errors ? params.data._errors.{name} : null"}})
    return cols


def grid_rows(d: dict[str, Any], messages: dict[str, list[str]] | None = None) -> list[dict[str, Any]]:
    """Rows of the dose grid, each with ``_errors`` (field -> message) when refused."""
    messages = messages or {}
    rows = []
    for i, dose in enumerate(d.get("doses", [])):
        row = {k: dose.get(k, "") for k in ("key", *D.DOSE_FIELDS)}
        errs = {n: " ".join(messages[f"d:{i}:{n}"]) for n in D.DOSE_FIELDS if messages.get(f"d:{i}:{n}")}
        row["_errors"] = errs or None
        rows.append(row)
    return rows


def _plain(row: dict[str, Any]) -> dict[str, Any]:
    """A grid row reduced to what the draft decides (values as text, and the error marks)."""
    out: dict[str, Any] = {k: "" if row.get(k) is None else str(row.get(k)) for k in ("key", *D.DOSE_FIELDS)}
    out["_errors"] = row.get("_errors") or None
    return out


def timeline_rows(d: dict[str, Any]) -> tuple[list[dict[str, Any]], float | None]:
    """The events of each valid dose row, for :func:`dashboard.figures.dose_timeline_figure`."""
    doc = D.to_document(d)
    try:
        duration = parse_quantity(doc["scenario"].get("duration", ""), "time")
    except UnitsError:
        duration = None
    mm = None
    try:
        if "molar_mass" in doc.get("substance", {}):
            mm = parse_quantity(doc["substance"]["molar_mass"], "molar_mass")
    except UnitsError:
        mm = None
    rows = []
    for i, table in enumerate(doc.get("dose", [])):
        try:
            dose = Dose.from_mapping(table, mm)
        except ScenarioError:
            continue
        end = duration if duration is not None else (dose.at + (dose.every or 0) * max((dose.count or 1) - 1, 0))
        label = f"{i + 1}. {dose.kind} → {dose.target}"
        rows.append({"label": label, "kind": dose.kind, "starts": list(dose.start_times(end)),
                     "length": dose.duration if dose.kind in ("infusion", "hold") else None})
    return rows, duration


def layout(initial: dict[str, Any]) -> html.Div:
    """The dosing card's body."""
    targets = [c["id"] for c in initial["compartments"]]
    return html.Div([
        html.Div([
            html.Button("+ Dose", id=ids.DOSE_ADD, className="btn"),
            html.Button("Remove selected dose", id=ids.DOSE_REMOVE, className="btn danger-outline"),
            html.Span("Kinds: " + "; ".join(f"{k}: {v}" for k, v in KIND_HELP.items()), className="fine-print"),
        ], className="toolbar"),
        dag.AgGrid(
            id=ids.DOSE_GRID, columnDefs=column_defs(targets), rowData=grid_rows(initial),
            defaultColDef={"resizable": True}, getRowId="params.data.key",
            dashGridOptions={"rowSelection": {"mode": "singleRow", "checkboxes": False, "enableClickSelection": True},
                             "domLayout": "autoHeight", "stopEditingWhenCellsLoseFocus": True,
                             "tooltipShowDelay": 200},
            className="dose-grid", style={"width": "100%"}),
        html.Div("Greyed cells are not used by the dose's kind. Every time and amount carries its unit.",
                 className="fine-print"),
        html.Div(id=ids.DOSE_MESSAGES, className="field-message block", role="alert"),
        graph(ids.DOSE_TIMELINE),
    ])


def register(app: Any, services: Any) -> None:
    """Attach the dosing panel's callbacks."""

    @app.callback(
        Output(ids.DOSE_GRID, "rowData"),
        Input(ids.LOADED, "data"),
        State(ids.DRAFT, "data"),
        State(ids.CHECK, "data"),
        prevent_initial_call=True,
    )
    def reload(_loaded, d, found):
        return grid_rows(d, (found or {}).get("messages"))

    @app.callback(
        Output(ids.DOSE_GRID, "columnDefs"),
        Input(ids.DRAFT, "data"),
        State(ids.DOSE_GRID, "columnDefs"),
    )
    def targets(d, current):
        new = column_defs([c.get("id", "") for c in d["compartments"]])
        if current and current[1].get("cellEditorParams") == new[1]["cellEditorParams"]:
            raise PreventUpdate
        return new

    @app.callback(
        Output(ids.DRAFT, "data", allow_duplicate=True),
        Output(ids.DOSE_GRID, "rowData", allow_duplicate=True),
        Output(ids.DELETE_NOTE, "children", allow_duplicate=True),
        Input(ids.DOSE_GRID, "cellValueChanged"),
        Input(ids.DOSE_ADD, "n_clicks"),
        Input(ids.DOSE_REMOVE, "n_clicks"),
        State(ids.DOSE_GRID, "selectedRows"),
        State(ids.DRAFT, "data"),
        prevent_initial_call=True,
    )
    def edit(changed, _add, _remove, picked, d):
        keys = [x["key"] for x in d["doses"]]
        trigger = ctx.triggered_id
        if trigger == ids.DOSE_GRID:
            rows = edited_rows(changed, d["doses"], D.DOSE_FIELDS)
            if rows is None:
                raise PreventUpdate
            return D.set_doses(d, rows), no_update, no_update
        note = no_update
        if trigger == ids.DOSE_ADD:
            new = D.add_dose(d)
        elif trigger == ids.DOSE_REMOVE:
            if not picked or picked[0].get("key") not in keys:
                raise PreventUpdate
            index = keys.index(picked[0]["key"])
            new = D.remove_dose(d, index)
            dose = d["doses"][index]
            note = (f"Removed dose {index + 1} ({dose.get('kind') or 'dose'} on '{dose.get('target') or ''}'). "
                    "Undo (↶ at the top, or Ctrl+Z) brings it back.")
        else:
            raise PreventUpdate
        _, found = D.check(new)
        return new, grid_rows(new, found["messages"]), note

    @app.callback(
        Output(ids.DOSE_MESSAGES, "children"),
        Output(ids.DOSE_TIMELINE, "figure"),
        Output(ids.DOSE_GRID, "rowData", allow_duplicate=True),
        Input(ids.CHECK, "data"),
        State(ids.DRAFT, "data"),
        State(ids.DOSE_GRID, "rowData"),
        prevent_initial_call="initial_duplicate",
    )
    def feedback(found, d, rows):
        msgs = (found or {}).get("messages", {})
        listed = []
        for i in range(len(d["doses"])):
            for n in D.DOSE_FIELDS:
                listed += msgs.get(f"d:{i}:{n}", [])
        new_rows = grid_rows(d, msgs)
        same = [_plain(r) for r in new_rows] == [_plain(r) for r in rows or []]
        events, duration = timeline_rows(d)
        return message_list(listed), dose_timeline_figure(events, duration), no_update if same else new_rows
