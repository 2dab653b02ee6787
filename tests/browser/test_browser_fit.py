"""The fit journey in a real (headless) browser: replicate data to fitted D and K to an adopted scenario.

The data are the invented example of the README (data/diffusion_cell_replicates.csv). What the
page shows is checked against the command line on the same files (`barrierflow fit`, whose own
recovery of D and K is checked against Crank's series in tests/test_fit.py), and the adopted
scenario's run against the fitted curve.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from playwright.sync_api import expect

pytestmark = pytest.mark.browser

ROOT = Path(__file__).resolve().parents[2]
DATA = ROOT / "data" / "diffusion_cell_replicates.csv"
FREE = ["barrier.membrane.layer.1.diffusivity", "barrier.membrane.layer.1.partition"]


def test_upload_data_fit_adopt_and_run(ui, tmp_path):
    page = ui.page
    ui.open()
    ui.pick("example-pick", "Diffusion cell, infinite dose, sink receptor (diffusion_cell.toml)")
    page.locator("#example-open").click()
    ui.idle()

    # upload the lab's data: the page reads it and names what it holds
    page.locator("#fit-upload input[type=file]").set_input_files(str(DATA))
    expect(page.locator("#fit-data-note")).to_contain_text("35 values in 3 replicates (1, 2, 3)")
    ui.idle()
    # the data over the open scenario's curve, before any fit
    traces = ui.figure("fig-fit", until=lambda ts: {"open scenario", "replicate 3"} <= {t["name"] for t in ts})
    measured = next(t for t in traces if t["name"] == "replicate 1")
    assert measured["y"][-1] == pytest.approx(75.5)  # the file's value, in its own unit (ug/cm^2)
    # the parameters to estimate default to D and K of the observed barrier's first layer
    expect(page.locator("#fit-free")).to_contain_text("barrier.membrane.layer.1.diffusivity")
    expect(page.locator("#fit-free")).to_contain_text("barrier.membrane.layer.1.partition")

    page.locator("#fit-run").click()
    page.locator("#fit-status .good", has_text="Fitted 2 parameter(s)").wait_for(timeout=90_000)
    ui.idle()
    traces = ui.figure("fig-fit", until=lambda ts: "fitted" in {t["name"] for t in ts})
    names = {t["name"] for t in traces}
    assert {"fitted", "95 % confidence band of the fit", "open scenario"} <= names
    fitted_curve = next(t for t in traces if t["name"] == "fitted")
    residuals = ui.figure("fig-fit-residuals", until=lambda ts: len(ts) == 3)
    assert sum(len(t["x"]) for t in residuals) == 35
    expect(page.locator("#fit-table")).to_contain_text("95 % CI (profile)")
    expect(page.locator("#fit-warnings")).to_contain_text("strongly correlated")

    # the report the page downloads holds the numbers of the command line on the same files
    with page.expect_download() as info:
        page.locator("#fit-export-report").click()
    report_path = tmp_path / info.value.suggested_filename
    info.value.save_as(report_path)
    page_report = json.loads(report_path.read_text())
    done = subprocess.run([sys.executable, "-m", "barrierflow", "fit", str(ROOT / "scenarios" / "diffusion_cell.toml"),
                           str(DATA), "--free", FREE[0], "--free", FREE[1], "--weights", "1/y^2", "--json",
                           str(tmp_path / "cli.json"), "-o", str(tmp_path / "cli.toml"), "--no-progress"],
                          capture_output=True, text=True, timeout=120, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    cli_report = json.loads((tmp_path / "cli.json").read_text())
    for path in FREE:
        assert page_report["parameters"][path]["estimate"] == pytest.approx(
            cli_report["parameters"][path]["estimate"], rel=1e-9)
        assert page_report["parameters"][path]["ci95"] == pytest.approx(cli_report["parameters"][path]["ci95"],
                                                                        rel=1e-9)
    d_text = f"{page_report['parameters'][FREE[0]]['estimate']:.6g} cm^2/s"

    # adopt: the editor shows the fitted values, and a run of the adopted scenario follows the fit
    page.locator("#fit-adopt").click()
    expect(page.locator("#fit-adopt-note")).to_contain_text("Adopted into the open scenario")
    ui.idle()
    ui.pick("element-select", "Barrier membrane: donor → receptor")
    expect(ui.cell("layer-grid", 0, "diffusivity")).to_have_text(d_text)
    ui.run(1)
    ui.tab("Barriers: flux and permeated")
    permeated = ui.figure("fig-permeated", until=lambda ts: len(ts) >= 1)
    # the run's cumulative amount at 24 h against the fitted curve's last point (the plot shows the
    # scenario's [output] amount per cm^2, the fit the data's ug/cm^2; 1 mg = 1000 ug)
    axis = page.evaluate("() => document.getElementById('fig-permeated').querySelector('.js-plotly-plot')"
                         ".layout.yaxis.title.text")
    factor = {"ug/cm²": 1.0, "mg/cm²": 1000.0}[axis.split("[")[1].rstrip("]")]
    run_trace = permeated[0]
    at_24 = run_trace["y"][min(range(len(run_trace["x"])), key=lambda i: abs(run_trace["x"][i] - 24.0))]
    assert factor * at_24 == pytest.approx(fitted_curve["y"][-1], rel=1e-4)
    ui.shot("journey-fit-adopt-run")
