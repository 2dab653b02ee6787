"""Every new feature of the lab's protocol on every engine path, with the ledger closed.

One invented network carries every linear feature at once (samples with replacement, a partial
remove, a remove that ends contact and a new application that restores it, a loaded layer, loss
to the air beside clearance, values per area); another the features that change a volume or hold
solid (evaporation, a solubility limit, samples without replacement). Each path that runs a model
must agree with a tight Radau solution (scipy's solve_ivp Radau IIA, order 5, rtol 1e-11, the
reference library) and close the mass balance to 1e-6; the paths that cannot run a model must
refuse it with a message that names the integrators that can.
"""

from __future__ import annotations

import numpy as np
import pytest

import barrierflow as bf
from barrierflow.engine.exact import ExactIntegrator
from barrierflow.engine.integrators import ScipyIntegrator
from barrierflow.engine.rosenbrock import RosenbrockIntegrator
from barrierflow.errors import ScenarioError

LINEAR = """
[scenario]
name = "every linear feature of the lab's protocol (invented)"
duration = "10 h"
output_step = "15 min"

[[compartment]]
id = "vehicle"
volume = "10 uL/cm^2"
initial_concentration = "4 mg/mL"
loss_rate = "0.3 1/h"
clearance = "0.002 mL/h"

[[compartment]]
id = "receptor"
volume = "3 mL"

[[barrier]]
id = "skin"
from = "vehicle"
to = "receptor"
area = "2 cm^2"

  [[barrier.layer]]
  thickness = "15 um"
  diffusivity = "2e-9 cm^2/s"
  partition = 5.0
  cells = 12
  initial_concentration = "1 mg/mL"

  [[barrier.layer]]
  thickness = "60 um"
  diffusivity = "5e-7 cm^2/s"
  cells = 12

[[dose]]
target = "receptor"
kind = "sample"
volume = "0.3 mL"
at = "1 h"
every = "1 h"

[[dose]]
target = "vehicle"
kind = "remove"
fraction = 0.5
at = "2 h"

[[dose]]
target = "vehicle"
kind = "remove"
ends_contact = true
at = "4 h"

[[dose]]
target = "vehicle"
kind = "bolus"
amount = "20 ug/cm^2"
at = "6 h"
"""

VEHICLE = """
[scenario]
name = "a volatile suspension sampled without replacement (invented)"
duration = "10 h"
output_step = "15 min"

[substance]
solubility = "2 mg/mL"

[[compartment]]
id = "vehicle"
volume = "10 uL/cm^2"
initial_concentration = "1.5 mg/mL"
evaporation_rate = "3 uL/(cm^2*h)"
residual_volume = "1 uL/cm^2"
loss_rate = "0.1 1/h"

[[compartment]]
id = "receptor"
volume = "3 mL"

[[barrier]]
id = "skin"
from = "vehicle"
to = "receptor"
area = "2 cm^2"

  [[barrier.layer]]
  thickness = "15 um"
  diffusivity = "2e-11 cm^2/s"
  partition = 5.0
  cells = 12

  [[barrier.layer]]
  thickness = "60 um"
  diffusivity = "5e-7 cm^2/s"
  cells = 12

[[dose]]
target = "receptor"
kind = "sample"
volume = "0.3 mL"
replace = false
at = "2 h"
every = "2 h"

[[dose]]
target = "vehicle"
kind = "remove"
fraction = 0.8
ends_contact = true
at = "8 h"
"""

PATHS = {
    "exact chain": ExactIntegrator("chain"),
    "exact modes": ExactIntegrator("modes"),
    "exact expm": ExactIntegrator("expm"),
    "rodas": RosenbrockIntegrator(rtol=1e-9, atol=1e-12),
    "bdf": ScipyIntegrator("BDF", rtol=1e-9, atol=1e-12),
    "radau": ScipyIntegrator("Radau", rtol=1e-9, atol=1e-12),
    "lsoda": ScipyIntegrator("LSODA", rtol=1e-9, atol=1e-12),
}
REFERENCE = ScipyIntegrator("Radau", rtol=1e-11, atol=1e-14)
_REFS: dict[str, bf.Result] = {}


