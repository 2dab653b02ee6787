"""Steady state of layered barriers, lag and burst times, checked against published forms.

References
----------
- Crank, J., The Mathematics of Diffusion, 2nd ed., Oxford, 1975:
  ch. 4 (plane sheet: linear steady profile, steady flux F = D (C1 - C2) / l, eq. 4.4 as cited
  in the project issue; with a partition coefficient the membrane-side concentration is
  K C_solution); eq. 4.24a (cumulative permeation through an initially empty sheet, whose
  late line has the intercept l^2/(6D)); ch. 4 (a sheet initially at the source concentration
  gives the intercept -l^2/(3D)); ch. 12 (composite media: resistances in series, transfer of
  the state across each layer); ch. 14 (diffusion with irreversible first-order reaction: the
  steady solution in a sheet is hyperbolic, and the fraction of the entering flux that leaves
  a sheet held at C1 on one face and 0 on the other is sech(l sqrt(k/D))).
  Equation numbers are quoted from memory.
- Tran, Meldon & Sontag, "Transient diffusion in bi-layer composites with mass transfer
  resistance: exact solution and time lag analysis", Front. Chem. Eng. 2 (2021) 605197:
  the time lag of a bi-layer does not depend on the direction of flow.
- scipy.integrate.solve_ivp (Radau) on an independent finite-volume discretisation written in
  this file (not the engine), as a numerical reference.
"""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.integrate import solve_ivp
from scipy.sparse.linalg import spsolve

import barrierflow
from barrierflow import Barrier, Compartment, Layer, Scenario
from barrierflow.analysis.steady import (
    PROFILE_COLUMNS,
    barrier_steady,
    burst_time,
    lag_time,
    steady_state,
)

SCENARIOS = sorted((Path(__file__).resolve().parent.parent / "scenarios").glob("*.toml"))
PER_S = 3600.0  # cm^2/s -> cm^2/h


def close(a, b, rtol=1e-12, atol=0.0):
    """|a - b| <= atol + rtol |b| (the error scaling of the style guide)."""
    return abs(a - b) <= atol + rtol * abs(b)


def layer(um, d_cm2_s, k=1.0, kdeg=0.0, name=""):
    return Layer(thickness=um * 1e-4, diffusivity=d_cm2_s * PER_S, partition=k, degradation_rate=kdeg, name=name)


ONE = (layer(20, 2e-10, 4.0),)
TWO = (layer(15, 1e-9, 10.0), layer(50, 2e-8, 1.0))
THREE = (layer(15, 1e-9, 10.0), layer(30, 5e-9, 3.0), layer(50, 2e-8, 1.0))


# ----------------------------------------------------------------------------- FD reference
class FiniteVolume:
    """Independent finite-volume model of a layered sheet in the potential u = C/K.

    Cells of equal width per layer; the conductance between two cell centres is the series
    of the two half cells, h/(2 D K); capacity per cell K h; source at x = 0 held at u_src,
    perfect sink at x = L.
    """

    def __init__(self, layers, cells_per_layer=100):
        h, d, kp, kd = [], [], [], []
        for ly in layers:
            n = cells_per_layer
            h += [ly.thickness / n] * n
            d += [ly.diffusivity] * n
            kp += [ly.partition] * n
            kd += [ly.degradation_rate] * n
        self.h, self.d, self.k, self.kd = map(np.array, (h, d, kp, kd))
        half = self.h / (2 * self.d * self.k)
        g = 1.0 / (half[:-1] + half[1:])
        self.g_in, self.g_out = 1.0 / half[0], 1.0 / half[-1]
        self.cap = self.k * self.h
        n = len(h)
        diag = np.zeros(n)
        diag[:-1] -= g
        diag[1:] -= g
        diag[0] -= self.g_in
        diag[-1] -= self.g_out
        diag -= self.kd * self.cap
        a = sp.diags([g, diag, g], [-1, 0, 1], format="csc")
        self.A = sp.diags(1.0 / self.cap) @ a      # du/dt = A u + b
        self.b = np.zeros(n)
        self.b[0] = self.g_in / self.cap[0]
        self.n = n

    def steady(self, u_src=1.0):
        return spsolve(self.A.tocsc(), -self.b * u_src)

    def intercept(self, u0):
        """Exact time-axis intercept of the late cumulative line of this semi-discrete model."""
        uss = self.steady()
        w = spsolve(self.A.tocsc(), u0 - uss)
        return w[-1] / uss[-1]

    def simulate_intercept(self, u0, t_end, window):
        """Integrate with solve_ivp (Radau) and regress the late cumulative line."""
        n = self.n
        a = self.A.tocsr()

        def rhs(t, y):
            u = y[:n]
            return np.concatenate((a @ u + self.b, [self.g_out * u[-1]]))

        jac = sp.bmat([[a, None], [sp.csr_matrix(([self.g_out], ([0], [n - 1])), shape=(1, n)), None]],
                      format="csc")
        jac = sp.bmat([[jac, sp.csc_matrix((n + 1, 1))]], format="csc")
        t_eval = np.linspace(window[0], window[1], 41)
        sol = solve_ivp(rhs, (0.0, t_end), np.concatenate((u0, [0.0])), method="Radau", jac=jac,
                        t_eval=t_eval, rtol=1e-10, atol=1e-14)
        assert sol.success
        slope, icpt = np.polyfit(sol.t, sol.y[n], 1)
        return -icpt / slope, slope

    def slowest_time(self):
        ev = np.linalg.eigvals(self.A.toarray())
        return 1.0 / np.min(np.abs(ev.real))


