"""Parameter paths (barrierflow.model.paths): one name for each field of a scenario.

The reference here is the model itself: a path must read the value the model holds, name the
field exactly as the model's own error messages name it, and change it through the model's own
validation. The syntax is fixed by the project's contract (extensions.md: PATH).
"""

from __future__ import annotations

import dataclasses
import pickle
from pathlib import Path

import pytest

import barrierflow
from barrierflow.errors import ScenarioError, UnitsError
from barrierflow.model import Barrier, Compartment, Dose, Layer, Scenario, Substance
from barrierflow.model.paths import (
    TABLES,
    ParamPath,
    Tied,
    field_paths,
    parameter_paths,
    parse_param,
    with_values,
)
from barrierflow.units import KINDS

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = sorted((ROOT / "scenarios").glob("*.toml"))
SCENARIOS = {p.name: barrierflow.load(p) for p in EXAMPLES}


def patch() -> Scenario:
    return SCENARIOS["benchmark_patch.toml"]


# ---------------------------------------------------------------- syntax
@pytest.mark.parametrize("text, parts, label", [
    ("barrier.skin.layer.1.diffusivity", ("barrier", "skin", 1, "diffusivity"), "barrier 'skin' layer 1 diffusivity"),
    ("barrier.skin.area", ("barrier", "skin", None, "area"), "barrier 'skin' area"),
    ("compartment.central.clearance", ("compartment", "central", None, "clearance"),
     "compartment 'central' clearance"),
    ("exchange.exchange_1.flow", ("exchange", "exchange_1", None, "flow"), "exchange 'exchange_1' flow"),
    ("transfer.absorption.rate", ("transfer", "absorption", None, "rate"), "transfer 'absorption' rate"),
    ("dose.2.amount", ("dose", 2, None, "amount"), "dose 2 amount"),
    ("substance.solubility", ("substance", None, None, "solubility"), "substance solubility"),
    ("scenario.duration", ("scenario", None, None, "duration"), "scenario duration"),
    ("output.concentration", ("output", None, None, "concentration"), "output concentration"),
])
def test_the_contract_syntax_and_its_message_form(text, parts, label):
    # the PATH forms of extensions.md, and their one-to-one message form
    p = ParamPath.parse(text)
    assert (p.table, p.item, p.layer, p.field) == parts
    assert p.text == str(p) == text
    assert p.label == label
    assert ParamPath.parse(label) == p
    assert ParamPath(*parts) == p


def test_a_path_knows_its_kind_unit_range_and_role():
    d = ParamPath.parse("barrier.skin.layer.1.diffusivity")
    assert (d.kind, d.unit, d.bound, d.positive, d.structural, d.numeric) == (
        "diffusivity", "cm^2/h", "> 0", True, False, True)
    c = ParamPath.parse("compartment.central.clearance")
    assert (c.kind, c.unit, c.bound, c.positive) == ("flow", "mL/h", ">= 0", False)
    k = ParamPath.parse("barrier.skin.layer.2.partition")
    assert (k.kind, k.unit, k.positive) == ("number", "", True)
    assert ParamPath.parse("dose.1.at").structural and ParamPath.parse("barrier.skin.layer.1.cells").structural
    assert not ParamPath.parse("dose.1.target").numeric
    # the path's facts are the model's field table, not a copy
    assert d.spec is next(s for s in Layer.SPECS if s.key == "diffusivity")
    assert ParamPath.parse("compartment.c.vmax").spec is next(s for s in Compartment.SPECS if s.attr == "vmax")


@pytest.mark.parametrize("text, message", [
    ("barier.skin.area",
     "parameter path: got 'barier.skin.area'; did you mean 'barrier'? a path starts with one of: "
     "scenario, substance, compartment, barrier, exchange, transfer, dose, output"),
    ("barrier.skin.layer.1.difusivity",
     "parameter path: got 'barrier.skin.layer.1.difusivity'; did you mean 'diffusivity'? a barrier layer has the "
     "fields name, thickness, diffusivity, partition, cells, degradation_rate, initial_concentration"),
    ("exchange.e.flw", "parameter path: got 'exchange.e.flw'; did you mean 'flow'? an exchange has the fields "
                       "id, from, to, flow"),
    ("dose.0.amount", "parameter path: got 'dose.0.amount'; must read dose.<n>.<field> (doses counted from 1 in "
                      "the file's order), such as dose.1.amount"),
    ("barrier.skin.layer.1", "parameter path: got 'barrier.skin.layer.1'; must read barrier.<id>.<field> or "
                             "barrier.<id>.layer.<n>.<field>, such as barrier.skin.layer.1.diffusivity (layers "
                             "counted from 1)"),
    ("compartment.central", "parameter path: got 'compartment.central'; must read compartment.<id>.<field>, such "
                            "as compartment.central.clearance"),
])
def test_malformed_paths_are_refused_with_what_exists(text, message):
    with pytest.raises(ScenarioError) as info:
        ParamPath.parse(text)
    assert str(info.value) == message


