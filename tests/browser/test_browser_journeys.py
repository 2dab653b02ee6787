"""The researcher's journeys through the dashboard, in a real (headless) browser.

Each journey ends with a full-page screenshot under pytest's tmp dir (see the ``screens``
fixture). The physics the journeys check has outside sources, named beside each check:

- mass conservation in a closed donor-barrier-receiver system (common practice: the amount
  initially in the donor equals, at every time, what is in the two compartments plus what is
  inside the barrier);
- steady flux through one membrane between a held source and a perfect sink,
  J = D K C0 / L, proportional to the partition coefficient K, and the lag time L^2/(6 D),
  independent of K (Crank, The Mathematics of Diffusion, 2nd ed., 1975, eqs. 4.24a and 4.24b);
- at an interface between layers the ratio C/K is continuous (the partition condition of
  composite media, Crank 1975, ch. 12), so the concentration jumps by the ratio of the two
  partition coefficients.
"""

from __future__ import annotations

import csv
import io
import json
import re
import subprocess
import sys
from pathlib import Path

import pytest
from playwright.sync_api import expect

pytestmark = pytest.mark.browser

ROOT = Path(__file__).resolve().parents[2]


def _cli(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "barrierflow", *args], cwd=cwd, capture_output=True, text=True,
                          timeout=120)


def _rows(text: str) -> tuple[list[str], list[list[float]]]:
    reader = list(csv.reader(io.StringIO(text)))
    head, body = reader[0], reader[1:]
    return head, [[float(x) if x else float("nan") for x in row] for row in body]


def test_build_from_empty_run_and_export_matches_command_line(ui, tmp_path):
    """Journey 1: donor - two-layer barrier - receiver built by clicking; run; CSV equals the CLI's."""
    page = ui.page
    ui.open()
    expect(page.locator("#form-empty")).to_be_visible()

    page.locator("#network-add-compartment").click()
    expect(ui.field("compartment", "id")).to_have_value("compartment_1")
    ui.type_into(ui.field("compartment", "id"), "donor")
    ui.type_into(ui.field("compartment", "volume"), "2 mL")
    ui.type_into(ui.field("compartment", "initial_concentration"), "10 mg/mL")
    page.locator("#network-add-compartment").click()
    expect(ui.field("compartment", "id")).to_have_value("compartment_2")
    ui.type_into(ui.field("compartment", "id"), "receiver")
    ui.type_into(ui.field("compartment", "volume"), "5 mL")
    ui.idle()

    # draw the barrier by clicking the two compartments
    page.locator("#network-click-connect input").check()
    ui.click_node("donor")
    expect(page.locator("#network-message")).to_contain_text("now click the receiving compartment")
    ui.click_node("receiver")
    # the new barrier has no hidden layer: the one it starts with is named, selected and described
    expect(page.locator("#network-message")).to_contain_text(
        "Connected with barrier barrier_1. It starts with one layer named 'default layer' (thickness 10 um, "
        "diffusivity 1e-7 cm^2/s, partition coefficient 1), selected in the layer table")
    expect(ui.field("link", "id")).to_have_value("barrier_1")
    expect(ui.cell("layer-grid", 0, "name")).to_have_text("default layer")
    expect(page.locator("#layer-grid .ag-center-cols-container .ag-row[row-index='0']")).to_have_class(
        re.compile(r"\bag-row-selected\b"))
    ui.type_into(ui.field("link", "id"), "membrane")
    ui.type_into(ui.field("link", "area"), "2 cm^2")

    # two layers, every value with its unit
    ui.edit_cell("layer-grid", 0, "name", "outer film")
    ui.edit_cell("layer-grid", 0, "thickness", "20 um")
    ui.edit_cell("layer-grid", 0, "diffusivity", "1e-8 cm^2/s")
    ui.edit_cell("layer-grid", 0, "partition", "5")
    page.locator("#layer-add").click()
    expect(ui.cell("layer-grid", 1, "name")).to_have_text("layer 2")
    ui.edit_cell("layer-grid", 1, "name", "inner gel")
    ui.edit_cell("layer-grid", 1, "thickness", "200 um")
    ui.edit_cell("layer-grid", 1, "diffusivity", "5e-7 cm^2/s")
    ui.edit_cell("layer-grid", 1, "partition", "1")
    expect(page.locator("#steady-numbers")).to_contain_text("Lag time")

    ui.type_into(page.locator("#run-duration"), "24 h")
    ui.type_into(page.locator("#run-output-step"), "15 min")
    expect(page.locator("#run-problems")).to_be_empty()
    ui.run(1)

    traces = {t["name"]: t for t in ui.figure("fig-concentration", until=lambda ts: len(ts) == 2)}
    assert {"donor", "receiver"} <= set(traces)
    donor, receiver = traces["donor"]["y"], traces["receiver"]["y"]
    assert donor[0] == pytest.approx(10_000.0)  # 10 mg/mL shown in mg/L
    assert receiver[0] == 0.0 and receiver[-1] > 0.0
    assert donor[-1] < donor[0]

    toml_path = ui.download("#scenario-save", tmp_path)
    csv_path = ui.download("#export-csv", tmp_path)
    side_path = ui.download("#export-sidecar", tmp_path)
    assert toml_path.name == "untitled.toml"
    ui.shot("journey1-built-and-run")

    cli_dir = tmp_path / "cli"
    cli_dir.mkdir()
    done = _cli("run", str(toml_path), "-o", str(cli_dir / "cli.csv"), "--no-progress", cwd=cli_dir)
    assert done.returncode == 0, done.stderr
    assert csv_path.read_bytes() == (cli_dir / "cli.csv").read_bytes()
    page_side = json.loads(side_path.read_text())
    cli_side = json.loads((cli_dir / "cli.json").read_text())
    for doc in (page_side, cli_side):
        doc.pop("created")
        doc["solver"]["statistics"].pop("wall_time_s")
    assert page_side == cli_side

    # mass conservation in the closed system (common practice), from the exported traces
    head, rows = _rows(csv_path.read_text())
    col = {name: i for i, name in enumerate(head)}
    for row in rows:
        total = row[col["amount:donor [mg]"]] + row[col["amount:receiver [mg]"]] + row[col["content:membrane [mg]"]]
        assert total == pytest.approx(20.0, rel=1e-6)