def integral_lag(layers, n=20000):
    """Lag time from the integral form (1/R) int K r (R - r) dx, by the midpoint rule."""
    rs, ks = [], []
    r0 = 0.0
    for ly in layers:
        h = ly.thickness / n
        xm = (np.arange(n) + 0.5) * h
        rs.append(r0 + xm / (ly.diffusivity * ly.partition))
        ks.append(np.full(n, ly.partition * h))
        r0 += ly.resistance
    r = np.concatenate(rs)
    w = np.concatenate(ks)
    return float(np.sum(w * r * (r0 - r)) / r0)


# ----------------------------------------------------------------------------- one membrane
def test_one_membrane_flux_and_linear_profile_crank_ch4():
    # Crank 1975, ch. 4 (eq. 4.4 as cited): F = D (C1 - C2) / l, with C1 = K C_donor.
    # Worked by hand: l = 100 um = 0.01 cm, D = 1e-7 cm^2/s = 3.6e-4 cm^2/h, K = 5, C = 1 mg/mL:
    # F = 3.6e-4 * 5 * 1 / 0.01 = 0.18 mg/(cm^2 h); R = 0.01 / (3.6e-4 * 5) = 5.5556 h/cm.
    b = Barrier("m", "donor", "receptor", 2.0, (layer(100, 1e-7, 5.0),))
    s = barrier_steady(b, c_from=1.0, k_from=1.0)
    assert close(s.steady_flux, 0.18, 1e-12)
    assert close(s.resistances[0], 0.01 / (3.6e-4 * 5), 1e-12)
    assert close(s.permeability, 0.18, 1e-12)            # cm/h, flux per donor concentration
    assert s.fraction_through == 1.0 and close(s.uptake_flux, 0.18, 1e-12)
    # profile: K C_donor at x = 0, 0 at x = l, linear in between
    x, c = np.array(s.profile.x), np.array(s.profile.conc)
    assert close(c[0], 5.0) and c[-1] == 0.0
    np.testing.assert_allclose(c, 5.0 * (1 - x / 0.01), rtol=0, atol=1e-12)
    # content of the sheet at steady state: K C l / 2 (the triangle under the linear profile)
    assert close(s.content, 5.0 * 0.01 / 2, 1e-12)


def test_donor_phase_partition_enters_as_ratio():
    # scenario format: the membrane/solution partition coefficient is K_membrane / K_solution.
    b = Barrier("m", "donor", "receptor", 1.0, (layer(100, 1e-7, 5.0),))
    s1 = barrier_steady(b, c_from=1.0, k_from=1.0)
    s2 = barrier_steady(b, c_from=1.0, k_from=2.5)     # donor phase holds 2.5x more: ratio 2
    assert close(s2.steady_flux, s1.steady_flux / 2.5, 1e-12)
    assert close(s2.profile.conc[0], 2.0, 1e-12)
    assert close(s2.permeability, 1.0 / (2.5 * s2.resistance), 1e-12)


def test_receiver_concentration_reduces_flux():
    # J = (C_from/K_from - C_to/K_to) / R (scenario format, steady state without degradation)
    b = Barrier("m", "a", "b", 1.0, TWO)
    s = barrier_steady(b, c_from=3.0, k_from=1.5, c_to=0.4, k_to=0.8)
    assert close(s.steady_flux, (3.0 / 1.5 - 0.4 / 0.8) / b.resistance, 1e-12)
    assert close(s.uptake_flux, s.steady_flux, 1e-12)
    assert close(s.profile.conc[-1], TWO[-1].partition * 0.4 / 0.8, 1e-12)


