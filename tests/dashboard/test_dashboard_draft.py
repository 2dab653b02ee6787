"""The editor document (draft): it holds what the researcher typed and validates like a file.

The reference for every check here is the model library, which the command line uses: a draft
must give the same scenario as the file it came from, and the same messages as
``barrierflow check`` on the file it saves.
"""

from __future__ import annotations

from pathlib import Path

import pytest

import barrierflow
from barrierflow import ScenarioError
from barrierflow.units import parse_quantity
from dashboard import draft as D

ROOT = Path(__file__).resolve().parents[2]
EXAMPLES = sorted((ROOT / "scenarios").glob("*.toml"))


def _empty_network() -> tuple[dict, str, str, str]:
    d = D.new_draft("cell.toml")
    d, donor = D.add_compartment(d, "donor", initial_concentration="10 mg/mL")
    d, receiver = D.add_compartment(d, "receiver", volume="5 mL")
    d, link = D.connect(d, "barrier", donor, receiver)
    return d, donor, receiver, link


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_every_example_gives_back_the_same_scenario(path):
    scenario = barrierflow.load(path)
    d = D.draft_from_scenario(scenario, path.name)
    again, found = D.check(d)
    assert found["ok"], found["all"]
    assert again == scenario
    from_text, problems = D.draft_from_toml(path.read_text(), path.name)
    assert problems == []
    assert D.check(from_text)[0] == scenario
    # the saved text reads back to the same model (as `barrierflow run` would read it)
    text, valid = D.save_text(d)
    assert valid and barrierflow.loads(text, path.name) == scenario
    assert found["digest"] == scenario.digest


def test_an_empty_draft_asks_for_a_compartment():
    _, found = D.check(D.new_draft())
    assert not found["ok"]
    assert found["messages"]["general"] == ["untitled.toml: compartment: got no compartments; "
                                            "a scenario needs at least one [[compartment]]"]


def test_a_network_built_by_edits_is_valid_and_has_the_expected_parts():
    d, donor, receiver, link = _empty_network()
    scenario, found = D.check(d)
    assert found["ok"], found["all"]
    assert [c.id for c in scenario.compartments] == ["donor", "receiver"]
    b = scenario.barrier("barrier_1")
    assert (b.from_id, b.to_id, len(b.layers)) == ("donor", "receiver", 1)
    assert scenario.compartment("donor").initial_concentration == pytest.approx(10.0)  # mg/mL
    assert scenario.compartment("receiver").volume == pytest.approx(5.0)  # mL


def test_negative_thickness_is_located_at_its_cell_with_the_command_line_message():
    d, _, _, link = _empty_network()
    layer = D.find(d, link)["layers"][0]
    d = D.set_layers(d, link, [{**layer, "thickness": "-15 um"}])
    _, found = D.check(d)
    target = f"y:{link}:0:thickness"
    assert found["messages"][target] == ["cell.toml: barrier 'barrier_1' layer 1 thickness: got -15 um; must be > 0"]
    text, valid = D.save_text(d)
    assert not valid
    with pytest.raises(ScenarioError) as err:
        barrierflow.loads(text, "cell.toml")
    assert [str(p) for p in err.value.problems] == found["all"]


def test_wrong_unit_and_bare_number_are_located_at_the_compartment_field():
    d, donor, receiver, _ = _empty_network()
    d = D.update_compartment(d, receiver, {"volume": "5 kg", "clearance": "3"})
    _, found = D.check(d)
    vol = found["messages"][f"c:{receiver}:volume"][0]
    assert vol.startswith("cell.toml: compartment 'receiver' volume: got 5 kg; wrong kind of unit")
    assert "a volume" in vol
    assert "the unit is missing" in found["messages"][f"c:{receiver}:clearance"][0]
    text, _ = D.save_text(d)
    with pytest.raises(ScenarioError) as err:
        barrierflow.loads(text, "cell.toml")
    assert sorted(str(p) for p in err.value.problems) == sorted(found["all"])


def test_a_bad_dose_is_located_at_its_row():
    d, donor, _, _ = _empty_network()
    d = D.add_dose(d)
    d = D.set_doses(d, [{**d["doses"][0], "kind": "bolus", "amount": "", "at": "2 h"}])
    _, found = D.check(d)
    assert found["messages"]["d:0:amount"] == ["cell.toml: dose 1 amount: got nothing; a bolus dose needs amount"]


