"""The [[vary]] and [[correlation]] tables: reading, checking against the scenario, writing back,
and the --vary option (the same reader)."""

from __future__ import annotations

import dataclasses
import math

import pytest

import barrierflow as bf
from barrierflow import ScenarioError
from barrierflow.model import Correlation, Variation
from barrierflow.studies import with_variability

BASE = """
[scenario]
name = "invented one-compartment body for the variability tests"
duration = "24 h"
[substance]
molar_mass = "250 g/mol"
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
"""


def load(extra: str = "") -> bf.Scenario:
    return bf.loads(BASE + extra, "pk.toml")


def refused(extra: str) -> list[str]:
    with pytest.raises(ScenarioError) as info:
        load(extra)
    return [str(p) for p in info.value.problems]


def test_tables_load_with_units_and_round_trip():
    s = load("""
[[vary]]
path = "compartment.central.clearance"
distribution = "lognormal"
cv = 0.3
[[vary]]
path = "compartment.central.volume"
distribution = "normal"
sd = "1.5 L"
truncate = ["5 L", inf]
[[vary]]
path = "exchange.flow.flow"
distribution = "uniform"
low = "1 L/h"
high = "40 mL/min"
[[vary]]
path = "compartment.tissue.partition"
distribution = "lognormal"
gsd = 1.4
truncate = [0.5, 3]
[[correlation]]
between = ["compartment.central.clearance", "compartment.central.volume"]
rank = 0.6
""")
    v1, v2, v3, v4 = s.vary
    assert (v1.distribution, v1.cv, v1.path.text) == ("lognormal", 0.3, "compartment.central.clearance")
    assert v2.sd == 1500.0 and v2.truncate == (5000.0, math.inf)  # internal units: mL
    assert (v3.low, v3.high) == (1000.0, 2400.0)                  # mL/h
    assert v4.gsd == 1.4 and v4.truncate == (0.5, 3.0)            # a bare number for a dimensionless path
    assert s.correlations == (Correlation(("compartment.central.clearance", "compartment.central.volume"), 0.6),)
    again = bf.loads(s.to_toml())
    assert again == s and again.vary == s.vary and again.correlations == s.correlations
    assert "[[vary]]" in s.to_toml() and "[[correlation]]" in s.to_toml()


def test_a_single_run_is_the_same_with_or_without_variability():
    plain = load()
    varied = load('[[vary]]\npath = "compartment.central.clearance"\ndistribution = "lognormal"\ncv = 0.3\n')
    a, b = bf.simulate(plain), bf.simulate(varied)
    assert (a.concentration("central") == b.concentration("central")).all()


@pytest.mark.parametrize("table, message", [
    ('path = "compartment.central.clearance"\ndistribution = "lognorm"\ncv = 0.3',
     "pk.toml: vary 1 distribution: got 'lognorm'; did you mean 'lognormal'? one of: lognormal, normal, uniform"),
    ('path = "compartment.central.clearance"\ndistribution = "lognormal"',
     "pk.toml: vary 1 cv: got nothing; a lognormal distribution needs cv or gsd"),
    ('path = "compartment.central.clearance"\ndistribution = "lognormal"\ncv = 0.3\ngsd = 1.3',
     "pk.toml: vary 1 gsd: got 1.3; give one of cv and gsd, not both"),
    ('path = "compartment.central.clearance"\ndistribution = "normal"\ncv = 0.3\nlow = "1 L/h"',
     "pk.toml: vary 1 low: got 1 L/h; a normal distribution takes sd or cv, not low"),
    ('path = "compartment.central.clearance"\ndistribution = "uniform"\nlow = "3 L/h"',
     "pk.toml: vary 1 high: got nothing; a uniform distribution needs both low and high"),
    ('path = "compartment.central.clearance"\ndistribution = "uniform"\nlow = "3 L/h"\nhigh = "2 L/h"',
     "pk.toml: vary 1 high: got 2 L/h; must be above low (3 L/h)"),
    ('path = "compartment.central.clearance"\ndistribution = "normal"\nsd = "2 mg"',
     "pk.toml: vary 1 sd: got 2 mg; wrong kind of unit (mg); expected a flow or clearance (volume per time)"),
    ('path = "compartment.central.clearence"\ndistribution = "lognormal"\ncv = 0.3',
     "pk.toml: vary 1 path: got 'compartment.central.clearence'; did you mean 'clearance'? a compartment has the "
     "fields id, volume, initial_concentration, partition, clearance, vmax, km, held_concentration, "
     "evaporation_rate, residual_volume, loss_rate, description"),
    ('path = "compartment.blood.clearance"\ndistribution = "lognormal"\ncv = 0.3',
     "pk.toml: vary 1 path: got 'compartment.blood.clearance'; did you mean 'compartment.central.clearance'? names "
     "no compartment of the scenario (compartment ids: central, tissue)"),
    ('path = "scenario.duration"\ndistribution = "lognormal"\ncv = 0.3',
     "pk.toml: vary 1 path: got 'scenario.duration'; scenario duration shapes the run"),
    ('path = "compartment.central.clearance"\ndistribution = "lognormal"\ncv = -0.3',
     "pk.toml: vary 1 cv: got -0.3; a coefficient of variation from 0 to 10 (0.3 for 30 %); must be > 0"),
    ('path = "compartment.central.volume"\ndistribution = "normal"\ncv = 0.5',
     "pk.toml: vary 1 cv: got 0.5; a normal around 10 L gives compartment 'central' volume a value below its range "
     "(> 0) in about 1 subject of 44; truncate it (truncate = [\"0 L\", inf]) or use a log-normal"),
    ('path = "compartment.tissue.vmax"\ndistribution = "lognormal"\ncv = 0.3',
     "pk.toml: vary 1 path: got 'compartment.tissue.vmax'; compartment 'tissue' vmax is not set in the scenario"),
    ('path = "compartment.tissue.initial_concentration"\ndistribution = "lognormal"\ncv = 0.3',
     "pk.toml: vary 1 path: got 0 mg/mL; a log-normal is centred on the scenario's value of compartment 'tissue' "
     "initial_concentration, which must be > 0"),
    ('path = "compartment.central.clearance"\ndistribution = "lognormal"\ncv = 0.3\nspread = 2',
     "pk.toml: vary 1 spread: got an unknown key; known keys here: path, distribution, cv, gsd, sd, low, high, "
     "truncate"),
])
def test_refusals_name_table_field_value_and_expectation(table, message):
    problems = refused("[[vary]]\n" + table + "\n")
    assert any(p.startswith(message) for p in problems), problems


