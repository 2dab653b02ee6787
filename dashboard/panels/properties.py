"""The properties panel: edit the selected compartment or link, each field with its unit.

The forms are always in the page (hidden when not in use), so their inputs keep their ids;
picking an element fills them from the draft, and typing writes the draft back. Messages from
the validation appear under the field they are about.
"""

from __future__ import annotations

from typing import Any

from dash import ALL, Input, Output, State, ctx, dcc, html, no_update
from dash.exceptions import PreventUpdate

from .. import draft as D
from .. import ids
from . import layers
from .common import field_row

COMPARTMENT_HELP = {
    "volume": "volume, e.g. 5 mL, 15 L, or per area of its one barrier, e.g. 10 uL/cm^2; may stay empty for a "
              "held compartment",
    "initial_concentration": "mass per volume, e.g. 20 mg/mL; empty: 0",
    "partition": "bare number, relative to the reference phase; empty: 1",
    "clearance": "volume per time, e.g. 10 L/h; empty: none",
    "vmax": "mass per time, e.g. 2 mg/h; give Km too",
    "km": "mass per volume, e.g. 0.1 mg/L; give Vmax too",
    "held_concentration": "empty for a normal compartment; '0 mg/mL' makes a perfect sink",
    "evaporation_rate": "a volatile vehicle: volume per time, e.g. 0.1 mL/h, or per area, e.g. 4 uL/(cm^2*h); "
                        "empty: none",
    "residual_volume": "what evaporation leaves, e.g. 1 uL or 0.5 uL/cm^2 (with an evaporation rate)",
    "loss_rate": "first-order loss of the solute to the air, per time, e.g. 0.2 1/h; empty: none",
}
COMPARTMENT_ORDER = ("id", "volume", "initial_concentration", "partition", "clearance", "vmax", "km",
                     "held_concentration", "evaporation_rate", "residual_volume", "loss_rate", "description")
LINK_ORDER = ("id", "area", "flow", "rate")
LINK_KIND_OF = {"area": "barrier", "flow": "exchange", "rate": "transfer"}


def _compartment_form() -> html.Div:
    rows = []
    for name in COMPARTMENT_ORDER:
        label, kind, example = D.COMPARTMENT_FIELDS[name]
        help_text = COMPARTMENT_HELP.get(name)
        rows.append(field_row("compartment", name, label, kind, example, help_text=help_text))
    return html.Div(rows, id="form-compartment", className="form", style={"display": "none"})


def _link_form() -> html.Div:
    rows = []
    labels = {"id": D.LINK_FIELDS["barrier"]["id"], "area": D.LINK_FIELDS["barrier"]["area"],
              "flow": D.LINK_FIELDS["exchange"]["flow"], "rate": D.LINK_FIELDS["transfer"]["rate"]}
    for name in LINK_ORDER:
        label, kind, example = labels[name]
        rows.append(field_row("link", name, label, kind, example))
    ends = html.Div([
        html.Div([html.Label("From", className="field-label"),
                  dcc.Dropdown(id=ids.field("link", "from"), clearable=False, className="pick-comp"),
                  html.Div(id=ids.field_message("link", "from"), className="field-message")],
                 className="field-row half"),
        html.Div([html.Label("To", className="field-label"),
                  dcc.Dropdown(id=ids.field("link", "to"), clearable=False, className="pick-comp"),
                  html.Div(id=ids.field_message("link", "to"), className="field-message")],
                 className="field-row half"),
    ], className="field-pair")
    model = html.Div([
        html.Label("Model of the barrier", className="field-label"),
        dcc.RadioItems(id=ids.field("link", "model"), inline=True, value="resolved",
                       options=[{"label": " resolved: diffusion solved in every layer", "value": "resolved"},
                                {"label": " quasi-steady: resistance only, no storage", "value": "steady"}],
                       className="radio"),
        html.Div(id=ids.field_message("link", "model"), className="field-message"),
    ], className="field-row", id="row-link-model")
    return html.Div([html.Div(id="link-kind-note", className="kind-note"), ends] + rows + [model],
                    id="form-link", className="form", style={"display": "none"})


def layout(selected: str | None = None, options: list[dict[str, str]] | None = None) -> html.Div:
    """The properties card's body, with ``selected`` (``"c:<key>"`` or ``"l:<key>"``) picked."""
    return html.Div([
        html.Label("Edit", htmlFor=ids.SELECT, className="field-label"),
        dcc.Dropdown(id=ids.SELECT, options=options or [], value=selected, className="element-select",
                     placeholder="click an element on the canvas, or pick it here"),
        html.Div("Nothing selected. Click a compartment or a link on the canvas, or add one.",
                 id="form-empty", className="empty-note"),
        _compartment_form(),
        _link_form(),
        layers.layout(),
    ], id=ids.PROPERTIES)


def _field_names(outputs_list: list[dict[str, Any]]) -> list[str]:
    return [o["id"]["name"] for o in outputs_list]


def _selected_item(selected: str | None, prefix: str, d: dict[str, Any]) -> tuple[str, dict[str, Any]]:
    """The key and draft item of the selection if it is of the kind ``prefix`` ("c:" or "l:")."""
    if not selected or not selected.startswith(prefix):
        raise PreventUpdate
    item = D.find(d, selected[2:])
    if item is None:
        raise PreventUpdate
    return selected[2:], item


