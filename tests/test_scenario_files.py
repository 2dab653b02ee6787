"""Scenario files: loading, the refusals of the format's "Bad input" section, the round trip,
atomic writing.

The contract is /work/shared/spec/scenario-format.md (a copy of its rules is summarised in
DEVELOPERS.md). Message wording follows the pattern
``<file>: <field path>: got <value>; <what was expected>``; the important ones are pinned
here word for word, so that a change of wording is a deliberate one.
"""

from __future__ import annotations

import dataclasses
import os
import re
from pathlib import Path

import pytest

import barrierflow
from barrierflow import Compartment, Problem, Scenario, ScenarioError
from barrierflow.io import atomic_write
from barrierflow.model import MAX_TOTAL_CELLS

SCENARIOS = sorted((Path(__file__).resolve().parent.parent / "scenarios").glob("*.toml"))

# A small valid file (invented numbers) that the bad-input cases below break one way each.
BASE = '''
[scenario]
name = "test cell"
duration = "24 h"
output_step = "1 h"

[substance]
name = "test compound"

[[compartment]]
id = "donor"
volume = "1 mL"
initial_concentration = "10 mg/mL"

[[compartment]]
id = "receptor"
volume = "5 mL"

[[compartment]]
id = "body"
volume = "5 L"
clearance = "10 L/h"

[[barrier]]
id = "skin"
from = "donor"
to = "receptor"
area = "1 cm^2"

  [[barrier.layer]]
  name = "outer"
  thickness = "15 um"
  diffusivity = "1e-9 cm^2/s"
  partition = 10

  [[barrier.layer]]
  name = "inner"
  thickness = "100 um"
  diffusivity = "1e-6 cm^2/s"

[[exchange]]
id = "flow"
from = "receptor"
to = "body"
flow = "1 L/h"

[[dose]]
target = "donor"
kind = "bolus"
amount = "1 mg"
at = "12 h"
'''


def edit(old: str, new: str, text: str = BASE, count: int = 1) -> str:
    """``text`` with ``old`` replaced by ``new`` (``old`` must occur)."""
    assert old in text, old
    return text.replace(old, new, count)


def refusal(text: str, file: str = "patch.toml") -> ScenarioError:
    with pytest.raises(ScenarioError) as info:
        barrierflow.loads(text, file)
    return info.value


def lines(err: ScenarioError) -> list[str]:
    return str(err).splitlines()


def test_base_file_is_valid():
    s = barrierflow.loads(BASE, "patch.toml")
    assert [c.id for c in s.compartments] == ["donor", "receptor", "body"]
    # internal units: cm, h, mg, mL
    assert s.barriers[0].layers[0].thickness == 0.0015
    assert s.barriers[0].layers[0].diffusivity == pytest.approx(3.6e-6, rel=1e-12)  # 1e-9 cm^2/s * 3600 s/h
    assert s.compartment("body").volume == 5000.0
    assert s.compartment("body").clearance == 10000.0
    assert s.doses[0].at == 12.0
    assert s.exchanges[0].flow == 1000.0


# ----------------------------------------------------------------------------- every file
@pytest.mark.parametrize("path", SCENARIOS, ids=[p.name for p in SCENARIOS])
def test_every_scenario_file_loads(path):
    s = barrierflow.load(path)
    assert s.source == path.name
    assert s.duration > 0 and s.compartments


@pytest.mark.parametrize("path", SCENARIOS, ids=[p.name for p in SCENARIOS])
def test_every_scenario_file_says_it_is_invented(path):
    # The project's rule: demo data are scenarios of our own invention, and say so.
    s = barrierflow.load(path)
    assert "invented" in s.description.lower()
    assert "invented" in path.read_text(encoding="utf-8").splitlines()[0].lower()


@pytest.mark.parametrize("path", SCENARIOS, ids=[p.name for p in SCENARIOS])
def test_round_trip_gives_an_equal_model(path, tmp_path):
    s = barrierflow.load(path)
    text = s.to_toml()
    again = barrierflow.loads(text, path.name)
    assert again == s
    assert again.to_toml() == text          # writing is stable
    assert again.digest == s.digest
    barrierflow.save(s, tmp_path / path.name)
    assert barrierflow.load(tmp_path / path.name) == s


