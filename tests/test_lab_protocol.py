"""The lab's protocol: samples, doses per area, loaded layers, volatile vehicles, solid, wash-off.

Every physics check names its source beside it; the networks are small so that the file stays
within a few seconds per engine path.

- Crank, J., The Mathematics of Diffusion, 2nd ed., Oxford 1975: eq. 4.18 (the plane sheet with
  constant surface concentrations, sorption and desorption; the equation number is from memory)
  and eq. 4.24a (the time-lag solution, cumulative amount through an initially empty membrane).
- Frasch, H. F. and Bunge, A. L., The transient dermal exposure II: post-exposure absorption and
  evaporation of volatile compounds, J Pharm Sci 104 (2015) 1499. Their table of values could not
  be obtained here, so the check is derived from the solution they use for a closed surface
  (no evaporation after the exposure, their chi = 0): an infinite dose on a membrane over a sink
  for the exposure time, then a no-flux surface; the membrane's content at the end of the
  exposure then leaves only into the sink. The post-exposure series below (eigenfunctions
  cos((2m + 1) pi x / 2L) of the closed-and-sink membrane, projected on the exposure profile of
  Crank's eq. 4.24 family) is derived here, not copied.
- The sampling correction Q_n = (V C_n + v sum_{i<n} C_i) / A (OECD Test Guideline 428, 2004,
  describes the set-up; the formula is common practice): checked by hand arithmetic.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import barrierflow as bf
from barrierflow import Barrier, Compartment, Dose, Layer, Scenario, Substance
from barrierflow.analysis.sampling import corrected_curve, cumulative_from_samples, samples
from barrierflow.engine.exact import ExactIntegrator
from barrierflow.engine.integrators import ScipyIntegrator
from barrierflow.engine.rosenbrock import RosenbrockIntegrator
from barrierflow.errors import ScenarioError
from barrierflow.model import ParamPath, with_values

RADAU = ScipyIntegrator("Radau", rtol=1e-10, atol=1e-13)
PATHS = {
    "exact": ExactIntegrator(),
    "modes": ExactIntegrator("modes"),
    "expm": ExactIntegrator("expm"),
    "rodas": RosenbrockIntegrator(rtol=1e-8, atol=1e-11),
    "bdf": ScipyIntegrator("BDF", rtol=1e-8, atol=1e-11),
    "radau": ScipyIntegrator("Radau", rtol=1e-8, atol=1e-11),
    "lsoda": ScipyIntegrator("LSODA", rtol=1e-8, atol=1e-11),
}


def close(a, b, rel, abs_=0.0):
    return abs(a - b) <= abs_ + rel * abs(b)


# ----------------------------------------------------------------------------- samples
def test_a_sample_by_hand_arithmetic():
    # hand arithmetic (the mass balance of one aliquot): 0.5 mL of 2 mg/mL takes 1 mg from 10 mg;
    # fresh medium restores 5 mL, so 9 mg in 5 mL = 1.8 mg/mL; without it 9 mg stay in 4.5 mL
    r = bf.simulate(Scenario(name="s (invented)", duration=2.0, output_step=0.5,
                             compartments=(Compartment("receptor", volume=5.0, initial_concentration=2.0),),
                             doses=(Dose("receptor", "sample", at=1.0, volume=0.5),)))
    assert r.integrator == "exact"
    t = list(r.times)
    k = t.index(1.0)
    assert r.concentration("receptor")[k - 1] == 2.0 and close(r.concentration("receptor")[k], 1.8, 1e-15)
    assert close(r.sampled("receptor")[k], 1.0, 1e-15) and close(r.amount("receptor")[-1], 9.0, 1e-15)
    got = samples(r, "receptor")
    assert got.times.tolist() == [1.0] and close(got.concentrations[0], 2.0, 1e-15)
    keep = bf.simulate(Scenario(name="s (invented)", duration=2.0, output_step=0.5,
                                compartments=(Compartment("receptor", volume=5.0, initial_concentration=2.0),),
                                doses=(Dose("receptor", "sample", at=1.0, volume=0.5, replace=False),)))
    assert keep.integrator.startswith("scipy")
    assert close(keep.concentration("receptor")[-1], 2.0, 1e-12) and close(keep.volume("receptor")[-1], 4.5, 1e-15)
    assert close(keep.amount("receptor")[-1], 9.0, 1e-12) and close(keep.sampled("receptor")[-1], 1.0, 1e-12)
    heads = [name for name, _ in keep.columns()]
    assert "sampled:receptor [mg]" in heads and "volume:receptor [mL]" in heads
    for res in (r, keep):
        assert res.mass_balance.relative_error < 1e-12 and close(res.mass_balance.sampled, 1.0, 1e-12)


def test_the_sampling_correction_by_hand_arithmetic():
    # V = 5 mL, v = 0.5 mL, A = 1 cm^2, samples 0.01, 0.03, 0.06 mg/mL: Q1 = 5 x 0.01 = 0.05;
    # Q2 = 5 x 0.03 + 0.5 x 0.01 = 0.155; Q3 = 5 x 0.06 + 0.5 x (0.01 + 0.03) = 0.32 mg/cm^2.
    # Without replacement the volume before sample n is V - (n - 1) v: 5 x 0.01 = 0.05,
    # 4.5 x 0.03 + 0.005 = 0.14, 4 x 0.06 + 0.02 = 0.26.
    q = cumulative_from_samples([0.01, 0.03, 0.06], 5.0, 0.5, 1.0)
    assert np.allclose(q, [0.05, 0.155, 0.32], rtol=1e-14, atol=0)
    q = cumulative_from_samples([0.01, 0.03, 0.06], [5.0, 4.5, 4.0], 0.5, 1.0)
    assert np.allclose(q, [0.05, 0.14, 0.26], rtol=1e-14, atol=0)


def _sampled_cell(replace=True, c_donor=1.0):
    membrane = Layer(0.002, 3.6e-6, 2.0, cells=30)                    # lag 0.185 h
    return Scenario(
        name="diffusion cell sampled every 2 h (invented)", duration=12.0, output_step=0.25,
        compartments=(Compartment("donor", held_concentration=c_donor), Compartment("receptor", volume=5.0)),
        barriers=(Barrier("m", "donor", "receptor", 1.0, (membrane,)),),
        doses=(Dose("receptor", "sample", at=2.0, every=2.0, volume=0.5, replace=replace),))


@pytest.mark.parametrize("path", ["exact", "rodas", "radau"])
def test_the_corrected_curve_is_the_true_cumulative_amount(path):
    # the correction is the receptor's mass balance (what is there plus what earlier samples
    # took): applied to the run's own aliquots it gives back the cumulative amount permeated,
    # which the engine integrates separately, to round-off
    r = bf.simulate(_sampled_cell(), integrator=PATHS[path])
    times, q = corrected_curve(r, "m")
    assert times.tolist() == [2.0, 4.0, 6.0, 8.0, 10.0, 12.0]
    rows = [list(r.times).index(t) for t in times]
    true = r.permeated("m")[rows]
    assert np.allclose(q, true, rtol=1e-9, atol=0)
    # the uncorrected V C_n / A falls short by what the samples took
    got = samples(r, "receptor")
    assert np.all(5.0 * got.concentrations[1:] < true[1:])
    assert r.mass_balance.relative_error < 1e-9


def test_the_corrected_curve_without_replacement():
    r = bf.simulate(_sampled_cell(replace=False))
    times, q = corrected_curve(r, "m")
    rows = [list(r.times).index(t) for t in times]
    assert np.allclose(q, r.permeated("m")[rows], rtol=1e-7, atol=0)
    assert close(r.volume("receptor")[-1], 5.0 - 6 * 0.5, 1e-12)
    assert r.mass_balance.relative_error < 1e-7


# ----------------------------------------------------------------------------- per area
PER_AREA = """
[scenario]
name = "doses per area (invented)"
duration = "1 h"
output_step = "30 min"
[[compartment]]
id = "vehicle"
volume = "10 uL/cm^2"
[[compartment]]
id = "receptor"
held_concentration = "0 mg/mL"
[[barrier]]
id = "skin"
from = "vehicle"
to = "receptor"
area = "2 cm^2"
  [[barrier.layer]]
  thickness = "20 um"
  diffusivity = "1e-10 cm^2/s"
