"""The network editor: a canvas of compartments and links, with its toolbar and legend."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import dash_cytoscape as cyto
from dash import Input, Output, State, ctx, dcc, html, no_update
from dash.exceptions import PreventUpdate

from .. import draft as D
from .. import ids
from ..palette import LINK_STYLE, cytoscape_stylesheet, legend_svg

KIND_WORDS = {"barrier": "Barrier (layers)", "exchange": "Exchange (two-way flow)", "transfer": "Transfer (one-way)"}


def elements(d: Mapping[str, Any], positions: Mapping[str, Mapping[str, float]] | None = None,
             selected: str | None = None, pending: str | None = None) -> list[dict[str, Any]]:
    """Canvas elements of a draft.

    Parameters
    ----------
    d : dict
        The draft.
    positions : mapping, optional
        Current node positions by compartment key (from the canvas); the draft's own positions
        are used for nodes not in it.
    selected : str, optional
        ``"c:<key>"`` or ``"l:<key>"`` of the selected element.
    pending : str, optional
        Key of the compartment a click-drawn link starts from.
    """
    positions = positions or {}
    out: list[dict[str, Any]] = []
    for c in d.get("compartments", []):
        key = c["key"]
        held = bool(c.get("held_concentration", "").strip())
        if held:
            sub = f"held at {c['held_concentration']}"
        else:
            sub = c.get("volume") or "no volume"
        pos = positions.get(key) or d.get("positions", {}).get(key) or {"x": 100.0, "y": 100.0}
        out.append({
            "data": {"id": key, "label": f"{c.get('id') or '(no id)'}\n{sub}", "held": "yes" if held else "no",
                     "pending": "yes" if pending == key else "no"},
            "position": {"x": float(pos["x"]), "y": float(pos["y"])},
            "selected": selected == f"c:{key}",
        })
    for link in d.get("links", []):
        label = link.get("id") or "(no id)"
        if link["kind"] == "barrier":
            n = len(link.get("layers", []))
            label += f" · {n} layer{'s' if n != 1 else ''}"
        elif link["kind"] == "exchange":
            label += f" · {link.get('flow', '')}"
        else:
            label += f" · {link.get('rate', '')}"
        out.append({
            "data": {"id": link["key"], "source": link["from"], "target": link["to"], "kind": link["kind"],
                     "label": label},
            "selected": selected == f"l:{link['key']}",
        })
    return out


def canvas_positions(current: list[dict[str, Any]] | None) -> dict[str, dict[str, float]]:
    """Node positions by key from the canvas's ``elements`` (after the user dragged them)."""
    out = {}
    for el in current or []:
        pos = el.get("position")
        data = el.get("data", {})
        if pos and "source" not in data and "id" in data:
            out[data["id"]] = {"x": float(pos["x"]), "y": float(pos["y"])}
    return out


def free_spot(positions: Mapping[str, Mapping[str, float]]) -> dict[str, float]:
    """Where to put a new compartment: right of the others, wrapping to a new row."""
    if not positions:
        return {"x": 110.0, "y": 80.0}
    xs = [p["x"] for p in positions.values()]
    ys = [p["y"] for p in positions.values()]
    x = max(xs) + 250.0
    y = min(ys)
    if x > min(xs) + 2 * 250.0 + 1:
        x, y = min(xs), max(ys) + 120.0
    return {"x": x, "y": y}


def element_options(d: Mapping[str, Any]) -> list[dict[str, str]]:
    """Options of the 'edit' picker: every compartment, then every link."""
    name_of = {c["key"]: c.get("id") or "(no id)" for c in d.get("compartments", [])}
    opts = [{"label": f"Compartment {name_of[c['key']]}", "value": f"c:{c['key']}"} for c in d.get("compartments", [])]
    for link in d.get("links", []):
        opts.append({"label": f"{link['kind'].capitalize()} {link.get('id') or '(no id)'}: "
                              f"{name_of.get(link['from'], '?')} → {name_of.get(link['to'], '?')}",
                     "value": f"l:{link['key']}"})
    return opts