def test_demo_files_named_by_the_issue_exist():
    names = {p.name for p in SCENARIOS}
    assert {"daily_patch.toml", "diffusion_cell.toml", "membrane_washoff.toml",
            "benchmark_patch.toml"} <= names


def test_demo_files_hold_what_their_names_say():
    patch = barrierflow.load(SCENARIOS[0].parent / "daily_patch.toml")
    assert len(patch.barrier("skin").layers) == 2
    assert {d.kind for d in patch.doses} == {"replace"}
    assert patch.doses[0].start_times(patch.duration) == (24.0, 48.0, 72.0, 96.0, 120.0, 144.0)
    assert {c.id for c in patch.compartments} == {"patch", "central", "peripheral"}

    cell = barrierflow.load(SCENARIOS[0].parent / "diffusion_cell.toml")
    assert cell.compartment("donor").held and cell.compartment("receptor").held_concentration == 0.0

    wash = barrierflow.load(SCENARIOS[0].parent / "membrane_washoff.toml")
    assert [(d.kind, d.at) for d in wash.doses] == [("remove", 8.0)]
    assert not any(c.held for c in wash.compartments)

    # every without count repeats to the end of the run, the end included (format conventions)
    drops = barrierflow.load(SCENARIOS[0].parent / "eye_drops.toml")
    assert drops.doses[0].start_times(drops.duration) == tuple(6.0 * i for i in range(9))

    oral = barrierflow.load(SCENARIOS[0].parent / "oral_depot.toml")
    # km = 2 umol/L at 320 g/mol = 6.4e-4 mg/mL (IUPAC Green Book 2007, 2.10: c_mass = c * M)
    assert oral.compartment("central").km == pytest.approx(6.4e-4, rel=1e-12)
    assert not oral.is_linear


def test_benchmark_file_matches_the_benchmark_contract():
    # /work/shared/spec/benchmark.md, the reference problem, value by value (internal units)
    s = barrierflow.load(SCENARIOS[0].parent / "benchmark_patch.toml")
    assert s.duration == 168.0 and len(s.output_grid()) == 7 * 24 * 6 + 1
    assert [(c.id, c.volume, c.initial_concentration, c.clearance) for c in s.compartments] == [
        ("patch", 1.0, 10.0, 0.0), ("central", 5000.0, 0.0, 10000.0), ("peripheral", 20000.0, 0.0, 0.0)]
    (skin,) = s.barriers
    assert (skin.from_id, skin.to_id, skin.area) == ("patch", "central", 10.0)
    assert [(ly.thickness, ly.diffusivity, ly.partition, ly.cells) for ly in skin.layers] == [
        (0.0015, 3.6e-6, 10.0, 50), (0.01, 3.6e-3, 1.0, 50), (0.1, 3.6e-3, 1.0, 50)]
    assert [(e.from_id, e.to_id, e.flow) for e in s.exchanges] == [("central", "peripheral", 5000.0)]
    (dose,) = s.doses
    assert (dose.kind, dose.concentration, dose.at, dose.every, dose.count) == ("replace", 10.0, 24.0, 24.0, 6)


def test_output_times_follow_the_conventions():
    s = barrierflow.loads(edit('output_step = "1 h"', 'output_step = "5 h"'))
    assert s.output_grid() == (0.0, 5.0, 10.0, 15.0, 20.0, 24.0)  # 0 and the end always included
    s = barrierflow.loads(edit('output_step = "1 h"\n', ''))
    grid = s.output_grid()
    assert len(grid) == 501 and grid[0] == 0.0 and grid[-1] == 24.0  # 500 equal steps
    s = barrierflow.loads(edit('output_step = "1 h"', 'output_times = ["0 h", "30 min", "2 h"]'))
    assert s.output_grid() == (0.0, 0.5, 2.0)