[[dose]]
target = "vehicle"
kind = "bolus"
amount = "50 ug/cm^2"
"""


def test_doses_per_area_take_the_area_of_the_one_barrier():
    # 10 uL/cm^2 on 2 cm^2 is 20 uL = 0.02 mL; 50 ug/cm^2 on 2 cm^2 is 100 ug = 0.1 mg (arithmetic)
    s = bf.loads(PER_AREA)
    vehicle = s.compartment("vehicle")
    assert vehicle.volume == 0.02 and vehicle.volume_per_area == 0.01
    assert s.doses[0].amount == 0.1 and s.doses[0].amount_per_area == 0.05
    r = bf.simulate(s)
    assert close(r.dosed("vehicle")[-1], 0.1, 1e-15) and close(r.concentration("vehicle")[0], 5.0, 1e-12)
    # written back per area, read back equal
    text = s.to_toml()
    assert 'volume = "10 uL/cm^2"' in text and 'amount = "50 ug/cm^2"' in text and bf.loads(text) == s
    # a parameter path reads and sets the value as written: per area, in the file's unit
    path = ParamPath.parse("dose.1.amount")
    assert path.get(s) == 0.05 and path.file_unit(s) == "ug/cm^2" and path.kind_in(s) == "amount_per_area"
    assert with_values(s, {path: 0.1}).doses[0].amount == 0.2


def test_values_per_area_are_refused_where_the_area_is_ambiguous():
    two = PER_AREA.replace('[[dose]]', '''[[barrier]]
id = "edge"
from = "vehicle"
to = "receptor"
area = "0.5 cm^2"
  [[barrier.layer]]
  thickness = "20 um"
  diffusivity = "1e-10 cm^2/s"
[[dose]]''')
    with pytest.raises(ScenarioError) as info:
        bf.loads(two)
    text = str(info.value)
    assert "compartment 'vehicle' volume: got 10 uL/cm^2; compartment 'vehicle' touches 2 barriers ('skin', 'edge')" \
        in text
    assert "dose 1 amount: got 50 ug/cm^2" in text and "give it as an absolute value, such as '2 mg'" in text
    alone = """
