"""Fitting barrier parameters to replicate permeation data (barrierflow.studies.fit).

The synthetic data are made outside the engine, from Crank's series for the amount permeated
through a membrane (Crank, The Mathematics of Diffusion, 2nd ed., 1975, eq. 4.24a), with seeded
5 % relative noise.
"""

from __future__ import annotations

import math
import pickle

import numpy as np
import pytest
from scipy import stats

import barrierflow as bf
from barrierflow import Barrier, Compartment, Dose, Layer, Scenario
from barrierflow.analysis.timelag import time_lag
from barrierflow.errors import ScenarioError
from barrierflow.model.experiment import Experiment, Series
from barrierflow.studies.fit import WEIGHTS, FreeParameter, fit

H_PER_S = 1.0 / 3600.0
L, D, K, C = 20e-4, 2e-10 * 3600.0, 4.0, 2.0   # cm, cm^2/h, -, mg/mL (an invented membrane)
DK = ["barrier.membrane.layer.1.diffusivity", "barrier.membrane.layer.1.partition"]


def crank_q(t, thickness, diffusivity, c1, terms=200):
    """Cumulative amount per area through a membrane, initially empty, held source, perfect sink.

    Crank, The Mathematics of Diffusion, 2nd ed. (1975), eq. 4.24a:
    Q_t / (L C1) = D t / L^2 - 1/6 - (2/pi^2) sum_n ((-1)^n / n^2) exp(-D n^2 pi^2 t / L^2).
    """
    t = np.asarray(t, dtype=float)
    n = np.arange(1, terms + 1)[:, None]
    s = ((-1.0) ** n / n**2 * np.exp(-diffusivity * n**2 * np.pi**2 * t[None, :] / thickness**2)).sum(axis=0)
    return thickness * c1 * (diffusivity * t / thickness**2 - 1.0 / 6.0 - 2.0 / np.pi**2 * s)


def cell(d=D * 1.3, k=K * 0.7, cells=None, receptor_volume=None, duration=12.0):
    """An invented diffusion cell: held donor C, one membrane (start values off the truth), a sink or a receptor."""
    receptor = (Compartment("receptor", held_concentration=0.0) if receptor_volume is None
                else Compartment("receptor", volume=receptor_volume))
    return Scenario(name="invented diffusion cell", duration=duration, output_step=1.0,
                    compartments=(Compartment("donor", held_concentration=C), receptor),
                    barriers=(Barrier("membrane", "donor", "receptor", area=1.0,
                                      layers=(Layer(thickness=L, diffusivity=d, partition=k, cells=cells),)),))


def replicates(t, q, seed, n=3, cv=0.05, quantity="permeated", target="membrane", unit="mg/cm^2"):
    rng = np.random.default_rng(seed)
    series = tuple(Series(quantity, target, str(i + 1), tuple(q * (1 + cv * rng.standard_normal(len(t)))), unit)
                   for i in range(n))
    return Experiment(tuple(float(x) for x in t), series)


T = np.array([0.5, 1, 1.5, 2, 3, 4, 6, 8, 10, 12])


def at_times(s, t):
    return bf.with_values(s, {"scenario.output_step": None, "scenario.output_times": tuple(float(x) for x in t)})


# ----------------------------------------------------------------------------- recovery and coverage
@pytest.mark.slow
def test_95_percent_intervals_cover_the_truth_in_at_least_90_of_100_repeats():
    # Data: Crank 1975 eq. 4.24a (outside the engine), 3 replicates, seeded 5 % relative noise;
    # weights 1/y^2 match the relative error. Nominal coverage 95 %: at least 90 of 100 for each
    # parameter (the chance of fewer than 90 with a true 95 % is about 1 %, binomial).
    s = cell()
    q = crank_q(T, L, D, K * C)
    covered = np.zeros(2)
    ratios = []
    for seed in range(100):
        r = fit(s, replicates(T, q, seed), DK, weights="1/y^2", profile=False, replicates=False)
        assert r.converged
        for j, truth in enumerate((D, K)):
            lo, hi = r.parameters[j].ci95
            covered[j] += lo <= truth <= hi
        ratios.append([r.parameters[0].estimate / D, r.parameters[1].estimate / K])
    assert covered[0] >= 90 and covered[1] >= 90, covered
    # and the estimates are unbiased to well within their spread (about 1.5 % and 2.6 %)
    np.testing.assert_allclose(np.mean(ratios, axis=0), [1.0, 1.0], atol=0.01)