# ----------------------------------------------------------------------------- bad input
# (edit to BASE, the exact message line expected), pinned word for word.
PINNED = {
    "negative thickness": (
        ('thickness = "15 um"', 'thickness = "-15 um"'),
        "patch.toml: barrier 'skin' layer 1 thickness: got -15 um; must be > 0"),
    "zero thickness": (
        ('thickness = "100 um"', 'thickness = "0 um"'),
        "patch.toml: barrier 'skin' layer 2 thickness: got 0 um; must be > 0"),
    "negative volume": (
        ('volume = "5 L"', 'volume = "-5 L"'),
        "patch.toml: compartment 'body' volume: got -5 L; must be > 0"),
    "zero volume": (
        ('volume = "1 mL"', 'volume = "0 mL"'),
        "patch.toml: compartment 'donor' volume: got 0 mL; must be > 0"),
    "zero area": (
        ('area = "1 cm^2"', 'area = "0 cm^2"'),
        "patch.toml: barrier 'skin' area: got 0 cm^2; must be > 0"),
    "negative area": (
        ('area = "1 cm^2"', 'area = "-1 cm^2"'),
        "patch.toml: barrier 'skin' area: got -1 cm^2; must be > 0"),
    "wrong dimension": (
        ('volume = "5 L"', 'volume = "5 kg"'),
        "patch.toml: compartment 'body' volume: got 5 kg; wrong kind of unit (kg); "
        "expected a volume with its unit, such as '5 mL', or a volume per area such as '10 uL/cm^2' (times the "
        "area of the one barrier the compartment touches)"),
    "wrong dimension diffusivity": (
        ('diffusivity = "1e-9 cm^2/s"', 'diffusivity = "1e-9 cm/s"'),
        "patch.toml: barrier 'skin' layer 1 diffusivity: got 1e-9 cm/s; wrong kind of unit (cm / s); "
        "expected a diffusivity (area per time) with its unit, such as '1e-9 cm^2/s'"),
    "bare number": (
        ('volume = "5 L"', 'volume = 5'),
        "patch.toml: compartment 'body' volume: got 5; a bare number is not accepted here; "
        "expected a volume with its unit, such as '5 mL'"),
    "barrier from names no compartment": (
        ('from = "donor"', 'from = "doner"'),
        "patch.toml: barrier 'skin' from: got 'doner'; names no compartment (known: donor, receptor, body)"),
    "barrier to names no compartment": (
        ('to = "receptor"\narea', 'to = "blood"\narea'),
        "patch.toml: barrier 'skin' to: got 'blood'; names no compartment (known: donor, receptor, body)"),
    "exchange to names no compartment": (
        ('to = "body"', 'to = "bodyy"'),
        "patch.toml: exchange 'flow' to: got 'bodyy'; names no compartment (known: donor, receptor, body)"),
    "duplicated compartment id": (
        ('id = "body"', 'id = "receptor"'),
        "patch.toml: compartment 'receptor' id: got 'receptor'; ids must be unique across the file; "
        "already used by a compartment"),
    "barrier id used by a compartment": (
        ('id = "skin"', 'id = "donor"'),
        "patch.toml: barrier 'donor' id: got 'donor'; ids must be unique across the file; "
        "already used by a compartment"),
    "dose on unknown compartment": (
        ('target = "donor"', 'target = "patch"'),
        "patch.toml: dose 1 target: got 'patch'; names no compartment (known: donor, receptor, body)"),
    "non-finite number in a unit string": (
        ('volume = "5 L"', 'volume = "nan L"'),
        "patch.toml: compartment 'body' volume: got nan L; must be a finite number with its unit"),
    "infinite number in a unit string": (
        ('area = "1 cm^2"', 'area = "inf cm^2"'),
        "patch.toml: barrier 'skin' area: got inf cm^2; must be a finite number with its unit"),
    "non-finite bare number": (
        ('partition = 10', 'partition = nan'),
        "patch.toml: barrier 'skin' layer 1 partition: got nan; must be a finite number"),
    "vmax without km": (
        ('clearance = "10 L/h"', 'vmax = "2 mg/h"'),
        "patch.toml: compartment 'body' vmax: got 2 mg/h; vmax needs km too (Michaelis-Menten elimination)"),
    "km without vmax": (
        ('clearance = "10 L/h"', 'km = "0.1 mg/L"'),
        "patch.toml: compartment 'body' km: got 0.1 mg/L; km needs vmax too (Michaelis-Menten elimination)"),
    "grid too large in one layer": (
        ('partition = 10', 'partition = 10\n  cells = 200000'),
        "patch.toml: barrier 'skin' layer 1 cells: got 200000; must be at most 100000 (a grid too large for memory)"),
    "self-loop barrier": (
        ('to = "receptor"\narea', 'to = "donor"\narea'),
        "patch.toml: barrier 'skin' to: got 'donor'; a barrier must join two different compartments"),
    "dose on held compartment": (
        ('initial_concentration = "10 mg/mL"', 'held_concentration = "10 mg/mL"'),
        "patch.toml: dose 1 target: got 'donor'; a held compartment never changes, so it cannot be dosed; "
        "dose another compartment or drop held_concentration"),
    "unknown key with a hint": (
        ('clearance = "10 L/h"', 'clearence = "10 L/h"'),
        "patch.toml: compartment 'body' clearence: got an unknown key; did you mean 'clearance'? known keys here: "
        "id, volume, initial_concentration, partition, clearance, vmax, km, held_concentration, evaporation_rate, "
        "residual_volume, loss_rate, description"),
    "unknown table with a hint": (
        ('[[exchange]]', '[[exchanges]]'),
        "patch.toml: [exchanges]: got an unknown table; did you mean 'exchange'? known keys here: "
        "scenario, substance, compartment, barrier, exchange, transfer, dose, output, vary, correlation"),
    "unknown scenario key with a hint": (
        ('output_step = "1 h"', 'output_stepp = "1 h"'),
        "patch.toml: scenario output_stepp: got an unknown key; did you mean 'output_step'? known keys here: "
        "name, description, duration, output_step, output_times, check_ranges"),
    "molar unit without molar mass": (
        ('initial_concentration = "10 mg/mL"', 'initial_concentration = "1 mmol/L"'),
        "patch.toml: compartment 'donor' initial_concentration: got 1 mmol/L; a molar unit needs the "
        "substance's molar_mass in [substance]; give it, or write a concentration (mass per volume) with its "
        "unit, such as '20 mg/mL'"),
    "dose after the end of the run": (
        ('at = "12 h"', 'at = "2 d"'),
        "patch.toml: dose 1 at: got 48 h; must be within the run (duration 24 h)"),
    "dose kind unknown": (
        ('kind = "bolus"', 'kind = "pill"'),
        "patch.toml: dose 1 kind: got 'pill'; must be one of bolus, infusion, hold, replace, remove, sample"),
    "bolus without amount": (
        ('amount = "1 mg"\n', ''),
        "patch.toml: dose 1 amount: got nothing; a bolus dose needs amount"),
    "missing required key": (
        ('  diffusivity = "1e-6 cm^2/s"\n', ''),
        "patch.toml: barrier 'skin' layer 2 diffusivity: got nothing; this key is required, such as '1e-9 cm^2/s'"),
    "quoted number where a bare number is meant": (
        ('partition = 10', 'partition = "10"'),
        "patch.toml: barrier 'skin' layer 1 partition: got \"10\"; expected a bare number such as 10 "
        "(no unit, no quotes)"),
    "negative partition coefficient": (
        ('partition = 10', 'partition = -10'),
        "patch.toml: barrier 'skin' layer 1 partition: got -10; must be > 0"),
    "negative time of a dose": (
        ('at = "12 h"', 'at = "-1 h"'),
        "patch.toml: dose 1 at: got -1 h; must be >= 0"),
    "output times that do not increase": (
        ('output_step = "1 h"', 'output_times = ["0 h", "2 h", "1 h"]'),
        "patch.toml: scenario output_times[2]: got 1 h; times must increase"),
    "output unit of the wrong kind": (
        ('[[dose]]', '[output]\nconcentration = "mg"\n\n[[dose]]'),
        "patch.toml: output concentration: got mg; wrong kind of unit (mg); expected a concentration "
        "(mass per volume) unit, such as 'mg/mL'"),
    "output unit with a number": (
        ('[[dose]]', '[output]\namount = "2 mg"\n\n[[dose]]'),
        "patch.toml: output amount: got 2 mg; a unit without a number is expected; an amount (mass) unit, "
        "such as 'mg'"),
    "exchange id that is not text": (
        ('id = "flow"', 'id = 5'),
        "patch.toml: exchange 1 id: got 5; expected text in quotes"),
    "bad id": (
        ('id = "body"', 'id = "2body"'),
        "patch.toml: compartment '2body' id: got '2body'; an id starts with a letter and holds only letters, "
        "digits, '_' and '-'"),
}


