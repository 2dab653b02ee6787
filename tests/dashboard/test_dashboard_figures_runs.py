"""Figures and packed runs: what the plots draw is what the library computed, in the units shown.

Every figure is checked by plotly's own validator (``plotly.graph_objects.Figure`` refuses an
unknown or ill-typed property). The physics checks name their source:

- mass balance: what entered equals what is present plus what left (common practice);
- one membrane between a held source and a perfect sink: steady flux J = D K C0 / L,
  proportional to K, lag time L^2/(6D) independent of K (Crank, The Mathematics of Diffusion,
  2nd ed., 1975, eqs. 4.24a and 4.24b);
- partition condition C1/K1 = C2/K2 at an interface (Crank 1975, ch. 12);
- unit factors: 1 mL = 1e-3 L and 1 mg = 1000 ug (SI definitions, NIST SP 811, 2008).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import plotly.graph_objects as go
import pytest

import barrierflow
from dashboard import figures as F
from dashboard.panels.doses import timeline_rows
from dashboard.panels.layers import barrier_model, grid_rows, steady_summary
from dashboard.panels.network import canvas_positions, elements
from dashboard.panels.results import compare_rows, comparison_csv
from dashboard.runs import RunArchive, execute, exports, pack, run_key

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def patch_run():
    scenario = barrierflow.load(ROOT / "scenarios" / "daily_patch.toml")
    result = barrierflow.simulate(scenario)
    return result, pack(result, "run 1", scenario.to_toml())


@pytest.fixture(scope="module")
def cell_runs():
    text = (ROOT / "scenarios" / "diffusion_cell.toml").read_text()
    doubled = text.replace("partition = 4.0", "partition = 8.0")
    assert doubled != text
    return execute(text, "K 4", "diffusion_cell.toml"), execute(doubled, "K 8", "diffusion_cell.toml")


def test_concentration_figure_draws_the_library_traces_in_the_chosen_unit(patch_run):
    result, run = patch_run
    fig = F.concentration_figure([run], unit="mg/L", time_unit="d", split=False)
    go.Figure(fig)
    traces = {t["name"]: t for t in fig["data"]}
    assert set(traces) == set(result.compartment_ids)
    np.testing.assert_allclose(traces["central"]["y"], result.concentration("central") * 1000.0)  # mg/mL -> mg/L
    np.testing.assert_allclose(traces["central"]["x"], result.times / 24.0)  # h -> d
    assert fig["layout"]["yaxis"]["title"]["text"] == "concentration [mg/L]"
    assert fig["layout"]["xaxis"]["title"]["text"] == "time [d]"
    # the patch holds ~1e4 mg/L, plasma far less: the automatic axis is logarithmic
    assert F.wide_range([run])
    assert not F.wide_range([run], ["central", "peripheral"])


def _shown_on_its_axis(fig, name):
    """Fraction of a trace's points (after its first rise) inside the plotted range of its y axis."""
    trace = next(t for t in fig["data"] if t["name"] == name)
    axis = fig["layout"]["yaxis" + trace["yaxis"][1:]]
    y = np.array([v for v in trace["y"] if v is not None and v > 0])
    if axis["type"] == "log":
        low, high = 10 ** axis["range"][0], 10 ** axis["range"][1]
    else:
        low, high = -np.inf, np.inf
    start = int(np.argmax(y > 0.01 * y.max()))
    return float(np.mean((y[start:] >= low) & (y[start:] <= high))), y.max() <= high


def test_the_default_view_shows_plasma_beside_a_concentrated_patch(patch_run):
    _, run = patch_run
    fig = F.concentration_figure([run], unit="ug/L")
    go.Figure(fig)
    axis_of = {t["name"]: t["yaxis"] for t in fig["data"]}
    assert axis_of == {"patch": "y", "central": "y2", "peripheral": "y2"}  # the patch apart from the body
    for name in ("patch", "central", "peripheral"):
        share, peak_inside = _shown_on_its_axis(fig, name)
        assert share == 1.0 and peak_inside, name
    # one plot: every curve still inside the log axis (its range reaches below the lowest peak)
    one = F.concentration_figure([run], unit="ug/L", split=False)
    assert one["layout"]["yaxis"]["type"] == "log"
    for name in ("patch", "central", "peripheral"):
        share, peak_inside = _shown_on_its_axis(one, name)
        assert share > 0.95 and peak_inside, name
    # legends sit outside the plotting area, at the right
    assert fig["layout"]["legend"]["x"] > 1 and fig["layout"]["legend"]["xanchor"] == "left"