def legend() -> html.Div:
    """The legend of the canvas drawing."""
    items = [("compartment", "compartment: a well-mixed volume"),
             ("held", "held compartment: fixed concentration (reservoir or perfect sink), double border")]
    items += [(kind, LINK_STYLE[kind][5]) for kind in ("barrier", "exchange", "transfer")]
    return html.Div([html.Div([html.Img(src=legend_svg(k), alt=k, width=60, height=32), html.Span(text)],
                              className="legend-item") for k, text in items],
                    id=ids.LEGEND, className="legend", **{"aria-label": "legend of the network drawing"})


def layout(initial: dict[str, Any]) -> html.Div:
    """The network card's body."""
    comp_opts = [{"label": c["id"], "value": c["key"]} for c in initial["compartments"]]
    return html.Div([
        html.Div([
            html.Button("+ Compartment", id=ids.ADD_COMPARTMENT, className="btn"),
            html.Button("Delete selected", id=ids.DELETE, className="btn danger-outline"),
            html.Button("Tidy layout", id=ids.TIDY, className="btn"),
        ], className="toolbar"),
        html.Div([
            html.Span("Connect", className="toolbar-label"),
            dcc.Dropdown(id=ids.LINK_KIND, clearable=False, value="barrier", searchable=False,
                         options=[{"label": KIND_WORDS[k], "value": k} for k in KIND_WORDS], className="pick-kind"),
            html.Span("from", className="toolbar-label"),
            dcc.Dropdown(id=ids.LINK_FROM, options=comp_opts, placeholder="compartment", className="pick-comp"),
            html.Span("to", className="toolbar-label"),
            dcc.Dropdown(id=ids.LINK_TO, options=comp_opts, placeholder="compartment", className="pick-comp"),
            html.Button("Connect", id=ids.CONNECT, className="btn primary"),
            dcc.Checklist(id=ids.CLICK_CONNECT, options=[{"label": " connect by clicking two compartments",
                                                         "value": "on"}],
                          value=[], className="click-connect"),
        ], className="toolbar"),
        cyto.Cytoscape(
            id=ids.CANVAS, elements=elements(initial), layout={"name": "preset", "fit": True, "padding": 40},
            stylesheet=cytoscape_stylesheet(), style={"width": "100%", "height": "430px"},
            minZoom=0.35, maxZoom=1.6, autoRefreshLayout=True, boxSelectionEnabled=False,
            className="canvas", responsive=True),
        html.Div(id=ids.NETWORK_MESSAGE, className="network-message", role="status"),
        legend(),
        dcc.Store(id=ids.PENDING, data=None),
    ])


def delete_note(name: str, taken: list[str]) -> str:
    """What a delete did, and how to take it back."""
    if not name:
        return ""
    if not taken:
        return f"Deleted {name}. Undo (↶ at the top, or Ctrl+Z) brings it back."
    listed = taken[0] if len(taken) == 1 else ", ".join(taken[:-1]) + " and " + taken[-1]
    return f"Deleted {name} and with it {listed}. Undo (↶ at the top, or Ctrl+Z) brings them all back."


