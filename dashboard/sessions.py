"""Each browser's work on the server: the open scenario, its runs and the view, kept across reloads.

A browser is told apart by a cookie (:data:`COOKIE`, a random 32-hex-digit id, HttpOnly,
SameSite=Strict, kept :data:`KEEP_DAYS` days). Its folder under the sessions directory holds

``state.json``
    ``{"format": "barrierflow session", "version": 1, "revision": n, "saved": "...",
    "draft": {...}, "valid": {...}, "runs": [run records], "view": {...}, "measured": {"name",
    "text"} or null}``, written atomically;
``runs/<key>.json``
    each run's packed data (:func:`dashboard.project.encode_run`), so that a run survives a
    server restart even when the run archive has dropped it.

Every save names the revision it was based on and the page that makes it; a save based on an
older revision than the one on disk, written by another page (another tab of the same browser
saved in between), is refused as a conflict, and the page says so instead of silently
overwriting the other tab's work. Saves of one page may overtake each other on the way; the
one with the lower count of the page's changes is dropped.

Folders not touched for :data:`KEEP_DAYS` days are removed when the store starts.
"""

from __future__ import annotations

import json
import os
import re
import secrets
import shutil
import threading
import time
from collections.abc import Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from barrierflow.io.atomic import atomic_write

from .project import encode_run, read_run
from .runs import RunData

__all__ = ["COOKIE", "KEEP_DAYS", "SessionStore", "current_id", "default_directory", "install", "valid_id"]

COOKIE = "barrierflow_session"
KEEP_DAYS = 30
FORMAT = "barrierflow session"
_ID = re.compile(r"^[0-9a-f]{32}$")
_KEY = re.compile(r"^[0-9a-zA-Z_-]{1,80}$")


def valid_id(value: Any) -> bool:
    """True for a well-formed session id (32 lower-case hex digits)."""
    return isinstance(value, str) and bool(_ID.match(value))


def default_directory() -> Path:
    """Where sessions are kept by default: ``$BARRIERFLOW_STATE_DIR``, else
    ``$XDG_STATE_HOME/barrierflow/sessions``, else ``~/.local/state/barrierflow/sessions``."""
    if os.environ.get("BARRIERFLOW_STATE_DIR"):
        return Path(os.environ["BARRIERFLOW_STATE_DIR"]) / "sessions"
    base = os.environ.get("XDG_STATE_HOME") or str(Path.home() / ".local" / "state")
    return Path(base) / "barrierflow" / "sessions"


def install(server: Any) -> None:
    """Give every request of a Flask server its browser's session id (:func:`current_id`).

    A request without a valid cookie gets a new id, and its answer sets the cookie (HttpOnly,
    SameSite=Lax: sent on the browser's own requests and on following a link to the page, never
    on a request another site makes; kept :data:`KEEP_DAYS` days, renewed on every page load).
    """
    import flask

    @server.before_request
    def _session_id():  # noqa: ANN202 - a Flask hook
        cookie = flask.request.cookies.get(COOKIE)
        if valid_id(cookie):
            flask.g.barrierflow_session = cookie
            flask.g.barrierflow_session_new = False
        else:
            flask.g.barrierflow_session = SessionStore.new_id()
            flask.g.barrierflow_session_new = True

    @server.after_request
    def _session_cookie(response):  # noqa: ANN202 - a Flask hook
        sid = flask.g.get("barrierflow_session")
        if sid and (flask.g.get("barrierflow_session_new") or flask.request.path == "/"):
            response.set_cookie(COOKIE, sid, max_age=int(KEEP_DAYS * 86400), httponly=True, samesite="Lax")
        return response


def current_id() -> str | None:
    """The session id of the request being answered (None outside a request)."""
    import flask

    if not flask.has_request_context():
        return None
    return flask.g.get("barrierflow_session")