def test_noise_free_data_give_the_true_values():
    # Crank 1975 eq. 4.24a without noise: the fit recovers D and K to the engine's grid error
    r = fit(cell(cells=60), replicates(T, crank_q(T, L, D, K * C), 0, cv=0.0), DK, profile=False)
    assert r.converged
    assert r["barrier.membrane.layer.1.diffusivity"].estimate == pytest.approx(D, rel=2e-3)
    assert r["barrier.membrane.layer.1.partition"].estimate == pytest.approx(K, rel=2e-3)


# ----------------------------------------------------------------------------- the time-lag method
@pytest.mark.parametrize("steady_end", [48.0, 24.0])
def test_time_lag_on_noise_free_data_matches_crank(steady_end):
    # Crank 1975 eq. 4.24b: the late line Q = (D C1 / L)(t - L^2/(6D)): J_ss = D K C / L,
    # t_lag = L^2/(6D); so D = L^2/(6 t_lag) and K = J_ss L/(D C). Beyond 3 lag times the
    # transient of eq. 4.24a is below 0.0015 L C1 and falls by exp(-pi^2/6) per lag time.
    t = np.linspace(0.25, steady_end, 60)
    est = time_lag(t, crank_q(t, L, D, K * C), thickness=L, source_concentration=C)
    assert est.steady and est.first_time >= 3 * L**2 / (6 * D) * 0.99
    assert est.lag_time == pytest.approx(L**2 / (6 * D), rel=1e-3)
    assert est.flux == pytest.approx(D * K * C / L, rel=1e-4)
    assert est.diffusivity == pytest.approx(D, rel=1e-3)
    assert est.partition == pytest.approx(K, rel=1e-3)
    assert est.permeability == pytest.approx(D * K / L, rel=1e-4)


def test_time_lag_flags_data_that_end_before_steady_state():
    lag = L**2 / (6 * D)
    t = np.linspace(0.1, 2.0 * lag, 12)
    est = time_lag(t, crank_q(t, L, D, K * C), thickness=L, source_concentration=C)
    assert not est.steady and est.n_points == 3
    assert "the data end before 3 lag times" in est.message
    with pytest.raises(ValueError, match="three times or more"):
        time_lag([1.0, 2.0, 2.0], [0.1, 0.2, 0.3])


def test_the_time_lag_estimates_stand_beside_the_fit_and_start_it():
    t = np.linspace(0.5, 24, 20)
    r = fit(cell(), replicates(t, crank_q(t, L, D, K * C), 4), DK, weights="1/y^2", profile=False)
    lag = r.time_lags["membrane"]["pooled"]
    assert set(r.time_lags["membrane"]) == {"1", "2", "3", "pooled"}
    d, k = r.parameters
    assert d.time_lag == pytest.approx(lag.diffusivity) and k.time_lag == pytest.approx(lag.partition)
    assert d.start == pytest.approx(lag.diffusivity, rel=1e-9) and k.start == pytest.approx(lag.partition, rel=1e-9)
    assert "time-lag method, barrier 'membrane'" in r.to_text()


# ----------------------------------------------------------------------------- profile likelihood
def test_profile_interval_is_the_exact_interval_of_a_linear_parameter():
    # With D fixed, Q(t) is proportional to K (the engine scales every cell's storage and
    # conductance by K), so the fit of K alone is linear least squares, whose exact 95 % interval
    # is K_hat +- t(0.975, n-1) s / sqrt(sum g^2) with g = Q at K = 1 (any text on linear
    # regression). The profile-t interval (Bates & Watts 1988, ch. 6) is exact for such a model,
    # whatever the scale the parameter is estimated on (here its logarithm).
    s = cell(d=D, k=1.0)
    e = replicates(T, crank_q(T, L, D, K * C), 11)
    r = fit(s, e, ["barrier.membrane.layer.1.partition"], weights="none", replicates=False)
    g = np.concatenate([bf.simulate(at_times(s, T)).permeated("membrane")] * 3)
    y = np.concatenate([ser.array for ser in e.series])
    k_hat = float(g @ y / (g @ g))
    sd = math.sqrt(float(np.sum((y - k_hat * g) ** 2)) / (len(y) - 1))
    half = stats.t.ppf(0.975, len(y) - 1) * sd / math.sqrt(float(g @ g))
    est = r.parameters[0]
    assert est.estimate == pytest.approx(k_hat, rel=1e-7)
    lo, hi = est.profile_ci95
    assert lo == pytest.approx(k_hat - half, rel=1e-5) and hi == pytest.approx(k_hat + half, rel=1e-5)
    # the Jacobian interval of ln K is close to it but not symmetric in K
    assert est.ci95[0] == pytest.approx(k_hat - half, rel=1e-2) and est.se == pytest.approx(
        sd / math.sqrt(float(g @ g)), rel=1e-5)