def register(app: Any, services: Any) -> None:
    """Attach the properties panel's callbacks (and the layer grid's)."""

    @app.callback(
        Output("form-empty", "style"),
        Output("form-compartment", "style"),
        Output("form-link", "style"),
        Output("link-kind-note", "children"),
        Output(ids.field("compartment", ALL), "value"),
        Output(ids.field("link", ALL), "value"),
        Output(ids.field("link", "from"), "options"),
        Output(ids.field("link", "to"), "options"),
        Output("row-link-area", "style"),
        Output("row-link-flow", "style"),
        Output("row-link-rate", "style"),
        Output("row-link-model", "style"),
        Input(ids.SELECT, "value"),
        Input(ids.LOADED, "data"),
        State(ids.DRAFT, "data"),
    )
    def fill(selected, _loaded, d):
        comp_names = _field_names(ctx.outputs_list[4])
        link_names = _field_names(ctx.outputs_list[5])
        hide, show = {"display": "none"}, {}
        item = D.find(d, selected.split(":", 1)[1]) if selected else None
        comp_opts = [{"label": c.get("id") or "(no id)", "value": c["key"]} for c in d["compartments"]]
        if item is None:
            return (show, hide, hide, "", [no_update] * len(comp_names), [no_update] * len(link_names),
                    comp_opts, comp_opts, hide, hide, hide, hide)
        if selected.startswith("c:"):
            return (hide, show, hide, "", [item.get(n, "") for n in comp_names], [no_update] * len(link_names),
                    comp_opts, comp_opts, hide, hide, hide, hide)
        kind = item["kind"]
        values = []
        for n in link_names:
            if n == "model":
                values.append(item.get("model") or "resolved")
            else:
                values.append(item.get(n, ""))
        note = {"barrier": "Barrier: a stack of layers between two compartments; edit the layers below.",
                "exchange": "Exchange: a two-way, storage-free flow, rate = Q (C_from/K_from − C_to/K_to).",
                "transfer": "Transfer: one-way first order, rate = k × amount in 'from'."}[kind]
        vis = {name: (show if LINK_KIND_OF[name] == kind else hide) for name in ("area", "flow", "rate")}
        return (hide, hide, show, note, [no_update] * len(comp_names), values, comp_opts, comp_opts,
                vis["area"], vis["flow"], vis["rate"], show if kind == "barrier" else hide)

    @app.callback(
        Output(ids.DRAFT, "data", allow_duplicate=True),
        Input(ids.field("compartment", ALL), "value"),
        State(ids.SELECT, "value"),
        State(ids.DRAFT, "data"),
        prevent_initial_call=True,
    )
    def write_compartment(values, selected, d):
        key, item = _selected_item(selected, "c:", d)
        names = [i["id"]["name"] for i in ctx.inputs_list[0]]
        changes = {n: (v or "") for n, v in zip(names, values, strict=True) if (v or "") != item.get(n, "")}
        if not changes:
            raise PreventUpdate
        return D.update_compartment(d, key, changes)

    @app.callback(
        Output(ids.DRAFT, "data", allow_duplicate=True),
        Input(ids.field("link", ALL), "value"),
        State(ids.SELECT, "value"),
        State(ids.DRAFT, "data"),
        prevent_initial_call=True,
    )
    def write_link(values, selected, d):
        key, item = _selected_item(selected, "l:", d)
        names = [i["id"]["name"] for i in ctx.inputs_list[0]]
        allowed = set(D.LINK_FIELDS[item["kind"]]) | {"from", "to"}
        changes = {}
        for n, v in zip(names, values, strict=True):
            v = v or ""
            if n not in allowed:
                continue
            if n == "model" and v == "resolved" and not item.get("model"):
                continue
            if v != item.get(n, ""):
                changes[n] = v
        if not changes:
            raise PreventUpdate
        return D.update_link(d, key, changes)

    @app.callback(
        Output(ids.field_message("compartment", ALL), "children"),
        Output(ids.field_message("link", ALL), "children"),
        Output(ids.field("compartment", ALL), "className"),
        Output(ids.field("link", ALL), "className"),
        Input(ids.CHECK, "data"),
        Input(ids.SELECT, "value"),
    )
    def messages(found, selected):
        comp_names = _field_names(ctx.outputs_list[0])
        link_names = _field_names(ctx.outputs_list[1])
        comp_inputs = _field_names(ctx.outputs_list[2])
        link_inputs = _field_names(ctx.outputs_list[3])
        msgs = (found or {}).get("messages", {})
        key = selected[2:] if selected else ""
        prefix = selected[0] if selected else ""

        def at(scope: str, name: str) -> list[str]:
            if not key or prefix != scope:
                return []
            found_here = list(msgs.get(f"{scope}:{key}:{name}", []))
            if scope == "l" and name == "id":
                found_here += msgs.get(f"l:{key}:layers", [])
            return found_here

        def cls(scope: str, name: str, base: str) -> str:
            return f"{base} invalid" if at(scope, name) else base

        return ([" ".join(at("c", n)) for n in comp_names], [" ".join(at("l", n)) for n in link_names],
                [cls("c", n, "field-input") for n in comp_inputs],
                [cls("l", n, "field-input" if n not in ("model", "from", "to") else "pick-comp")
                 for n in link_inputs])

    layers.register(app, services)