def test_upload_change_partition_rerun_and_compare(ui, tmp_path):
    """Journey 2: upload an example, double a layer's K, re-run, overlay and compare the two runs."""
    page = ui.page
    ui.open()
    page.set_input_files("#scenario-upload input[type=file]", str(ROOT / "scenarios" / "diffusion_cell.toml"))
    expect(page.locator("#scenario-open-message")).to_contain_text("Opened diffusion_cell.toml")
    expect(ui.field("link", "id")).to_have_value("membrane")
    expect(ui.cell("layer-grid", 0, "partition")).to_have_text("4")
    before = page.locator("#steady-numbers").inner_text()
    ui.run(1)

    ui.edit_cell("layer-grid", 0, "partition", "8")
    expect(page.locator("#steady-numbers")).not_to_have_text(before)
    ui.type_into(page.locator("#run-name"), "K doubled")
    page.locator("#run-button").click()
    page.locator("#run-status .good", has_text="K doubled done").wait_for()
    ui.idle()
    page.locator("#runs-pick input[value='r1']").check()
    ui.idle()

    ui.tab("Barriers: flux and permeated")
    names = [t["name"] for t in ui.figure("fig-permeated", until=lambda ts: len(ts) == 2)]
    assert any(n.endswith("· run 1") for n in names) and any(n.endswith("· K doubled") for n in names), names
    final = {t["name"].split(" · ")[1]: t["y"][-1] for t in ui.figure("fig-permeated")}
    # Crank (1975), eq. 4.24a: Q(t) = (D K C0 / L)(t - L^2/(6D)) late on, so doubling K doubles Q
    assert final["K doubled"] / final["run 1"] == pytest.approx(2.0, rel=0.02)

    ui.tab("Metrics and comparison")
    expect(page.locator("#metrics-grid .ag-header-cell-text", has_text="K doubled ÷ run 1")).to_be_visible()
    ui.type_into(page.locator("#metrics-filter"), "time-lag method")
    ratio_col = page.locator("#metrics-grid .ag-header-cell[col-id='r1']")
    expect(ratio_col).to_be_visible()

    def ratio_of(metric: str) -> float:
        row = page.locator("#metrics-grid .ag-pinned-left-cols-container .ag-row",
                           has=page.locator(".ag-cell[col-id='metric']", has_text=re.compile(f"^{re.escape(metric)}$")))
        expect(row).to_have_count(1)
        index = row.get_attribute("row-index")
        cell = page.locator(f"#metrics-grid .ag-center-cols-container .ag-row[row-index='{index}'] "
                            ".ag-cell[col-id='r1']").filter(has_text=re.compile(r"\d"))
        expect(cell).to_have_count(1)
        return float(cell.inner_text())

    # Crank (1975), eqs. 4.24a, 4.24b: steady flux proportional to K, lag time L^2/(6D) independent of K
    assert ratio_of("steady flux (time-lag method)") == pytest.approx(2.0, rel=0.01)
    assert ratio_of("lag time (time-lag method)") == pytest.approx(1.0, rel=0.01)
    ui.shot("journey2-compare")