def test_an_open_profile_is_reported_at_a_bound():
    # with data far past the lag time and D bounded close above, the profile of D meets the bound
    t = np.array([20.0, 30, 40, 48])
    e = replicates(t, crank_q(t, L, D, K * C), 2)
    r = fit(cell(duration=48), e, [f"{DK[0]}=1e-10:2.05e-10", DK[1]], weights="1/y^2", replicates=False)
    text = " ".join(r.warnings)
    assert "barrier 'membrane' layer 1 diffusivity" in text
    assert ("is open on its upper side" in text) or ("sits at its upper bound" in text) or ("reaches its upper" in text)


# ----------------------------------------------------------------------------- identifiability
def test_parameters_the_data_cannot_separate_are_named():
    # Q(t) depends on D, K and L only through D/L^2 and D K/L (Crank eq. 4.24a): freeing all three
    # leaves one combination uninformed
    t = np.linspace(0.5, 12, 14)
    e = replicates(t, crank_q(t, L, D, K * C), 5)
    r = fit(cell(), e, [*DK, "barrier.membrane.layer.1.thickness"], weights="1/y^2", profile=False,
            replicates=False)
    joined = "\n".join(r.warnings)
    assert "the data hardly inform the combination of" in joined
    assert "barrier 'membrane' layer 1 thickness" in joined and "cannot be estimated separately" in joined
    assert "strongly correlated" in joined


def test_correlation_warning_names_the_pair():
    t = np.array([4.0, 6, 8, 10, 12])  # only the straight part: D and K trade against each other
    r = fit(cell(), replicates(t, crank_q(t, L, D, K * C), 6), DK, weights="1/y^2", profile=False, replicates=False)
    assert any("barrier 'membrane' layer 1 diffusivity and barrier 'membrane' layer 1 partition are strongly "
               "correlated" in w and "permeability" in w for w in r.warnings)
    assert abs(r.correlation[0, 1]) > 0.95


# ----------------------------------------------------------------------------- replicates and weights
def test_per_replicate_fits_give_mean_sd_and_cv():
    q = crank_q(T, L, D, K * C)
    e = replicates(T, q, 8, n=4)
    r = fit(cell(), e, DK, weights="1/y^2", profile=False)
    d = r.parameters[0]
    assert len(d.replicates) == 4
    one = fit(cell(), e.replicate("3"), DK, weights="1/y^2", profile=False)
    assert d.replicates[2] == pytest.approx(one.parameters[0].estimate, rel=1e-5)
    assert d.replicate_mean == pytest.approx(np.mean(d.replicates))
    assert d.replicate_sd == pytest.approx(np.std(d.replicates, ddof=1))
    assert d.replicate_cv == pytest.approx(d.replicate_sd / d.replicate_mean)


def test_weights_by_hand():
    from barrierflow.studies.estimation import ObservedData as _Data

    s1 = Series("permeated", "m", "1", (0.0, 2.0, 4.0), "mg/cm^2")
    s2 = Series("permeated", "m", "2", (0.0, 4.0, math.nan), "mg/cm^2")
    e = Experiment((0.0, 1.0, 2.0), (s1, s2))
    assert _Data(e, "none").w.tolist() == [1, 1, 1, 1, 1]
    # observed y held above 1 % of the largest (4): 0 -> 0.04
    np.testing.assert_allclose(_Data(e, "1/y").w, [1 / 0.04, 1 / 2, 1 / 4, 1 / 0.04, 1 / 4])
    np.testing.assert_allclose(_Data(e, "1/y^2").w, [1 / 0.04**2, 1 / 4, 1 / 16, 1 / 0.04**2, 1 / 16])
    # replicate variance: time 1 has var(2, 4) = 2; time 0 has 0 -> held at 1e-4 of the median (2);
    # time 2 has one replicate -> the median
    np.testing.assert_allclose(_Data(e, "replicate").w, [1 / 2e-4, 1 / 2, 1 / 2, 1 / 2e-4, 1 / 2])
    assert set(WEIGHTS) == {"none", "1/y", "1/y^2", "replicate"}


