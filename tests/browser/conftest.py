"""Browser-test harness: the dashboard served in-process, driven by headless Debian chromium.

The app runs in a thread of the test process (waitress, as ``barrierflow serve`` serves it, on a
free loopback port);
Playwright drives ``/usr/bin/chromium`` (installed by ``make browser``, never by
``playwright install``). Each test gets a fresh browser context, so its page starts with empty
stores. A test fails if the page raises a JavaScript error or a callback fails.
"""

from __future__ import annotations

import json
import logging
import os
import shutil
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

ROOT = Path(__file__).resolve().parents[2]
CHROMIUM = os.environ.get("BARRIERFLOW_CHROMIUM", "/usr/bin/chromium")
LAUNCH_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage", "--disable-background-networking",
               "--disable-component-update", "--disable-sync", "--no-first-run"]
TIMEOUT_MS = 20_000


@pytest.fixture(scope="session")
def live_url(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """URL of the dashboard, started empty, served from a thread for the whole session."""
    from dashboard import create_app
    from dashboard.server import make_server

    logging.getLogger("waitress.queue").setLevel(logging.ERROR)
    app = create_app(None, examples_dir=ROOT / "scenarios", cache_dir=tmp_path_factory.mktemp("dash-cache"),
                     poll_ms=100)
    server = make_server(app, "127.0.0.1", 0)
    thread = threading.Thread(target=server.run, name="dashboard-server", daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.effective_port}/"
    finally:
        server.close()
        thread.join(timeout=10)


@pytest.fixture(scope="session")
def browser() -> Iterator[Any]:
    """One headless chromium for the session."""
    if not (Path(CHROMIUM).exists() or shutil.which(CHROMIUM)):
        message = f"no chromium at {CHROMIUM}; run 'make browser' to install Debian's chromium"
        if os.environ.get("CI"):
            pytest.fail(message + " (in CI the browser tests must run, not skip)")
        pytest.skip(message)
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS, headless=True)
        try:
            yield b
        finally:
            b.close()