@pytest.mark.parametrize("text, message", [
    ("barrier.skn.layer.1.diffusivity",
     "parameter path: got 'barrier.skn.layer.1.diffusivity'; did you mean 'barrier.skin.layer.1.diffusivity'? "
     "names no barrier of the scenario (barrier ids: skin)"),
    ("barrier.skin.layer.4.diffusivity",
     "parameter path: got 'barrier.skin.layer.4.diffusivity'; did you mean 'barrier.skin.layer.3.diffusivity'? "
     "barrier 'skin' has layers 1 to 3"),
    ("compartment.centrl.clearance",
     "parameter path: got 'compartment.centrl.clearance'; did you mean 'compartment.central.clearance'? names no "
     "compartment of the scenario (compartment ids: patch, central, peripheral)"),
    ("dose.2.concentration",
     "parameter path: got 'dose.2.concentration'; did you mean 'dose.1.concentration'? the scenario has only "
     "dose 1"),
    ("exchange.exchange_1.flw",
     "parameter path: got 'exchange.exchange_1.flw'; did you mean 'exchange.exchange_1.flow'? an exchange has "
     "the fields id, from, to, flow"),
])
def test_paths_missing_from_the_scenario_say_what_is_nearby(text, message):
    s = patch()
    with pytest.raises(ScenarioError) as info:
        ParamPath.parse(text, s)
    assert str(info.value) == message
    assert info.value.problems[0].path == ""  # the refusal is about the text, not a place of the scenario
    with pytest.raises(ScenarioError, match="fit --free: got"):
        parse_param(text, s, what="fit --free")
    try:
        path = ParamPath.parse(text)  # well formed, but not in this scenario
    except ScenarioError:
        pass
    else:
        assert not path.exists(s)
        with pytest.raises(ScenarioError) as again:
            path.get(s)
        assert str(again.value) == message
    with pytest.raises(ScenarioError) as again:
        with_values(s, {text: 1.0})
    assert str(again.value) == message


def test_tables_cover_every_model_class_with_a_field_table():
    # no field of the model lacks a path: every object of every demo scenario is reachable
    seen = set()
    for s in SCENARIOS.values():
        for p in field_paths(s):
            seen.add((p.table, p.layer is not None))
    assert {t for t, _ in seen} == set(TABLES)
    assert ("barrier", True) in seen


# ---------------------------------------------------------------- every path of every scenario
@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_every_path_of_every_scenario_parses_reads_and_writes_back(name):
    s = SCENARIOS[name]
    paths = field_paths(s)
    assert len(set(paths)) == len(paths)
    for p in paths:
        assert ParamPath.parse(p.text, s) == p
        assert ParamPath.parse(p.label, s) == p
        assert pickle.loads(pickle.dumps(p)) == p
        value = p.get(s)
        assert value == getattr(p._owner(s), p.attr_in(s))  # the per-area form where the file gave one
        if value is not None:
            # setting the value the scenario holds gives an equal scenario
            assert with_values(s, {p: value}) == s
            assert with_values(s, {p.text: value}) == s
    numeric = parameter_paths(s)
    assert numeric and all(p.numeric and p.get(s) is not None for p in numeric)
    assert set(numeric) == {p for p in paths if p.numeric and p.get(s) is not None}
    # all at once: one new scenario, equal to the old, with source and file units kept
    again = with_values(s, {p: p.get(s) for p in numeric})
    assert again == s and again.source == s.source and again.file_units == s.file_units
    assert not any(p.structural for p in parameter_paths(s, structural=False))


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_a_refused_value_is_named_as_the_model_names_its_field(name):
    # the path's label is the field path of the model's own message, and Problem.path its text
    s = SCENARIOS[name]
    for p in parameter_paths(s):
        if p.bound is None:
            continue
        bad = -1 if p.kind == "count" else (0.0 if p.bound == "> 0" else -1.0)
        with pytest.raises(ScenarioError) as info:
            with_values(s, {p: bad})
        mine = [q for q in info.value.problems if q.path == p.text]
        assert mine, (p, info.value.problems)
        assert mine[0].field == p.label


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_the_bound_in_the_field_table_is_the_range_the_model_checks(name):
    # FieldSpec.bound is the one statement of a field's range: the model refuses exactly outside it
    s = SCENARIOS[name]
    for p in parameter_paths(s):
        if p.kind == "count":
            continue
        value = p.get(s)
        at_zero_refused = _refused_at(s, p, 0.0)
        below_refused = _refused_at(s, p, -abs(value) - 1.0)
        if p.bound == "> 0":
            assert at_zero_refused and below_refused, p
        elif p.bound == ">= 0":
            assert not at_zero_refused and below_refused, p
        else:
            assert not below_refused, p


