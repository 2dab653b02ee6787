"""A small HTTP client that speaks to a served dashboard as Dash's page does (for the load test).

It keeps its own cookies (one browser), reads the page's configuration (the signed page-load
token Dash echoes on every callback request), the layout, and calls callbacks by the ids of
their outputs, inputs and states, following a background callback until it answers, as the
page's renderer does (``dash-renderer``: ``_dash-update-component`` with ``cacheKey`` and
``job`` once the job has started).
"""

from __future__ import annotations

import http.cookiejar
import json
import re
import time
import urllib.error
import urllib.parse
import urllib.request
from dataclasses import dataclass, field
from typing import Any


def _spec(key: str) -> dict[str, str]:
    cid, prop = key.rsplit(".", 1)
    return {"id": json.loads(cid) if cid.startswith("{") else cid, "property": prop}


def _output_key(outputs: list[str]) -> str:
    """The ``output`` string Dash uses for a callback: ``..a.b...c.d..`` for several outputs."""
    if len(outputs) == 1:
        return outputs[0]
    return ".." + "...".join(outputs) + ".."


@dataclass
class Timing:
    """Wall time of every request, by kind."""

    seconds: dict[str, list[float]] = field(default_factory=dict)
    failures: list[str] = field(default_factory=list)

    def add(self, kind: str, value: float) -> None:
        self.seconds.setdefault(kind, []).append(value)


class DashClient:
    """One browser on a served dashboard.

    Parameters
    ----------
    base : str
        ``http://127.0.0.1:PORT/``.
    timing : Timing, optional
        Where request times and failures are recorded.
    """

    def __init__(self, base: str, timing: Timing | None = None):
        self.base = base.rstrip("/") + "/"
        self.jar = http.cookiejar.CookieJar()
        self.opener = urllib.request.build_opener(urllib.request.HTTPCookieProcessor(self.jar))
        self.timing = timing or Timing()
        self.end_id = ""
        self.layout: dict[str, Any] = {}

    # ------------------------------------------------------------------ plumbing
    def _request(self, kind: str, path: str, body: bytes | None = None, query: dict[str, str] | None = None
                 ) -> tuple[int, bytes]:
        url = self.base + path + (("?" + urllib.parse.urlencode(query)) if query else "")
        req = urllib.request.Request(url, data=body, method="POST" if body is not None else "GET",
                                     headers={"Content-Type": "application/json"} if body is not None else {})
        started = time.perf_counter()
        try:
            with self.opener.open(req, timeout=120) as r:
                status, data = r.status, r.read()
        except urllib.error.HTTPError as err:
            status, data = err.code, err.read()
        self.timing.add(kind, time.perf_counter() - started)
        if status not in (200, 204):
            self.timing.failures.append(f"{kind}: HTTP {status}: {data[:300]!r}")
        return status, data

    # ------------------------------------------------------------------ page
    def open(self) -> dict[str, Any]:
        """Load the page and its layout, as a browser does; returns the layout."""
        status, html = self._request("page", "")
        assert status == 200, html[:300]
        config = re.search(rb'<script id="_dash-config" type="application/json">(.*?)</script>', html, re.S)
        self.end_id = json.loads(config.group(1))["end_id"] if config else ""
        status, data = self._request("layout", "_dash-layout")
        assert status == 200, data[:300]
        self.layout = json.loads(data)
        return self.layout

    def prop(self, cid: str, name: str) -> Any:
        """A property of a component of the layout last loaded."""
        found = _find(self.layout, cid)
        if found is None:
            raise KeyError(cid)
        return found.get("props", {}).get(name)

    # ------------------------------------------------------------------ callbacks
    def call(self, outputs: list[str], inputs: dict[str, Any], state: dict[str, Any] | None = None,
             kind: str = "callback", changed: list[str] | None = None, background: bool = False,
             timeout: float = 120.0) -> dict[str, Any]:
        """Call the callback with these outputs; returns ``{component id: {prop: value}}``.

        ``inputs`` and ``state`` map ``"id.prop"`` to the value sent; ``changed`` names the
        inputs that triggered it (default: the first). A background callback is followed until
        it answers (its time is recorded under ``kind + " (until done)"``).
        """
        state = state or {}
        body = {
            "output": _output_key(outputs),
            "outputs": [_spec(o) for o in outputs] if len(outputs) > 1 else _spec(outputs[0]),
            "inputs": [dict(_spec(k), value=v) for k, v in inputs.items()],
            "state": [dict(_spec(k), value=v) for k, v in state.items()],
            "changedPropIds": changed or [next(iter(inputs))],
        }
        query = {"endId": self.end_id} if self.end_id else {}
        started = time.perf_counter()
        status, data = self._request(kind, "_dash-update-component", json.dumps(body).encode(), query)
        if status == 204:
            return {}
        assert status == 200, data[:300]
        answer = json.loads(data)
        if not background:
            return answer.get("response", {})
        polled = dict(body, inputs=[dict(i, value=None) for i in body["inputs"]],
                      state=[dict(s, value=None) for s in body["state"]])
        handles = dict(query, cacheKey=answer["cacheKey"], job=answer["job"])
        deadline = time.monotonic() + timeout
        while "response" not in answer:
            if time.monotonic() > deadline:
                raise TimeoutError(f"{kind}: no answer within {timeout} s")
            time.sleep(0.1)
            status, data = self._request(kind + " (poll)", "_dash-update-component", json.dumps(polled).encode(),
                                         handles)
            if status == 204:
                self.timing.failures.append(f"{kind}: the job ended without a result (HTTP 204)")
                return {}
            assert status == 200, data[:300]
            answer = json.loads(data)
        self.timing.add(kind + " (until done)", time.perf_counter() - started)
        return answer["response"]


def _find(node: Any, cid: str) -> dict[str, Any] | None:
    if isinstance(node, dict):
        props = node.get("props")
        if isinstance(props, dict) and props.get("id") == cid:
            return node
        for value in (props or {}).values() if isinstance(props, dict) else node.values():
            found = _find(value, cid)
            if found is not None:
                return found
    elif isinstance(node, list):
        for item in node:
            found = _find(item, cid)
            if found is not None:
                return found
    return None