class SessionStore:
    """The sessions folder.

    Parameters
    ----------
    directory : path
        Created when missing.
    keep_days : float
        Sessions untouched for longer are removed when the store starts.
    """

    def __init__(self, directory: str | os.PathLike[str], keep_days: float = KEEP_DAYS):
        self.directory = Path(directory)
        self.directory.mkdir(parents=True, exist_ok=True)
        self.keep_days = keep_days
        self._locks: dict[str, threading.Lock] = {}
        self._guard = threading.Lock()
        self.prune()

    @staticmethod
    def new_id() -> str:
        """A fresh session id."""
        return secrets.token_hex(16)

    def _lock(self, sid: str) -> threading.Lock:
        with self._guard:
            return self._locks.setdefault(sid, threading.Lock())

    def _folder(self, sid: str) -> Path:
        if not valid_id(sid):
            raise ValueError(f"session id: got {sid!r}; expected 32 hexadecimal digits")
        return self.directory / sid

    # ---------------------------------------------------------------- state
    def load(self, sid: str | None) -> dict[str, Any] | None:
        """The saved state of a session (None when there is none or it cannot be read)."""
        if not valid_id(sid):
            return None
        path = self._folder(sid) / "state.json"
        try:
            state = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        if not isinstance(state, dict) or state.get("format") != FORMAT or not isinstance(state.get("draft"), dict):
            return None
        return state

    def revision(self, sid: str | None) -> int:
        """The revision on disk (0 for a session never saved)."""
        state = self.load(sid)
        return int(state.get("revision", 0)) if state else 0

    def save(self, sid: str, state: Mapping[str, Any], base: int | None, force: bool = False, *,
             writer: str = "", edits: int = 0) -> dict[str, Any]:
        """Save a session's state if it is based on the revision on disk.

        Parameters
        ----------
        sid : str
        state : mapping
            ``draft``, ``valid``, ``runs``, ``view``.
        base : int or None
            The revision the page last saw (None: no check).
        force : bool
            Save even over another page's newer revision.
        writer : str
            The page that saves (its token). Saves of one page never conflict with each other:
            one that arrives after a later one of the same page (its ``edits`` count is not
            higher) is dropped as stale.
        edits : int
            The page's count of its changes at this save.

        Returns
        -------
        dict
            ``{"revision": n, "conflict": False, "saved": "HH:MM:SS"}`` (``saved`` None when
            nothing was written: the state on disk is already this one, or the save is stale),
            or ``{"revision": n on disk, "conflict": True}`` when another page saved since
            ``base`` (nothing written unless ``force``).
        """
        folder = self._folder(sid)
        with self._lock(sid):
            on_disk = self.load(sid)
            current = int(on_disk.get("revision", 0)) if on_disk else 0
            same_writer = bool(writer) and on_disk is not None and on_disk.get("writer") == writer
            if same_writer and edits <= int(on_disk.get("edits", 0)):
                return {"revision": current, "conflict": False, "saved": None}  # a later save of this page won
            if on_disk is not None and all(on_disk.get(k) == v for k, v in state.items()):
                return {"revision": current, "conflict": False, "saved": None}  # nothing changed
            if base is not None and base != current and not same_writer and not force:
                return {"revision": current, "conflict": True}
            revision = current + 1
            doc = dict(state, format=FORMAT, version=1, revision=revision, writer=writer, edits=int(edits),
                       saved=datetime.now(UTC).isoformat(timespec="seconds"))
            folder.mkdir(parents=True, exist_ok=True)
            atomic_write(folder / "state.json", json.dumps(doc, ensure_ascii=False, allow_nan=False))
        return {"revision": revision, "conflict": False,
                "saved": datetime.now(UTC).astimezone().strftime("%H:%M:%S")}

    # ---------------------------------------------------------------- runs
    def has_run(self, sid: str, key: str) -> bool:
        """True when the run ``key`` is kept in the session."""
        return _KEY.match(key or "") is not None and (self._folder(sid) / "runs" / f"{key}.json").exists()

    def put_run(self, sid: str, key: str, data: RunData) -> None:
        """Keep a run's packed data in the session (written atomically)."""
        if not _KEY.match(key or ""):
            raise ValueError(f"run key: got {key!r}; expected letters, digits, _ and -")
        folder = self._folder(sid) / "runs"
        folder.mkdir(parents=True, exist_ok=True)
        atomic_write(folder / f"{key}.json", json.dumps(encode_run(data), ensure_ascii=False, allow_nan=False))

    def get_run(self, sid: str | None, key: str, name: str) -> RunData | None:
        """A run kept in the session, under ``name`` (None when it is not kept or does not check)."""
        if not valid_id(sid) or not _KEY.match(key or ""):
            return None
        path = self._folder(sid) / "runs" / f"{key}.json"
        try:
            obj = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        return read_run(obj, name, str(path))

    def forget_runs(self, sid: str, keep: set[str]) -> None:
        """Remove the kept runs of a session whose keys are not in ``keep``."""
        folder = self._folder(sid) / "runs"
        if not folder.is_dir():
            return
        for path in folder.glob("*.json"):
            if path.stem not in keep:
                path.unlink(missing_ok=True)

    # ---------------------------------------------------------------- housekeeping
    def prune(self) -> None:
        """Remove sessions untouched for longer than ``keep_days``."""
        limit = time.time() - self.keep_days * 86400
        for folder in self.directory.iterdir():
            if not (folder.is_dir() and valid_id(folder.name)):
                continue
            try:
                touched = (folder / "state.json").stat().st_mtime
            except OSError:
                touched = folder.stat().st_mtime
            if touched < limit:
                shutil.rmtree(folder, ignore_errors=True)
