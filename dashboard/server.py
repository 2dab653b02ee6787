"""Serving the dashboard: a production WSGI server, the Host-header guard and the upload limit.

``barrierflow serve`` (and ``make run``) call :func:`serve`, which hands the Flask server of the
Dash app to waitress (a pure-Python WSGI server with a pool of threads); ``--debug`` keeps
Flask's development server, with its reloader off.

Two guards are installed on every app by :func:`install_guards` (``create_app`` calls it):

- **The Host header.** A page from another site can make the browser talk to a server on this
  machine by pointing its own host name at 127.0.0.1 (DNS rebinding); the browser then sends
  that foreign name in the ``Host`` header. A request whose ``Host`` is not one of the names of
  the bound address is answered 403. Bound to the loopback address (the default), the names are
  ``127.0.0.1``, ``localhost`` and ``[::1]`` with the port; bound to another address, that
  address. Binding a wildcard address (``0.0.0.0``, ``::``) on purpose turns the check off
  unless names are given with ``--allow-host``, which also adds names in every other case.
- **The size of a request.** An upload is refused above :data:`DEFAULT_MAX_UPLOAD` bytes (the
  ``--max-upload`` option changes it): in the page before it is sent, in the callback that
  reads it, and by Flask for a request body larger than an upload of that size could make
  (:func:`request_limit`), answered 413.
"""

from __future__ import annotations

import ipaddress
import math
from collections.abc import Iterable
from typing import Any

__all__ = ["DEFAULT_MAX_UPLOAD", "allowed_hosts", "format_size", "install_guards", "make_server", "request_limit",
           "serve"]

DEFAULT_MAX_UPLOAD = 5 * 1024 * 1024
"""Largest file the dashboard accepts by default, in bytes (5 MiB)."""

LOOPBACK_NAMES = ("127.0.0.1", "localhost", "[::1]")
WILDCARDS = ("0.0.0.0", "::", "")
REQUEST_ALLOWANCE = 4 * 1024 * 1024
"""Bytes a callback request may carry besides an upload (the page's stores)."""

ALLOWED_HOSTS_KEY = "BARRIERFLOW_ALLOWED_HOSTS"
MAX_UPLOAD_KEY = "BARRIERFLOW_MAX_UPLOAD"


def format_size(n: int) -> str:
    """A size in bytes as a researcher reads it: ``5 MB``, ``730 kB``, ``12 bytes`` (binary multiples)."""
    if n >= 1024 * 1024:
        value, unit = n / (1024 * 1024), "MB"
    elif n >= 1024:
        value, unit = n / 1024, "kB"
    else:
        return f"{n} bytes"
    return f"{float(f'{value:.3g}'):g} {unit}"


def request_limit(max_upload: int) -> int:
    """Largest request body, bytes: an upload of ``max_upload`` bytes in base64, plus the page's stores."""
    return math.ceil(max_upload * 4 / 3) + 1024 + REQUEST_ALLOWANCE


def _is_loopback(host: str) -> bool:
    if host.lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def _with_port(name: str, port: int) -> set[str]:
    name = name.lower()
    if ":" in name and not name.startswith("["):
        name = f"[{name}]"  # an IPv6 address, as the Host header writes it
    out = {f"{name}:{port}"}
    if port == 80:
        out.add(name)
    return out


def allowed_hosts(host: str, port: int, extra: Iterable[str] = ()) -> frozenset[str] | None:
    """The ``Host`` header values accepted for a server bound to ``host:port``.

    Parameters
    ----------
    host : str
        The bound address (``127.0.0.1`` by default).
    port : int
    extra : iterable of str
        More names (``--allow-host``), with or without a port; without one, the bound port is used.

    Returns
    -------
    frozenset of str or None
        Lower-case ``name:port`` values; None when nothing is checked (a wildcard address bound on
        purpose, with no ``extra`` names).

    Examples
    --------
    >>> sorted(allowed_hosts("127.0.0.1", 8050))
    ['127.0.0.1:8050', '[::1]:8050', 'localhost:8050']
    >>> allowed_hosts("0.0.0.0", 8050) is None
    True
    """
    names: set[str] = set()
    for name in extra:
        name = name.strip().lower()
        if not name:
            continue
        has_port = name.rsplit(":", 1)[-1].isdigit() and (name.count(":") == 1 or name.startswith("["))
        names |= {name} if has_port else _with_port(name, port)
    if host in WILDCARDS:
        return frozenset(names) if names else None
    if _is_loopback(host):
        for name in LOOPBACK_NAMES:
            names |= _with_port(name, port)
    names |= _with_port(host, port)
    return frozenset(names)