def test_renaming_a_compartment_keeps_its_links_and_doses():
    d, donor, receiver, link = _empty_network()
    d = D.add_dose(d, "donor")
    d = D.update_compartment(d, donor, {"id": "patch"})
    scenario, found = D.check(d)
    assert found["ok"], found["all"]
    assert scenario.barrier("barrier_1").from_id == "patch"
    assert scenario.doses[0].target == "patch"


def test_deleting_a_compartment_removes_its_links_and_doses():
    d, donor, receiver, link = _empty_network()
    d = D.add_dose(d, "donor")
    d = D.delete(d, donor)
    assert [c["id"] for c in d["compartments"]] == ["receiver"]
    assert d["links"] == [] and d["doses"] == []
    assert donor not in d["positions"]


def test_edits_do_not_change_their_input():
    d, donor, receiver, link = _empty_network()
    before = repr(d)
    D.update_compartment(d, donor, {"volume": "3 mL"})
    D.add_layer(d, link)
    D.delete(d, receiver)
    assert repr(d) == before


def test_layers_are_added_removed_and_reordered():
    d, _, _, link = _empty_network()
    d = D.add_layer(d, link)
    d = D.add_layer(d, link, after=0)
    names = [layer["name"] for layer in D.find(d, link)["layers"]]
    assert names == ["default layer", "layer 3", "layer 2"]
    d = D.move_layer(d, link, 2, -1)
    assert [layer["name"] for layer in D.find(d, link)["layers"]] == ["default layer", "layer 2", "layer 3"]
    d = D.move_layer(d, link, 0, -1)  # already first: unchanged
    d = D.remove_layer(d, link, 1)
    assert [layer["name"] for layer in D.find(d, link)["layers"]] == ["default layer", "layer 3"]
    scenario, found = D.check(d)
    assert found["ok"] and len(scenario.barrier("barrier_1").layers) == 2


def test_connecting_a_compartment_to_itself_is_refused():
    d, donor, _, _ = _empty_network()
    with pytest.raises(ValueError, match="two different compartments"):
        D.connect(d, "exchange", donor, donor)


TIMES = [("168 h", "7 d"), ("0.25 h", "15 min"), ("24 h", "24 h"), ("1.5 h", "90 min"), ("0 h", "0 h"),
         ("1e-3 h", "1e-3 h"), ("36 s", "36 s")]


@pytest.mark.parametrize("text, expected", TIMES)
def test_times_are_written_as_a_researcher_would_and_read_back_exactly(text, expected):
    shown = D.pretty_time(text)
    assert shown == expected
    assert parse_quantity(shown, "time") == parse_quantity(text, "time")


def test_tidy_layout_puts_sources_left_of_what_they_feed():
    d, donor, receiver, _ = _empty_network()
    d, third = D.add_compartment(d, "body")
    d, _ = D.connect(d, "transfer", receiver, third)
    pos = D.tidy_positions(d)
    assert pos[donor]["x"] < pos[receiver]["x"] < pos[third]["x"]


def test_explicit_output_times_of_a_file_are_kept_until_a_step_is_typed():
    text = (ROOT / "scenarios" / "daily_patch.toml").read_text().replace(
        'output_step = "5 min"', 'output_times = ["0 h", "1 h", "2 d"]')
    d, problems = D.draft_from_toml(text, "t.toml")
    assert problems == []
    assert D.check(d)[0].output_times == (0.0, 1.0, 48.0)
    d = D.set_scenario(d, output_step="30 min")
    scenario = D.check(d)[0]
    assert scenario.output_times is None and scenario.output_step == pytest.approx(0.5)


def test_a_toml_syntax_error_is_reported_and_gives_an_empty_draft():
    d, problems = D.draft_from_toml("[scenario\nname = 1", "broken.toml")
    assert d["compartments"] == []
    assert len(problems) == 1 and problems[0].field == "TOML syntax"