# ----------------------------------------------------------------------------- laminates
def test_laminate_series_resistances_and_interface_jumps_crank_ch12():
    # Crank 1975, ch. 12: in a laminate the resistances l_i/(D_i K_i) add; C/K is continuous at
    # each interface, so C jumps by the ratio of the partition coefficients.
    # Worked by hand for TWO: R1 = 15e-4/(3.6e-6*10) = 41.6667 h/cm, R2 = 50e-4/(7.2e-5*1) = 69.4444 h/cm,
    # R = 111.1111 h/cm; J = 2/R = 0.018 mg/(cm^2 h); u at the interface = 2 - J R1 = 1.25.
    b = Barrier("skin", "v", "r", 1.0, TWO)
    s = barrier_steady(b, c_from=2.0, k_from=1.0)
    assert close(s.resistances[0], 41.666666666666667, 1e-12)
    assert close(s.resistances[1], 69.444444444444444, 1e-12)
    assert close(s.steady_flux, 0.018, 1e-12)
    assert close(s.layers[0].conc_out, 12.5, 1e-12)      # K1 u = 10 * 1.25
    assert close(s.layers[1].conc_in, 1.25, 1e-12)       # K2 u = 1 * 1.25
    # the profile has the interface twice, once on each side, with the jump
    p = s.profile
    i = p.layer.index(1)
    assert p.x[i - 1] == p.x[i] and p.layer[i - 1] == 0
    assert close(p.conc[i - 1] / p.conc[i], 10.0, 1e-12)
    # linear in each layer
    for k in (0, 1):
        xs = np.array([x for x, ly in zip(p.x, p.layer, strict=True) if ly == k])
        cs = np.array([c for c, ly in zip(p.conc, p.layer, strict=True) if ly == k])
        coef = np.polyfit(xs, cs, 1)
        np.testing.assert_allclose(np.polyval(coef, xs), cs, atol=1e-9 * cs.max())


def test_steady_profile_matches_finite_volume():
    # independent check of the three-layer profile (potential continuous, flux constant)
    b = Barrier("b", "v", "r", 1.0, THREE)
    s = barrier_steady(b, c_from=1.0, k_from=1.0, points_per_layer=5)
    fv = FiniteVolume(THREE, 400)
    u = fv.steady()
    j_fv = fv.g_out * u[-1]
    assert close(s.steady_flux, j_fv, 1e-9)


# ----------------------------------------------------------------------------- lag and burst
@pytest.mark.parametrize("um,d", [(20, 2e-10), (100, 1e-7), (1, 1e-12)])
def test_single_layer_lag_and_burst_crank_ch4(um, d):
    # Crank 1975, eq. 4.24a: late line intercept l^2/(6D); pre-equilibrated sheet: -l^2/(3D)
    ly = layer(um, d, 3.0)
    t = ly.thickness**2 / ly.diffusivity
    assert close(lag_time([ly]), t / 6, 1e-12)
    assert close(burst_time([ly]), -t / 3, 1e-12)


def test_single_layer_finite_volume_reproduces_crank_series():
    # Validates the test's own reference model against Crank 1975, eq. 4.24a:
    # Q(t)/(l C1) = D t/l^2 - 1/6 - (2/pi^2) sum (-1)^n/n^2 exp(-D n^2 pi^2 t/l^2)
    ly = ONE[0]
    fv = FiniteVolume(ONE, 200)
    tau = ly.thickness**2 / ly.diffusivity
    t_end = 0.5 * tau
    sol = solve_ivp(lambda t, y: np.concatenate((fv.A @ y[:-1] + fv.b, [fv.g_out * y[-2]])),
                    (0, t_end), np.zeros(fv.n + 1), method="Radau", rtol=1e-10, atol=1e-14,
                    t_eval=[t_end], jac=None)
    n = np.arange(1, 200)
    series = ly.diffusivity * t_end / ly.thickness**2 - 1 / 6 - (2 / math.pi**2) * np.sum(
        (-1.0) ** n / n**2 * np.exp(-ly.diffusivity * n**2 * math.pi**2 * t_end / ly.thickness**2))
    q_exact = series * ly.thickness * ly.partition * 1.0
    assert close(sol.y[-1, -1], q_exact, 1e-4)