def _refused_at(s: Scenario, p: ParamPath, value: float) -> bool:
    try:
        with_values(s, {p: value})
    except ScenarioError as err:
        return any(q.path == p.text for q in err.problems)
    return False


# ---------------------------------------------------------------- with_values
def test_with_values_changes_several_objects_in_one_pass():
    s = patch()
    new = with_values(s, {
        "barrier.skin.layer.1.diffusivity": 7.2e-6,
        "barrier.skin.layer.3.thickness": 0.2,
        "barrier.skin.area": 5.0,
        "compartment.central.clearance": 12_000,
        "dose.1.concentration": 8,
        "substance.solubility": 3.0,
        "scenario.duration": 100.0,
    })
    assert new.barrier("skin").layers[0].diffusivity == 7.2e-6
    assert new.barrier("skin").layers[2].thickness == 0.2 and new.barrier("skin").area == 5.0
    assert new.barrier("skin").layers[1] is s.barrier("skin").layers[1]  # untouched parts are shared
    assert new.compartment("central").clearance == 12_000.0
    assert isinstance(new.compartment("central").clearance, float)
    assert new.doses[0].concentration == 8.0 and new.substance.solubility == 3.0 and new.duration == 100.0
    assert s.barrier("skin").layers[0].diffusivity == 3.6e-6  # the original is unchanged
    assert new.compartments[0] is s.compartments[0]


def test_with_values_reports_every_refusal_at_once_with_paths():
    s = patch()
    with pytest.raises(ScenarioError) as info:
        with_values(s, {"barrier.skin.layer.2.diffusivity": -1.0, "compartment.central.volume": 0.0,
                        "barrier.skin.area": float("nan")})
    got = {(q.path, q.field, q.expected) for q in info.value.problems}
    assert got == {
        ("barrier.skin.layer.2.diffusivity", "barrier 'skin' layer 2 diffusivity", "must be > 0"),
        ("compartment.central.volume", "compartment 'central' volume", "must be > 0"),
        ("barrier.skin.area", "barrier 'skin' area", "must be a finite number"),
    }
    # a network problem comes from the scenario's own check, with the file it came from
    with pytest.raises(ScenarioError) as info:
        with_values(s, {"dose.1.at": 500.0})
    assert str(info.value) == "benchmark_patch.toml: dose 1 at: got 500 h; must be within the run (duration 168 h)"
    assert info.value.problems[0].path == "dose.1.at"


def test_with_values_refuses_a_path_given_twice_and_a_field_the_dose_does_not_use():
    s = patch()
    with pytest.raises(ScenarioError, match="is set twice"):
        with_values(s, {"barrier.skin.area": 5.0, "barrier 'skin' area": 6.0})
    with pytest.raises(ScenarioError) as info:
        with_values(s, {"dose.1.amount": 2.0})
    assert str(info.value) == "dose 1 amount: got 2 mg; a replace dose does not use amount; remove it"


# ---------------------------------------------------------------- tied parameters
def test_tied_paths_take_one_value():
    s = patch()
    # the first patch and every refill at one concentration (both 10 mg/mL in the file)
    tie = Tied(("compartment.patch.initial_concentration", "dose.1.concentration"))
    assert tie.get(s) == 10.0
    assert parse_param(tie.text, s) == tie
    assert parse_param("compartment.patch.initial_concentration, dose.1.concentration") == tie
    assert (tie.kind, tie.unit, tie.positive, tie.bound, tie.structural) == ("concentration", "mg/mL", False, ">= 0",
                                                                             False)
    new = with_values(s, {tie: 4.0})
    assert new.compartment("patch").initial_concentration == 4.0 and new.doses[0].concentration == 4.0
    assert tie.get(new) == 4.0
    assert pickle.loads(pickle.dumps(tie)) == tie
    # two layers sharing a diffusivity: the strictest range of the members
    layers = Tied(("barrier.skin.layer.2.diffusivity", "barrier.skin.layer.3.diffusivity"))
    assert layers.get(s) == 0.0036 and layers.positive
    assert with_values(s, {layers: 0.0036}) == s
    assert layers.file_unit(s) == "cm^2/s" and layers.to_file_unit(0.0036, s) == 1e-6