def test_an_uploaded_file_with_problems_is_kept_as_typed_and_its_problems_listed():
    import base64

    from dashboard.panels.scenario import open_upload

    text = (ROOT / "scenarios" / "diffusion_cell.toml").read_text().replace('thickness = "20 um"',
                                                                             'thickness = "-20 um"')
    contents = "data:application/octet-stream;base64," + base64.b64encode(text.encode()).decode()
    d, problems = open_upload(contents, "mine.toml")
    assert problems == ["mine.toml: barrier 'membrane' layer 1 thickness: got -20 um; must be > 0"]
    assert d["links"][0]["layers"][0]["thickness"] == "-20 um"
    assert d["file"] == "mine.toml"
    assert open_upload("garbage", "x.toml")[0] is None


def test_problems_are_located_by_their_path_not_their_message():
    # the draft finds a field from Problem.path (the model's parameter path), whatever the message says
    from barrierflow.errors import Problem

    d, donor, receiver, link = _empty_network()
    d = D.add_dose(d)
    d = D.add_layer(d, link)
    found = D.locate([
        Problem("some words", "x", "y", path="barrier.barrier_1.layer.2.diffusivity"),
        Problem("some words", "x", "y", path="compartment.receiver.volume"),
        Problem("some words", "x", "y", path="compartment.2.clearance"),  # a table without id: by position
        Problem("some words", "x", "y", path="barrier.barrier_1.area"),
        Problem("some words", "x", "y", path="barrier.barrier_1.layer"),
        Problem("some words", "x", "y", path="dose.1.at"),
        Problem("some words", "x", "y", path="scenario.duration"),
        Problem("some words", "x", "y", path="substance.molar_mass"),
        Problem("some words", "x", "y", path="output.time"),
        Problem("compartment 'donor' volume", "x", "y", path=""),  # no path: not guessed from the text
        Problem("some words", "x", "y", path="compartment.nobody.volume"),
    ], d)
    assert {k: len(v) for k, v in found.items()} == {
        f"y:{link}:1:diffusivity": 1, f"c:{receiver}:volume": 1, f"c:{receiver}:clearance": 1,
        f"l:{link}:area": 1, f"l:{link}:layers": 1, "d:0:at": 1, "s:duration": 1, "sub:molar_mass": 1,
        "o:time": 1, "general": 2}


def test_field_kinds_come_from_the_model():
    from barrierflow.model import Compartment, Dose, Layer

    for table, cls in ((D.COMPARTMENT_FIELDS, Compartment), (D.LAYER_FIELDS, Layer), (D.DOSE_FIELDS, Dose)):
        kinds = {s.key: s.kind for s in cls.SPECS}
        assert {k: kind for k, (_, kind, _) in table.items()} == {k: kinds[k] for k in table}


def test_a_draft_with_problems_is_saved_by_the_model_writer():
    from barrierflow.model import to_toml

    d, _, _, link = _empty_network()
    layer = D.find(d, link)["layers"][0]
    d = D.set_layers(d, link, [{**layer, "partition": "nan", "thickness": "-1 um"}])
    text, valid = D.save_text(d)
    assert not valid
    assert text.split("\n", 1)[0].startswith("# This scenario has problems")
    assert text.endswith(to_toml(D.to_document(d)))
    assert "partition = nan" in text  # TOML's own nan, refused by the reader as the draft's check refuses it
    with pytest.raises(ScenarioError) as err:
        barrierflow.loads(text, "cell.toml")
    _, found = D.check(d)
    assert [str(p) for p in err.value.problems] == found["all"]


def test_every_problem_of_one_layer_is_shown_at_its_cell():
    from dashboard.panels.layers import grid_rows, layer_messages

    d, a = D.add_compartment(D.new_draft("two.toml"), "a", volume="1 mL")
    d, b = D.add_compartment(d, "b", volume="1 mL")
    d, link = D.connect(d, "barrier", a, b)
    layer = D.find(d, link)["layers"][0]
    assert layer["name"] == D.DEFAULT_LAYER_NAME  # the layer a new barrier starts with, named so
    assert "one layer named 'default layer' (thickness 10 um" in D.new_link_note(d, link)
    d = D.set_layers(d, link, [dict(layer, thickness="-5 um", diffusivity="fast")])
    _s, found = D.check(d)
    errors = grid_rows(d, link, found["messages"])[0]["_errors"]
    assert set(errors) == {"thickness", "diffusivity"}, errors
    listed = layer_messages(d, link, found["messages"])
    assert any("thickness: got -5 um" in m for m in listed) and any("diffusivity: got fast" in m for m in listed)