def test_invalid_values_are_flagged_at_the_field_and_nothing_is_lost(ui, tmp_path):
    """Journey 3: a negative thickness and a wrong unit are flagged with the CLI's messages; Run
    refuses them naming the fields; the last valid version runs only when asked for, and its
    name and the runs list say so."""
    page = ui.page
    ui.open()
    ui.pick("example-pick", "Daily patch over two-layer skin into a two-compartment body (daily_patch.toml)")
    page.locator("#example-open").click()
    expect(page.locator("#scenario-open-message")).to_contain_text("Opened the example daily_patch.toml")
    expect(ui.field("link", "id")).to_have_value("skin")
    ui.run(1)

    ui.edit_cell("layer-grid", 0, "thickness", "-15 um")
    negative = "daily_patch.toml: barrier 'skin' layer 1 thickness: got -15 um; must be > 0"
    expect(page.locator("#layer-messages")).to_contain_text(negative)
    expect(ui.cell("layer-grid", 0, "thickness")).to_have_class(re.compile(r"\bcell-invalid\b"))

    ui.pick("element-select", "Compartment central")
    expect(ui.field("compartment", "id")).to_have_value("central")
    ui.type_into(ui.field("compartment", "volume"), "15 kg")
    wrong_unit = "daily_patch.toml: compartment 'central' volume: got 15 kg; wrong kind of unit"
    expect(ui.field_message("compartment", "volume")).to_contain_text(wrong_unit)
    expect(ui.field("compartment", "volume").locator("xpath=..")).to_have_class(re.compile(r"\binvalid\b"))
    expect(page.locator("#run-problems")).to_contain_text("The scenario on the screen has 2 problems")

    # the command line gives the same messages for the saved file
    saved = ui.download("#scenario-save", tmp_path)
    assert saved.name == "daily_patch.toml"
    checked = _cli("check", str(saved), cwd=tmp_path)
    assert checked.returncode == 2
    cli_lines = [line.replace(str(saved), saved.name) for line in checked.stderr.splitlines()]
    page_messages = page.locator("#run-problems li").all_inner_texts()
    assert len(page_messages) == 2
    for message in page_messages:
        assert message in cli_lines, (message, cli_lines)
    assert ui.field_message("compartment", "volume").inner_text() in page_messages

    # Run refuses what is on the screen, naming the fields to fix; nothing is added to the runs
    page.locator("#run-button").click()
    expect(page.locator("#run-status")).to_contain_text(
        "Not run: the scenario on the screen has 2 problems. Fix these fields: compartment 'central' volume; "
        "barrier 'skin' layer 1 thickness.")
    ui.idle()
    expect(page.locator("#runs-pick input")).to_have_count(1)
    # the last valid version runs only when asked for, plainly labelled in its name and in the runs list
    last = page.locator("#run-last-valid")
    expect(last).to_be_visible()
    expect(last).to_have_text("Run the last valid version instead")
    last.click()
    page.locator("#run-status .good", has_text="run 2 (last valid version) done").wait_for(timeout=60_000)
    expect(page.locator("#run-status")).to_contain_text("not what is on the screen")
    ui.idle()
    expect(page.locator("#runs-pick label").nth(1)).to_contain_text(
        "run 2 (last valid version): Daily patch")
    expect(page.locator("#runs-pick label").nth(1)).to_contain_text("the last valid version, not the edited screen")
    ui.figure("fig-concentration", until=lambda ts: len(ts) == 3)
    page.locator("#runs-pick input[value='r1']").check()
    ui.idle()
    names = [t["name"] for t in ui.figure("fig-concentration", until=lambda ts: len(ts) == 6)]
    assert sum(n.endswith("· run 2 (last valid version)") for n in names) == 3, names

    # nothing was lost: the wrong values are still there to be fixed
    expect(ui.field("compartment", "volume")).to_have_value("15 kg")
    ui.type_into(ui.field("compartment", "volume"), "15 L")
    expect(ui.field_message("compartment", "volume")).to_be_empty()
    ui.pick("element-select", "Barrier skin: patch → central")
    expect(ui.cell("layer-grid", 0, "thickness")).to_have_text("-15 um")
    ui.shot("journey3-invalid-values")
    ui.edit_cell("layer-grid", 0, "thickness", "15 um")
    expect(page.locator("#layer-messages")).to_be_empty()
    expect(page.locator("#run-problems")).to_be_empty()
    expect(page.locator("#run-last-valid")).to_be_hidden()