def test_laminate_lag_equals_integral_form_and_two_layer_expansion():
    # The layered closed form and the integral form (1/R) int K r (R - r) dx agree.
    for layers in (ONE, TWO, THREE):
        assert close(lag_time(layers), integral_lag(layers), 1e-7)
    # two layers written out: [ (l1^2/D1)(R1/6 + R2/2) + (l2^2/D2)(R2/6 + R1/2) ] / (R1 + R2)
    a, b = TWO
    r1, r2 = a.resistance, b.resistance
    expected = ((a.thickness**2 / a.diffusivity) * (r1 / 6 + r2 / 2)
                + (b.thickness**2 / b.diffusivity) * (r2 / 6 + r1 / 2)) / (r1 + r2)
    assert close(lag_time(TWO), expected, 1e-12)


def test_lag_time_does_not_depend_on_direction_tran_2021():
    # Tran, Meldon & Sontag 2021: the time lag of a bi-layer is the same in both directions.
    for layers in (TWO, THREE):
        assert close(lag_time(layers), lag_time(tuple(reversed(layers))), 1e-12)


def test_lag_time_from_laplace_transfer_matrices_numerically():
    # B(p), the upper-right entry of the product of the exact transfer matrices of Crank ch. 12,
    # evaluated at small p; lag = B'(0)/B(0) by a central difference (independent code path).
    def big_b(layers, p):
        m = np.eye(2)
        for ly in layers:
            s = math.sqrt((p + ly.degradation_rate) / ly.diffusivity)
            dk = ly.diffusivity * ly.partition
            sl = s * ly.thickness
            m = m @ np.array([[math.cosh(sl), math.sinh(sl) / (dk * s)], [dk * s * math.sinh(sl), math.cosh(sl)]])
        return m[0, 1]

    for layers in (ONE, TWO, THREE):
        lag = lag_time(layers)
        h = 1e-3 / lag
        db = (big_b(layers, 2 * h) - big_b(layers, h)) / h  # one-sided: p > 0 keeps s real
        b0 = 2 * big_b(layers, h) - big_b(layers, 2 * h)
        assert close(lag, db / b0, 2e-3)


@pytest.mark.parametrize("layers", [ONE, TWO, THREE], ids=["one", "two", "three"])
def test_lag_and_burst_against_finite_volume_simulation(layers):
    # solve_ivp on an independent finite-volume model: the late cumulative line's intercept,
    # for an initially empty barrier (lag) and a pre-equilibrated one (burst).
    fv = FiniteVolume(layers, 100)
    slow = fv.slowest_time()
    lag = lag_time(layers)
    burst = burst_time(layers)
    n = fv.n
    # semi-discrete exact intercepts converge to the closed forms (second order in the cell width)
    assert close(fv.intercept(np.zeros(n)), lag, 2e-4)
    assert close(fv.intercept(np.ones(n)), burst, 2e-4)
    t_end = 40 * slow
    sim_lag, slope = fv.simulate_intercept(np.zeros(n), t_end, (25 * slow, t_end))
    assert close(sim_lag, lag, 1e-3)
    b = Barrier("b", "v", "r", 1.0, layers)
    assert close(slope, barrier_steady(b, 1.0, 1.0).steady_flux, 1e-4)
    sim_burst, _ = fv.simulate_intercept(np.ones(n), t_end, (25 * slow, t_end))
    assert close(sim_burst, burst, 1e-3)


# ----------------------------------------------------------------------------- degradation
@pytest.mark.parametrize("kdeg", [1e-3, 0.05, 1.0, 30.0, 2e4])
def test_degrading_layer_fraction_through_sech_crank_ch14(kdeg):
    # Crank 1975, ch. 14: sheet with first-order reaction, held at C1 and 0: the steady
    # profile C = C1 sinh(m (l - x)) / sinh(m l), m = sqrt(k/D); the outgoing flux over the
    # entering flux is sech(m l).
    ly = layer(100, 1e-7, 2.0, kdeg=kdeg)
    b = Barrier("m", "d", "r", 1.0, (ly,))
    s = barrier_steady(b, c_from=1.0, k_from=1.0, points_per_layer=11)
    m = math.sqrt(kdeg / ly.diffusivity)
    z = m * ly.thickness
    assert close(s.fraction_through, 1 / math.cosh(z), 1e-10)
    dk = ly.diffusivity * ly.partition
    # J_in = D K m u0 coth(ml), J_out = D K m u0 / sinh(ml)
    assert close(s.uptake_flux, dk * m / math.tanh(z), 1e-10)
    if z < 700:
        assert close(s.steady_flux, dk * m / math.sinh(z), 1e-10)
    x = np.array(s.profile.x)
    expected = 2.0 * np.exp(m * (ly.thickness - x) - z) * np.expm1(-2 * m * (ly.thickness - x)) / math.expm1(-2 * z)
    np.testing.assert_allclose(s.profile.conc, expected, rtol=1e-10, atol=1e-300)
    # the substance lost in the layer is k times its content
    assert close(s.uptake_flux - s.steady_flux, kdeg * s.content, 1e-9)
    assert s.burst_time is None and s.degrades


