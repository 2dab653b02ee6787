"""Small layout helpers shared by the panels: cards, labelled inputs with units and messages."""

from __future__ import annotations

import base64
from pathlib import Path
from typing import Any

from dash import dcc, html

from barrierflow.units import KINDS

from .. import ids
from ..server import DEFAULT_MAX_UPLOAD, format_size

# the unit hint shown beside an input, by kind of quantity
UNIT_HINT = {
    "length": "length, e.g. 15 um",
    "time": "time, e.g. 24 h, 15 min, 7 d",
    "area": "area, e.g. 10 cm^2",
    "volume": "volume, e.g. 5 mL, 15 L",
    "diffusivity": "area per time, e.g. 1e-9 cm^2/s",
    "concentration": "mass per volume, e.g. 20 mg/mL",
    "amount": "mass, e.g. 2 mg",
    "amount_rate": "mass per time, e.g. 0.1 mg/h",
    "flow": "volume per time, e.g. 10 L/h",
    "rate": "per time, e.g. 0.8 1/h",
    "molar_mass": "e.g. 250 g/mol",
    "number": "bare number, no unit",
    "count": "whole number",
    "flag": "true or false",
    "id": "letters, digits, _ and -",
    "text": "free text",
}


def card(title: str, *children: Any, id: str | None = None, extra: Any = None, class_name: str = "") -> html.Section:
    """A titled card; ``extra`` goes at the right of the title bar."""
    head = [html.H2(title)]
    if extra is not None:
        head.append(html.Div(extra, className="card-extra"))
    kwargs = {"id": id} if id else {}
    return html.Section([html.Div(head, className="card-head"), html.Div(list(children), className="card-body")],
                        className=f"card {class_name}".strip(), **kwargs)


def field_row(scope: str, name: str, label: str, kind: str, example: str, *, value: str = "",
              help_text: str | None = None) -> html.Div:
    """A labelled text input (debounced) with its unit hint and a message line below it."""
    hint = help_text if help_text is not None else UNIT_HINT.get(kind, "")
    unit = KINDS[kind].internal if kind in KINDS else None
    return html.Div([
        html.Label(label, htmlFor=f"field-{scope}-{name}", className="field-label"),
        html.Div([
            dcc.Input(id=ids.field(scope, name), type="text", value=value, debounce=True,
                      placeholder=f"e.g. {example}", className="field-input", spellCheck=False,
                      autoComplete="off"),
            html.Span(hint, className="field-hint", title=f"internal unit: {unit}" if unit else None),
        ], className="field-line"),
        html.Div(id=ids.field_message(scope, name), className="field-message", role="alert"),
    ], className="field-row", id=f"row-{scope}-{name}")


def labelled(label: str, component: Any, hint: str | None = None, message_id: Any = None) -> html.Div:
    """A label above any component, with an optional hint and message line."""
    parts = [html.Label(label, className="field-label"),
             html.Div([component] + ([html.Span(hint, className="field-hint")] if hint else []),
                      className="field-line")]
    if message_id is not None:
        parts.append(html.Div(id=message_id, className="field-message", role="alert"))
    return html.Div(parts, className="field-row")


def message_list(messages: list[str]) -> Any:
    """Messages as a list (empty string when there are none)."""
    if not messages:
        return ""
    return html.Ul([html.Li(m) for m in messages], className="message-list")


GRAPH_CONFIG = {
    "displaylogo": False,
    "responsive": True,
    "toImageButtonOptions": {"format": "png", "scale": 2},
    "modeBarButtonsToRemove": ["lasso2d", "select2d"],
}


def graph(id: str, figure: dict | None = None, height: int | None = None, **kwargs: Any) -> dcc.Graph:
    """A plotly graph with the dashboard's mode bar (PNG or SVG export, no logo)."""
    # Dash 4 gives a graph "height: 100%" by default, which inside a grid or flex item takes the
    # height of the item and lets the plot overflow its card; the figure's own height rules here
    kwargs["style"] = {"height": f"{height}px"} if height else {"height": "auto"}
    return dcc.Graph(id=id, figure=figure or {"data": [], "layout": {}}, config=dict(GRAPH_CONFIG), **kwargs)


def edited_rows(changed: Any, rows: list[dict[str, Any]], fields: Any) -> list[dict[str, Any]] | None:
    """Apply a grid's cell edits to copies of ``rows`` (each with a ``key``); None when none applies.

    ``changed`` is dash-ag-grid's ``cellValueChanged`` (one event or a list); only columns in
    ``fields`` are taken, and every value is kept as text (the draft holds what was typed).
    """
    events = changed if isinstance(changed, list) else [changed] if changed else []
    out = [dict(row) for row in rows]
    keys = [row["key"] for row in rows]
    touched = False
    for ev in events:
        row_key = ev.get("rowId") or (ev.get("data") or {}).get("key")
        col = ev.get("colId")
        if row_key in keys and col in fields:
            # dash-ag-grid reports the new value as "value" (older versions: "newValue")
            value = ev["value"] if "value" in ev else ev.get("newValue")
            out[keys.index(row_key)][col] = "" if value is None else str(value)
            touched = True
    return out if touched else None


def too_large(name: str, size: int, limit: int) -> str:
    """The message refusing an upload of ``size`` bytes above ``limit``."""
    return (f"{name}: file: got {format_size(size)}; the dashboard accepts files up to {format_size(limit)} "
            "(start it with --max-upload MB to accept larger ones)")


def decode_upload(contents: str, filename: str | None, limit: int = DEFAULT_MAX_UPLOAD) -> tuple[str, bytes]:
    """The name and bytes of an uploaded file (a ``data:...;base64,`` URL from ``dcc.Upload``).

    Raises
    ------
    ValueError
        With the message to show: contents that are not base64, or a file above ``limit`` bytes.
    """
    name = Path(filename or "uploaded.toml").name
    try:
        _kind, data = contents.split(",", 1)
    except ValueError:
        raise ValueError(f"{name}: file: got unreadable contents; expected a file read by the browser") from None
    if len(data) * 3 // 4 > limit + 3:
        raise ValueError(too_large(name, len(data) * 3 // 4, limit))
    try:
        raw = base64.b64decode(data, validate=True)
    except ValueError:
        raise ValueError(f"{name}: file: got unreadable contents; expected a file read by the browser") from None
    if len(raw) > limit:
        raise ValueError(too_large(name, len(raw), limit))
    return name, raw
