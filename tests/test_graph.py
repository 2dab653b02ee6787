"""The network as a networkx MultiDiGraph: both directions, both Python routes (objects and
plain keyword attributes), the same model and the same refusals as a file.

The graph layout is the one documented in ``Scenario.graph`` and ``Scenario.from_graph``.
"""

from __future__ import annotations

from pathlib import Path

import networkx as nx
import pytest

import barrierflow
from barrierflow import Barrier, Compartment, Dose, Exchange, Layer, Scenario, ScenarioError, Transfer

ROOT = Path(__file__).resolve().parent.parent
SCENARIOS = sorted((ROOT / "scenarios").glob("*.toml"))


def benchmark_by_keywords() -> nx.MultiDiGraph:
    """The benchmark problem (benchmark.md, an invented scenario) written as keyword attributes."""
    g = nx.MultiDiGraph(name="benchmark: daily patch to a two-compartment body")
    g.add_node("patch", volume="1 mL", initial_concentration="10 mg/mL")
    g.add_node("central", volume="5 L", clearance="10 L/h")
    g.add_node("peripheral", volume="20 L")
    g.add_edge("patch", "central", key="skin", kind="barrier", area="10 cm^2", layers=[
        {"name": "outer layer", "thickness": "15 um", "diffusivity": "1e-9 cm^2/s", "partition": 10, "cells": 50},
        {"name": "middle layer", "thickness": "100 um", "diffusivity": "1e-6 cm^2/s", "partition": 1, "cells": 50},
        {"name": "inner layer", "thickness": "1000 um", "diffusivity": "1e-6 cm^2/s", "partition": 1, "cells": 50},
    ])
    g.add_edge("central", "peripheral", kind="exchange", flow="5 L/h")  # integer key: id made up
    return g


BENCHMARK_DOSES = [{"target": "patch", "kind": "replace", "concentration": "10 mg/mL",
                    "at": "24 h", "every": "24 h", "count": 6}]


def test_keyword_graph_equals_the_file():
    from_file = barrierflow.load(ROOT / "scenarios" / "benchmark_patch.toml")
    from_graph = Scenario.from_graph(benchmark_by_keywords(), doses=BENCHMARK_DOSES, duration="7 d",
                                     output_step="10 min", description=from_file.description)
    assert from_graph == from_file


def test_object_graph_equals_the_file():
    from_file = barrierflow.load(ROOT / "scenarios" / "benchmark_patch.toml")
    g = nx.MultiDiGraph(name=from_file.name)
    g.add_node("patch", compartment=Compartment("patch", volume=1.0, initial_concentration=10.0))
    g.add_node("central", compartment=Compartment("central", volume=5000.0, clearance=10000.0))
    g.add_node("peripheral", compartment=Compartment("peripheral", volume=20000.0))
    layers = (Layer(0.0015, 3.6e-6, 10.0, "outer layer", 50), Layer(0.01, 3.6e-3, 1.0, "middle layer", 50),
              Layer(0.1, 3.6e-3, 1.0, "inner layer", 50))
    g.add_edge("patch", "central", key="skin", barrier=Barrier("skin", "patch", "central", 10.0, layers))
    g.add_edge("central", "peripheral", key="exchange_1",
               exchange=Exchange("exchange_1", "central", "peripheral", 5000.0))
    doses = [Dose("patch", "replace", at=24.0, concentration=10.0, every=24.0, count=6)]
    s = Scenario.from_graph(g, doses=doses, duration=168.0, output_step=from_file.output_step,
                            description=from_file.description)
    assert s == from_file


def test_numbers_in_python_are_internal_units():
    g = nx.MultiDiGraph()
    g.add_node("a", volume=1000.0)            # mL
    g.add_node("b", volume="1 L")
    s = Scenario.from_graph(g, duration=24.0)
    assert s.compartment("a") == Compartment("a", volume=1000.0)
    assert s.compartment("b").volume == 1000.0


@pytest.mark.parametrize("path", SCENARIOS, ids=[p.name for p in SCENARIOS])
def test_graph_of_every_file_builds_the_same_scenario(path):
    s = barrierflow.load(path)
    again = Scenario.from_graph(s.graph, doses=s.doses, duration=s.duration, output=s.output_units,
                                output_step=s.output_step, output_times=s.output_times,
                                description=s.description)
    assert again == s