def register(app: Any, services: Any) -> None:
    """Attach the network editor's callbacks."""

    @app.callback(
        Output(ids.CANVAS, "elements"),
        Input(ids.DRAFT, "data"),
        Input(ids.SELECT, "value"),
        Input(ids.PENDING, "data"),
        State(ids.CANVAS, "elements"),
    )
    def draw(d, selected, pending, current):
        return elements(d, canvas_positions(current), selected, pending)

    @app.callback(
        Output(ids.LINK_FROM, "options"),
        Output(ids.LINK_TO, "options"),
        Output(ids.SELECT, "options"),
        Input(ids.DRAFT, "data"),
    )
    def options(d):
        comp = [{"label": c.get("id") or "(no id)", "value": c["key"]} for c in d["compartments"]]
        return comp, comp, element_options(d)

    @app.callback(
        Output(ids.DRAFT, "data", allow_duplicate=True),
        Output(ids.SELECT, "options", allow_duplicate=True),
        Output(ids.SELECT, "value", allow_duplicate=True),
        Output(ids.NETWORK_MESSAGE, "children"),
        Output(ids.CANVAS, "elements", allow_duplicate=True),
        Output(ids.LINK_FROM, "value"),
        Output(ids.LINK_TO, "value"),
        Output(ids.DELETE_NOTE, "children", allow_duplicate=True),
        Input(ids.ADD_COMPARTMENT, "n_clicks"),
        Input(ids.DELETE, "n_clicks"),
        Input(ids.CONNECT, "n_clicks"),
        Input(ids.TIDY, "n_clicks"),
        State(ids.DRAFT, "data"),
        State(ids.SELECT, "value"),
        State(ids.LINK_KIND, "value"),
        State(ids.LINK_FROM, "value"),
        State(ids.LINK_TO, "value"),
        State(ids.CANVAS, "elements"),
        prevent_initial_call=True,
    )
    def act(_add, _delete, _connect, _tidy, d, selected, kind, from_key, to_key, current):
        # the picker's options go out with its value: a value missing from the options is dropped
        trigger = ctx.triggered_id
        positions = canvas_positions(current)
        if trigger == ids.ADD_COMPARTMENT:
            new, key = D.add_compartment(d, position=free_spot(positions))
            name = D.find(new, key)["id"]
            return (new, element_options(new), f"c:{key}", f"Added compartment {name} (1 mL); edit it on the right.",
                    no_update, no_update, no_update, no_update)
        if trigger == ids.DELETE:
            if not selected:
                return (no_update, no_update, no_update, "Select a compartment or a link first (click it).",
                        no_update, no_update, no_update, no_update)
            key = selected.split(":", 1)[1]
            item = D.find(d, key)
            if item is None:
                raise PreventUpdate
            new = D.delete(d, key)
            note = delete_note(*D.deleted_with(d, key))
            return (new, element_options(new), None, note, no_update, no_update, no_update, note)
        if trigger == ids.CONNECT:
            try:
                new, key = D.connect(d, kind, from_key, to_key)
            except ValueError as err:
                return no_update, no_update, no_update, str(err), no_update, no_update, no_update, no_update
            return (new, element_options(new), f"l:{key}", D.new_link_note(new, key), no_update, None, None, no_update)
        if trigger == ids.TIDY:
            new = dict(d)
            new["positions"] = D.tidy_positions(d)
            return (new, no_update, no_update, "Laid out the network, sources at the left.",
                    elements(new, None, selected), no_update, no_update, no_update)
        raise PreventUpdate

    @app.callback(
        Output(ids.SELECT, "options", allow_duplicate=True),
        Output(ids.SELECT, "value", allow_duplicate=True),
        Output(ids.PENDING, "data"),
        Output(ids.DRAFT, "data", allow_duplicate=True),
        Output(ids.NETWORK_MESSAGE, "children", allow_duplicate=True),
        Input(ids.CANVAS, "tapNodeData"),
        Input(ids.CANVAS, "tapEdgeData"),
        State(ids.CLICK_CONNECT, "value"),
        State(ids.PENDING, "data"),
        State(ids.DRAFT, "data"),
        State(ids.LINK_KIND, "value"),
        prevent_initial_call=True,
    )
    def tap(node, edge, click_mode, pending, d, kind):
        if ctx.triggered_id != ids.CANVAS:
            raise PreventUpdate
        prop = ctx.triggered[0]["prop_id"].split(".")[-1]
        if prop == "tapEdgeData":
            if not edge:
                raise PreventUpdate
            return element_options(d), f"l:{edge['id']}", None, no_update, no_update
        if not node:
            raise PreventUpdate
        key = node["id"]
        opts = element_options(d)
        if "on" not in (click_mode or []):
            return opts, f"c:{key}", None, no_update, no_update
        if not pending or D.find(d, pending) is None:
            name = D.find(d, key)["id"]
            return (opts, f"c:{key}", key, no_update,
                    f"Drawing a {kind} from {name}: now click the receiving compartment.")
        if pending == key:
            return opts, f"c:{key}", None, no_update, "Cancelled: a link needs two different compartments."
        new, link_key = D.connect(d, kind, pending, key)
        return element_options(new), f"l:{link_key}", None, new, D.new_link_note(new, link_key)
