"""The engine against published closed forms and an independent scipy reference.

Each check names its source. Errors are scaled as atol + rtol * |y| (scipy's convention).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.special import lambertw

import barrierflow as bf
from barrierflow import Barrier, Compartment, Dose, Exchange, Layer, Scenario, Transfer

H_PER_S = 1.0 / 3600.0


def crank_q(t, L, D, c1, terms=200):
    """Cumulative amount per area through a membrane, initially empty, held source, perfect sink.

    Crank, The Mathematics of Diffusion, 2nd ed. (1975), eq. 4.24a:
    Q_t / (L C1) = D t / L^2 - 1/6 - (2/pi^2) sum_n ((-1)^n / n^2) exp(-D n^2 pi^2 t / L^2),
    C1 the concentration in the membrane at the source face (K times the source's).
    """
    n = np.arange(1, terms + 1)[:, None]
    s = ((-1.0) ** n / n**2 * np.exp(-D * n**2 * np.pi**2 * np.asarray(t)[None, :] / L**2)).sum(axis=0)
    return L * c1 * (D * np.asarray(t) / L**2 - 1.0 / 6.0 - 2.0 / np.pi**2 * s)


def membrane_cell(k_membrane=5.0, k_donor=1.0, cells=None, duration=20.0, step=0.05):
    """An invented diffusion cell: held donor 1 mg/mL, 50 um membrane, D 1e-8 cm^2/s, held sink."""
    L = 50e-4
    D = 1e-8 * 3600
    layer = Layer(thickness=L, diffusivity=D, partition=k_membrane, cells=cells)
    return Scenario(
        name="membrane test (invented)", duration=duration, output_step=step,
        compartments=(Compartment("donor", held_concentration=1.0, partition=k_donor),
                      Compartment("receptor", held_concentration=0.0)),
        barriers=(Barrier("membrane", "donor", "receptor", area=1.0, layers=(layer,)),),
    ), L, D


@pytest.mark.parametrize("k_membrane,k_donor", [(1.0, 1.0), (5.0, 1.0), (5.0, 2.0)])
def test_single_membrane_matches_crank_424a(k_membrane, k_donor):
    # Crank 1975 eq. 4.24a, partition form C1 = (K_membrane/K_donor) C_donor (common practice).
    s, L, D = membrane_cell(k_membrane, k_donor)
    r = bf.simulate(s)
    lag = L**2 / (6 * D)  # Crank eq. 4.24b, the time lag
    t = r.times
    late = t >= lag
    exact = crank_q(t[late], L, D, c1=k_membrane / k_donor * 1.0)
    got = r.permeated("membrane")[late]
    assert np.max(np.abs(got - exact) / exact) < 0.005
    # the steady flux J = D K dC / L (Crank eq. 4.4 with partition)
    j_exact = D * (k_membrane / k_donor) * 1.0 / L
    assert r.flux("membrane")[-1] == pytest.approx(j_exact, rel=1e-3)
    assert r.mass_balance.relative_error < 1e-6


def test_single_membrane_uniform_cells_also_converges():
    # Crank 1975 eq. 4.24a with the grid set in the file (cells = 60, equal cells)
    s, L, D = membrane_cell(cells=60)
    r = bf.simulate(s)
    late = r.times >= 2 * L**2 / (6 * D)
    exact = crank_q(r.times[late], L, D, c1=5.0)
    assert np.max(np.abs(r.permeated("membrane")[late] - exact) / exact) < 0.005


def one_compartment(doses, duration=24.0, step=0.25, cl=2000.0, v=10000.0, extra=()):
    return Scenario(name="one compartment (invented)", duration=duration, output_step=step,
                    compartments=(Compartment("plasma", volume=v, clearance=cl), *extra), doses=tuple(doses))


def close(got, exact, rtol=1e-3, atol=1e-12):
    """Error scaled as atol + rtol |y| (scipy's convention)."""
    return bool(np.all(np.abs(got - exact) <= atol + rtol * np.abs(exact)))


def test_iv_bolus_one_compartment():
    # Gibaldi & Perrier, Pharmacokinetics, 2nd ed. (1982), ch. 1: C = (Dose/V) exp(-k t), k = CL/V
    r = bf.simulate(one_compartment([Dose("plasma", "bolus", at=0.0, amount=100.0)]))
    exact = 100.0 / 10000.0 * np.exp(-0.2 * r.times)
    assert close(r.concentration("plasma"), exact, rtol=1e-3, atol=1e-9 * 0.01)
    assert r.eliminated("plasma")[-1] == pytest.approx(100.0 * (1 - math.exp(-0.2 * 24)), rel=1e-4)


def test_constant_rate_infusion():
    # Gibaldi & Perrier 1982, ch. 2: during an infusion C = R0/CL (1 - e^{-kt}); after, first-order decay
    r = bf.simulate(one_compartment([Dose("plasma", "infusion", at=0.0, rate=50.0, duration=10.0)]))
    t = r.times
    k = 0.2
    c_end = 50.0 / 2000.0 * (1 - math.exp(-k * 10))
    exact = np.where(t <= 10, 50.0 / 2000.0 * (1 - np.exp(-k * t)), c_end * np.exp(-k * (t - 10)))
    assert close(r.concentration("plasma"), exact, rtol=1e-3, atol=1e-9)
    assert r.dosed("plasma")[-1] == pytest.approx(500.0, rel=1e-9)


def test_repeated_bolus_accumulation():
    # Gibaldi & Perrier 1982, ch. 3: superposition of boluses; peak accumulation 1/(1 - e^{-k tau})
    tau, k = 6.0, 0.2
    r = bf.simulate(one_compartment([Dose("plasma", "bolus", at=0.0, amount=100.0, every=tau, count=8)],
                                    duration=48.0, step=0.5))
    t = r.times
    exact = sum(np.where(t >= i * tau, 0.01 * np.exp(-k * (t - i * tau)), 0.0) for i in range(8))
    assert close(r.concentration("plasma"), exact, rtol=1e-3, atol=1e-9)
    # the row at a dose time shows the state just after the dose (scenario format convention)
    at_last = np.searchsorted(t, 42.0)
    ratio_exact = (1 - math.exp(-8 * k * tau)) / (1 - math.exp(-k * tau))
    assert r.concentration("plasma")[at_last] / 0.01 == pytest.approx(ratio_exact, rel=1e-3)


def test_first_order_absorption_bateman():
    # Gibaldi & Perrier 1982, ch. 1 (Bateman function): C = D ka / (V (ka - k)) (e^{-kt} - e^{-ka t})
    ka, k, v, dose = 1.2, 0.2, 10000.0, 100.0
    s = Scenario(name="oral (invented)", duration=24.0, output_step=0.25,
                 compartments=(Compartment("gut", volume=100.0), Compartment("plasma", volume=v, clearance=k * v)),
                 transfers=(Transfer("absorption", "gut", "plasma", rate=ka),),
                 doses=(Dose("gut", "bolus", at=0.0, amount=dose),))
    r = bf.simulate(s)
    t = r.times
    exact = dose * ka / (v * (ka - k)) * (np.exp(-k * t) - np.exp(-ka * t))
    assert close(r.concentration("plasma"), exact, rtol=1e-3, atol=1e-8 * exact.max())


def test_two_compartment_biexponential():
    # Gibaldi & Perrier 1982, ch. 2: C = A e^{-alpha t} + B e^{-beta t} after an IV bolus
    v1, v2, cl, q, dose = 5000.0, 20000.0, 10000.0, 5000.0, 100.0
    s = Scenario(name="two compartments (invented)", duration=24.0, output_step=0.1,
                 compartments=(Compartment("central", volume=v1, clearance=cl), Compartment("tissue", volume=v2)),
                 exchanges=(Exchange("blood", "central", "tissue", flow=q),),
                 doses=(Dose("central", "bolus", at=0.0, amount=dose),))
    r = bf.simulate(s)
    k10, k12, k21 = cl / v1, q / v1, q / v2
    sum_, prod = k10 + k12 + k21, k10 * k21
    alpha = (sum_ + math.sqrt(sum_**2 - 4 * prod)) / 2
    beta = (sum_ - math.sqrt(sum_**2 - 4 * prod)) / 2
    a = dose / v1 * (alpha - k21) / (alpha - beta)
    b = dose / v1 * (k21 - beta) / (alpha - beta)
    exact = a * np.exp(-alpha * r.times) + b * np.exp(-beta * r.times)
    assert close(r.concentration("central"), exact, rtol=1e-3, atol=1e-9 * exact.max())


def test_michaelis_menten_bolus_lambert_w():
    # Schnell & Mendoza, J. Theor. Biol. 187 (1997) 207-212: for dC/dt = -Vm C / (Km + C),
    # C(t) = Km W[(C0/Km) exp((C0 - Vm t)/Km)], computed with scipy.special.lambertw
    v, vmax, km, dose = 1000.0, 2.0, 0.01, 50.0
    s = Scenario(name="saturable (invented)", duration=40.0, output_step=0.5,
                 compartments=(Compartment("plasma", volume=v, vmax=vmax, km=km),),
                 doses=(Dose("plasma", "bolus", at=0.0, amount=dose),))
    r = bf.simulate(s)
    c0, vm = dose / v, vmax / v
    exact = km * np.real(lambertw(c0 / km * np.exp((c0 - vm * r.times) / km)))
    assert close(r.concentration("plasma"), exact, rtol=1e-3, atol=1e-6 * c0)
    assert r.mass_balance.relative_error < 1e-6


def test_closed_system_reaches_partition_equilibrium():
    # Common practice (thermodynamics of partitioning): at equilibrium C/K is the same in every
    # phase, so C_i = K_i * M / sum_j (V_j K_j); no mass is lost.
    donor = Compartment("donor", volume=2.0, initial_concentration=5.0, partition=1.0)
    receiver = Compartment("receiver", volume=3.0, partition=0.5)
    layers = (Layer(20e-4, 1e-7 * 3600, partition=8.0), Layer(80e-4, 1e-6 * 3600, partition=1.5))
    s = Scenario(name="closed cell (invented)", duration=400.0, output_step=10.0,
                 compartments=(donor, receiver), barriers=(Barrier("film", "donor", "receiver", 1.0, layers),))
    r = bf.simulate(s)
    m = 10.0
    capacity = 2.0 * 1.0 + 3.0 * 0.5 + 20e-4 * 8.0 + 80e-4 * 1.5
    u = m / capacity
    assert r.concentration("donor")[-1] == pytest.approx(u * 1.0, rel=1e-5)
    assert r.concentration("receiver")[-1] == pytest.approx(u * 0.5, rel=1e-5)
    prof = r.profile("film", r.times[-1])
    assert np.allclose(prof.conc[prof.layer == 0], u * 8.0, rtol=1e-5)
    assert np.allclose(prof.conc[prof.layer == 1], u * 1.5, rtol=1e-5)
    total = r.amount("donor")[-1] + r.amount("receiver")[-1] + r.content("film")[-1]
    assert total == pytest.approx(m, rel=1e-9)


def independent_reference(n1, n2, t_out):
    """A finite-volume discretisation written here, independently of the engine, solved by Radau.

    Donor (finite, with partition), a two-layer barrier, a receptor with clearance.
    """
    A, vd, vr, kd, kr, cl = 2.0, 1.5, 4.0, 1.0, 1.0, 0.5
    l1, d1, k1 = 10e-4, 2e-8 * 3600, 4.0
    l2, d2, k2 = 60e-4, 5e-7 * 3600, 1.0
    h = np.r_[np.full(n1, l1 / n1), np.full(n2, l2 / n2)]
    d = np.r_[np.full(n1, d1), np.full(n2, d2)]
    k = np.r_[np.full(n1, k1), np.full(n2, k2)]
    half = h / (2 * d * k)
    g_int = 1.0 / (half[:-1] + half[1:])
    g_in, g_out = 1.0 / half[0], 1.0 / half[-1]

    def f(t, y):
        cd, cr, c = y[0], y[1], y[2:]
        u = c / k
        j_in = g_in * (cd / kd - u[0])
        j = g_int * (u[:-1] - u[1:])
        j_out = g_out * (u[-1] - cr / kr)
        dc = np.empty_like(c)
        dc[0] = j_in
        dc[1:] = j
        dc[:-1] -= j
        dc[-1] -= j_out
        return np.r_[-A * j_in / vd, (A * j_out - cl * cr) / vr, dc / h]

    y0 = np.zeros(2 + n1 + n2)
    y0[0] = 3.0
    sol = solve_ivp(f, (0, t_out[-1]), y0, method="Radau", t_eval=t_out, rtol=1e-10, atol=1e-14)
    return sol.y


def test_against_independent_radau_reference():
    # Reference: scipy.integrate.solve_ivp (Radau, rtol 1e-10) on a discretisation written in
    # this test, independently of the engine (same grid, so only the integration is compared).
    n1, n2 = 8, 12
    layers = (Layer(10e-4, 2e-8 * 3600, partition=4.0, cells=n1), Layer(60e-4, 5e-7 * 3600, partition=1.0, cells=n2))
    s = Scenario(name="reference (invented)", duration=30.0, output_step=0.5,
                 compartments=(Compartment("donor", volume=1.5, initial_concentration=3.0),
                               Compartment("receptor", volume=4.0, clearance=0.5)),
                 barriers=(Barrier("skin", "donor", "receptor", 2.0, layers),))
    r = bf.simulate(s)
    ref = independent_reference(n1, n2, r.times)
    assert close(r.concentration("donor"), ref[0], rtol=1e-4, atol=1e-9)
    assert close(r.concentration("receptor"), ref[1], rtol=1e-4, atol=1e-9 * ref[1].max())


def test_replace_remove_and_hold_semantics():
    # Scenario-format conventions (the project's contract): a replace empties and refills, a
    # remove empties, both count as removed; a hold clamps and what it gives counts as dosed.
    layers = (Layer(20e-4, 1e-7 * 3600, partition=2.0),)
    s = Scenario(name="events (invented)", duration=30.0, output_step=1.0,
                 compartments=(Compartment("patch", volume=0.5, initial_concentration=4.0),
                               Compartment("body", volume=1000.0, clearance=100.0)),
                 barriers=(Barrier("skin", "patch", "body", 5.0, layers),),
                 doses=(Dose("patch", "replace", at=10.0, concentration=4.0),
                        Dose("patch", "remove", at=20.0),
                        Dose("patch", "hold", at=22.0, duration=4.0, concentration=1.0)))
    r = bf.simulate(s)
    t = r.times
    c = r.concentration("patch")
    assert c[np.searchsorted(t, 10.0)] == 4.0            # row at the event shows the after-state
    assert c[np.searchsorted(t, 20.0)] == 0.0
    assert np.all(c[(t >= 22.0) & (t <= 26.0)] == 1.0)    # clamped during the hold
    assert c[-1] < 1.0                                    # evolves freely after it
    assert r.removed("patch")[-1] > 0
    assert r.mass_balance.relative_error < 1e-6


def test_sink_receptor_with_held_source_balance():
    # a held donor gives and a held sink takes: the ledger counts both (relative error < 1e-6)
    s, _, _ = membrane_cell()
    r = bf.simulate(s)
    mb = r.mass_balance
    assert mb.relative_error < 1e-6
    assert r.dosed("receptor")[-1] == pytest.approx(-r.permeated("membrane")[-1], rel=1e-6)


def test_steady_barrier_model_has_no_storage_and_resistance_flux():
    # quasi-steady barrier: J = (C_from/K_from - C_to/K_to) / R (scenario-format spec, series resistances)
    layers = (Layer(15e-4, 1e-9 * 3600, partition=10.0), Layer(100e-4, 1e-6 * 3600))
    s = Scenario(name="steady barrier (invented)", duration=5.0, output_step=0.5,
                 compartments=(Compartment("donor", held_concentration=2.0), Compartment("sink", held_concentration=0)),
                 barriers=(Barrier("skin", "donor", "sink", 3.0, layers, model="steady"),))
    r = bf.simulate(s)
    R = sum(layer.thickness / (layer.diffusivity * layer.partition) for layer in layers)
    assert np.allclose(r.flux("skin"), 2.0 / R, rtol=1e-12)
    assert np.allclose(r.content("skin"), 0.0)
    assert r.permeated("skin")[-1] == pytest.approx(2.0 / R * 5.0, rel=1e-9)


def test_steady_barrier_with_degradation_sech():
    # Crank 1975 ch. 14 (diffusion with first-order reaction), one layer, held source and sink:
    # the steady flux leaving the far face is J0 / cosh(L sqrt(k/D)) of the entering J0 / coth... ratio sech
    L, D, k = 100e-4, 1e-7 * 3600, 2.0
    layer = Layer(L, D, partition=1.0, degradation_rate=k)
    s = Scenario(name="degrading layer (invented)", duration=2.0, output_step=0.5,
                 compartments=(Compartment("donor", held_concentration=1.0), Compartment("sink", held_concentration=0)),
                 barriers=(Barrier("film", "donor", "sink", 1.0, (layer,), model="steady"),))
    r = bf.simulate(s)
    phi = L * math.sqrt(k / D)
    assert r.flux("film")[-1] / r.uptake_flux("film")[-1] == pytest.approx(1.0 / math.cosh(phi), rel=1e-10)
    assert r.flux("film")[-1] == pytest.approx(D / L * phi / math.sinh(phi), rel=1e-10)
    assert r.mass_balance.relative_error < 1e-9


def test_resolved_layer_with_degradation_approaches_sech():
    # the same closed form (Crank 1975 ch. 14) reached by the resolved layer at long times
    L, D, k = 100e-4, 1e-7 * 3600, 2.0
    layer = Layer(L, D, partition=1.0, degradation_rate=k, cells=80)
    s = Scenario(name="degrading layer (invented)", duration=20.0, output_step=1.0,
                 compartments=(Compartment("donor", held_concentration=1.0), Compartment("sink", held_concentration=0)),
                 barriers=(Barrier("film", "donor", "sink", 1.0, (layer,)),))
    r = bf.simulate(s)
    phi = L * math.sqrt(k / D)
    assert r.flux("film")[-1] / r.uptake_flux("film")[-1] == pytest.approx(1.0 / math.cosh(phi), rel=2e-3)
    assert r.mass_balance.relative_error < 1e-6