@pytest.mark.parametrize("case", list(PINNED), ids=list(PINNED))
def test_bad_input_is_refused_with_one_pinned_message(case):
    (old, new), expected = PINNED[case]
    err = refusal(edit(old, new))
    assert expected in lines(err), "\n".join(lines(err))
    # every message names the file, a field path, the value and what was expected
    for p in err.problems:
        assert p.file == "patch.toml" and p.field and p.value and p.expected
        assert re.fullmatch(r"patch\.toml: [^:]+: got .+; .+", str(p)), str(p)


def test_each_refusal_reports_only_its_own_problem():
    # a single mistake gives a single message (no follow-on noise), for the cases where that holds
    for case in ("negative thickness", "wrong dimension", "bare number", "dose on unknown compartment",
                 "self-loop barrier", "vmax without km", "unknown key with a hint"):
        (old, new), expected = PINNED[case]
        assert lines(refusal(edit(old, new))) == [expected], case


def test_grid_too_large_over_all_layers():
    layer = '\n  [[barrier.layer]]\n  thickness = "10 um"\n  diffusivity = "1e-6 cm^2/s"\n  cells = 100000\n'
    text = edit('[[exchange]]', layer * 11 + '\n[[exchange]]')
    err = refusal(text)
    assert lines(err) == [f"patch.toml: barrier layer cells: got 1100000 cells in all; must be at most "
                          f"{MAX_TOTAL_CELLS} (a grid too large for memory)"]