[scenario]
duration = "1 h"
[[compartment]]
id = "vehicle"
volume = "10 uL/cm^2"
"""
    with pytest.raises(ScenarioError, match="touches no barrier"):
        bf.loads(alone)
    with pytest.raises(ScenarioError, match=r"or a volume per area such as '10 uL/cm\^2'"):
        bf.loads(PER_AREA.replace('"10 uL/cm^2"', '"10 uL/cm"'))


# ----------------------------------------------------------------------------- loaded layers
def _crank_sheet(t, d, thickness):
    """Crank (1975) eq. 4.18: M_t / M_inf of a plane sheet of this thickness, both faces at zero."""
    n = np.arange(0, 400)[:, None]
    k = (2 * n + 1) ** 2 * math.pi**2 * d / thickness**2
    return 1.0 - np.sum(8.0 / ((2 * n + 1) ** 2 * math.pi**2) * np.exp(-k * np.asarray(t)[None, :]), axis=0)


def _loaded(sealed=False):
    # a membrane of 100 um, D = 1e-8 cm^2/s (3.6e-5 cm^2/h), loaded with 5 mg/mL, into sinks
    layer = Layer(0.01, 3.6e-5, 1.0, cells=200, initial_concentration=5.0)
    donor = Compartment("donor", volume=1.0) if sealed else Compartment("donor", held_concentration=0.0)
    doses = (Dose("donor", "remove", at=0.0, ends_contact=True),) if sealed else ()
    return Scenario(name="desorption from a loaded membrane (invented)", duration=4.0, output_step=0.05,
                    compartments=(donor, Compartment("receptor", held_concentration=0.0)),
                    barriers=(Barrier("m", "donor", "receptor", 1.0, (layer,)),), doses=doses)


@pytest.mark.parametrize("path", ["exact", "rodas"])
def test_desorption_from_a_loaded_slab_matches_crank(path):
    r = bf.simulate(_loaded(), integrator=PATHS[path])
    m0 = 5.0 * 0.01 * 1.0
    assert close(r.content("m")[0], m0, 1e-14)
    released = 1.0 - r.content("m") / m0
    later = r.times > 0  # (the series converges slowly at t = 0, where both are 0)
    ref = _crank_sheet(r.times[later], 3.6e-5, 0.01)
    assert np.max(np.abs(released[later] - ref)) < 5e-5      # finite volumes, 200 cells: 2.6e-5 here
    assert r.mass_balance.relative_error < 1e-9
    # a face sealed (a remove that ends contact): half of a sheet twice as thick (Crank eq. 4.18)
    sealed = bf.simulate(_loaded(sealed=True), integrator=PATHS[path])
    ref2 = _crank_sheet(sealed.times[later], 3.6e-5, 0.02)
    assert np.max(np.abs(1.0 - sealed.content("m")[later] / m0 - ref2)) < 5e-5
    assert np.all(sealed.amount("donor") == 0.0)           # nothing goes back into the emptied donor
    assert sealed.mass_balance.relative_error < 1e-9


# ----------------------------------------------------------------------------- solid
def _suspension(c0=4.0, volume=0.1, duration=30.0):
    # a donor of 4 mg/mL where the solubility is 1 mg/mL: 3 mg/mL held as solid
    membrane = Layer(0.002, 3.6e-5, 2.0, cells=40)                    # R = L/(D K) = 27.8 h/cm
    return Scenario(name="saturated suspension (invented)", duration=duration, output_step=0.1,
                    substance=Substance(solubility=1.0),
                    compartments=(Compartment("donor", volume=volume, initial_concentration=c0),
                                  Compartment("receptor", held_concentration=0.0)),
                    barriers=(Barrier("m", "donor", "receptor", 1.0, (membrane,)),))


def test_a_solubility_limited_donor_gives_the_saturated_steady_flux():
    # scenario format: J = (C_from / K_from - C_to / K_to) / R; with solid present the donor's
    # dissolved C/K is the solubility S, so J = S / R (the saturated flux, as from a held donor at S)
    s = _suspension()
    r = bf.simulate(s)
    assert r.integrator.startswith("scipy")
    resistance = s.barriers[0].resistance
    j_sat = 1.0 / resistance
    held = bf.simulate(dataclasses_replace_donor(s, Compartment("donor", held_concentration=1.0)))
    solid = r.solid("donor")
    while_solid = solid > 0.0
    assert while_solid[:50].all()
    assert np.allclose(r.permeated("m")[while_solid], held.permeated("m")[while_solid], rtol=1e-6, atol=1e-9)
    k = int(np.argmax(r.flux("m")[while_solid]))
    assert close(float(np.max(r.flux("m")[while_solid])), j_sat, 1e-5), k
    # the solid runs out when the permeated amount and the membrane's steady content (A L K S / 2)
    # have taken all but the dissolved S V: Q(t) = J (t - lag), lag = L^2 / (6 D) (Crank eq. 4.24a)
    lag = 0.002**2 / (6 * 3.6e-5)
    gone = lag + (0.4 - 0.1 - 0.002 * 2.0 * 1.0 / 2) / j_sat
    t_gone = float(r.times[np.argmax(~while_solid)])
    assert abs(t_gone - gone) <= 0.15, (t_gone, gone)
    # then the solution is depleted and the flux falls below the saturated one
    assert r.flux("m")[-1] < 0.9 * j_sat and r.concentration("donor")[-1] < 1.0
    assert r.mass_balance.relative_error < 1e-7
    assert any("held as undissolved solid" in w for w in r.warnings())


def dataclasses_replace_donor(s: Scenario, donor: Compartment) -> Scenario:
    import dataclasses

    return dataclasses.replace(s, compartments=(donor,) + s.compartments[1:])


# ----------------------------------------------------------------------------- evaporation
def test_evaporation_and_loss_to_the_air_by_hand():
    # no barrier: the volume falls at 0.004 mL/h from 0.02 mL to 0.001 mL (reached at 4.75 h);
    # a first-order loss of 0.2 1/h leaves M0 exp(-0.2 t) (common mathematics); the
    # concentration is that amount over the volume
    s = Scenario(name="volatile vehicle alone (invented)", duration=8.0, output_step=0.25,
                 compartments=(Compartment("vehicle", volume=0.02, initial_concentration=5.0, evaporation_rate=0.004,
                                           residual_volume=0.001, loss_rate=0.2),))
    r = bf.simulate(s)
    t = r.times
    assert np.allclose(r.volume("vehicle"), np.maximum(0.02 - 0.004 * t, 0.001), rtol=1e-14, atol=0)
    m = 0.1 * np.exp(-0.2 * t)
    assert np.allclose(r.amount("vehicle"), m, rtol=2e-7)
    assert np.allclose(r.lost("vehicle"), 0.1 - m, rtol=2e-7, atol=1e-12)
    assert np.allclose(r.concentration("vehicle"), m / np.maximum(0.02 - 0.004 * t, 0.001), rtol=2e-7)
    assert r.mass_balance.relative_error < 1e-9
    heads = [name for name, _ in r.columns()]
    assert "lost:vehicle [mg]" in heads and "volume:vehicle [mL]" in heads


def test_an_evaporating_finite_dose_on_a_steady_barrier():
    # derived here: a storage-free barrier (resistance R, area A) from a vehicle of volume
    # V(t) = V0 - E t into a sink: dM/dt = -A M / (R K V(t)), so M = M0 ((V0 - E t) / V0)^(A/(R K E))
    # until the residue is reached; then M falls as exp(-A t / (R K V_res))
    layer = Layer(0.002, 3.6e-5, 1.0)
    v0, e, vres, c0 = 0.05, 0.01, 0.01, 2.0
    s = Scenario(name="evaporating vehicle on a membrane (invented)", duration=8.0, output_step=0.1,
                 compartments=(Compartment("vehicle", volume=v0, initial_concentration=c0, evaporation_rate=e,
                                           residual_volume=vres),
                               Compartment("receptor", held_concentration=0.0)),
                 barriers=(Barrier("m", "vehicle", "receptor", 1.0, (layer,), model="steady"),))
    r = bf.simulate(s)
    g = 1.0 / layer.resistance
    t = r.times
    t_dry = (v0 - vres) / e
    m = np.where(t <= t_dry, c0 * v0 * np.clip((v0 - e * t) / v0, 0, None) ** (g / e),
                 c0 * v0 * (vres / v0) ** (g / e) * np.exp(-g * (t - t_dry) / vres))
    assert np.allclose(r.permeated("m"), c0 * v0 - m, rtol=1e-6, atol=1e-9)
    assert r.mass_balance.relative_error < 1e-9


# ----------------------------------------------------------------------------- wash-off
def _exposure(t_exp, after="closed", cells=200, duration=None):
    # an infinite dose (a hold at C_v) on a membrane over a sink for t_exp; then a wash-off that
    # ends contact (a closed surface), or a hold at zero (the surface a sink)
    layer = Layer(0.002, 7.2e-7, 3.0, cells=cells)                   # lag L^2/(6D) = 0.926 h
    doses = [Dose("vehicle", "hold", at=0.0, concentration=1.0, duration=t_exp)]
    if after == "closed":
        doses.append(Dose("vehicle", "remove", at=t_exp, ends_contact=True))
    else:
        doses.append(Dose("vehicle", "hold", at=t_exp, concentration=0.0, duration=duration - t_exp))
    return Scenario(name="transient exposure (invented)", duration=duration or t_exp + 40.0, output_step=0.05,
                    compartments=(Compartment("vehicle", volume=0.01), Compartment("receptor", held_concentration=0.0)),
                    barriers=(Barrier("m", "vehicle", "receptor", 1.0, (layer,)),), doses=tuple(doses))


def _post_exposure(t, t_exp, d, length, kc):
    """Cumulative amount per area through a membrane exposed to a surface concentration kc for
    t_exp over a sink, the surface closed afterwards (Frasch & Bunge 2015, chi = 0; derived here).

    During the exposure Crank's eq. 4.24a; afterwards the content at t_exp, expanded in the
    eigenfunctions cos(mu_m x), mu_m = (2m + 1) pi / (2L), of the closed-and-sink membrane, leaves
    only through the sink: Q(t) = Q(t_exp) + S(t_exp) - S(t), S the content.
    """
    t = np.asarray(t, dtype=float)
    n = np.arange(1, 3000)
    tau_e = d * t_exp / length**2
    q_e = length * kc * (tau_e - 1 / 6 - (2 / math.pi**2) * np.sum((-1.0) ** n / n**2 * np.exp(-n**2 * math.pi**2
                                                                                                    * tau_e)))
    m = np.arange(0, 800)
    mu = (2 * m + 1) * math.pi / (2 * length)
    a = n[:, None] * math.pi / length
    # profile at t_exp: kc (1 - x/L) - (2 kc / pi) sum sin(n pi x / L) / n exp(-n^2 pi^2 tau_e)
    lin = 1.0 / (length * mu**2)                                   # int (1 - x/L) cos(mu x) dx
    sin_cos = 0.5 * ((1 - np.cos((a + mu) * length)) / (a + mu) + (1 - np.cos((a - mu) * length)) / (a - mu))
    decay = np.exp(-n**2 * math.pi**2 * tau_e) / n
    proj = kc * lin - (2 * kc / math.pi) * (decay[:, None] * sin_cos).sum(axis=0)
    b = 2.0 / length * proj                                        # coefficients of cos(mu x)
    content = b * (-1.0) ** m / mu                                  # int cos(mu x) dx = (-1)^m / mu
    out = np.empty_like(t)
    for i, ti in enumerate(t):
        if ti <= t_exp:
            tau = d * ti / length**2
            out[i] = length * kc * (tau - 1 / 6 - (2 / math.pi**2) * np.sum((-1.0) ** n / n**2
                                                                          * np.exp(-n**2 * math.pi**2 * tau)))
        else:
            out[i] = q_e + content.sum() - np.sum(content * np.exp(-d * mu**2 * (ti - t_exp)))
    return out


@pytest.mark.parametrize("t_exp", [0.5, 2.0])
def test_wash_off_with_a_closed_surface_against_the_post_exposure_solution(t_exp):
    d, length, k = 7.2e-7, 0.002, 3.0
    r = bf.simulate(_exposure(t_exp))
    ref = _post_exposure(r.times, t_exp, d, length, k * 1.0)
    total = ref[-1]
    assert np.max(np.abs(r.permeated("m") - ref)) < 1e-4 * total        # 200 cells: 1.7e-5 and 4.8e-6 here
    # everything in the membrane at the end of the exposure is absorbed: nothing goes back
    assert np.all(r.amount("vehicle")[r.times > t_exp] == 0.0)
    # the surface kept at zero instead (a hold at 0) takes part of the depot back
    sink = bf.simulate(_exposure(t_exp, after="sink", duration=t_exp + 40.0))
    assert sink.permeated("m")[-1] < r.permeated("m")[-1] - 0.05 * (total - ref[np.searchsorted(r.times, t_exp)])
    assert r.mass_balance.relative_error < 1e-9 and sink.mass_balance.relative_error < 1e-9


def test_fraction_removed_and_ends_contact_in_the_ledger():
    # a remove of 90 %: 10 % stays, the volume stays (the ledger's removed is 90 % of the content)
    s = Scenario(name="partial wash (invented)", duration=2.0, output_step=0.5,
                 compartments=(Compartment("vehicle", volume=0.01, initial_concentration=10.0),),
                 doses=(Dose("vehicle", "remove", at=1.0, fraction=0.9),))
    r = bf.simulate(s)
    assert close(r.removed("vehicle")[-1], 0.09, 1e-14) and close(r.amount("vehicle")[-1], 0.01, 1e-12)
    with pytest.raises(ScenarioError, match="touches no barrier, so there is no contact to end"):
        bf.simulate(Scenario(name="s", duration=2.0, compartments=s.compartments,
                             doses=(Dose("vehicle", "remove", at=1.0, ends_contact=True),)))


# ----------------------------------------------------------------------------- the whole protocol
def test_the_finite_dose_study_in_one_file(tmp_path, capsys):
    # scenarios/finite_dose_in_vitro.toml (invented): 10 uL/cm^2 of a volatile vehicle on 1.77 cm^2
    # (17.7 uL, 5 mg/mL: 88.5 ug applied), the receptor sampled 0.5 mL every 2 h with replacement,
    # a wash-off at 8 h that ends contact
    from pathlib import Path

    from barrierflow.cli import main

    path = Path(__file__).resolve().parents[1] / "scenarios" / "finite_dose_in_vitro.toml"
    s = bf.load(path)
    assert close(s.compartment("vehicle").volume, 0.0177, 1e-14)
    r = bf.simulate(s)
    mb = r.mass_balance
    assert mb.relative_error < 1e-9 and mb.sampled > 0 and mb.lost > 0 and mb.removed > 0
    b = r.metrics().barrier("skin")
    assert close(b.applied, 0.0885, 1e-12) and 0 < b.fraction_absorbed < 1
    assert close(b.fraction_absorbed, b.permeated_amount / 0.0885, 1e-12)
    times, q = corrected_curve(r, "skin")
    assert times.tolist() == [2.0 * k for k in range(1, 13)]
    assert np.allclose(q, r.permeated("skin")[[list(r.times).index(t) for t in times]], rtol=1e-9, atol=0)
    assert r.solid("vehicle").max() > 0                          # it concentrated past the solubility
    assert np.all(r.uptake_flux("skin")[r.times > 8.0] == 0.0)    # closed after the wash
    out = tmp_path / "study.csv"
    assert main(["run", str(path), "-o", str(out), "--samples", str(tmp_path / "samples.csv"),
                 "--metrics", str(tmp_path / "metrics.csv"), "--no-progress"]) == 0
    printed = capsys.readouterr().out
    assert "sampled" in printed and "lost to the air" in printed
    rows = (tmp_path / "samples.csv").read_text().splitlines()
    assert rows[0] == ("time [h],compartment,aliquot [mL],concentration [ug/mL],barrier,corrected [ug/cm^2],"
                       "permeated [ug/cm^2]") and len(rows) == 13
    last = rows[-1].split(",")
    assert close(float(last[5]), float(last[6]), 1e-9)
    header = out.read_text().splitlines()[0].split(",")
    for col in ("sampled:receptor [ug]", "lost:vehicle [ug]", "volume:vehicle [mL]", "solid:vehicle [ug]"):
        assert col in header
