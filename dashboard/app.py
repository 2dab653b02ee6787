"""The app factory: :func:`create_app` builds the dashboard, one panel module after another.

Each panel module (:mod:`dashboard.panels`) holds its layout and a ``register(app, services)``
that attaches its callbacks with ``app.callback``. Each researcher's state lives in
``dcc.Store`` components in their page, no module holds any; what the page holds is also kept in
the browser's session folder (:mod:`dashboard.sessions`), from which ``app.layout`` (a function)
builds the page at every load. Packed runs are kept in a disk cache keyed by a hash of the
scenario (:mod:`dashboard.runs`); background runs go through :mod:`dashboard.jobs`.
"""

from __future__ import annotations

import os
import secrets
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import dash
from dash import dcc, html

import barrierflow
from barrierflow.analysis import CAUTION as _CAUTION
from barrierflow.model import Scenario

from . import draft as D
from . import ids
from . import view as V
from .jobs import JobManager, Workers
from .panels import doses, fit, history, network, properties, results, run, session, variability
from .panels import scenario as scenario_bar
from .panels.common import card
from .runs import RunArchive, warm_up
from .server import DEFAULT_MAX_UPLOAD, install_guards
from .sessions import SessionStore, current_id, default_directory
from .sessions import install as install_sessions

__all__ = ["CAUTION", "Services", "create_app", "example_scenarios"]

CAUTION = _CAUTION
"""The caution shown at the top and the foot of every page (the same words as in the sidecar)."""

ASSETS = Path(__file__).parent / "assets"


@dataclass(frozen=True)
class Services:
    """What the panels share on the server: the run archive, the background jobs and the workers.

    Attributes
    ----------
    archive : RunArchive
    manager : JobManager
        Runs Dash's background callbacks (in threads of the server).
    workers : Workers
        The worker processes that simulate.
    sessions : SessionStore
        Each browser's work, kept across reloads.
    examples : dict of str to str
        Example file path -> label.
    poll_ms : int, ms
        How often the page asks whether a background run has finished.
    max_upload : int, bytes
        Largest file accepted for upload.
    """

    archive: RunArchive
    manager: Any
    workers: Workers
    sessions: SessionStore
    examples: dict[str, str]
    poll_ms: int = 100
    max_upload: int = DEFAULT_MAX_UPLOAD


def example_scenarios(folder: str | os.PathLike[str] | None = None) -> dict[str, str]:
    """The example scenarios: file path -> "name (file)" for every ``*.toml`` of ``folder``.

    The default folder is the project's ``scenarios/`` (beside the package), when it exists.
    Files that do not load are left out.
    """
    if folder is None:
        folder = Path(__file__).resolve().parent.parent / "scenarios"
    folder = Path(folder)
    out = {}
    if folder.is_dir():
        for path in sorted(folder.glob("*.toml")):
            try:
                s = barrierflow.load(path)
            except barrierflow.ScenarioError:
                continue
            out[str(path)] = f"{s.name or path.stem} ({path.name})"
    return out


def _initial_draft(opened: Scenario | str | os.PathLike[str] | None) -> dict[str, Any]:
    if opened is None:
        return D.new_draft()
    if isinstance(opened, Scenario):
        name = Path(opened.source).name if opened.source else "untitled.toml"
        return D.draft_from_scenario(opened, name)
    path = Path(opened)
    return D.draft_from_scenario(barrierflow.load(path), path.name)


def fresh_state(initial: dict[str, Any]) -> dict[str, Any]:
    """The state of a session that starts with the draft ``initial`` (no runs, default view)."""
    return {"draft": initial, "valid": None, "runs": [], "view": {}, "revision": 0}