INTERFACE_SCENARIO = """\
# An invented scenario for the browser test: two layers whose partition coefficients differ
# tenfold, between a held source and a perfect sink.
[scenario]
name = "Two layers, tenfold partition jump (invented)"
duration = "3 h"
output_step = "2 min"

[[compartment]]
id = "source"
held_concentration = "1 mg/mL"

[[compartment]]
id = "sink"
held_concentration = "0 mg/mL"

[[barrier]]
id = "film"
from = "source"
to = "sink"
area = "1 cm^2"

  [[barrier.layer]]
  name = "coating"
  thickness = "10 um"
  diffusivity = "1e-8 cm^2/s"
  partition = 10.0
  cells = 20

  [[barrier.layer]]
  name = "base film"
  thickness = "50 um"
  diffusivity = "1e-8 cm^2/s"
  partition = 1.0
  cells = 40
"""


def test_profile_slider_shows_the_interface_jump(ui, tmp_path):
    """Journey 4: move the profile slider; the concentration jumps at the interface by K1/K2."""
    page = ui.page
    path = tmp_path / "interface_jump.toml"
    path.write_text(INTERFACE_SCENARIO)
    ui.open()
    page.set_input_files("#scenario-upload input[type=file]", str(path))
    expect(page.locator("#scenario-open-message")).to_contain_text("Opened interface_jump.toml")
    ui.run(1)
    ui.tab("Profile through a barrier")
    ui.figure("fig-profile", until=lambda ts: len(ts) >= 2)
    thumb = page.locator("#profile-slider [role='slider']")
    thumb.focus()
    page.keyboard.press("Home")
    expect(page.locator("#profile-time")).to_contain_text("t = 0 h")
    layers = [t for t in ui.figure("fig-profile") if not t["name"].startswith("steady")]
    assert len(layers) == 2 and max(layers[0]["y"] + layers[1]["y"]) == 0.0

    page.keyboard.press("End")
    expect(page.locator("#profile-time")).to_contain_text("t = 3 h")
    ui.idle()
    traces = ui.figure("fig-profile")
    coating, base = [t for t in traces if not t["name"].startswith("steady")]
    assert "'film' at 3 h" in ui.layout_title("fig-profile")
    # partition condition C1/K1 = C2/K2 at the interface (Crank 1975, ch. 12): a tenfold jump;
    # the cells next to it sit half a cell away, hence the tolerance
    assert coating["y"][-1] / base["y"][0] == pytest.approx(10.0, rel=0.1)
    assert coating["x"][-1] < 10.0 < base["x"][0]
    # late in the run the profile is the steady one (drawn dotted)
    steady = [t for t in traces if t["name"].startswith("steady")]
    # K1 * C_source / K_source = 10 mg/mL, shown in mg/L (the concentration unit of every plot)
    assert steady and steady[0]["y"][0] == pytest.approx(10_000.0)
    assert base["y"][0] == pytest.approx(steady[1]["y"][0], rel=0.05)

    for _ in range(10):
        page.keyboard.press("ArrowLeft")
    expect(page.locator("#profile-time")).to_contain_text("t = 2.667 h")

    page.locator("#profile-play").click()
    expect(page.locator("#profile-play")).to_have_text("⏸ Pause")
    expect(page.locator("#profile-time")).not_to_contain_text("t = 2.667 h")
    page.locator("#profile-play").click()
    expect(page.locator("#profile-play")).to_have_text("▶ Play")
    thumb.focus()
    page.keyboard.press("End")
    expect(page.locator("#profile-time")).to_contain_text("t = 3 h")
    ui.shot("journey4-profile")