def test_graph_layout_is_the_documented_one():
    s = barrierflow.load(ROOT / "scenarios" / "oral_depot.toml")
    g = s.graph
    assert isinstance(g, nx.MultiDiGraph) and nx.is_frozen(g)
    assert g.graph["name"] == s.name and g.graph["substance"] == s.substance
    assert list(g.nodes) == ["gut", "central", "tissue"]
    assert g.nodes["central"]["compartment"] is s.compartment("central")
    edges = {(u, v, k): d for u, v, k, d in g.edges(keys=True, data=True)}
    assert set(edges) == {("gut", "central", "absorption"), ("central", "tissue", "distribution")}
    assert edges["gut", "central", "absorption"]["kind"] == "transfer"
    assert isinstance(edges["gut", "central", "absorption"]["transfer"], Transfer)
    assert edges["central", "tissue", "distribution"]["kind"] == "exchange"
    with pytest.raises(nx.NetworkXError):
        g.add_node("another")


def test_a_plain_digraph_is_accepted():
    g = nx.DiGraph()
    g.add_node("a", volume="1 mL", initial_concentration="1 mg/mL")
    g.add_node("b", held_concentration="0 mg/mL")
    g.add_edge("a", "b", kind="barrier", area="1 cm^2", layers=[{"thickness": "10 um", "diffusivity": "1e-7 cm^2/s"}])
    s = Scenario.from_graph(g, duration="1 d")
    assert [b.id for b in s.barriers] == ["barrier_1"] and s.duration == 24.0


# ----------------------------------------------------------------------------- refusals
def test_keyword_attributes_are_refused_as_a_file_would_be():
    g = benchmark_by_keywords()
    g.nodes["central"]["volume"] = "-5 L"
    g.nodes["peripheral"]["volume"] = 20  # a bare number from Python is taken in mL: fine
    with pytest.raises(ScenarioError) as from_graph:
        Scenario.from_graph(g, doses=BENCHMARK_DOSES, duration="7 d")
    text = (ROOT / "scenarios" / "benchmark_patch.toml").read_text(encoding="utf-8").replace('"5 L"', '"-5 L"')
    with pytest.raises(ScenarioError) as from_file:
        barrierflow.loads(text)
    assert from_graph.value.problems == from_file.value.problems
    assert str(from_graph.value) == "compartment 'central' volume: got -5 L; must be > 0"


def test_unknown_attribute_gets_a_hint():
    g = benchmark_by_keywords()
    g.nodes["central"]["clearence"] = "10 L/h"
    with pytest.raises(ScenarioError) as info:
        Scenario.from_graph(g, duration="7 d")
    assert str(info.value).startswith(
        "compartment 'central' clearence: got an unknown key; did you mean 'clearance'?")


def test_self_loop_barrier_is_refused():
    g = nx.MultiDiGraph()
    g.add_node("skin_surface", volume="1 mL")
    g.add_edge("skin_surface", "skin_surface", key="loop", kind="barrier", area="1 cm^2",
               layers=[{"thickness": "10 um", "diffusivity": "1e-7 cm^2/s"}])
    with pytest.raises(ScenarioError) as info:
        Scenario.from_graph(g, duration="1 d")
    assert str(info.value) == ("barrier 'loop' to: got 'skin_surface'; "
                               "a barrier must join two different compartments")
    with pytest.raises(ScenarioError, match="a barrier must join two different compartments"):
        Barrier("b", "x", "x", 1.0, (Layer(0.001, 1e-4),))


def test_dose_on_a_held_compartment_is_refused():
    g = nx.MultiDiGraph()
    g.add_node("donor", held_concentration="1 mg/mL")
    g.add_node("receptor", volume="5 mL")
    g.add_edge("donor", "receptor", key="m", kind="barrier", area="1 cm^2",
               layers=[{"thickness": "10 um", "diffusivity": "1e-7 cm^2/s"}])
    for kind, extra in [("bolus", {"amount": "1 mg"}), ("replace", {"concentration": "2 mg/mL"}),
                        ("remove", {}), ("hold", {"concentration": "2 mg/mL", "duration": "1 h"})]:
        with pytest.raises(ScenarioError) as info:
            Scenario.from_graph(g, doses=[{"target": "donor", "kind": kind, **extra}], duration="1 d")
        assert str(info.value).startswith("dose 1 target: got 'donor'; a held compartment never changes"), kind