def install_guards(server: Any, *, max_upload: int = DEFAULT_MAX_UPLOAD,
                   hosts: frozenset[str] | None = None) -> None:
    """Install the Host-header check and the request-size limit on a Flask server.

    ``hosts`` (see :func:`allowed_hosts`; None: no check) and ``max_upload`` are kept in the
    server's config (``BARRIERFLOW_ALLOWED_HOSTS``, ``BARRIERFLOW_MAX_UPLOAD``), where
    :func:`serve` sets the hosts once the address is known.
    """
    import flask

    server.config[ALLOWED_HOSTS_KEY] = hosts
    server.config[MAX_UPLOAD_KEY] = int(max_upload)
    server.config["MAX_CONTENT_LENGTH"] = request_limit(int(max_upload))

    @server.before_request
    def _check_host():  # noqa: ANN202 - a Flask hook
        allowed = server.config.get(ALLOWED_HOSTS_KEY)
        if allowed is None:
            return None
        host = (flask.request.host or "").lower()
        if host in allowed:
            return None
        text = (f"barrierflow refused this request: Host header: got {host or '(none)'}; expected one of "
                f"{', '.join(sorted(allowed))}. Open the dashboard at the address it was started on, or start "
                "it with --allow-host NAME to accept another name.\n")
        return flask.Response(text, status=403, mimetype="text/plain")

    @server.errorhandler(413)
    def _too_large(_err):  # noqa: ANN202 - a Flask hook
        limit = server.config.get(MAX_UPLOAD_KEY, DEFAULT_MAX_UPLOAD)
        text = (f"barrierflow refused this request: its size is above what an upload of {format_size(limit)} "
                "makes; start the dashboard with --max-upload MB to accept larger files.\n")
        return flask.Response(text, status=413, mimetype="text/plain")


def make_server(app: Any, host: str = "127.0.0.1", port: int = 8050, *, allow_hosts: Iterable[str] = (),
                threads: int = 8) -> Any:
    """A waitress server for a dashboard, bound but not yet running (``.run()`` serves, ``.close()``
    stops); port 0 picks a free port (``.effective_port``). The Host-header check is set for the
    address bound (see :func:`allowed_hosts`).
    """
    import waitress.server

    server = waitress.server.create_server(app.server, host=host, port=port, threads=threads, ident="barrierflow")
    app.server.config[ALLOWED_HOSTS_KEY] = allowed_hosts(host, server.effective_port, allow_hosts)
    return server


def serve(app: Any, host: str = "127.0.0.1", port: int = 8050, *, debug: bool = False,
          allow_hosts: Iterable[str] = (), threads: int = 8) -> None:
    """Serve a dashboard until interrupted: waitress with ``threads`` threads, or Flask's
    development server with ``debug`` (no reloader).

    The Host-header check is set for the bound address (see :func:`allowed_hosts`).
    """
    if debug:
        app.server.config[ALLOWED_HOSTS_KEY] = allowed_hosts(host, port, allow_hosts)
        app.run(host=host, port=port, debug=True, use_reloader=False)
        return
    import logging

    logging.basicConfig()
    server = make_server(app, host, port, allow_hosts=allow_hosts, threads=threads)
    shown = f"[{host}]" if ":" in host else host
    print(f"Serving on http://{shown}:{server.effective_port} (waitress, {threads} threads)", flush=True)
    server.run()