def test_toml_syntax_error_names_the_line():
    text = edit('volume = "5 L"', 'volume = "5 L')
    number = text.splitlines().index('volume = "5 L') + 1
    (line,) = lines(refusal(text))
    assert line.startswith("patch.toml: TOML syntax: got ")
    assert f"line {number}," in line and line.endswith("; a valid TOML document")


def test_single_table_where_a_list_is_meant():
    err = refusal(BASE.replace("[[exchange]]", "[exchange]"))
    assert "patch.toml: exchange: got [exchange]; write [[exchange]] (a list of tables), one per exchange" in lines(err)


def test_missing_scenario_table_and_duration():
    err = refusal(edit('duration = "24 h"\n', ''))
    assert lines(err) == ['patch.toml: scenario duration: got nothing; this key is required, '
                          'such as duration = "7 d"']


def test_several_problems_of_a_file_are_reported_together():
    text = BASE
    for old, new in [('thickness = "15 um"', 'thickness = "-15 um"'),     # a layer
                     ('volume = "5 L"', 'volume = 5'),                     # a compartment
                     ('to = "body"', 'to = "bodyy"'),                      # the network
                     ('target = "donor"', 'target = "nobody"'),            # the regimen
                     ('output_step = "1 h"', 'output_step = "1 kg"'),      # the head
                     ('name = "test compound"', 'name = "x"\nmolar_mass = "-1 g/mol"')]:
        text = edit(old, new, text)
    err = refusal(text)
    fields = [p.field for p in err.problems]
    assert fields == [
        "substance molar_mass", "scenario output_step", "compartment 'body' volume",
        "barrier 'skin' layer 1 thickness", "exchange 'flow' to", "dose 1 target"], fields
    assert str(err).count("patch.toml: ") == 6