def test_a_curve_that_is_zero_throughout_is_named_not_left_in_the_legend(cell_runs):
    run, _ = cell_runs
    fig = F.concentration_figure([run], scale="log")
    names = [t["name"] for t in fig["data"]]
    assert names == ["donor"]  # the receptor is a perfect sink, 0 throughout
    assert any("0 throughout" in a["text"] and "receptor" in a["text"] for a in fig["layout"]["annotations"])


def test_overlaid_runs_differ_by_dash_and_name(patch_run, cell_runs):
    _, run = patch_run
    other = dataclasses.replace(run, name="run 2")
    fig = F.concentration_figure([run, other], compartments=["central"])
    go.Figure(fig)
    assert [t["name"] for t in fig["data"]] == ["central · run 1", "central · run 2"]
    assert fig["data"][0]["line"]["dash"] != fig["data"][1]["line"]["dash"]
    assert fig["data"][0]["line"]["color"] == fig["data"][1]["line"]["color"]


def test_flux_and_permeated_in_ug(cell_runs):
    base, _ = cell_runs
    flux = F.flux_figure([base], amount_unit="ug")
    perm = F.permeated_figure([base], amount_unit="ug")
    go.Figure(flux)
    go.Figure(perm)
    np.testing.assert_allclose(perm["data"][0]["y"], base.barriers["membrane"].permeated * 1000.0)
    assert perm["layout"]["yaxis"]["title"]["text"] == "permeated [ug/cm²]"


def test_steady_flux_doubles_with_the_partition_coefficient_in_the_comparison(cell_runs):
    rows, names = compare_rows(list(cell_runs), reference=0)
    assert names == ["K 4", "K 8"]
    by_name = {(r["id"], r["name"]): r for r in rows}
    # Crank (1975), eqs. 4.24a, 4.24b
    assert float(by_name[("membrane", "steady_flux")]["q1"]) == pytest.approx(2.0, rel=1e-3)
    assert float(by_name[("membrane", "lag_time")]["q1"]) == pytest.approx(1.0, rel=1e-3)
    assert by_name[("membrane", "steady_flux")]["r1"] == "2"
    text = comparison_csv(list(cell_runs))
    assert text.splitlines()[0] == "run,scenario,kind,id,metric,unit,value,ratio_to_reference,note"


def test_profile_figure_shows_the_partition_jump():
    text = """
[scenario]
name = "jump (invented)"
duration = "3 h"
output_step = "5 min"
[[compartment]]
id = "a"
held_concentration = "1 mg/mL"
[[compartment]]
id = "b"
held_concentration = "0 mg/mL"
[[barrier]]
id = "film"
from = "a"
to = "b"
area = "1 cm^2"
  [[barrier.layer]]
  thickness = "10 um"
  diffusivity = "1e-8 cm^2/s"
  partition = 10
  cells = 20
  [[barrier.layer]]
  thickness = "50 um"
  diffusivity = "1e-8 cm^2/s"
  partition = 1
  cells = 40
"""
    run = execute(text, "r", "jump.toml")
    fig = F.profile_figure([run], "film", 3.0, steady=run.steady["film"])
    go.Figure(fig)
    first, second = fig["data"][0], fig["data"][1]
    assert max(first["x"]) < 10.0 < min(second["x"])  # um
    # Crank (1975), ch. 12: C1/K1 = C2/K2 at the interface; the cells sit half a cell away
    assert first["y"][-1] / second["y"][0] == pytest.approx(10.0, rel=0.1)
    shapes = fig["layout"]["shapes"]
    assert [s["type"] for s in shapes].count("rect") == 2 and [s["type"] for s in shapes].count("line") == 1