def page(state: dict[str, Any], examples: dict[str, str], *, token: str = "",
         max_upload: int = DEFAULT_MAX_UPLOAD) -> html.Div:
    """The whole page for a session's state (see :mod:`dashboard.sessions`; :func:`fresh_state`
    for a new one): its draft, last valid version, runs and view settings.

    ``token`` names this page load: it is part of every background run's job key, so two pages
    that run the same scenario at the same moment never collect each other's result.
    """
    initial = state["draft"]
    view = state.get("view") or {}
    selected = V.get(view, ids.SELECT)
    if not (selected and D.find(initial, selected[2:]) is not None):
        selected = D.first_selection(initial)
    header = html.Header([
        html.Div([
            html.H1("barrierflow"),
            html.Span("transport through layered barriers into compartments and the body", className="tagline"),
        ], className="brand"),
        html.Div([html.Strong("Caution. "), html.Span(CAUTION)], id=ids.CAUTION, className="caution",
                 role="note"),
        history.layout(),
    ], className="page-header")
    editor = html.Div([
        card("Network", network.layout(initial), id="card-network", class_name="network-card",
             extra=html.Span("drag compartments to move them; click to select", className="fine-print")),
        card("Properties", properties.layout(selected, network.element_options(initial)),
             id="card-properties", class_name="properties-card"),
    ], className="editor-row")
    return html.Div([
        header,
        html.Main([
            card("Scenario", scenario_bar.layout(examples, initial), session.layout(state), id="card-scenario"),
            editor,
            card("Dosing", doses.layout(initial), id="card-dosing"),
            card("Run", run.layout(initial, view), id="card-run"),
            card("Results", results.layout(view), id="card-results"),
            card("Fit to data", fit.layout(), id="card-fit"),
            card("Variability", variability.layout(), id="card-variability"),
        ]),
        html.Footer([html.Span(CAUTION), html.Span(f" barrierflow {barrierflow.__version__}")],
                    className="page-footer"),
        dcc.Store(id=ids.DRAFT, data=initial),
        dcc.Store(id=ids.CHECK),
        dcc.Store(id=ids.VALID, data=state.get("valid")),
        dcc.Store(id=ids.RUNS, data=list(state.get("runs") or [])),
        dcc.Store(id=ids.LOADED, data={"gen": initial["gen"]}),
        dcc.Store(id=ids.PAGE, data={"token": token or secrets.token_hex(16), "max_upload": int(max_upload)}),
        dcc.Store(id=ids.UPLOADED),
        dcc.Store(id=ids.EDITS, data={"n": 0}),
        dcc.Store(id=ids.MEASURED, data=state.get("measured")),
        dcc.Store(id=ids.SAVED, data={"n": 0, "revision": int(state.get("revision", 0)), "conflict": False}),
    ], className="page")


def create_app(scenario: Scenario | str | os.PathLike[str] | None = None, *,
               examples_dir: str | os.PathLike[str] | None = None,
               cache_dir: str | os.PathLike[str] | None = None,
               poll_ms: int = 100, max_upload: int = DEFAULT_MAX_UPLOAD, workers_count: int = 2,
               allowed_hosts: frozenset[str] | None = None,
               session_dir: str | os.PathLike[str] | None = None, warm: bool = False) -> dash.Dash:
    """Build the dashboard.

    Parameters
    ----------
    scenario : Scenario or path, optional
        Opened at start; by default the page starts empty.
    examples_dir : path, optional
        Folder of example scenarios (default: the project's ``scenarios/``).
    cache_dir : path, optional
        Where runs are kept on disk (default: a new temporary folder).
    poll_ms : int, ms
        How often the page polls a background run.
    max_upload : int, bytes
        Largest file accepted for upload (default 5 MiB, :data:`dashboard.server.DEFAULT_MAX_UPLOAD`).
    workers_count : int
        Worker processes that simulate (runs beyond this many at once wait for a free one).
    allowed_hosts : frozenset of str, optional
        ``Host`` header values accepted (see :func:`dashboard.server.allowed_hosts`); default:
        no check until :func:`dashboard.server.serve` sets them for the address it binds.
    session_dir : path, optional
        Where each browser's work is kept (see :mod:`dashboard.sessions`); default:
        ``cache_dir/sessions`` when ``cache_dir`` is given, else
        :func:`dashboard.sessions.default_directory`.
    warm : bool
        Start the worker processes now and load the compiled engine in them (in the background),
        so that the first run does not wait for it.

    Returns
    -------
    dash.Dash
        Serve it with :func:`dashboard.server.serve` (waitress), or ``app.run(...)`` while developing.

    Raises
    ------
    barrierflow.ScenarioError
        When ``scenario`` is a file that cannot be loaded.
    """
    initial = _initial_draft(scenario)
    archive = RunArchive(cache_dir)
    manager = JobManager()
    workers = Workers(processes=workers_count)
    if warm:
        workers.warm(warm_up)
    examples = example_scenarios(examples_dir)
    app = dash.Dash(
        __name__,
        title="barrierflow",
        update_title=None,
        assets_folder=str(ASSETS),
        serve_locally=True,
        background_callback_manager=manager,
        suppress_callback_exceptions=False,
    )
    install_guards(app.server, max_upload=max_upload, hosts=allowed_hosts)
    install_sessions(app.server)
    if session_dir is None:
        session_dir = Path(cache_dir) / "sessions" if cache_dir else default_directory()
    sessions = SessionStore(session_dir)

    def layout() -> html.Div:
        # a function: every page load gets its own token, and the page of the browser's session
        state = sessions.load(current_id()) or fresh_state(initial)
        return page(state, examples, token=secrets.token_hex(16), max_upload=max_upload)

    app.layout = layout
    services = Services(archive=archive, manager=manager, workers=workers, sessions=sessions, examples=examples,
                        poll_ms=poll_ms, max_upload=max_upload)
    app.server.extensions["barrierflow"] = services  # Flask's registry of extensions (tests reach it there)
    for panel in (scenario_bar, network, properties, doses, run, results, session, history, fit, variability):
        panel.register(app, services)
    return app

