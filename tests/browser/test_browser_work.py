"""The researcher's work kept, undone, saved and refused, in a real (headless) browser.

Journeys: a reload and a closed tab keep the work (and leaving with uncommitted typing asks
first); Undo brings back a cascade delete; a saved project reopens the comparison in another
browser; a new empty scenario runs nothing and says what is missing. Each ends with a
screenshot under pytest's tmp dir (see the ``screens`` fixture). What they check is the
dashboard's own behaviour; the numbers compared are barrierflow's simulations of invented demo
scenarios, compared with themselves (kept, saved, reopened: the same float64 values).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from playwright.sync_api import expect

pytestmark = pytest.mark.browser

ROOT = Path(__file__).resolve().parents[2]


def test_reload_and_a_closed_tab_keep_the_work(ui, browser):
    """Journey 5: edit, run, set the view; reload and reopen: everything is back; leaving with
    typing not yet committed asks first."""
    page = ui.page
    ui.open()
    ui.pick("example-pick", "Daily patch over two-layer skin into a two-compartment body (daily_patch.toml)")
    page.locator("#example-open").click()
    expect(ui.field("link", "id")).to_have_value("skin")
    ui.pick("element-select", "Compartment central")
    ui.type_into(ui.field("compartment", "volume"), "12 L")
    ui.idle()
    ui.type_into(page.locator("#run-name"), "smaller body")
    page.locator("#run-button").click()
    page.locator("#run-status .good", has_text="smaller body done").wait_for(timeout=60_000)
    ui.idle()
    page.locator("#time-unit input[value='d']").check()
    ui.idle()
    first = {t["name"]: t["y"][-1] for t in ui.figure("fig-concentration", until=lambda ts: len(ts) >= 3)}
    page.wait_for_function("() => !window.barrierflowUnsaved()", timeout=20_000)

    def check_restored(p) -> None:
        p.wait_for_selector("#network-canvas canvas")
        expect(p.locator(ui.pattern(type="field", scope="compartment", name="volume"))).to_have_value("12 L")
        expect(p.locator("#runs-pick")).to_contain_text("smaller body")
        expect(p.locator("#time-unit input[value='d']")).to_be_checked()
        expect(p.locator("#scenario-file")).to_have_value("daily_patch.toml")

    page.reload()
    check_restored(page)
    ui.idle()
    again = {t["name"]: t["y"][-1] for t in ui.figure("fig-concentration", until=lambda ts: len(ts) >= 3)}
    assert again == first
    x_title = page.evaluate(
        "() => document.querySelector('#fig-concentration .js-plotly-plot').layout.xaxis.title.text")
    assert x_title == "time [d]"

    # typing that is not committed yet: leaving the page asks first
    field = ui.field("compartment", "volume")
    field.click()
    field.fill("13 L")
    assert page.evaluate("() => window.barrierflowUnsaved()") == "typing not yet committed"
    asked = []
    page.on("dialog", lambda d: (asked.append(d.type), d.dismiss()))
    page.close(run_before_unload=True)
    page.wait_for_timeout(500)
    assert asked == ["beforeunload"]
    field.press("Enter")
    ui.idle()
    page.wait_for_function("() => !window.barrierflowUnsaved()", timeout=20_000)

    # a closed tab: a new page of the same browser finds the work (the committed 13 L too)
    page.close()
    other = page.context.new_page()
    other.goto(ui.url)
    other.wait_for_selector("#network-canvas canvas")
    expect(other.locator(ui.pattern(type="field", scope="compartment", name="volume"))).to_have_value("13 L")
    expect(other.locator("#runs-pick")).to_contain_text("smaller body")
    ui.page = other
    ui.shot("journey5-reload")


def test_undo_brings_back_a_cascade_delete(ui):
    """Journey 6: deleting a compartment says what went with it; Undo (button or Ctrl+Z) brings it
    all back; Redo deletes again; a removed layer comes back; 100 steps are kept."""
    page = ui.page
    ui.open()
    ui.pick("example-pick", "Daily patch over two-layer skin into a two-compartment body (daily_patch.toml)")
    page.locator("#example-open").click()
    expect(ui.field("link", "id")).to_have_value("skin")
    ui.idle()
    ui.pick("element-select", "Compartment central")
    expect(ui.field("compartment", "id")).to_have_value("central")
    page.locator("#network-delete").click()
    note = page.locator("#delete-note")
    expect(note).to_contain_text("Deleted compartment 'central' and with it barrier 'skin' and exchange "
                                 "'distribution'")
    ui.idle()
    assert sorted(ui.canvas_labels()) == ["patch", "peripheral"]

    page.locator("#edit-undo").click()
    ui.idle()
    expect(note).to_contain_text("Undone")
    page.wait_for_function("() => window.cy.nodes().length === 3 && window.cy.edges().length === 2")
    assert sorted(ui.canvas_labels()) == ["central", "patch", "peripheral"]
    expect(page.locator("#run-problems")).to_be_empty()
    ui.pick("element-select", "Barrier skin: patch → central")
    expect(ui.cell("layer-grid", 1, "name")).to_have_text("viable epidermis")

    page.locator("#edit-redo").click()
    ui.idle()
    page.wait_for_function("() => window.cy.nodes().length === 2 && window.cy.edges().length === 0")
    page.locator("body").click(position={"x": 5, "y": 5})  # keyboard outside the text fields
    page.keyboard.press("Control+z")
    ui.idle()
    page.wait_for_function("() => window.cy.nodes().length === 3 && window.cy.edges().length === 2")

    # a removed layer comes back too
    ui.pick("element-select", "Barrier skin: patch → central")
    ui.cell("layer-grid", 1, "name").click()
    page.locator("#layer-remove").click()
    expect(note).to_contain_text("Removed layer 2 (viable epidermis) of barrier 'skin'")
    expect(ui.cell("layer-grid", 1, "name")).to_have_count(0)
    page.locator("#edit-undo").click()
    ui.idle()
    expect(ui.cell("layer-grid", 1, "name")).to_have_text("viable epidermis")

    # the page keeps at least 50 steps (100): 120 drafts in, 100 steps back, no more
    kept = page.evaluate("""() => {
        const h = window.dash_clientside.barrierflow;
        let history = null;
        for (let i = 0; i <= 120; i++) { history = h.record({gen: 'x', seq: i}, history); }
        let back = 0, moved = h.step(history, true);
        while (moved) { back += 1; history = moved[1]; moved = h.step(history, true); }
        return [back, history.current.seq];
    }""")
    assert kept == [100, 20]
    ui.shot("journey6-undo")


def test_a_saved_project_reopens_the_comparison(ui, browser, tmp_path):
    """Journey 7: two runs compared, measured data dropped onto the plots; the project saved;
    opened in another browser (no session): the same runs, ticked, the same reference, the same
    numbers and markers, the same units."""
    page = ui.page
    ui.open()
    ui.pick("example-pick", "Diffusion cell, infinite dose, sink receptor (diffusion_cell.toml)")
    page.locator("#example-open").click()
    expect(ui.field("link", "id")).to_have_value("membrane")
    ui.run(1)
    ui.edit_cell("layer-grid", 0, "partition", "8")
    ui.type_into(page.locator("#run-name"), "K doubled")
    page.locator("#run-button").click()
    page.locator("#run-status .good", has_text="K doubled done").wait_for()
    ui.idle()
    page.locator("#runs-pick input[value='r1']").check()
    ui.idle()
    page.locator("#time-unit input[value='min']").check()
    ui.idle()
    ui.tab("Barriers: flux and permeated")
    ui.figure("fig-permeated", until=lambda ts: len(ts) == 2)
    # measured data dropped onto the plots: a marker series per replicate over the curves
    page.set_input_files("#measured-upload input[type=file]", str(ROOT / "data" / "diffusion_cell_replicates.csv"))
    expect(page.locator("#measured-note")).to_contain_text("permeated:membrane (3 replicates) on the permeated plot")
    ui.idle()
    before = {f"{t['name']} {i}": t["y"]
              for i, t in enumerate(ui.figure("fig-permeated", until=lambda ts: len(ts) == 5))}
    assert sum(name.startswith("permeated:membrane measured") for name in before) == 3
    ui.tab("Metrics and comparison")
    expect(page.locator("#metrics-grid .ag-header-cell-text", has_text="K doubled ÷ run 1")).to_be_visible()
    page.wait_for_function("() => !window.barrierflowUnsaved()")

    saved = ui.download("#project-save", tmp_path)
    assert saved.name == "diffusion_cell.bfproject.json"
    doc = json.loads(saved.read_text())
    assert doc["format"] == "barrierflow project" and [r["name"] for r in doc["runs"]] == ["run 1", "K doubled"]
    expect(page.locator("#scenario-open-message")).to_contain_text("Saved the project diffusion_cell.bfproject.json")

    # another browser, another session: open the file there
    context = browser.new_context(viewport={"width": 1440, "height": 900}, accept_downloads=True)
    try:
        other = type(ui)(context.new_page(), ui.url, ui.screens)
        other.open()
        expect(other.page.locator("#runs-empty")).to_be_visible()
        other.page.set_input_files("#scenario-upload input[type=file]", str(saved))
        expect(other.page.locator("#scenario-open-message")).to_contain_text(
            "Opened the project diffusion_cell.bfproject.json")
        other.idle()
        expect(other.page.locator("#runs-pick input[value='r1']")).to_be_checked()
        expect(other.page.locator("#runs-pick input[value='r2']")).to_be_checked()
        expect(other.page.locator("#time-unit input[value='min']")).to_be_checked()
        expect(other.cell("layer-grid", 0, "partition")).to_have_text("8")
        other.tab("Barriers: flux and permeated")
        after = {f"{t['name']} {i}": t["y"]
                 for i, t in enumerate(other.figure("fig-permeated", until=lambda ts: len(ts) == 5))}
        assert after == before  # the same numbers and measured data, read from the file (nothing simulated again)
        other.tab("Metrics and comparison")
        expect(other.page.locator("#metrics-grid .ag-header-cell-text", has_text="K doubled ÷ run 1")).to_be_visible()
        other.shot("journey7-project-reopened")
        assert not other.errors, other.errors
    finally:
        context.close()


def test_a_new_empty_scenario_cannot_run_and_says_what_is_missing(ui):
    """Journey 8: after an example ran, "New empty scenario" runs nothing (never the example) and
    says what is missing, first compartments, then substance."""
    page = ui.page
    ui.open()
    ui.pick("example-pick", "Diffusion cell, infinite dose, sink receptor (diffusion_cell.toml)")
    page.locator("#example-open").click()
    expect(ui.field("link", "id")).to_have_value("membrane")
    ui.run(1)
    page.locator("#scenario-new").click()
    expect(page.locator("#scenario-open-message")).to_contain_text("Started an empty scenario")
    ui.idle()
    expect(page.locator("#run-last-valid")).to_be_hidden()  # the example is not this scenario's last version
    page.locator("#run-button").click()
    expect(page.locator("#run-status")).to_contain_text("Not run: the scenario on the screen has 1 problem. "
                                                        "Fix this field: compartment.")
    expect(page.locator("#run-problems")).to_contain_text("a scenario needs at least one [[compartment]]")
    page.locator("#network-add-compartment").click()
    ui.idle()
    expect(page.locator("#run-problems")).to_contain_text("Nothing to run yet: No substance anywhere")
    page.locator("#run-button").click()
    expect(page.locator("#run-status")).to_contain_text("Nothing to run yet: No substance anywhere")
    ui.type_into(ui.field("compartment", "initial_concentration"), "1 mg/mL")
    ui.idle()
    expect(page.locator("#run-problems")).to_be_empty()
    ui.run(2)
    expect(page.locator("#runs-pick input")).to_have_count(2)
    ui.shot("journey8-empty-scenario")