def test_mass_balance_stack_meets_what_entered(patch_run):
    _, run = patch_run
    fig = F.balance_figure(run)
    go.Figure(F.balance_figure([run, dataclasses.replace(run, name="run 2")]))
    go.Figure(fig)
    stacked = np.sum([t["y"] for t in fig["data"] if t.get("stackgroup")], axis=0)
    entered = np.asarray(fig["data"][-1]["y"])
    np.testing.assert_allclose(stacked, entered, rtol=1e-8, atol=1e-9 * entered.max())


def test_stack_and_timeline_figures(patch_run):
    go.Figure(F.stack_figure([{"name": "a", "thickness": 15e-4}, {"name": "b", "thickness": None}]))
    scenario = barrierflow.load(ROOT / "scenarios" / "daily_patch.toml")
    from dashboard.draft import draft_from_scenario

    d = draft_from_scenario(scenario, "daily_patch.toml")
    rows, duration = timeline_rows(d)
    assert duration == pytest.approx(scenario.duration)
    assert rows[0]["starts"] == list(scenario.doses[0].start_times(scenario.duration))
    go.Figure(F.dose_timeline_figure(rows, duration))


def test_the_archive_makes_a_dropped_run_again_with_the_same_numbers(tmp_path, patch_run):
    _, run = patch_run
    archive = RunArchive(tmp_path)
    toml = run.toml
    record = {"key": run_key(toml), "toml": toml, "name": "again", "file": "daily_patch.toml"}
    again = archive.fetch(record)  # not in the archive: simulated from the record's TOML
    assert again.name == "again"
    np.testing.assert_array_equal(again.conc["central"], run.conc["central"])
    assert archive.get(record["key"]) is not None


def test_exports_are_the_library_files(tmp_path):
    path = ROOT / "scenarios" / "membrane_washoff.toml"
    files = exports(path.read_text(), path.name)
    result = barrierflow.simulate(barrierflow.load(path))
    result.to_csv(tmp_path / "cli.csv")
    assert files.csv == (tmp_path / "cli.csv").read_text()
    assert files.sidecar.startswith("{") and '"created"' in files.sidecar


def test_layer_grid_and_steady_state_of_a_single_membrane():
    scenario = barrierflow.load(ROOT / "scenarios" / "diffusion_cell.toml")
    from dashboard.draft import check, draft_from_scenario

    d = draft_from_scenario(scenario, "diffusion_cell.toml")
    key = d["links"][0]["key"]
    barrier, src, dst = barrier_model(d, key)
    s = steady_summary(barrier, src, dst)
    layer = scenario.barrier("membrane").layers[0]
    c0 = scenario.compartment("donor").held_concentration
    # Crank (1975), eq. 4.24a: J = D K C0 / L with a perfect sink
    assert s.steady_flux == pytest.approx(layer.diffusivity * layer.partition * c0 / layer.thickness, rel=1e-12)
    assert s.lag_time == pytest.approx(layer.thickness ** 2 / (6 * layer.diffusivity), rel=1e-12)
    rows = grid_rows(d, key, check(d)[1]["messages"])
    assert rows[0]["thickness"] == "20 um" and rows[0]["_errors"] is None


def test_canvas_elements_keep_dragged_positions_and_tell_kinds_apart():
    scenario = barrierflow.load(ROOT / "scenarios" / "diffusion_cell.toml")
    from dashboard.draft import draft_from_scenario

    d = draft_from_scenario(scenario, "diffusion_cell.toml")
    key = d["compartments"][0]["key"]
    moved = [{"data": {"id": key}, "position": {"x": 5.0, "y": 6.0}}]
    els = elements(d, canvas_positions(moved))
    node = next(e for e in els if e["data"]["id"] == key)
    assert node["position"] == {"x": 5.0, "y": 6.0}
    assert node["data"]["held"] == "yes"
    edge = next(e for e in els if "source" in e["data"])
    assert edge["data"]["kind"] == "barrier" and "1 layer" in edge["data"]["label"]


