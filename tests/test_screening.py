"""The screening estimate (Potts and Guy, Predicting skin permeability, Pharm. Res. 9 (1992) 663).

log10 kp [cm/s] = -6.3 + 0.71 log10 Kow - 0.0061 MW; K = Kow^0.71; D/L = 10^(-6.3 - 0.0061 MW) cm/s.
The worked values below are computed by hand from that published equation.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

import barrierflow as bf
from barrierflow.analysis.screening import SCREENING_FLAG, screen_layer, screening_estimate
from barrierflow.cli import main
from barrierflow.errors import ScenarioError

ROOT = Path(__file__).resolve().parents[1]


def test_the_published_correlation_by_hand():
    # caffeine-like inputs: log Kow -0.07, MW 194.19 g/mol:
    # log kp = -6.3 - 0.0497 - 1.184559 = -7.534259 (cm/s)
    e = screening_estimate(-0.07, 194.19, 15e-4)
    assert math.log10(e.permeability / 3600.0) == pytest.approx(-7.534259, abs=1e-6)
    assert e.partition == pytest.approx(10 ** (0.71 * -0.07), rel=1e-12)
    # the split multiplies back to kp (Fick: kp = D K / L), and D scales with the path length
    assert e.diffusivity * e.partition / 15e-4 == pytest.approx(e.permeability, rel=1e-12)
    assert screening_estimate(-0.07, 194.19, 30e-4).diffusivity == pytest.approx(2 * e.diffusivity, rel=1e-12)
    assert e.in_domain and not e.warnings


def test_outside_the_domain_is_flagged():
    e = screening_estimate(7.5, 900.0, 15e-4)
    assert not e.in_domain and len(e.warnings) == 2
    assert "molar mass 900 g/mol lies outside the correlation's data (18 to 750 g/mol)" in e.warnings[0]
    assert "log Kow 7.5 lies outside" in e.warnings[1]
    assert SCREENING_FLAG in e.to_text() and "SCREENING ESTIMATE" in e.to_text()
    with pytest.raises(ScenarioError, match="screening molar mass: got -1"):
        screening_estimate(1.0, -1, 1e-3)


def scenario_with_substance(tmp_path, extra='log_kow = 1.2\nmolar_mass = "250 g/mol"\n'):
    text = (ROOT / "scenarios" / "diffusion_cell.toml").read_text()
    text = text.replace('solubility = "5 mg/mL"\n', f'solubility = "5 mg/mL"\n{extra}')
    path = tmp_path / "cell.toml"
    path.write_text(text)
    return path


def test_screen_a_layer_of_a_scenario(tmp_path):
    s = bf.load(scenario_with_substance(tmp_path))
    est, new = screen_layer(s)
    layer = new.barrier("membrane").layers[0]
    assert layer.diffusivity == pytest.approx(est.diffusivity, rel=1e-5)
    assert layer.partition == pytest.approx(10 ** (0.71 * 1.2), rel=1e-5)
    assert "SCREENING ESTIMATE" in new.description
    text = new.to_toml()
    assert bf.loads(text) == new
    with pytest.raises(ScenarioError, match="needs \\[substance\\] log_kow and molar_mass"):
        screen_layer(bf.load(ROOT / "scenarios" / "diffusion_cell.toml"))
    with pytest.raises(ScenarioError, match="did you mean"):
        screen_layer(s, "barrier.membrane.layer.2")


def test_screen_command(tmp_path, capsys):
    path = scenario_with_substance(tmp_path)
    assert main(["screen", str(path), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["screening_estimate"] is True and doc["in_domain"] is True and doc["flag"] == SCREENING_FLAG
    assert main(["screen", str(path), "--layer", "barrier.membrane.layer.1", "-o", str(tmp_path / "s.toml")]) == 0
    out = capsys.readouterr().out
    assert "SCREENING ESTIMATE" in out and (tmp_path / "s.toml").is_file()
    assert main(["screen", str(ROOT / "scenarios" / "diffusion_cell.toml")]) == 2
    assert "log_kow, molar_mass not given" in capsys.readouterr().err