def test_tied_groups_are_refused_when_they_cannot_be_one_value():
    s = patch()
    with pytest.raises(ScenarioError, match="tied paths must hold one kind of quantity"):
        Tied(("compartment.central.volume", "compartment.central.clearance"))
    with pytest.raises(ScenarioError, match="at least two paths"):
        Tied(("compartment.central.volume",))
    with pytest.raises(ScenarioError, match="appears twice"):
        Tied(("compartment.central.volume", "compartment 'central' volume"))
    differ = Tied(("compartment.central.volume", "compartment.peripheral.volume"))
    with pytest.raises(ScenarioError) as info:
        differ.get(s)
    assert str(info.value) == ("tied parameters: got compartment.central.volume = 5000.0, "
                               "compartment.peripheral.volume = 20000.0; tied paths take one value; these differ "
                               "in the scenario")
    assert differ.get(with_values(s, {differ: 7000.0})) == 7000.0
    with pytest.raises(ScenarioError, match="is set twice"):
        with_values(s, {differ: 7000.0, "compartment.central.volume": 6000.0})


# ---------------------------------------------------------------- units
def test_values_are_reported_back_in_the_unit_the_file_used():
    s = patch()  # central volume "5 L", clearance "10 L/h", diffusivity "1e-9 cm^2/s", duration "7 d"
    cases = {
        "compartment.central.volume": ("L", 5.0),
        "compartment.central.clearance": ("L/h", 10.0),
        "barrier.skin.layer.1.diffusivity": ("cm^2/s", 1e-9),
        "barrier.skin.layer.1.thickness": ("um", 15.0),
        "scenario.duration": ("d", 7.0),
        "scenario.output_step": ("min", 10.0),
        "barrier.skin.layer.1.partition": ("", 10.0),
    }
    for text, (unit, number) in cases.items():
        p = ParamPath.parse(text)
        assert p.file_unit(s) == unit, text
        assert p.to_file_unit(p.get(s), s) == number, text
        assert p.from_file_unit(number, s) == p.get(s), text
    # a field the file left out, and a scenario built in Python: the unit the model writes in
    deg = ParamPath.parse("barrier.skin.layer.1.degradation_rate")
    assert deg.file_unit(s) == "1/h"
    py = dataclasses.replace(s)  # keeps file_units; a graph-built scenario has none
    built = Scenario.from_graph(s.graph, s.doses, s.duration)
    assert built.file_units == () and py.file_units == s.file_units
    assert ParamPath.parse("compartment.central.volume").file_unit(built) == "mL"
    assert ParamPath.parse("barrier.skin.layer.1.diffusivity").file_unit(built) == "cm^2/s"


def test_molar_units_of_the_file_are_reported_back_with_the_molar_mass():
    s = SCENARIOS["oral_depot.toml"]
    written = dict(s.file_units)
    molar = {k: u for k, u in written.items() if "mol" in u}
    assert molar, written  # the oral depot writes km in a molar unit
    for text, unit in molar.items():
        p = ParamPath.parse(text)
        assert p.file_unit(s) == unit
        assert p.from_file_unit(p.to_file_unit(p.get(s), s), s) == pytest.approx(p.get(s), rel=1e-15)
    p = ParamPath.parse("substance.molar_mass")
    assert p.to_file_unit(p.get(s), s) == 320.0  # "320 g/mol"


def test_reading_a_value_written_as_in_a_file():
    s = patch()
    assert ParamPath.parse("barrier.skin.layer.1.thickness").read("15 um") == 0.0015
    assert ParamPath.parse("compartment.central.volume").read("5 L", s) == 5000.0
    assert ParamPath.parse("barrier.skin.layer.1.partition").read("2.5") == 2.5
    assert ParamPath.parse("barrier.skin.layer.1.cells").read("40") == 40
    with pytest.raises(UnitsError) as info:
        ParamPath.parse("barrier.skin.layer.1.thickness").read("15")
    assert str(info.value).startswith("barrier 'skin' layer 1 thickness: got 15; the unit is missing")
    with pytest.raises(UnitsError, match="a bare number"):
        ParamPath.parse("barrier.skin.layer.1.partition").read("ten")