def test_refusals_of_correlations_and_repeated_paths():
    vary = ('[[vary]]\npath = "compartment.central.clearance"\ndistribution = "lognormal"\ncv = 0.3\n'
            '[[vary]]\npath = "compartment.central.volume"\ndistribution = "lognormal"\ncv = 0.2\n'
            '[[vary]]\npath = "exchange.flow.flow"\ndistribution = "lognormal"\ncv = 0.2\n')
    assert refused(vary + '[[vary]]\npath = "compartment.central.clearance"\ndistribution = "lognormal"\n'
                          'cv = 0.1\n') == [
        "pk.toml: vary 4 path: got 'compartment.central.clearance'; compartment.central.clearance is varied already "
        "by vary 1; vary each path once (tie paths with a comma)"]
    assert refused(vary + '[[correlation]]\nbetween = ["compartment.central.clearance", "compartment.tissue.volume"]'
                          '\nrank = 0.5\n') == [
        "pk.toml: correlation 1 between: got 'compartment.tissue.volume'; names no varied parameter (a [[vary]] path; "
        "varied: compartment.central.clearance, compartment.central.volume, exchange.flow.flow)"]
    assert refused(vary + '[[correlation]]\nbetween = ["compartment.central.clearance", "compartment.central.volume"]'
                          '\nrank = 1.5\n') == [
        "pk.toml: correlation 1 rank: got 1.5; a rank correlation between -1 and 1 (exclusive), such as -0.4"]
    # three pairs that cannot hold together: a and b alike, b and c alike, a and c opposite
    pairs = (("compartment.central.clearance", "compartment.central.volume", 0.9),
             ("compartment.central.volume", "exchange.flow.flow", 0.9),
             ("compartment.central.clearance", "exchange.flow.flow", -0.9))
    text = "".join(f'[[correlation]]\nbetween = ["{a}", "{b}"]\nrank = {r}\n' for a, b, r in pairs)
    assert refused(vary + text) == [
        "pk.toml: correlation: got 0.9, 0.9, -0.9; these rank correlations cannot hold together (their matrix is not "
        "positive definite); weaken some of them"]


def test_the_option_form_reads_to_the_same_table():
    s = load()
    v = Variation.parse("compartment.central.volume=normal:sd=1.5 L,truncate=5 L..")
    assert v == Variation("compartment.central.volume", "normal", sd=1500.0, truncate=(5000.0, math.inf))
    assert Variation.parse(v.to_option()) == v
    assert Variation.parse("compartment.tissue.partition=uniform:low=0.5,high=2").low == 0.5
    tied = Variation.parse("compartment.central.partition,compartment.tissue.partition=lognormal:cv=0.2")
    assert [p.text for p in tied.path.paths] == ["compartment.central.partition", "compartment.tissue.partition"]
    s2 = with_variability(s, [v, tied], [("compartment.central.volume", "compartment.central.partition,"
                                          "compartment.tissue.partition", -0.3)])
    assert len(s2.vary) == 2 and s2.correlations[0].rank == -0.3
    # an option on a path the file varies replaces the file's table
    s3 = with_variability(s2, ["compartment.central.volume=lognormal:cv=0.1"])
    assert s3.vary[0].distribution == "lognormal" and len(s3.vary) == 2
    with pytest.raises(ScenarioError, match=r"--vary 'compartment.central.volume=normal' sd: got nothing; a normal "
                                            r"distribution needs sd or cv"):
        Variation.parse("compartment.central.volume=normal")
    with pytest.raises(ScenarioError, match=r"--vary: got 'compartment.central.volume'; PATH=DISTRIBUTION:KEY=VALUE"):
        Variation.parse("compartment.central.volume")
    with pytest.raises(ScenarioError, match=r"truncate: got '5 L'; LO..HI"):
        Variation.parse("compartment.central.volume=normal:cv=0.1,truncate=5 L")


def test_the_model_objects_are_immutable_and_pickle():
    import pickle

    s = load('[[vary]]\npath = "compartment.central.clearance"\ndistribution = "lognormal"\ncv = 0.3\n')
    v = s.vary[0]
    with pytest.raises(dataclasses.FrozenInstanceError):
        v.cv = 0.5
    assert pickle.loads(pickle.dumps(s)) == s
