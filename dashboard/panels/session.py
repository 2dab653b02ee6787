"""Keeping the work: every change of the page is saved in the browser's session on the server.

The page counts its changes (the draft, the last valid version, the runs, the view settings)
in the browser (``store-edits``); each count is sent with the state to :func:`persist`, which
saves it in the session (:class:`dashboard.sessions.SessionStore`) and answers with the count
it saved (``store-saved``). ``assets/session.js`` warns before the page is left while the two
differ (a change not yet on the server), while another tab's save is in conflict, or while a
text field holds typing not yet committed (Enter or leaving the field commits it).
"""

from __future__ import annotations

from typing import Any

from dash import Input, Output, State, ctx, html
from dash.exceptions import PreventUpdate

from .. import ids
from .. import view as V
from ..sessions import current_id

SAVED_NOTE = ("Your scenario, runs and view are kept for this browser on the computer that serves the "
              "dashboard: a reload or a closed tab brings them back. Save a project file to keep them elsewhere.")


def layout(state: dict[str, Any]) -> html.Div:
    """The session note under the scenario bar, and the conflict banner (hidden)."""
    return html.Div([
        html.Div(SAVED_NOTE, id=ids.SESSION_NOTE, className="session-note fine-print", role="status"),
        html.Div([
            html.Span("This browser's work was changed in another tab or window after this page was loaded, so "
                      "this page's changes are not being kept. Reload the page to continue with the other "
                      "version, or keep this page's version instead. ", className="warn"),
            html.Button("Keep this page's version", id=ids.KEEP_THIS, className="btn small"),
        ], id=ids.SESSION_CONFLICT, className="session-conflict", role="alert", style={"display": "none"}),
    ])


def register(app: Any, services: Any) -> None:
    """Attach the callbacks that keep the page's work in the session."""
    store = services.sessions
    archive = services.archive
    settings = list(V.SETTINGS)

    # the page counts its own changes (no request); the count goes to the server with the state
    app.clientside_callback(
        """
        function() {
            const args = Array.from(arguments);
            const edits = args[args.length - 1] || {n: 0};
            const n = (edits.n || 0) + 1;
            window.barrierflowEdits = n;
            window.barrierflowCounted = Date.now();
            return {n: n};
        }
        """,
        Output(ids.EDITS, "data"),
        Input(ids.DRAFT, "data"),
        Input(ids.VALID, "data"),
        Input(ids.RUNS, "data"),
        Input(ids.MEASURED, "data"),
        *[Input(cid, "value") for cid in settings],
        State(ids.EDITS, "data"),
        prevent_initial_call=True,
    )

    app.clientside_callback(
        """
        function(saved) {
            if (saved) {
                window.barrierflowSaved = Math.max(window.barrierflowSaved || 0, saved.n || 0);
                window.barrierflowConflict = !!saved.conflict;
            }
        }
        """,
        Input(ids.SAVED, "data"),
        prevent_initial_call=True,
    )

    @app.callback(
        Output(ids.SAVED, "data"),
        Output(ids.SESSION_CONFLICT, "style"),
        Output(ids.SESSION_NOTE, "children"),
        Input(ids.EDITS, "data"),
        Input(ids.KEEP_THIS, "n_clicks"),
        State(ids.DRAFT, "data"),
        State(ids.VALID, "data"),
        State(ids.RUNS, "data"),
        State(ids.MEASURED, "data"),
        *[State(cid, "value") for cid in settings],
        State(ids.SAVED, "data"),
        State(ids.PAGE, "data"),
        prevent_initial_call=True,
    )
    def persist(edits, _keep, draft, valid, runs, measured, *rest):
        *values, saved, page = rest
        sid = current_id()
        if sid is None or not isinstance(draft, dict):
            raise PreventUpdate
        runs = runs or []
        view = V.clean(dict(zip(settings, values, strict=True)))
        state = {"draft": draft, "valid": valid, "runs": runs, "view": view, "measured": measured}
        force = ctx.triggered_id == ids.KEEP_THIS
        n = (edits or {}).get("n", 0)
        answer = store.save(sid, state, (saved or {}).get("revision"), force=force,
                            writer=(page or {}).get("token", ""), edits=n)
        if answer["conflict"]:
            return ({"n": (saved or {}).get("n", 0), "revision": (saved or {}).get("revision"), "conflict": True},
                    {}, "Not kept: see the message below.")
        keys = set()
        for record in runs:
            key = record.get("key")
            if not key or record.get("error"):
                continue
            keys.add(key)
            if not store.has_run(sid, key):
                data = archive.get(key)
                if data is not None:
                    store.put_run(sid, key, data)
        store.forget_runs(sid, keys)
        when = answer.get("saved")
        note = SAVED_NOTE + (f" (Saved {when}.)" if when else "")
        return {"n": n, "revision": answer["revision"], "conflict": False}, {"display": "none"}, note