def test_file_units_are_not_part_of_equality_and_travel_with_the_scenario():
    s = patch()
    again = barrierflow.loads(s.to_toml(), "again.toml")
    assert again == s
    assert pickle.loads(pickle.dumps(s)).file_units == s.file_units
    # every dimensional value of the file has its unit recorded, under a path of the scenario
    for text, unit in s.file_units:
        p = ParamPath.parse(text, s)
        assert p.kind in KINDS and unit


# ---------------------------------------------------------------- Python-built scenarios
def test_paths_on_a_scenario_built_from_objects():
    s = Scenario(
        name="two layers", duration=24.0,
        compartments=(Compartment("donor", volume=1.0, initial_concentration=5.0), Compartment("sink", volume=10.0)),
        barriers=(Barrier("b", "donor", "sink", 1.0, (Layer(0.001, 1e-5), Layer(0.01, 1e-3, partition=0.5))),),
        doses=(Dose("donor", "bolus", at=12.0, amount=1.0),), substance=Substance(solubility=20.0))
    texts = [p.text for p in parameter_paths(s)]
    assert texts[:4] == ["scenario.duration", "substance.solubility", "compartment.donor.volume",
                         "compartment.donor.initial_concentration"]
    assert "barrier.b.layer.2.partition" in texts and "dose.1.amount" in texts and "dose.1.at" in texts
    assert "barrier.b.layer.1.cells" not in texts  # not set: None
    new = with_values(s, {"barrier.b.layer.1.cells": 12})
    assert new.barrier("b").layers[0].cells == 12


# ---------------------------------------------------------------- Problem.path
def test_every_problem_of_a_file_carries_its_place_as_a_path():
    text = """
[scenario]
duration = "24 h"
bogus = 1
[substance]
solubility = "-1 mg/mL"
[[compartment]]
id = "a"
volume = "1 mL"
[[compartment]]
volume = "-1 mL"
[[compartment]]
id = "b"
volume = "1 mL"
[[barrier]]
id = "m"
from = "a"
to = "b"
area = "1 cm^2"
  [[barrier.layer]]
  thickness = "10 um"
  diffusivity = "1e-7 cm^2/s"
  [[barrier.layer]]
  thickness = "-10 um"
  diffusivity = "1e-7 cm^2/s"
[[exchange]]
from = "a"
to = "b"
flow = "-1 mL/h"
[[dose]]
target = "a"
kind = "bolus"
[[dose]]
target = "zz"
kind = "bolus"
amount = "1 mg"
[output]
time = "kg"
"""
    with pytest.raises(ScenarioError) as info:
        barrierflow.loads(text, "x.toml")
    got = [(p.path, p.field) for p in info.value.problems]
    assert got == [
        ("substance.solubility", "substance solubility"),
        ("scenario.bogus", "scenario bogus"),
        ("compartment.2.volume", "compartment 2 volume"),     # no id: its position in the file
        ("compartment.2.id", "compartment 2 id"),
        ("barrier.m.layer.2.thickness", "barrier 'm' layer 2 thickness"),
        ("exchange.1.flow", "exchange 1 flow"),
        ("dose.1.amount", "dose 1 amount"),
        ("dose.2.target", "dose 2 target"),                   # numbered in the file, not among valid doses
        ("output.time", "output time"),
    ]
    # where a path names a field, it is the ParamPath of the message's field path
    for p in info.value.problems:
        try:
            path = ParamPath.parse(p.path)
        except ScenarioError:
            continue
        assert path.label == p.field


def test_problems_of_a_graph_carry_their_paths_too():
    import networkx as nx

    g = nx.MultiDiGraph()
    g.add_node("a", volume="1 mL")
    g.add_node("b", volume="-2 mL")
    g.add_edge("a", "b", key="m", kind="barrier", area="1 cm^2", layers=[{"thickness": "0 um", "diffusivity": 1.0}])
    with pytest.raises(ScenarioError) as info:
        Scenario.from_graph(g, [{"target": "a", "kind": "bolus"}], duration="-1 h")
    got = {(p.path, p.field) for p in info.value.problems}
    assert got == {("compartment.b.volume", "compartment 'b' volume"),
                   ("barrier.m.layer.1.thickness", "barrier 'm' layer 1 thickness"),
                   ("dose.1.amount", "dose 1 amount"),
                   ("scenario.duration", "scenario duration")}
