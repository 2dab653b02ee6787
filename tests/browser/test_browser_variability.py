"""Journey: a population from the variability panel, the same numbers as the command line.

Subject k of a seed is the same subject in the page's worker and on the command line, and the
bands are computed by the same sketch, so the page's median band of a trace equals the
command line's BANDS.csv (to the ten digits the CSV keeps). The percentiles bracket each other
at every time (5th <= 50th <= 95th: order statistics, common practice).
"""

from __future__ import annotations

import csv
import io
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from playwright.sync_api import expect

pytestmark = pytest.mark.browser

ROOT = Path(__file__).resolve().parents[2]
PATCH = "Daily patch over two-layer skin into a two-compartment body (daily_patch.toml)"


def test_population_from_the_panel_matches_the_command_line(ui, tmp_path):
    page = ui.page
    ui.open()
    ui.pick("example-pick", PATCH)
    page.locator("#example-open").click()
    expect(page.locator("#scenario-open-message")).to_contain_text("Opened the example daily_patch.toml")
    ui.idle()
    page.locator("#card-variability").scroll_into_view_if_needed()

    # a spread the model refuses is named with the command line's message, and not added
    ui.pick("vary-path", "compartment.central.volume (15 L)")
    ui.pick("vary-distribution", "normal: mean = the scenario's value")
    ui.type_into(page.locator("#vary-spread"), "0.8")
    page.locator("#vary-add").click()
    expect(page.locator("#vary-message")).to_contain_text("gives compartment 'central' volume a value below its "
                                                          "range")
    expect(page.locator("#vary-list")).to_contain_text("No parameter has a spread yet.")

    ui.pick("vary-distribution", "log-normal: median = the scenario's value")
    ui.pick("vary-path", "barrier.skin.layer.1.diffusivity (1e-10 cm^2/s)")
    ui.type_into(page.locator("#vary-spread"), "0.4")
    page.locator("#vary-add").click()
    ui.pick("vary-path", "compartment.central.clearance (20 L/h)")
    ui.type_into(page.locator("#vary-spread"), "0.3")
    page.locator("#vary-add").click()
    chips = page.locator("#vary-list .chip")
    expect(chips).to_have_count(2)
    expect(chips.nth(0)).to_contain_text("barrier.skin.layer.1.diffusivity: lognormal cv 0.4")

    ui.type_into(page.locator("#vary-subjects"), "40")
    ui.type_into(page.locator("#vary-seed"), "7")
    page.locator("#vary-run").click()
    page.locator("#vary-status .good", has_text="40 subjects").wait_for(timeout=120_000)
    ui.idle()

    ui.pick("vary-trace", "conc:central [ug/L]")
    page.wait_for_function("() => { const gd = document.getElementById('fig-vary-bands')"
                           ".querySelector('.js-plotly-plot'); return gd && gd.layout && gd.layout.title && "
                           "gd.layout.title.text.startsWith('conc:central'); }")
    bands = ui.figure("fig-vary-bands", until=lambda t: len(t) == 3 and len(t[2]["y"]) > 100)
    hi, lo, mid = (np.array(t["y"], dtype=float) for t in bands)
    assert np.all(lo <= mid + 1e-12) and np.all(mid <= hi + 1e-12) and hi.max() > lo.max()

    ui.pick("vary-metric", "auc:central")
    page.wait_for_function("() => { const gd = document.getElementById('fig-vary-histogram')"
                           ".querySelector('.js-plotly-plot'); return gd && gd.layout && gd.layout.title && "
                           "gd.layout.title.text.startsWith('auc:central'); }")
    hist = ui.figure("fig-vary-histogram", until=lambda t: len(t) == 1 and len(t[0]["x"]) == 40)
    assert len(hist[0]["x"]) == 40
    ranking = ui.figure("fig-vary-ranking", until=lambda t: len(t) == 2)
    params = page.evaluate("() => document.getElementById('fig-vary-ranking').querySelector('.js-plotly-plot')"
                           ".data[0].y")
    assert sorted(params) == ["barrier.skin.layer.1.diffusivity", "compartment.central.clearance"]
    assert all(0 <= x <= 1.5 for x in ranking[0]["x"])
    ui.shot("variability-population")

    # the command line: the same subjects, the same median band
    proc = subprocess.run(
        [sys.executable, "-m", "barrierflow", "population", str(ROOT / "scenarios" / "daily_patch.toml"), "-n", "40",
         "--seed", "7", "--vary", "barrier.skin.layer.1.diffusivity=lognormal:cv=0.4",
         "--vary", "compartment.central.clearance=lognormal:cv=0.3", "-o", str(tmp_path / "b.csv"),
         "--subjects", str(tmp_path / "s.csv"), "--no-progress"], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    rows = list(csv.reader(io.StringIO((tmp_path / "b.csv").read_text())))
    col = rows[0].index("conc:central p50 [ug/L]")
    cli = np.array([float(r[col]) for r in rows[1:]])
    np.testing.assert_allclose(mid, cli, rtol=1e-9, atol=1e-12)


def test_sweep_heatmap_of_the_diffusion_cell(ui):
    """A 3 x 2 sweep of the membrane's diffusivity (log steps) and partition coefficient: the steady
    flux between a held donor and a perfect sink, J = D K C0 / L (Crank, The Mathematics of
    Diffusion, 2nd ed., 1975, eq. 4.24a), so the permeated amount rises with both."""
    page = ui.page
    ui.open()
    ui.pick("example-pick", "Diffusion cell, infinite dose, sink receptor (diffusion_cell.toml)")
    page.locator("#example-open").click()
    expect(page.locator("#scenario-open-message")).to_contain_text("Opened the example diffusion_cell.toml")
    ui.idle()
    page.locator("#sweep-run").scroll_into_view_if_needed()
    ui.pick("sweep-path-1", "barrier.membrane.layer.1.diffusivity (2e-10 cm^2/s)")
    ui.type_into(page.locator("#sweep-range-1"), "1e-10 cm^2/s..4e-10 cm^2/s")
    ui.type_into(page.locator("#sweep-steps-1"), "3")
    page.locator("#sweep-log-1 input").check()
    ui.pick("sweep-path-2", "barrier.membrane.layer.1.partition (4)")
    ui.type_into(page.locator("#sweep-range-2"), "2..8")
    ui.type_into(page.locator("#sweep-steps-2"), "2")
    page.locator("#sweep-run").click()
    page.locator("#sweep-status .good", has_text="6 points done").wait_for(timeout=120_000)
    ui.idle()
    ui.pick("sweep-metric", "permeated:membrane")
    page.wait_for_function("() => { const gd = document.getElementById('fig-sweep').querySelector('.js-plotly-plot');"
                           " return gd && gd.data && gd.data[0] && gd.data[0].type === 'heatmap' && "
                           "gd.layout.title.text.startsWith('permeated:membrane'); }")
    z = page.evaluate("() => document.getElementById('fig-sweep').querySelector('.js-plotly-plot').data[0].z")
    z = np.array(z, dtype=float)
    assert z.shape == (3, 2)
    assert np.all(np.diff(z, axis=0) > 0) and np.all(np.diff(z, axis=1) > 0)
    # late in a long run the permeated amount follows the steady line, proportional to K: about 4x
    # from K = 2 to K = 8 at every diffusivity (less the lag time's share)
    assert np.all((z[:, 1] / z[:, 0] > 3.5) & (z[:, 1] / z[:, 0] <= 4.0 + 1e-9))
    ui.shot("variability-sweep")