# ----------------------------------------------------------------------------- other observables, ties
def test_receptor_concentrations_with_a_finite_receptor():
    # conc:receptor#n compared with the model's receptor concentration; the time-lag start reads
    # Q = V C / A (no sampling doses in this scenario)
    truth = cell(d=D, k=K, receptor_volume=5.0)
    t = np.array([1.0, 2, 3, 4, 6, 8, 10, 12])
    c = bf.simulate(at_times(truth, t)).concentration("receptor")
    e = replicates(t, c, 9, quantity="conc", target="receptor", unit="mg/mL", cv=0.03)
    r = fit(cell(receptor_volume=5.0), e, DK, weights="1/y^2", profile=False, replicates=False)
    assert r["barrier.membrane.layer.1.diffusivity"].estimate == pytest.approx(D, rel=0.05)
    assert r["barrier.membrane.layer.1.partition"].estimate == pytest.approx(K, rel=0.05)
    assert "membrane" in r.time_lags


def test_a_sample_reads_the_receptor_just_before_the_withdrawal():
    # a refill of the receptor with fresh medium (concentration 0) at each sample time: the sample
    # holds what the receptor held just before
    s = Scenario(name="sampled receptor (invented)", duration=12.0, output_step=1.0,
                 compartments=(Compartment("donor", held_concentration=C), Compartment("receptor", volume=5.0)),
                 barriers=(Barrier("membrane", "donor", "receptor", area=1.0,
                                   layers=(Layer(thickness=L, diffusivity=D, partition=K),)),),
                 doses=(Dose("receptor", "replace", concentration=0.0, at=4.0, every=4.0, count=2),))
    from barrierflow.studies.predict import Predictor

    pred = Predictor(s, (), ("conc:receptor",), np.array([2.0, 4.0, 8.0]))
    got = pred([])["conc:receptor"]
    fine = bf.simulate(at_times(s, (2.0, 4.0 - 1e-6 * 12, 8.0 - 1e-6 * 12)))
    np.testing.assert_allclose(got, fine.concentration("receptor"), rtol=1e-12)
    assert got[1] > 0 and got[2] > 0  # not the emptied receptor


def test_tied_diffusivities_of_two_layers():
    two = Scenario(name="two layers (invented)", duration=12.0, output_step=1.0,
                   compartments=(Compartment("donor", held_concentration=C), Compartment("receptor",
                                                                                        held_concentration=0.0)),
                   barriers=(Barrier("membrane", "donor", "receptor", area=1.0,
                                     layers=(Layer(thickness=L / 2, diffusivity=D, partition=K),
                                             Layer(thickness=L / 2, diffusivity=D, partition=K))),))
    # two identical halves are one membrane: Crank eq. 4.24a again
    e = replicates(T, crank_q(T, L, D, K * C), 12, cv=0.02)
    start = bf.with_values(two, {"barrier.membrane.layer.1.diffusivity,barrier.membrane.layer.2.diffusivity": D / 2})
    tied = "barrier.membrane.layer.1.diffusivity,barrier.membrane.layer.2.diffusivity"
    r = fit(start, e, [tied], weights="1/y^2", replicates=False)
    assert r.parameters[0].estimate == pytest.approx(D, rel=0.02)
    fitted = r.scenario.barrier("membrane").layers
    assert fitted[0].diffusivity == fitted[1].diffusivity == pytest.approx(D, rel=0.02)


# ----------------------------------------------------------------------------- outputs
def test_report_json_keys_units_and_the_fitted_scenario(tmp_path):
    s = bf.load("scenarios/diffusion_cell.toml")   # diffusivity written in cm^2/s
    t = np.array([0.5, 1, 2, 3, 4, 6, 8, 12, 24])
    e = replicates(t, crank_q(t, L, 2e-10 * 3600, 4.0 * 2.0), 3)
    r = fit(s, e, DK, weights="1/y^2", replicates=False)
    doc = r.as_dict()
    d = doc["parameters"]["barrier.membrane.layer.1.diffusivity"]
    assert d["unit"] == "cm^2/s" and 1.5e-10 < d["estimate"] < 2.5e-10
    assert d["ci95"][0] < d["estimate"] < d["ci95"][1] and d["se"] > 0
    assert doc["parameters"]["barrier.membrane.layer.1.partition"]["unit"] == ""
    assert doc["converged"] is True and doc["n_observations"] == 27 and math.isfinite(doc["aic"])
    paths = r.write(scenario=tmp_path / "fitted.toml", report=tmp_path / "r.json", residuals=tmp_path / "o.csv")
    assert [p.name for p in paths] == ["fitted.toml", "r.json", "o.csv"]
    again = bf.load(tmp_path / "fitted.toml")
    assert again.barrier("membrane").layers[0].diffusivity == pytest.approx(d["estimate"] * 3600, rel=1e-5)
    assert "Parameters fitted by barrierflow fit" in again.description
    rows = (tmp_path / "o.csv").read_text().splitlines()
    assert rows[0] == "time [h],observable,replicate,unit,observed,predicted,residual,weighted_residual"
    assert len(rows) == 28
    back = pickle.loads(pickle.dumps(r))
    assert back.estimates == r.estimates
    curves = r.curves()
    band = curves["permeated:membrane"]
    assert band.shape == (4, 200) and np.all(band[2] <= band[1]) and np.all(band[1] <= band[3])