def test_problems_after_a_failed_dose_keep_their_dose_number():
    text = edit('[[dose]]', '[[dose]]\ntarget = "donor"\nkind = "bolus"\namount = "-1 mg"\n\n[[dose]]')
    text = edit('target = "donor"\nkind = "bolus"\namount = "1 mg"', 'target = "nobody"\nkind = "bolus"\n'
                'amount = "1 mg"', text)
    fields = [p.field for p in refusal(text).problems]
    assert fields == ["dose 1 amount", "dose 2 target"]


def test_a_failed_compartment_does_not_cause_follow_on_messages():
    err = refusal(edit('volume = "5 L"', 'volume = "5 kg"'))
    assert [p.field for p in err.problems] == ["compartment 'body' volume"]  # not also "exchange 'flow' to"


def test_problem_objects_carry_their_fields():
    err = refusal(edit('thickness = "15 um"', 'thickness = "-15 um"'))
    assert err.problems == (Problem("barrier 'skin' layer 1 thickness", "-15 um", "must be > 0", "patch.toml",
                                    path="barrier.skin.layer.1.thickness"),)
    assert isinstance(err, ValueError) and isinstance(err, barrierflow.BarrierflowError)


def test_missing_file_is_refused(tmp_path):
    with pytest.raises(ScenarioError) as info:
        barrierflow.load(tmp_path / "nothing.toml")
    assert str(info.value).startswith("nothing.toml: file: got ")
    assert str(info.value).endswith("; no such file")


def test_load_names_the_file_not_the_folder(tmp_path):
    path = tmp_path / "my_cell.toml"
    path.write_text(edit('area = "1 cm^2"', 'area = "0 cm^2"'), encoding="utf-8")
    err = refusal_from_file(path)
    assert lines(err) == ["my_cell.toml: barrier 'skin' area: got 0 cm^2; must be > 0"]


def refusal_from_file(path: Path) -> ScenarioError:
    with pytest.raises(ScenarioError) as info:
        barrierflow.load(path)
    return info.value


# ----------------------------------------------------------------------------- the model directly
def test_model_objects_refuse_bad_values_too():
    with pytest.raises(ScenarioError) as info:
        Compartment("c", volume=-1.0)
    assert str(info.value) == "volume: got -1 mL; must be > 0"
    with pytest.raises(ScenarioError, match="must be a time > 0"):
        Scenario(name="x", duration=0.0, compartments=(Compartment("c", volume=1.0),))


def test_python_built_scenario_round_trips_through_toml():
    # floats that no short unit string gives (10/60 h) must still write and read back exactly
    s = barrierflow.loads(BASE)
    s2 = dataclasses.replace(s, output_step=10 / 60, duration=100 / 7)
    assert barrierflow.loads(s2.to_toml()) == s2


# ----------------------------------------------------------------------------- atomic writing
def test_atomic_write_replaces_the_file(tmp_path):
    target = tmp_path / "out.toml"
    target.write_text("old", encoding="utf-8")
    atomic_write(target, "new")
    assert target.read_text(encoding="utf-8") == "new"
    assert [p.name for p in tmp_path.iterdir()] == ["out.toml"]