def test_the_default_plot_of_the_demo_shows_plasma(ui):
    """Journey 9: the demo's default concentration view draws plasma inside its axis (the patch,
    some 1e6 times more concentrated, on a panel of its own); plot and metrics table share one
    unit; no legend covers an axis title; the caution stays on screen."""
    page = ui.page
    ui.open()
    ui.pick("example-pick", "Daily patch over two-layer skin into a two-compartment body (daily_patch.toml)")
    page.locator("#example-open").click()
    expect(ui.field("link", "id")).to_have_value("skin")
    ui.run(1)
    ui.figure("fig-concentration", until=lambda ts: len(ts) == 3)
    drawn = page.evaluate("""() => {
        const gd = document.querySelector('#fig-concentration .js-plotly-plot');
        return gd.data.map(t => {
            const ax = gd._fullLayout['yaxis' + (t.yaxis || 'y').slice(1)];
            return {name: t.name, y: Array.from(t.y), type: ax.type, range: ax.range.slice(), title: ax.title.text};
        });
    }""")
    by_name = {t["name"]: t for t in drawn}
    central = by_name["central"]
    assert central["title"] == "concentration [ug/L]"
    low, high = (10 ** v for v in central["range"]) if central["type"] == "log" else central["range"]
    values = [v for v in central["y"] if v is not None and v > 0]
    late = values[len(values) // 10:]  # after the first tenth of the week (the patch's first lag)
    assert max(values) <= high and all(low <= v <= high for v in late), (low, high, min(late), max(values))
    assert by_name["patch"]["range"] != central["range"]  # the patch on an axis of its own

    # the metrics table is in the plot's unit
    ui.tab("Metrics and comparison")
    cmax_unit = page.locator("#metrics-grid .ag-center-cols-container .ag-row .ag-cell[col-id='unit']",
                             has_text="ug/L")
    expect(cmax_unit.first).to_be_visible()
    ui.tab("Concentrations")
    ui.idle()

    # legends never cover an axis title (bounding boxes in the page), on every tab with a legend
    for tab, graph_id in (("Concentrations", "fig-concentration"), ("Barriers: flux and permeated", "fig-flux"),
                          ("Barriers: flux and permeated", "fig-permeated"), ("Mass balance", "fig-balance")):
        ui.tab(tab)
        ui.figure(graph_id, until=lambda ts: len(ts) >= 1)
        overlaps = page.evaluate("""(id) => {
            const root = document.getElementById(id);
            const legend = root.querySelector('.legend').getBoundingClientRect();
            const titles = Array.from(root.querySelectorAll('.g-xtitle, [class^="g-y"][class$="title"]'));
            return titles.filter(t => t.getBBox && t.getBoundingClientRect().width > 0).map(t => {
                const b = t.getBoundingClientRect();
                return !(b.right < legend.left || b.left > legend.right ||
                         b.bottom < legend.top || b.top > legend.bottom);
            });
        }""", graph_id)
        assert overlaps and not any(overlaps), (graph_id, overlaps)
    ui.tab("Concentrations")
    # the caution stays on screen, however far the page is scrolled
    page.evaluate("() => window.scrollTo(0, document.documentElement.scrollHeight)")
    page.wait_for_timeout(200)
    box = page.locator("#caution").bounding_box()
    assert box is not None and 0 <= box["y"] and box["y"] + box["height"] <= page.viewport_size["height"]
    page.evaluate("() => window.scrollTo(0, 0)")
    ui.shot("journey9-demo-plot")
