"""Undo and redo of every edit of the scenario, kept in the page (``assets/history.js``).

Every new draft (an edit of the network, a layer, a dose, a name, a unit; opening another
scenario too) pushes the one before onto the undo list (the last 100 are kept); Undo puts the
draft back and tells the panels to refresh their inputs (``store-loaded``); Redo goes forward
again until a new edit empties the redo list. Ctrl+Z and Ctrl+Y (or Ctrl+Shift+Z) do the same
outside text fields. The lists live only in the page: nothing of them goes to the server.
"""

from __future__ import annotations

from typing import Any

from dash import ClientsideFunction, Input, Output, State, dcc, html

from .. import ids


def layout() -> html.Div:
    """The Undo and Redo buttons (in the page header), the note of the last delete, and the
    page's history store."""
    return html.Div([
        html.Button("↶ Undo", id=ids.UNDO, className="btn", disabled=True, title="Nothing to undo"),
        html.Button("↷ Redo", id=ids.REDO, className="btn", disabled=True, title="Nothing to redo"),
        html.Span(id=ids.DELETE_NOTE, className="delete-note", role="status"),
        dcc.Store(id=ids.HISTORY, storage_type="memory"),
    ], className="edit-bar", role="toolbar", **{"aria-label": "undo and redo"})


def register(app: Any, services: Any) -> None:
    """Attach the clientside callbacks of undo and redo."""
    app.clientside_callback(
        ClientsideFunction("barrierflow", "record"),
        Output(ids.HISTORY, "data"),
        Input(ids.DRAFT, "data"),
        State(ids.HISTORY, "data"),
    )
    app.clientside_callback(
        ClientsideFunction("barrierflow", "undoRedo"),
        Output(ids.DRAFT, "data", allow_duplicate=True),
        Output(ids.HISTORY, "data", allow_duplicate=True),
        Output(ids.LOADED, "data", allow_duplicate=True),
        Output(ids.DELETE_NOTE, "children", allow_duplicate=True),
        Input(ids.UNDO, "n_clicks"),
        Input(ids.REDO, "n_clicks"),
        State(ids.HISTORY, "data"),
        State(ids.LOADED, "data"),
        prevent_initial_call=True,
    )
    app.clientside_callback(
        ClientsideFunction("barrierflow", "buttons"),
        Output(ids.UNDO, "disabled"),
        Output(ids.REDO, "disabled"),
        Output(ids.UNDO, "title"),
        Output(ids.REDO, "title"),
        Input(ids.HISTORY, "data"),
    )