def test_failed_write_leaves_the_old_file_intact(tmp_path, monkeypatch):
    target = tmp_path / "daily.toml"
    target.write_text("the old content\n", encoding="utf-8")

    def disk_full(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", disk_full)
    with pytest.raises(OSError, match="No space left"):
        barrierflow.save(barrierflow.loads(BASE), target)
    assert target.read_text(encoding="utf-8") == "the old content\n"
    assert [p.name for p in tmp_path.iterdir()] == ["daily.toml"]  # no temporary file left behind


def test_failed_rename_leaves_the_old_file_intact(tmp_path, monkeypatch):
    target = tmp_path / "daily.toml"
    target.write_text("the old content\n", encoding="utf-8")

    def refuse(src, dst):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(os, "replace", refuse)
    with pytest.raises(PermissionError):
        atomic_write(target, "new content")
    assert target.read_text(encoding="utf-8") == "the old content\n"
    assert [p.name for p in tmp_path.iterdir()] == ["daily.toml"]


# ----------------------------------------------------------------------------- robustness
_ODD_VALUES = ['5', '-1', '0', '"x"', '"5 kg"', '[1, 2]', '{a = 1}', 'true', 'nan', 'inf', '"nan mg"', '1e400',
               '""', '"1 mmol/L"', '[]', '"0 h"', '"-0 um"', '"1e-320 cm"', '"mg"', '"(("', '"10 h**2"', '2024-01-01']


def test_odd_values_anywhere_give_a_scenario_error_and_never_a_crash():
    # A seeded sweep: 150 files, each a demo file with one to three values replaced by odd ones.
    # Whatever is wrong, the result is a valid scenario (which round-trips) or a ScenarioError whose
    # every line names the file; never another exception (the CLI would show that as exit 1).
    import random

    rng = random.Random(20240601)
    texts = [p.read_text(encoding="utf-8") for p in SCENARIOS]
    for _ in range(150):
        lines_ = rng.choice(texts).splitlines()
        keyed = [i for i, line in enumerate(lines_) if re.match(r"\s*[a-z_]+ = ", line)]
        for _ in range(rng.randint(1, 3)):
            i = rng.choice(keyed)
            lines_[i] = lines_[i].split("=")[0] + "= " + rng.choice(_ODD_VALUES)
        text = "\n".join(lines_)
        try:
            s = barrierflow.loads(text, "odd.toml")
        except ScenarioError as err:
            assert all(str(p).startswith("odd.toml: ") for p in err.problems), str(err)
        else:
            assert barrierflow.loads(s.to_toml()) == s


# ----------------------------------------------------------------------------- every problem at once
def test_every_problem_of_one_layer_is_reported():
    # issue 16: a wrong diffusivity used to hide the negative thickness of the same layer
    text = edit('thickness = "15 um"\n  diffusivity = "1e-9 cm^2/s"\n  partition = 10',
                'thickness = "-15 um"\n  diffusivity = "1e-9 cm"\n  partition = -10\n  cells = 0')
    assert lines(refusal(text)) == [
        "patch.toml: barrier 'skin' layer 1 thickness: got -15 um; must be > 0",
        "patch.toml: barrier 'skin' layer 1 diffusivity: got 1e-9 cm; wrong kind of unit (cm); "
        "expected a diffusivity (area per time) with its unit, such as '1e-9 cm^2/s'",
        "patch.toml: barrier 'skin' layer 1 partition: got -10; must be > 0",
        "patch.toml: barrier 'skin' layer 1 cells: got 0; must be a whole number >= 1",
    ]


def test_a_missing_required_key_does_not_hide_the_others():
    text = edit('  thickness = "100 um"\n  diffusivity = "1e-6 cm^2/s"\n', '  thickness = "0 um"\n  partition = 0\n')
    assert lines(refusal(text)) == [
        "patch.toml: barrier 'skin' layer 2 thickness: got 0 um; must be > 0",
        "patch.toml: barrier 'skin' layer 2 partition: got 0; must be > 0",
        "patch.toml: barrier 'skin' layer 2 diffusivity: got nothing; this key is required, such as '1e-9 cm^2/s'",
    ]


def test_every_problem_of_a_compartment_and_a_dose_is_reported():
    text = edit('volume = "5 L"\nclearance = "10 L/h"', 'volume = "5 kg"\nclearance = "-10 L/h"\npartition = 0')
    text = edit('amount = "1 mg"\nat = "12 h"', 'amount = "1 mg/mL"\nat = "-12 h"\nevery = "0 h"', text)
    assert [p.field for p in refusal(text).problems] == [
        "compartment 'body' volume", "compartment 'body' clearance", "compartment 'body' partition",
        "dose 1 amount", "dose 1 at", "dose 1 every"]


def test_an_unreadable_field_causes_no_follow_on_message():
    # an unreadable held_concentration must not make "clearance" look wrong, nor an unreadable
    # "from" make the barrier look like a loop onto one compartment
    text = edit('volume = "5 L"', 'held_concentration = "5 kg"')
    assert [p.field for p in refusal(text).problems] == ["compartment 'body' held_concentration"]
    text = edit('from = "donor"', 'from = 7')
    assert [p.field for p in refusal(text).problems] == ["barrier 'skin' from"]
    text = edit('kind = "bolus"', 'kind = 3')
    assert lines(refusal(text)) == ["patch.toml: dose 1 kind: got 3; expected text in quotes"]


def test_check_on_the_command_line_shows_every_problem_of_a_layer(tmp_path, capsys):
    from barrierflow.cli import main

    path = tmp_path / "cell.toml"
    path.write_text(edit('thickness = "15 um"\n  diffusivity = "1e-9 cm^2/s"',
                         'thickness = "-15 um"\n  diffusivity = "1e-9 cm"'), encoding="utf-8")
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert "layer 1 thickness: got -15 um; must be > 0" in err
    assert "layer 1 diffusivity: got 1e-9 cm; wrong kind of unit" in err
    assert "2 problems; the scenario was refused" in err


# ----------------------------------------------------------------------------- files that are not scenarios
def test_values_nested_thousands_deep_are_refused():
    # issue 10: 5,000 nested arrays made the TOML parser exceed Python's recursion limit
    err = refusal(BASE + "\n[output]\ntime = " + "[" * 5000 + "]" * 5000 + "\n")
    assert lines(err) == ["patch.toml: TOML syntax: got arrays or inline tables nested hundreds of levels deep; "
                          "a scenario file (its values are nested a few levels at most)"]
    err = refusal(BASE.replace('name = "test cell"', 'name = ' + "[" * 40 + "]" * 40))
    assert lines(err) == ["patch.toml: scenario name: got values nested more than 16 levels deep; "
                          "a scenario value is a number, a text or a short list of them"]


def test_a_utf8_byte_order_mark_is_ignored_and_utf16_is_refused(tmp_path):
    path = tmp_path / "bom.toml"
    path.write_bytes(b"\xef\xbb\xbf" + BASE.encode())
    assert barrierflow.load(path) == barrierflow.loads(BASE)
    path.write_bytes(BASE.encode("utf-16"))
    assert lines(refusal_from_file(path)) == [
        "bom.toml: file: got a byte that is not UTF-8 at position 0; a scenario file is UTF-8 text "
        "(it is UTF-16 text; save it as UTF-8)"]


def test_long_values_are_shown_by_their_start():
    err = refusal(edit('volume = "5 L"', 'volume = "' + "5" * 600 + ' kg"'))
    (line,) = lines(err)
    assert line.startswith("patch.toml: compartment 'body' volume: got 5555") and "... (603 characters)" in line
    assert len(line) < 400


def test_a_fault_of_the_reader_is_still_a_refusal(monkeypatch):
    # the last line of defence: an exception the reader did not mean to raise becomes a
    # ScenarioError that says it is the reader's fault (the fuzzing tests make sure none occurs)
    import barrierflow.io.scenario_files as files

    def broken(doc, file=None):
        raise TypeError("injected")

    monkeypatch.setattr(files, "from_document", broken)
    err = refusal(BASE)
    assert files.READER_FAULT in str(err) and "TypeError: injected" in str(err)


def test_a_regimen_of_too_many_events_is_refused_before_it_is_listed():
    text = edit('at = "12 h"', 'at = "12 h"\nevery = "1e-9 h"')
    assert lines(refusal(text)) == [
        "patch.toml: dose: got 1.2e+10 dosing events in the run; at most 1,000,000 (a longer 'every' or a "
        "'count' keeps the regimen in bounds)"]
    text = edit('at = "12 h"', 'at = "12 h"\nevery = "1e-300 h"\ncount = 3')
    barrierflow.loads(text)  # three events: fine