def test_a_large_grid_is_thinned_for_the_profile_keeping_the_cells_at_every_interface():
    from dashboard.runs import profile_cells

    layer_of_cell = np.repeat([0, 1, 2], [2000, 50, 3000])
    kept = profile_cells(layer_of_cell, most=300)
    assert len(kept) <= 300 + 3
    for layer in (0, 1, 2):
        idx = np.flatnonzero(layer_of_cell == layer)
        assert idx[0] in kept and idx[-1] in kept
    assert np.all(np.diff(kept) > 0)
    np.testing.assert_array_equal(profile_cells(np.zeros(40, dtype=int)), np.arange(40))


def test_one_unit_choice_governs_the_plot_and_the_metrics_table(patch_run):
    from dashboard.panels.results import units_of

    _, run = patch_run
    u = units_of([run], None, None, "h")
    assert (u.concentration, u.amount) == ("ug/L", "mg")  # the demo's [output] units, by default
    rows, _ = compare_rows([run], 0, u.output)
    cmax = next(r for r in rows if r["id"] == "central" and r["name"] == "cmax")
    fig = F.concentration_figure([run], unit=u.concentration)
    central = next(t for t in fig["data"] if t["name"] == "central")
    assert cmax["unit"] == "ug/L" and fig["layout"]["yaxis2"]["title"]["text"] == "concentration [ug/L]"
    assert float(cmax["f0"]) == pytest.approx(max(central["y"]), rel=1e-9)
    # another choice moves both: 1 ug/L = 1e-3 mg/L, 1 d = 24 h (SI, NIST SP 811)
    other = units_of([run], "mg/L", "ug", "d")
    rows2, _ = compare_rows([run], 0, other.output)
    cmax2 = next(r for r in rows2 if r["id"] == "central" and r["name"] == "cmax")
    tmax2 = next(r for r in rows2 if r["id"] == "central" and r["name"] == "tmax")
    tmax = next(r for r in rows if r["id"] == "central" and r["name"] == "tmax")
    assert cmax2["unit"] == "mg/L" and float(cmax2["f0"]) == pytest.approx(float(cmax["f0"]) * 1e-3, rel=1e-12)
    assert tmax2["unit"] == "d" and float(tmax2["f0"]) == pytest.approx(float(tmax["f0"]) / 24, rel=1e-12)


def test_measured_data_are_drawn_over_the_predicted_curves_in_the_plot_units(cell_runs):
    from barrierflow.io import load_experiment

    base, _ = cell_runs
    experiment = load_experiment(ROOT / "data" / "diffusion_cell_replicates.csv")
    series = [s for s in experiment.series if s.observable == "permeated:membrane"]
    fig = F.permeated_figure([base], amount_unit="ug", measured=experiment)
    go.Figure(fig)
    markers = [t for t in fig["data"] if t["mode"] == "markers"]
    assert [t["name"] for t in markers] == ["permeated:membrane measured"] * len(series) == \
        ["permeated:membrane measured"] * 3
    assert [t["showlegend"] for t in markers] == [True, False, False]  # one legend entry, a marker per replicate
    assert len({t["marker"]["symbol"] for t in markers}) == 3
    # the file's own numbers (ug/cm^2) come back as written; in mg/cm^2 they are 1000 times smaller (SI)
    written = [float(line.split(",")[1]) for line in
               (ROOT / "data" / "diffusion_cell_replicates.csv").read_text().splitlines()[3:] if line.strip()]
    np.testing.assert_allclose(markers[0]["y"], written, rtol=1e-12)
    in_mg = F.permeated_figure([base], amount_unit="mg", measured=experiment)
    np.testing.assert_allclose([t for t in in_mg["data"] if t["mode"] == "markers"][0]["y"],
                               np.array(written) / 1000, rtol=1e-12)
    # the concentration plot has no permeated series to draw, and draws none
    conc = F.concentration_figure([base], measured=experiment)
    assert not [t for t in conc["data"] if t["mode"] == "markers"]