def test_degrading_laminate_against_finite_volume():
    layers = (layer(15, 1e-9, 10.0), layer(50, 2e-8, 1.0, kdeg=2.0), layer(30, 5e-9, 3.0, kdeg=0.3))
    b = Barrier("b", "v", "r", 1.0, layers)
    s = barrier_steady(b, c_from=1.0, k_from=1.0)
    fv = FiniteVolume(layers, 400)
    u = fv.steady()
    j_out = fv.g_out * u[-1]
    j_in = fv.g_in * (1.0 - u[0])
    assert close(s.steady_flux, j_out, 1e-5)
    assert close(s.uptake_flux, j_in, 1e-5)
    assert close(s.fraction_through, j_out / j_in, 1e-5)
    # per layer: flux in - flux out = k * content
    for ly, row in zip(layers, s.layers, strict=True):
        assert close(row.flux_in - row.flux_out, ly.degradation_rate * row.content, 1e-9, 1e-15)
    # lag time of the degraded steady line against the semi-discrete intercept
    assert close(lag_time(layers), fv.intercept(np.zeros(fv.n)), 1e-4)


def test_burst_time_refuses_degradation():
    with pytest.raises(ValueError, match="degradation"):
        burst_time([layer(10, 1e-8, kdeg=1.0)])


def test_steady_model_barrier_has_no_lag():
    # scenario format: "A steady barrier has no storage: its lag time is 0"
    b = Barrier("q", "a", "b", 1.0, TWO, model="steady")
    s = barrier_steady(b, 1.0, 1.0)
    assert s.lag_time == 0.0 and s.burst_time == 0.0
    assert close(s.steady_flux, 1.0 / b.resistance, 1e-12)


# ----------------------------------------------------------------------------- scenario level
@pytest.mark.parametrize("path", SCENARIOS, ids=[p.stem for p in SCENARIOS])
def test_every_example_scenario_has_the_spec_keys(path):
    sc = barrierflow.load(path)
    rep = steady_state(sc)
    doc = json.loads(json.dumps(rep.as_dict()))
    assert set(doc["barriers"]) == {b.id for b in sc.barriers}
    for bid, entry in doc["barriers"].items():
        b = sc.barrier(bid)
        src = sc.compartment(b.from_id)
        for key in ("permeability_cm_per_h", "steady_flux_mg_per_cm2_per_h", "lag_time_h", "resistance_h_per_cm"):
            assert key in entry
        assert entry["resistance_h_per_cm"] == [ly.thickness / (ly.diffusivity * ly.partition) for ly in b.layers]
        r = sum(entry["resistance_h_per_cm"])
        if not any(ly.degradation_rate for ly in b.layers):
            assert close(entry["permeability_cm_per_h"], 1 / (src.partition * r), 1e-12)
            assert close(entry["steady_flux_mg_per_cm2_per_h"],
                         src.starting_concentration / (src.partition * r), 1e-12, 1e-300)


def test_steady_state_uses_starting_concentration_and_sink():
    sc = Scenario(name="t", duration=10.0, compartments=(
        Compartment("donor", volume=1.0, initial_concentration=3.0, partition=2.0),
        Compartment("rec", volume=5.0, initial_concentration=1.0)),
        barriers=(Barrier("m", "donor", "rec", 1.0, ONE),))
    s = steady_state(sc).barrier("m")
    assert s.c_from == 3.0 and s.c_to == 0.0
    assert close(s.steady_flux, 3.0 / (2.0 * ONE[0].resistance), 1e-12)
    with pytest.raises(KeyError):
        steady_state(sc).barrier("nope")


