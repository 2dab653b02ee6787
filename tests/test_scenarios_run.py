"""Every example scenario runs, closes its mass balance and exports the columns of the format."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

import barrierflow as bf

SCENARIOS = sorted((Path(__file__).resolve().parents[1] / "scenarios").glob("*.toml"))


@pytest.mark.parametrize("path", SCENARIOS, ids=[p.stem for p in SCENARIOS])
def test_example_runs_and_closes_mass_balance(path, tmp_path):
    scenario = bf.load(path)
    result = bf.simulate(scenario)
    assert result.status == 0
    # the engine issue's requirement: relative mass-balance error below 1e-6 on every run
    assert result.mass_balance.relative_error < 1e-6
    out = result.to_csv(tmp_path / f"{path.stem}.csv")
    with open(out, newline="") as fh:
        rows = list(csv.reader(fh))
    header = rows[0]
    u = scenario.output_units
    assert header[0] == f"time [{u.time}]"
    for c in scenario.compartments:
        assert f"conc:{c.id} [{u.concentration}]" in header
        assert f"amount:{c.id} [{u.amount}]" in header
        assert f"eliminated:{c.id} [{u.amount}]" in header
    for b in scenario.barriers:
        assert f"flux:{b.id} [{u.amount}/({u.area}*{u.time})]" in header
        assert f"permeated:{b.id} [{u.amount}/{u.area}]" in header
        assert f"content:{b.id} [{u.amount}]" in header
    assert len(rows) - 1 == len(scenario.output_grid())
    side = json.loads(out.with_suffix(".json").read_text())
    for key in ("scenario", "software", "solver", "grid", "mass_balance_mg", "caution"):
        assert key in side
    assert bf.loads(side["scenario"]["toml"]) == scenario


def test_held_compartment_without_volume_leaves_amount_blank(tmp_path):
    text = """
[scenario]
name = "blank amounts (invented)"
duration = "2 h"
output_step = "1 h"
[[compartment]]
id = "donor"
held_concentration = "1 mg/mL"
[[compartment]]
id = "receptor"
volume = "5 mL"
[[barrier]]
id = "m"
from = "donor"
to = "receptor"
area = "1 cm^2"
  [[barrier.layer]]
  thickness = "20 um"
  diffusivity = "1e-7 cm^2/s"
"""
    r = bf.simulate(bf.loads(text))
    out = r.to_csv(tmp_path / "x.csv")
    rows = list(csv.DictReader(open(out)))
    assert all(row["amount:donor [mg]"] == "" for row in rows)
    assert all(row["amount:receptor [mg]"] != "" for row in rows)


def test_output_units_convert_the_columns(tmp_path):
    # NIST SP 811 (Thompson & Taylor 2008) App. B: 1 h = 60 min; 1 mg = 1000 ug; 1 cm^2 = 100 mm^2
    base = bf.load(SCENARIOS[0])
    from dataclasses import replace

    from barrierflow import OutputUnits

    other = replace(base, output_units=OutputUnits(time="min", concentration="ug/mL", amount="ug", area="mm^2"))
    r1, r2 = bf.simulate(base), bf.simulate(other)
    c1 = {name: v for name, v in r1.columns()}
    c2 = {name: v for name, v in r2.columns()}
    assert np.allclose(c2["time [min]"], c1["time [h]"] * 60)
    b = base.barriers[0].id
    cid = base.compartments[0].id
    assert np.allclose(c2[f"conc:{cid} [ug/mL]"], c1[f"conc:{cid} [mg/L]"])  # 1 mg/L = 1 ug/mL
    assert np.allclose(c2[f"permeated:{b} [ug/mm^2]"], c1[f"permeated:{b} [mg/cm^2]"] * 1000 / 100)
    assert np.allclose(c2[f"flux:{b} [ug/(mm^2*min)]"], c1[f"flux:{b} [mg/(cm^2*h)]"] * 1000 / 100 / 60)