@pytest.fixture(scope="session")
def screens(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Folder of the journeys' end screenshots (a test artifact under pytest's tmp dir)."""
    path = tmp_path_factory.mktemp("screens")
    print(f"\nscreenshots of the browser journeys: {path}")
    return path


class UI:
    """Small helpers that drive the dashboard's widgets as a researcher would."""

    def __init__(self, page: Any, url: str, screens: Path):
        self.page = page
        self.url = url
        self.screens = screens
        self.errors: list[str] = []
        page.on("pageerror", lambda e: self.errors.append(f"page error: {e}"))
        page.on("console", self._console)

    def _console(self, msg: Any) -> None:
        text = msg.text
        if msg.type == "error" and ("Callback" in text or "500" in text or "TypeError" in text):
            self.errors.append(f"console: {text[:400]}")

    # ------------------------------------------------------------------ navigation
    def open(self) -> None:
        """Load the page and wait until the first callbacks have settled."""
        self.page.goto(self.url)
        self.page.wait_for_selector("#network-canvas canvas", timeout=TIMEOUT_MS)
        self.idle()

    def idle(self) -> None:
        """Wait until no component is being updated by a callback."""
        self.page.wait_for_function(
            "() => document.querySelectorAll('[data-dash-is-loading=\"true\"]').length === 0",
            timeout=TIMEOUT_MS)

    # ------------------------------------------------------------------ widgets
    @staticmethod
    def pattern(**parts: str) -> str:
        """CSS selector of a component with a pattern-matching (dict) id."""
        text = json.dumps(dict(sorted(parts.items())), separators=(",", ":"))
        return f"[id='{text}']"

    def field(self, scope: str, name: str) -> Any:
        """The input of a field of the properties panel."""
        return self.page.locator(self.pattern(type="field", scope=scope, name=name))

    def field_message(self, scope: str, name: str) -> Any:
        """The message line under a field of the properties panel."""
        return self.page.locator(self.pattern(type="field-message", scope=scope, name=name))

    def type_into(self, locator: Any, text: str) -> None:
        """Replace the text of an input and commit it (Enter), as a researcher would."""
        locator.click()
        locator.fill(text)
        locator.press("Enter")

    def pick(self, dropdown_id: str, label: str) -> None:
        """Choose an option of a dropdown by its label."""
        self.page.locator(f"#{dropdown_id}").click()
        self.page.get_by_role("option", name=label, exact=True).click()

    def cell(self, grid_id: str, row: int, col: str) -> Any:
        """A cell of an AG Grid."""
        return self.page.locator(f"#{grid_id} .ag-center-cols-container .ag-row[row-index='{row}'] "
                                 f".ag-cell[col-id='{col}']")

    def edit_cell(self, grid_id: str, row: int, col: str, text: str) -> None:
        """Edit a grid cell with the keyboard: select it, Enter, replace the text, Enter."""
        cell = self.cell(grid_id, row, col)
        cell.click()
        self.page.keyboard.press("Enter")
        editor = self.page.locator(f"#{grid_id} .ag-cell-inline-editing input")
        editor.wait_for(timeout=TIMEOUT_MS)
        editor.fill(text)
        editor.press("Enter")
        self.idle()

    def click_node(self, label_start: str) -> None:
        """Click the compartment whose canvas label starts with ``label_start``."""
        # the canvas in the middle of the window: never under the page's sticky header
        self.idle()
        self.page.evaluate("() => document.getElementById('network-canvas').scrollIntoView({block: 'center'})")
        # the canvas lays its nodes out again after a change (a new node, a new label): click only
        # once the node has stood still for two reads 150 ms apart, or the click lands where the
        # node was (a click on empty canvas, which does nothing)
        deadline = time.monotonic() + TIMEOUT_MS / 1000
        last = None
        while True:
            pos = self.page.evaluate(
                """(start) => { const n = window.cy.nodes().filter(n => n.data('label').startsWith(start))[0];
                               if (!n) { return null; }
                               const p = n.renderedPosition();
                               return {x: p.x, y: p.y, moving: window.cy.nodes().some(m => m.animated())}; }""",
                label_start)
            if (pos is not None and last is not None and not pos["moving"]
                    and abs(pos["x"] - last["x"]) < 0.5 and abs(pos["y"] - last["y"]) < 0.5):
                break
            if time.monotonic() > deadline:
                raise AssertionError(f"the compartment {label_start!r} never stood still on the canvas; last {pos}")
            last = pos
            self.page.wait_for_timeout(150)
        box = self.page.locator("#network-canvas").bounding_box()
        self.page.mouse.click(box["x"] + pos["x"], box["y"] + pos["y"])

    def figure(self, graph_id: str, until: Any = None) -> list[dict[str, Any]]:
        """The traces drawn in a plotly graph (name, x, y), read from the page.

        With ``until`` (a function of the traces), wait until it holds (the plots are updated
        by a chain of callbacks after a run).
        """
        deadline = time.monotonic() + TIMEOUT_MS / 1000
        while True:
            traces = self._traces(graph_id)
            if until is None or until(traces):
                return traces
            if time.monotonic() > deadline:
                raise AssertionError(f"{graph_id}: the traces never satisfied the condition; got "
                                     f"{[t['name'] for t in traces]}")
            self.page.wait_for_timeout(100)

    def _traces(self, graph_id: str) -> list[dict[str, Any]]:
        return self.page.evaluate(
            """(id) => { const gd = document.getElementById(id).querySelector('.js-plotly-plot');
                         return (gd && gd.data ? gd.data : []).map(t => ({name: t.name || '', x: Array.from(t.x || []),
                                                                     y: Array.from(t.y || [])})); }""", graph_id)

    def layout_title(self, graph_id: str) -> str:
        """The title of a plotly graph."""
        return self.page.evaluate(
            """(id) => { const gd = document.getElementById(id).querySelector('.js-plotly-plot');
                         const t = gd && gd.layout && gd.layout.title; return t ? (t.text || '') : ''; }""", graph_id)

    def run(self, expect_number: int) -> None:
        """Click Run and wait until run number ``expect_number`` is reported done."""
        self.page.locator("#run-button").click()
        self.page.locator("#run-status .good", has_text=f"run {expect_number} done").wait_for(timeout=60_000)
        self.idle()

    def download(self, click_selector: str, folder: Path) -> Path:
        """Click what starts a download and save the file in ``folder`` under its suggested name."""
        with self.page.expect_download() as info:
            self.page.locator(click_selector).click()
        dl = info.value
        path = folder / dl.suggested_filename
        dl.save_as(path)
        return path

    def canvas_labels(self) -> list[str]:
        """The compartment ids drawn on the network canvas."""
        return self.page.evaluate("() => window.cy.nodes().map(n => n.data('label').split('\\n')[0])")

    def tab(self, label: str) -> None:
        """Open a results tab."""
        self.page.get_by_text(label, exact=True).click()
        self.idle()

    def shot(self, name: str) -> Path:
        """Save a screenshot of the whole page at the journey's end.

        The window is first made as tall as the page, so that the plots lay themselves out for
        that size before the picture is taken (a full-page capture alone resizes them midway).
        """
        self.idle()
        size = self.page.viewport_size
        height = self.page.evaluate("() => document.documentElement.scrollHeight")
        self.page.set_viewport_size({"width": size["width"], "height": height})
        self.page.wait_for_timeout(600)  # plotly redraws responsive plots after a resize
        self.idle()
        path = self.screens / f"{name}.png"
        self.page.screenshot(path=str(path), full_page=True)
        self.page.set_viewport_size(size)
        return path


@pytest.hookimpl(wrapper=True, tryfirst=True)
def pytest_runtest_makereport(item: pytest.Item, call: pytest.CallInfo) -> Any:
    """Keep each phase's report on the test item, so a fixture can tell that the test failed."""
    report = yield
    setattr(item, f"report_{report.when}", report)
    return report


@pytest.fixture
def ui(request: pytest.FixtureRequest, browser: Any, live_url: str, screens: Path) -> Iterator[UI]:
    """A fresh page (empty stores) on the dashboard; fails the test on a page or callback error.

    When the test fails, the page as it was is saved as ``FAILED-<test>.png`` beside the
    journeys' screenshots.
    """
    from playwright.sync_api import expect

    # the machine is shared: the assertions wait as long as the actions do (Playwright's own
    # default for expect is 5 s)
    expect.set_options(timeout=TIMEOUT_MS)
    context = browser.new_context(viewport={"width": 1440, "height": 900}, accept_downloads=True)
    context.set_default_timeout(TIMEOUT_MS)
    page = context.new_page()
    helper = UI(page, live_url, screens)
    try:
        yield helper
        report = getattr(request.node, "report_call", None)
        if report is not None and report.failed:
            helper.page.screenshot(path=str(screens / f"FAILED-{request.node.name}.png"), full_page=True)
    finally:
        context.close()
    assert not helper.errors, "\n".join(helper.errors)