def test_missing_link_kind_is_refused():
    g = nx.MultiDiGraph()
    g.add_node("a", volume="1 mL")
    g.add_node("b", volume="1 mL")
    g.add_edge("a", "b", key="ab", flow="1 mL/h")
    with pytest.raises(ScenarioError) as info:
        Scenario.from_graph(g, duration="1 d")
    assert str(info.value) == "link 'ab' kind: got None; must be 'barrier', 'exchange' or 'transfer'"


def test_object_that_disagrees_with_its_edge_is_refused():
    g = nx.MultiDiGraph()
    g.add_node("a", volume="1 mL")
    g.add_node("b", volume="1 mL")
    g.add_edge("a", "b", key="t", transfer=Transfer("t", "b", "a", 1.0))
    with pytest.raises(ScenarioError, match="transfer 't' from: got b -> a; must match the edge a -> b"):
        Scenario.from_graph(g, duration="1 d")


def test_graph_problems_are_reported_together():
    g = benchmark_by_keywords()
    g.nodes["central"]["volume"] = "5 kg"
    g.edges["patch", "central", "skin"]["area"] = "0 cm^2"
    g.add_node("orphan", volume="1 mL")
    doses = [{"target": "patch", "kind": "bolus", "amount": "-1 mg"}, {"target": "nowhere", "kind": "remove"}]
    with pytest.raises(ScenarioError) as info:
        Scenario.from_graph(g, doses=doses, duration="7 d")
    assert [p.field for p in info.value.problems] == [
        "compartment 'central' volume", "barrier 'skin' area", "dose 1 amount", "dose 2 target"]


# ----------------------------------------------------------------------------- whole network
def test_disconnected_parts_are_allowed_and_reported():
    g = benchmark_by_keywords()
    g.add_node("cell_donor", held_concentration="1 mg/mL")
    g.add_node("cell_receptor", held_concentration="0 mg/mL")
    g.add_edge("cell_donor", "cell_receptor", kind="barrier", area="1 cm^2",
               layers=[{"thickness": "10 um", "diffusivity": "1e-7 cm^2/s"}])
    s = Scenario.from_graph(g, doses=BENCHMARK_DOSES, duration="7 d")
    assert s.components() == [["central", "patch", "peripheral"], ["cell_donor", "cell_receptor"]]
    assert s.summary().endswith("note: the network has 2 disconnected parts: "
                                "{central, patch, peripheral}; {cell_donor, cell_receptor}")


def test_connected_network_has_no_note():
    s = barrierflow.load(ROOT / "scenarios" / "daily_patch.toml")
    assert s.components() == [["central", "patch", "peripheral"]]
    assert s.summary() == ("3 compartments, 1 barrier (2 layers), 1 exchange, 0 transfers, 1 dose, "
                           "duration 168 h")


def test_odd_attribute_values_give_a_scenario_error_and_never_a_crash():
    # a seeded sweep over odd Python values in node, edge, layer and dose attributes
    import math
    import random

    rng = random.Random(7)
    odd = [5, -1, 0, "x", "5 kg", [1, 2], {"a": 1}, True, None, math.nan, math.inf, "nan mg", "", "1 mmol/L",
           [], (), 1e-320, "1 d", object(), b"5 mL", 3 + 0j]
    for _ in range(200):
        nodes = {"patch": {"volume": "1 mL", "initial_concentration": "10 mg/mL"},
                 "central": {"volume": "5 L", "clearance": "10 L/h"}}
        layer = {"thickness": "15 um", "diffusivity": "1e-9 cm^2/s", "partition": 10}
        edge = {"kind": "barrier", "area": "10 cm^2", "layers": [layer]}
        dose = {"target": "patch", "kind": "bolus", "amount": "1 mg"}
        for _ in range(rng.randint(1, 3)):
            where = rng.choice([nodes["patch"], nodes["central"], edge, layer, dose])
            keys = {id(edge): ["area", "kind", "layers", "model"], id(layer): ["thickness", "diffusivity", "cells"],
                    id(dose): ["amount", "kind", "at", "target"]}.get(id(where), ["volume", "vmax", "partition"])
            where[rng.choice(keys)] = rng.choice(odd)
        g = nx.MultiDiGraph()
        for name, attrs in nodes.items():
            g.add_node(name, **attrs)
        g.add_edge("patch", "central", key="skin", **edge)
        try:
            s = Scenario.from_graph(g, doses=[dose], duration=rng.choice(["7 d", 24.0, -1.0, "x"]))
        except ScenarioError:
            continue
        assert barrierflow.loads(s.to_toml()) == s