def _reference(text: str) -> bf.Result:
    if text not in _REFS:
        _REFS[text] = bf.simulate(bf.loads(text), integrator=REFERENCE)
    return _REFS[text]


def _agree(result: bf.Result, ref: bf.Result, rel: float) -> None:
    for cid in ("vehicle", "receptor"):
        for get in (result.concentration, result.amount, result.sampled, result.lost):
            a, b = get(cid), getattr(ref, get.__name__)(cid)
            assert np.max(np.abs(a - b)) <= rel * max(float(np.max(np.abs(b))), 1e-300), (get.__name__, cid)
    a, b = result.permeated("skin"), ref.permeated("skin")
    assert np.max(np.abs(a - b)) <= rel * float(np.max(np.abs(b)))


@pytest.mark.parametrize("path", list(PATHS))
def test_the_linear_features_on_every_path(path):
    scenario = bf.loads(LINEAR)
    result = bf.simulate(scenario, integrator=PATHS[path], fallback=False)
    mb = result.mass_balance
    assert mb.relative_error <= 1e-6, mb
    assert mb.sampled > 0 and mb.lost > 0 and mb.removed > 0 and mb.eliminated > 0
    _agree(result, _reference(LINEAR), 1e-6)
    # closed from 4 h to the bolus at 6 h: the vehicle then only loses to the air and clearance
    t = result.times
    shut = (t > 4.0) & (t < 6.0)
    assert np.all(result.amount("vehicle")[shut] == 0.0)
    assert np.all(np.abs(result.uptake_flux("skin")[shut]) == 0.0)
    assert result.amount("vehicle")[np.searchsorted(t, 6.0)] > 0 and np.any(result.uptake_flux("skin")[t > 6.0] > 0)


def test_the_default_takes_an_exact_path_for_the_linear_features():
    result = bf.simulate(bf.loads(LINEAR))
    assert result.integrator == "exact" and result.stats["fallbacks"] == 0


@pytest.mark.parametrize("path", list(PATHS))
def test_the_vehicle_features_run_on_the_scipy_paths_and_are_refused_elsewhere(path):
    scenario = bf.loads(VEHICLE)
    if path.startswith("exact") or path == "rodas":
        with pytest.raises(ScenarioError, match="use auto, bdf, radau or lsoda"):
            bf.simulate(scenario, integrator=PATHS[path])
        return
    result = bf.simulate(scenario, integrator=PATHS[path], fallback=False)
    mb = result.mass_balance
    assert mb.relative_error <= 1e-6, mb
    ref = _reference(VEHICLE)
    _agree(result, ref, 2e-5)
    assert np.max(result.solid("vehicle")) > 0                          # it concentrated past the solubility
    assert np.allclose(result.volume("receptor")[-1], 3.0 - 5 * 0.3)    # five samples without replacement


def test_the_default_routes_the_vehicle_features_to_radau():
    result = bf.simulate(bf.loads(VEHICLE))
    assert result.integrator == "scipy-Radau" and result.mass_balance.relative_error <= 1e-6
    heads = [name for name, _ in result.columns()]
    for col in ("sampled:receptor [mg]", "lost:vehicle [mg]", "volume:vehicle [mL]", "volume:receptor [mL]",
                "solid:vehicle [mg]"):
        assert col in heads


def test_populations_refuse_the_vehicle_features_and_run_the_linear_ones():
    from barrierflow.engine.population import simulate_many

    linear = bf.loads(LINEAR)
    pop = simulate_many([linear, linear])
    single = bf.simulate(linear)
    assert np.allclose(pop.concentration("receptor")[1], single.concentration("receptor"), rtol=1e-9, atol=1e-15)
    with pytest.raises(ScenarioError, match="simulate the subjects one by one"):
        simulate_many([bf.loads(VEHICLE)])
