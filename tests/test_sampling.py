"""Drawing subjects: the distributions against their defining formulas and scipy.stats, the Gaussian
copula against the rank correlation asked for, the per-subject seed streams; and the quantile
sketch against numpy.percentile."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import barrierflow as bf
from barrierflow.analysis.sketch import QuantileSketch, count_values
from barrierflow.model import Variation
from barrierflow.studies import Marginal, Variability, with_variability

SCENARIO = bf.loads("""
[scenario]
name = "invented one-compartment body for the sampling tests"
duration = "24 h"
[[compartment]]
id = "central"
volume = "10 L"
clearance = "5 L/h"
initial_concentration = "2 mg/L"
[[compartment]]
id = "tissue"
volume = "20 L"
[[exchange]]
id = "flow"
from = "central"
to = "tissue"
flow = "2 L/h"
""")


def test_lognormal_by_cv_reproduces_geometric_mean_and_cv():
    # A log-normal with median m and sigma has geometric mean m and CV^2 = exp(sigma^2) - 1
    # (the moments of the log-normal: Aitchison & Brown, The Lognormal Distribution, Cambridge
    # University Press, 1957, ch. 2; Limpert, Stahel & Abbt, BioScience 51, 2001, 341-352, Table 1).
    s = with_variability(SCENARIO, ["compartment.central.clearance=lognormal:cv=0.4"])
    var = Variability.from_scenario(s)
    x = var.draw(seed=7, first=1, count=40_000)[:, 0]
    m = 5000.0  # 5 L/h in mL/h, the scenario's value
    sigma = math.sqrt(math.log(1 + 0.4 ** 2))
    n = len(x)
    ln = np.log(x)
    # geometric mean within 4 standard errors of its estimate (sigma / sqrt(n))
    assert abs(ln.mean() - math.log(m)) < 4 * sigma / math.sqrt(n)
    # the CV from the variance of ln x: var(ln x) has standard error sigma^2 sqrt(2 / n)
    s2 = ln.var(ddof=1)
    assert abs(s2 - sigma ** 2) < 4 * sigma ** 2 * math.sqrt(2 / n)
    assert math.sqrt(math.expm1(s2)) == pytest.approx(0.4, rel=0.02)
    # the plain coefficient of variation of the sample (a noisier estimate)
    assert x.std(ddof=1) / x.mean() == pytest.approx(0.4, rel=0.04)
    assert np.median(x) == pytest.approx(m, rel=0.02)


def test_lognormal_by_gsd():
    # gsd = exp(sigma): the standard deviation of ln x is ln gsd (Limpert et al. 2001, as above)
    var = Variability.from_scenario(with_variability(SCENARIO, ["exchange.flow.flow=lognormal:gsd=1.8"]))
    ln = np.log(var.draw(3, 1, 20_000)[:, 0])
    assert ln.std(ddof=1) == pytest.approx(math.log(1.8), rel=0.02)
    assert math.exp(ln.mean()) == pytest.approx(2000.0, rel=0.02)


@pytest.mark.parametrize("spec, reference", [
    # reference distributions of scipy.stats (a reference library), in internal units (mL, mL/h)
    ("compartment.central.volume=normal:sd=2 L", stats.norm(10_000, 2_000)),
    ("compartment.central.volume=normal:cv=0.2,truncate=7 L..12 L",
     stats.truncnorm((7_000 - 10_000) / 2_000, (12_000 - 10_000) / 2_000, 10_000, 2_000)),
    ("compartment.central.volume=normal:cv=0.1,truncate=11.5 L..",      # both bounds in the upper tail
     stats.truncnorm(1.5, np.inf, 10_000, 1_000)),
    ("exchange.flow.flow=uniform:low=1 L/h,high=3 L/h", stats.uniform(1_000, 2_000)),
    ("compartment.central.clearance=lognormal:cv=0.5", stats.lognorm(math.sqrt(math.log(1.25)), scale=5_000)),
])
def test_marginals_match_scipy_stats(spec, reference):
    var = Variability.from_scenario(with_variability(SCENARIO, [spec]))
    m = var.marginals[0]
    u = np.linspace(0.001, 0.999, 999)
    np.testing.assert_allclose(m.ppf(u), reference.ppf(u), rtol=1e-9)
    x = reference.ppf(u)
    np.testing.assert_allclose(m.cdf(x), u, rtol=1e-9, atol=1e-12)


def test_truncated_lognormal_matches_scipy_stats():
    # ln x is a normal truncated to [ln lo, ln hi] (scipy.stats.truncnorm on the log scale)
    var = Variability.from_scenario(with_variability(
        SCENARIO, ["compartment.central.clearance=lognormal:cv=0.5,truncate=3 L/h..9 L/h"]))
    m = var.marginals[0]
    sigma = math.sqrt(math.log(1.25))
    mu = math.log(5000.0)
    ref = stats.truncnorm((math.log(3000) - mu) / sigma, (math.log(9000) - mu) / sigma, mu, sigma)
    u = np.linspace(0.001, 0.999, 199)
    np.testing.assert_allclose(m.ppf(u), np.exp(ref.ppf(u)), rtol=1e-9)
    x = var.draw(1, 1, 5000)[:, 0]
    assert x.min() >= 3000.0 and x.max() <= 9000.0


@pytest.mark.parametrize("rank", [0.6, -0.4])
def test_copula_reproduces_the_rank_correlation(rank):
    # Normal scores with Pearson r = 2 sin(pi rank / 6) have Spearman's rank correlation `rank`
    # (Kruskal, Ordinal measures of association, J. Am. Stat. Assoc. 53, 1958, 814-861); monotone
    # marginals keep ranks, so the parameters have it too, whatever their distributions.
    s = with_variability(SCENARIO, ["compartment.central.clearance=lognormal:cv=0.5",
                                    "exchange.flow.flow=uniform:low=1 L/h,high=3 L/h",
                                    "compartment.central.volume=normal:cv=0.1"],
                         [("compartment.central.clearance", "exchange.flow.flow", rank)])
    x = Variability.from_scenario(s).draw(11, 1, 20_000)
    rho = stats.spearmanr(x[:, 0], x[:, 1]).statistic
    # the standard error of Spearman's rho is about (1 - rho^2) / sqrt(n - 1) for a normal pair
    assert abs(rho - rank) < 4 * (1 - rank ** 2) / math.sqrt(len(x) - 1) + 0.005
    assert abs(stats.spearmanr(x[:, 0], x[:, 2]).statistic) < 0.03   # an uncorrelated pair stays so


def test_each_subject_has_its_own_stream():
    s = with_variability(SCENARIO, ["compartment.central.clearance=lognormal:cv=0.3",
                                    "exchange.flow.flow=lognormal:cv=0.3"])
    var = Variability.from_scenario(s)
    block = var.draw(5, 1, 100)
    alone = np.vstack([var.draw(5, k, 1) for k in range(1, 101)])
    assert np.array_equal(block, alone)                      # subject k whatever the chunk
    assert np.array_equal(var.draw(5, 40, 10), block[39:49])
    assert not np.array_equal(var.draw(6, 1, 100), block)    # another seed, other subjects


def test_a_variation_resolves_on_the_scenario_value():
    v = Variation("compartment.central.clearance", "normal", cv=0.1)
    m = Marginal.from_variation(v, 5000.0)
    assert (m.loc, m.scale) == (5000.0, 500.0)


# ---------------------------------------------------------------- the quantile sketch
def _awkward(rng: np.random.Generator, n: int, cells: int) -> np.ndarray:
    x = rng.lognormal(0.0, 2.0, size=(n, cells)) * np.where(rng.random((n, cells)) < 0.3, -1.0, 1.0)
    x[rng.random(x.shape) < 0.05] = 0.0
    x[rng.random(x.shape) < 0.01] = np.nan
    x[:, 3] = 42.0
    return x


def test_sketch_leaves_out_infinities_and_nan():
    x = np.array([[1.0, np.inf], [2.0, -np.inf], [np.nan, 3.0], [4.0, np.nan]])
    sk = QuantileSketch(2)
    sk.add(count_values(x))
    assert sk.count().tolist() == [3, 1]
    assert sk.percentiles([0, 100]).tolist() == [[1.0, 3.0], [4.0, 3.0]]


def test_sketch_percentiles_within_their_accuracy_of_numpy():
    # The relative-error guarantee of the DDSketch bins (Masson, Rim & Lee, Proc. VLDB Endow. 12,
    # 2019, 2195-2205, section 2): every value of a bin is within the accuracy of its
    # representative; numpy.percentile (linear interpolation) is the reference.
    x = _awkward(np.random.default_rng(3), 4000, 40)
    q = [0, 1, 5, 25, 50, 75, 95, 99, 100]
    sk = QuantileSketch(40, accuracy=0.01)
    sk.add(count_values(x, 0.01))
    est = sk.percentiles(q)
    exact = np.nanpercentile(x, q, axis=0)
    lo = np.floor((sk.count() - 1)[None, :] * np.array(q)[:, None] / 100).astype(int)
    srt = np.sort(np.where(np.isnan(x), np.inf, x), axis=0)
    same_sign = (np.sign(np.take_along_axis(srt, lo, 0)) == np.sign(np.take_along_axis(srt, np.minimum(
        lo + 1, sk.count()[None, :] - 1), 0)))
    ok = same_sign & ~sk.floored(q)
    assert ok.mean() > 0.9
    np.testing.assert_array_less(np.abs(est - exact)[ok], 0.01 * np.abs(exact)[ok] + 1e-300)
    assert np.array_equal(est[[0, -1]], exact[[0, -1]])      # the extremes are kept exactly
    assert np.all(est[:, 3] == 42.0)                          # equal values come out exact


def test_sketch_merges_exactly_whatever_the_chunks():
    x = _awkward(np.random.default_rng(5), 3000, 25)
    x[:, 7] = np.random.default_rng(1).lognormal(0, 5, 3000)   # over many decades: the store collapses
    q = [2.5, 50, 97.5]
    whole = QuantileSketch(25)
    whole.add(count_values(x))
    ref = whole.percentiles(q)
    assert whole.floored(q)[0, 7] and not whole.floored(q)[2, 7]
    rng = np.random.default_rng(0)
    for cuts in ([1, 2, 2999], [1500], list(range(17, 3000, 17))):
        parts = np.split(x[rng.permutation(len(x))], cuts)
        sk = QuantileSketch(25)
        for part in reversed(parts):
            sk.add(count_values(part))
        assert np.array_equal(sk.percentiles(q), ref, equal_nan=True)
    a, b = QuantileSketch(25), QuantileSketch(25)
    a.add(count_values(x[:1000]))
    b.add(count_values(x[1000:]))
    a.add(b.to_counts())
    assert np.array_equal(a.percentiles(q), ref, equal_nan=True)
    with pytest.raises(ValueError, match="cannot join"):
        QuantileSketch(25, accuracy=0.02).add(count_values(x))


def test_sketch_bins_are_those_of_the_c_library_logarithm():
    # The bin of x is ceil(ln|x| / ln gamma) (Masson, Rim & Lee 2019, section 2) with ln from
    # the C library (math.log); the counting takes numpy's vectorised logarithm, which differs
    # from it by a unit in the last place for some values, and goes back to math.log near a bin
    # edge. Values at the edges gamma^k, one step either side of them, and random ones: each
    # value alone in its cell, its one bin must be the math.log one.
    gamma = 1.01
    edges = gamma ** np.arange(-2000.0, 2000.0)
    x = np.concatenate([edges, np.nextafter(edges, 0.0), np.nextafter(edges, np.inf),
                        np.random.default_rng(9).lognormal(0.0, 6.0, 100_000)])
    x = np.concatenate([x, -x[::7]])
    c = count_values(x[None, :], gamma - 1.0)
    inv = 1.0 / math.log(gamma)
    want_pos = [math.ceil(math.log(v) * inv) for v in x if v > 0]
    want_neg = [math.ceil(math.log(-v) * inv) for v in x if v < 0]
    assert c.pos_n.tolist() == [1 if v > 0 else 0 for v in x] and c.pos.tolist() == [1] * len(want_pos)
    assert c.pos_bin.tolist() == want_pos and c.neg_bin.tolist() == want_neg