def test_profile_csv_has_both_sides_of_every_interface():
    sc = Scenario(name="t", duration=10.0, compartments=(
        Compartment("donor", held_concentration=1.0), Compartment("rec", held_concentration=0.0)),
        barriers=(Barrier("skin", "donor", "rec", 1.0, THREE),))
    rep = steady_state(sc, points_per_layer=3)
    rows = list(csv.reader(io.StringIO(rep.profile_csv())))
    assert tuple(rows[0]) == PROFILE_COLUMNS
    body = rows[1:]
    assert len(body) == 9
    xs = [float(r[2]) for r in body]
    assert xs[2] == xs[3] == 15.0 and xs[5] == xs[6] == 45.0 and xs[-1] == 95.0
    c = [float(r[3]) for r in body]
    assert close(c[2] / c[3], 10.0 / 3.0, 1e-12) and close(c[5] / c[6], 3.0, 1e-12)
    assert [r[1] for r in body] == ["1"] * 3 + ["2"] * 3 + ["3"] * 3


# ----------------------------------------------------------------------------- against the engine
def _engine_lag(layers, cells):
    """Lag and steady flux read off a long run of barrierflow.simulate (held source, sink)."""
    fv = FiniteVolume(layers, 20)
    slow = fv.slowest_time()
    t_end = 40 * slow
    times = tuple(np.linspace(0.0, t_end, 161))
    lys = tuple(Layer(ly.thickness, ly.diffusivity, ly.partition, cells=cells) for ly in layers)
    sc = Scenario(name="lag check", duration=t_end, output_times=times, compartments=(
        Compartment("donor", held_concentration=1.0), Compartment("rec", held_concentration=0.0)),
        barriers=(Barrier("b", "donor", "rec", 1.0, lys),))
    res = barrierflow.simulate(sc)
    t = res.times
    late = t >= 25 * slow
    slope, icpt = np.polyfit(t[late], res.permeated("b")[late], 1)
    return -icpt / slope, slope


@pytest.mark.parametrize("layers", [ONE, TWO, THREE], ids=["one", "two", "three"])
def test_lag_time_against_a_long_engine_run(layers):
    lag_sim, flux_sim = _engine_lag(layers, 60)
    b = Barrier("b", "v", "r", 1.0, layers)
    s = barrier_steady(b, 1.0, 1.0)
    assert close(flux_sim, s.steady_flux, 1e-5)
    assert close(lag_sim, s.lag_time, 1e-3)


# ----------------------------------------------------------------------------- command line
@pytest.mark.parametrize("path", SCENARIOS, ids=[p.stem for p in SCENARIOS])
def test_cli_steady_json_prints_the_contract_keys(path, capsys):
    from barrierflow.cli import main

    assert main(["steady", str(path), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    sc = barrierflow.load(path)
    assert set(doc["barriers"]) == {b.id for b in sc.barriers}
    for entry in doc["barriers"].values():
        assert {"permeability_cm_per_h", "steady_flux_mg_per_cm2_per_h", "lag_time_h",
                "resistance_h_per_cm"} <= set(entry)


def test_cli_steady_table_and_profile(tmp_path, capsys):
    from barrierflow.cli import main

    scen = tmp_path / "two.toml"
    scen.write_text("""
[scenario]
name = "two layers (invented)"
duration = "24 h"
[[compartment]]
id = "donor"
held_concentration = "2 mg/mL"
[[compartment]]
id = "receptor"
held_concentration = "0 mg/mL"
[[barrier]]
id = "skin"
from = "donor"
to = "receptor"
area = "1 cm^2"
  [[barrier.layer]]
  thickness = "15 um"
  diffusivity = "1e-9 cm^2/s"
  partition = 10
  [[barrier.layer]]
  thickness = "50 um"
  diffusivity = "2e-8 cm^2/s"
  partition = 1
""")
    out = tmp_path / "profile.csv"
    assert main(["steady", str(scen), "--profile", str(out)]) == 0
    text = capsys.readouterr().out
    assert "permeability" in text and "0.018 mg/(cm^2*h)" in text and "research estimates" in text.lower()
    rows = list(csv.reader(io.StringIO(out.read_text())))
    assert tuple(rows[0]) == PROFILE_COLUMNS
    at15 = [r for r in rows[1:] if float(r[2]) == 15.0]
    assert [r[1] for r in at15] == ["1", "2"]
    assert close(float(at15[0][3]), 12.5, 1e-9) and close(float(at15[1][3]), 1.25, 1e-9)


def test_cli_steady_refuses_a_missing_file(tmp_path, capsys):
    from barrierflow.cli import main

    assert main(["steady", str(tmp_path / "nope.toml")]) == 2
    assert "nope.toml" in capsys.readouterr().err