def test_the_posterior_by_emcee():
    e = replicates(T, crank_q(T, L, D, K * C), 13)
    r = fit(cell(), e, DK, weights="1/y^2", profile=False, replicates=False, mcmc=200, seed=1)
    po = r.posterior
    assert po.walkers == 8 and po.samples.shape[1] == 2 and 0.2 < po.acceptance < 0.9
    for est in r.parameters:
        med, lo, hi = est.posterior
        assert lo < est.estimate < hi and med == pytest.approx(est.estimate, rel=0.05)
    band = po.band["permeated:membrane"]
    assert band.shape == (5, 60) and np.all(band[3] <= band[0] + 1e-15) and np.all(band[2] <= band[4] + 1e-15)
    assert any("MCMC chain is short" in w for w in r.warnings)
    band_json = r.as_dict()["posterior"]["band"]
    assert band_json["permeated:membrane"]["unit"] == "mg/cm^2" and len(band_json["times"]) == 60
    assert band_json["permeated:membrane"]["curve_p50"] == pytest.approx(band[1].tolist())
    again = fit(cell(), e, DK, weights="1/y^2", profile=False, replicates=False, mcmc=200, seed=1)
    np.testing.assert_array_equal(again.posterior.samples, po.samples)


# ----------------------------------------------------------------------------- refusals
@pytest.mark.parametrize("free,message", [
    ("barrier.membrane.layer.1.diffusion", "did you mean 'barrier.membrane.layer.1.diffusivity'?"),
    ("barrier.membrane.layer.1.cells", "is not a quantity that can be estimated"),
    ("scenario.duration", "shapes the run"),
    ("compartment.receptor.volume", "is not set in the scenario"),
    ("barrier.membrane.layer.1.partition=10:1", "the lower bound must be below the upper bound"),
    ("barrier.membrane.layer.1.partition=0:10", "the lower bound must be > 0"),
    ("barrier.membrane.layer.1.diffusivity=1 cm:2 cm", "cannot read the bound '1 cm'"),
    ("barrier.membrane.layer.1.partition=abc:", "cannot read the bound 'abc'"),
    ("barrier.membrane.layer.1.partition=1", "bounds are written PATH=LO:HI"),
])
def test_bad_free_parameters_are_refused(free, message):
    with pytest.raises(ScenarioError, match=message.replace("(", r"\(").replace("?", r"\?")):
        FreeParameter.parse(free, cell())


def test_bounds_read_in_the_file_unit_or_their_own():
    s = bf.load("scenarios/diffusion_cell.toml")
    f = FreeParameter.parse("barrier.membrane.layer.1.diffusivity=1e-10:1e-9", s)
    assert f.lower == pytest.approx(1e-10 * 3600) and f.upper == pytest.approx(1e-9 * 3600)  # cm^2/s as the file
    f = FreeParameter.parse("barrier.membrane.layer.1.diffusivity=:3.6e-6 cm^2/h", s)
    assert f.lower is None and f.upper == pytest.approx(3.6e-6)


def test_fit_refusals():
    e = replicates(T, crank_q(T, L, D, K * C), 0)
    with pytest.raises(ScenarioError, match="must be one of none, 1/y, 1/y\\^2, replicate"):
        fit(cell(), e, DK, weights="1/x")
    with pytest.raises(ScenarioError, match="is already freed"):
        fit(cell(), e, [DK[0], DK[0]])
    bad = Experiment((1.0,), (Series("permeated", "membrane_x", "1", (1.0,), "mg/cm^2"),))
    with pytest.raises(ScenarioError, match="did you mean 'permeated:membrane'"):
        fit(cell(), bad, DK)
    few = Experiment((1.0, 2.0), (Series("permeated", "membrane", "1", (1e-4, 2e-4), "mg/cm^2"),))
    with pytest.raises(ScenarioError, match="needs more values than parameters"):
        fit(cell(), few, DK)
