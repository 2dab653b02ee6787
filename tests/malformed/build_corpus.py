"""Write the corpus of malformed scenario files (run it after changing the list below).

    .venv/bin/python tests/malformed/build_corpus.py

Each case is a small valid scenario (BASE, invented numbers) broken one way, or a file that is
not a scenario at all. The files go to tests/malformed/files/, and index.toml beside this script
records, per file, the field path the refusal must name (``field``) and, where it matters, words
the message must hold (``says``). tests/test_malformed_corpus.py runs every file through
``barrierflow check`` and ``barrierflow run``.
"""

from __future__ import annotations

import json
import random
import shutil
from collections.abc import Callable
from pathlib import Path

HERE = Path(__file__).resolve().parent
FILES = HERE / "files"

BASE = '''# A small valid scenario (invented numbers) that each corpus file breaks one way.
[scenario]
name = "corpus base (invented)"
duration = "24 h"
output_step = "1 h"

[substance]
name = "compound Z (invented)"

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

[[compartment]]
id = "depot"
volume = "2 mL"

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

[[transfer]]
id = "uptake"
from = "depot"
to = "body"
rate = "0.5 1/h"

[[dose]]
target = "donor"
kind = "bolus"
amount = "1 mg"
at = "12 h"

[[dose]]
target = "depot"
kind = "infusion"
rate = "0.2 mg/h"
duration = "2 h"
at = "1 h"

[output]
concentration = "mg/L"
'''

L1 = "barrier 'skin' layer 1"
L2 = "barrier 'skin' layer 2"
BODY = "compartment 'body'"
D1, D2 = "dose 1", "dose 2"


def swap(old: str, new: str, count: int = 1) -> Callable[[str], str]:
    """An edit of BASE: ``old`` (which must occur) replaced by ``new``."""
    def apply(text: str) -> str:
        assert old in text, old
        return text.replace(old, new, count)
    return apply


def chain(*edits: Callable[[str], str]) -> Callable[[str], str]:
    def apply(text: str) -> str:
        for e in edits:
            text = e(text)
        return text
    return apply


def layer1(key: str, value: str) -> Callable[[str], str]:
    """Set (or add) a key of the first layer of 'skin'."""
    olds = {"thickness": 'thickness = "15 um"', "diffusivity": 'diffusivity = "1e-9 cm^2/s"',
            "partition": "partition = 10"}
    if key in olds:
        return swap(olds[key], f"{key} = {value}")
    return swap("partition = 10", f"partition = 10\n  {key} = {value}")


THICK = 'thickness = "15 um"'
AMOUNT = 'amount = "1 mg"'

# name: (edit of BASE, or bytes of the whole file), field the message names, words it says
CASES: dict[str, tuple[Callable[[str], str] | bytes, str, str]] = {
    # --- unit strings: data, never a calculation (issue 10)
    "thickness-power-tower": (layer1("thickness", '"9**9**9 um"'), f"{L1} thickness", "a calculation is not read"),
    "thickness-unit-without-number": (layer1("thickness", '"um"'), f"{L1} thickness", "the number is missing"),
    "thickness-negative": (layer1("thickness", '"-15 um"'), f"{L1} thickness", "must be > 0"),
    "thickness-zero": (layer1("thickness", '"0 um"'), f"{L1} thickness", "must be > 0"),
    "thickness-bare-number": (layer1("thickness", "15"), f"{L1} thickness", "a bare number is not accepted"),
    "thickness-wrong-kind": (layer1("thickness", '"15 kg"'), f"{L1} thickness", "wrong kind of unit"),
    "thickness-unknown-unit": (layer1("thickness", '"15 blorbs"'), f"{L1} thickness", "unknown unit 'blorbs'"),
    "thickness-overflow": (layer1("thickness", '"1e999 um"'), f"{L1} thickness", "must be a finite number"),
    "thickness-nan": (layer1("thickness", '"nan um"'), f"{L1} thickness", "must be a finite number"),
    "thickness-inf": (layer1("thickness", '"inf um"'), f"{L1} thickness", "must be a finite number"),
    "thickness-empty-text": (layer1("thickness", '""'), f"{L1} thickness", "nothing is written"),
    "thickness-power-of-power": (layer1("thickness", '"15 um^9^9"'), f"{L1} thickness", "a power of a power"),
    "thickness-area-unit": (layer1("thickness", '"15 um**2"'), f"{L1} thickness", "wrong kind of unit"),
    "thickness-number-in-unit": (layer1("thickness", '"2 100 um"'), f"{L1} thickness", "a number inside the unit"),
    "thickness-decimal-comma": (layer1("thickness", '"1,5 um"'), f"{L1} thickness", "unexpected ','"),
    "thickness-list": (layer1("thickness", '["15 um"]'), f"{L1} thickness", "expected a length"),
    "thickness-boolean": (layer1("thickness", "true"), f"{L1} thickness", "expected a length"),
    "thickness-inline-table": (layer1("thickness", '{ value = 15, unit = "um" }'), f"{L1} thickness",
                               "expected a length"),
    "thickness-date": (layer1("thickness", "1979-05-27"), f"{L1} thickness", "expected a length"),
    "thickness-huge-exponent-unit": (layer1("thickness", '"15 um^99"'), f"{L1} thickness",
                                     "a power must be a whole number from -12 to 12"),
    "thickness-long-text": (layer1("thickness", '"' + "5" * 900 + ' um"'), f"{L1} thickness",
                            "(903 characters)"),
    "thickness-unclosed-parenthesis": (layer1("thickness", '"15 (um"'), f"{L1} thickness",
                                       "a parenthesis is not closed"),
    "thickness-too-long": (layer1("thickness", '"1 ' + "um*" * 400 + 'um"'), f"{L1} thickness", "too long"),
    "diffusivity-velocity": (layer1("diffusivity", '"1e-9 cm/s"'), f"{L1} diffusivity", "wrong kind of unit"),
    "diffusivity-no-unit": (layer1("diffusivity", '"1e-9"'), f"{L1} diffusivity", "the unit is missing"),
    "diffusivity-negative": (layer1("diffusivity", '"-1e-9 cm^2/s"'), f"{L1} diffusivity", "must be > 0"),
    "diffusivity-beyond-float": (layer1("diffusivity", '"1e308 km^2/s"'), f"{L1} diffusivity", "is too large"),
    "partition-quoted": (layer1("partition", '"10"'), f"{L1} partition", "expected a bare number"),
    "partition-negative": (layer1("partition", "-1"), f"{L1} partition", "must be > 0"),
    "partition-zero": (layer1("partition", "0"), f"{L1} partition", "must be > 0"),
    "partition-nan": (layer1("partition", "nan"), f"{L1} partition", "must be a finite number"),
    "partition-inf": (layer1("partition", "inf"), f"{L1} partition", "must be a finite number"),
    "partition-whole-number-beyond-float": (layer1("partition", "1" + "0" * 400), f"{L1} partition",
                                            "must be a finite number"),
    "partition-with-unit": (layer1("partition", '"10 mL"'), f"{L1} partition", "expected a bare number"),
    "cells-zero": (layer1("cells", "0"), f"{L1} cells", "must be a whole number >= 1"),
    "cells-negative": (layer1("cells", "-3"), f"{L1} cells", "must be a whole number >= 1"),
    "cells-too-many": (layer1("cells", "200000"), f"{L1} cells", "a grid too large for memory"),
    "cells-fraction": (layer1("cells", "1.5"), f"{L1} cells", "expected a whole number"),
    "cells-quoted": (layer1("cells", '"40"'), f"{L1} cells", "expected a whole number"),
    "cells-astronomical": (layer1("cells", "9" * 30), f"{L1} cells", "a grid too large for memory"),
    "degradation-negative": (layer1("degradation_rate", '"-1 1/h"'), f"{L1} degradation_rate", "must be >= 0"),
    "degradation-wrong-kind": (layer1("degradation_rate", '"1 h"'), f"{L1} degradation_rate", "wrong kind of unit"),
    "layer-unknown-key": (swap(THICK, 'thicknes = "15 um"'), f"{L1} thicknes", "did you mean 'thickness'"),
    "layer-every-field-wrong": (chain(layer1("thickness", '"-15 um"'), layer1("diffusivity", '"1e-9 cm"'),
                                      layer1("partition", "-10")), f"{L1} diffusivity", "3 problems"),
    "layer-missing-both-required": (swap('  thickness = "100 um"\n  diffusivity = "1e-6 cm^2/s"\n', ""),
                                    f"{L2} thickness", "this key is required"),
    "layer-not-a-table": (lambda t: t.split("  [[barrier.layer]]")[0] + 'layer = "outer"\n\n[[exchange]]'
                          + t.split("[[exchange]]")[1], "barrier 'skin' layer", "expected a list of layer tables"),
    # --- barriers
    "barrier-without-layers": (lambda t: t.split("  [[barrier.layer]]")[0] + "[[exchange]]"
                               + t.split("[[exchange]]")[1], "barrier 'skin' layer", "at least one [[barrier.layer]]"),
    "barrier-area-zero": (swap('area = "1 cm^2"', 'area = "0 cm^2"'), "barrier 'skin' area", "must be > 0"),
    "barrier-area-length": (swap('area = "1 cm^2"', 'area = "10 cm"'), "barrier 'skin' area", "wrong kind of unit"),
    "barrier-area-missing": (swap('area = "1 cm^2"\n', ""), "barrier 'skin' area", "this key is required"),
    "barrier-from-unknown": (swap('from = "donor"', 'from = "doner"'), "barrier 'skin' from", "names no compartment"),
    "barrier-to-unknown": (swap('to = "receptor"\narea', 'to = "blood"\narea'), "barrier 'skin' to",
                           "names no compartment"),
    "barrier-loop": (swap('to = "receptor"\narea', 'to = "donor"\narea'), "barrier 'skin' to",
                     "two different compartments"),
    "barrier-model-unknown": (swap('area = "1 cm^2"', 'area = "1 cm^2"\nmodel = "fast"'), "barrier 'skin' model",
                              "must be 'resolved' or 'steady'"),
    "barrier-id-digit-first": (swap('id = "skin"', 'id = "2skin"'), "barrier '2skin' id", "an id starts with a letter"),
    "barrier-id-missing": (swap('id = "skin"\n', ""), "barrier 1 id", "this key is required"),
    "barrier-id-taken": (swap('id = "skin"', 'id = "donor"'), "barrier 'donor' id", "ids must be unique"),
    "barrier-single-table": (lambda t: t.replace("[[barrier]]", "[barrier]").replace("[[barrier.layer]]",
                                                                                     "[[barrier.layer]]"),
                             "barrier", "write [[barrier]]"),
    # --- compartments
    "volume-negative": (swap('volume = "5 L"', 'volume = "-5 L"'), f"{BODY} volume", "must be > 0"),
    "volume-missing": (swap('volume = "5 L"\n', ""), f"{BODY} volume", "required unless the compartment is held"),
    "volume-flow-unit": (swap('volume = "5 L"', 'volume = "5 mL/h"'), f"{BODY} volume", "wrong kind of unit"),
    "clearance-negative": (swap('clearance = "10 L/h"', 'clearance = "-1 L/h"'), f"{BODY} clearance", "must be >= 0"),
    "clearance-volume-unit": (swap('clearance = "10 L/h"', 'clearance = "10 L"'), f"{BODY} clearance",
                              "wrong kind of unit"),
    "vmax-without-km": (swap('clearance = "10 L/h"', 'vmax = "2 mg/h"'), f"{BODY} vmax", "vmax needs km"),
    "km-without-vmax": (swap('clearance = "10 L/h"', 'km = "0.1 mg/L"'), f"{BODY} km", "km needs vmax"),
    "km-zero": (swap('clearance = "10 L/h"', 'vmax = "2 mg/h"\nkm = "0 mg/L"'), f"{BODY} km", "must be > 0"),
    "held-and-cleared": (swap('volume = "5 L"', 'held_concentration = "0 mg/mL"'), f"{BODY} clearance",
                         "a held compartment does not change"),
    "molar-unit-without-molar-mass": (swap('initial_concentration = "10 mg/mL"', 'initial_concentration = "1 mmol/L"'),
                                      "compartment 'donor' initial_concentration", "needs the substance's molar_mass"),
    "initial-concentration-negative": (swap('initial_concentration = "10 mg/mL"', 'initial_concentration = "-1 mg/mL"'),
                                       "compartment 'donor' initial_concentration", "must be >= 0"),
    "held-concentration-negative": (swap('volume = "2 mL"', 'volume = "2 mL"\nheld_concentration = "-1 mg/mL"'),
                                    "compartment 'depot' held_concentration", "must be >= 0"),
    "compartment-id-with-space": (swap('id = "body"', 'id = "the body"'), "compartment 'the body' id",
                                  "an id starts with a letter"),
    "compartment-id-number": (swap('id = "body"', "id = 5"), "compartment 3 id", "expected text in quotes"),
    "compartment-id-duplicate": (swap('id = "body"', 'id = "receptor"'), "compartment 'receptor' id",
                                 "ids must be unique"),
    "compartment-unknown-key": (swap('clearance = "10 L/h"', 'clearence = "10 L/h"'), f"{BODY} clearence",
                                "did you mean 'clearance'"),
    "compartment-partition-text": (swap('clearance = "10 L/h"', 'clearance = "10 L/h"\npartition = "x"'),
                                   f"{BODY} partition", "expected a bare number"),
    "no-compartments": (lambda t: t[:t.index("[[compartment]]")] + "[[exchange]]" + t.split("[[exchange]]")[1],
                        "compartment", "at least one [[compartment]]"),
    "compartment-not-a-table": (lambda t: t.replace("[scenario]", 'compartment = "donor"\n[scenario]').replace(
        "[[compartment]]", "[[compartmentx]]"), "compartment", "expected [[compartment]] tables"),
    # --- exchanges and transfers
    "exchange-flow-zero": (swap('flow = "1 L/h"', 'flow = "0 L/h"'), "exchange 'flow' flow", "must be > 0"),
    "exchange-flow-missing": (swap('flow = "1 L/h"\n', ""), "exchange 'flow' flow", "this key is required"),
    "exchange-to-unknown": (swap('to = "body"\nflow', 'to = "bodyy"\nflow'), "exchange 'flow' to",
                            "names no compartment"),
    "exchange-id-not-text": (swap('id = "flow"', "id = 5"), "exchange 1 id", "expected text in quotes"),
    "transfer-rate-time": (swap('rate = "0.5 1/h"', 'rate = "0.5 h"'), "transfer 'uptake' rate", "wrong kind of unit"),
    "transfer-rate-negative": (swap('rate = "0.5 1/h"', 'rate = "-0.5 1/h"'), "transfer 'uptake' rate",
                               "must be > 0"),
    "transfer-from-held-without-volume": (chain(swap('volume = "2 mL"', 'held_concentration = "1 mg/mL"'),
                                                swap('target = "depot"', 'target = "body"')),
                                          "transfer 'uptake' from", "which needs a volume"),
    "transfer-id-taken": (swap('id = "uptake"', 'id = "skin"'), "transfer 'skin' id", "ids must be unique"),
    # --- doses
    "dose-target-unknown": (swap('target = "donor"', 'target = "patch"'), f"{D1} target", "names no compartment"),
    "dose-kind-unknown": (swap('kind = "bolus"', 'kind = "pill"'), f"{D1} kind", "must be one of"),
    "dose-kind-missing": (swap('kind = "bolus"\n', ""), f"{D1} kind", "this key is required"),
    "bolus-without-amount": (swap(AMOUNT + "\n", ""), f"{D1} amount", "a bolus dose needs amount"),
    "bolus-amount-negative": (swap(AMOUNT, 'amount = "-1 mg"'), f"{D1} amount", "must be > 0"),
    "bolus-amount-concentration": (swap(AMOUNT, 'amount = "1 mg/mL"'), f"{D1} amount", "wrong kind of unit"),
    "infusion-without-duration": (swap('duration = "2 h"\n', ""), f"{D2} duration", "an infusion dose needs duration"),
    "infusion-with-amount": (swap('rate = "0.2 mg/h"', 'rate = "0.2 mg/h"\namount = "1 mg"'), f"{D2} amount",
                             "does not use amount"),
    "hold-longer-than-its-interval": (swap('kind = "infusion"\nrate = "0.2 mg/h"', 'kind = "hold"\n'
                                           'concentration = "1 mg/mL"\nevery = "1 h"'), f"{D2} duration",
                                      "must end before the next one starts"),
    "dose-at-negative": (swap('at = "12 h"', 'at = "-1 h"'), f"{D1} at", "must be >= 0"),
    "dose-after-the-run": (swap('at = "12 h"', 'at = "2 d"'), f"{D1} at", "must be within the run"),
    "dose-every-zero": (swap('at = "12 h"', 'at = "12 h"\nevery = "0 h"'), f"{D1} every", "must be > 0"),
    "dose-count-zero": (swap('at = "12 h"', 'at = "12 h"\ncount = 0'), f"{D1} count", "must be a whole number >= 1"),
    "dose-count-without-every": (swap('at = "12 h"', 'at = "12 h"\ncount = 3'), f"{D1} count", "needs 'every'"),
    "dose-count-quoted": (swap('at = "12 h"', 'at = "12 h"\ncount = "3"'), f"{D1} count", "expected a whole number"),
    "dose-events-beyond-bounds": (swap('at = "12 h"', 'at = "12 h"\nevery = "1e-9 h"'), "dose",
                                  "at most 1,000,000"),
    "dose-events-astronomical": (swap('at = "12 h"', 'at = "0 h"\nevery = "1e-300 h"\ncount = ' + "9" * 40), "dose",
                                 "at most 1,000,000"),
    "dose-on-held-compartment": (swap('initial_concentration = "10 mg/mL"', 'held_concentration = "10 mg/mL"'),
                                 f"{D1} target", "a held compartment never changes"),
    "dose-during-a-hold": (swap('[output]', '[[dose]]\ntarget = "donor"\nkind = "hold"\nconcentration = "1 mg/mL"\n'
                                'duration = "20 h"\nat = "0 h"\n\n[output]'), f"{D1} at", "is held by dose 3"),
    "dose-single-table": (lambda t: t.replace("[[dose]]", "[dose]", 1).replace(
        '\n[[dose]]\ntarget = "depot"', '\n[[dosex]]\ntarget = "depot"'), "dose", "write [[dose]]"),
    # --- the [scenario] table
    "duration-missing": (swap('duration = "24 h"\n', ""), "scenario duration", "this key is required"),
    "duration-zero": (swap('duration = "24 h"', 'duration = "0 h"'), "scenario duration", "must be a time > 0"),
    "duration-mass": (swap('duration = "24 h"', 'duration = "7 kg"'), "scenario duration", "wrong kind of unit"),
    "duration-bare": (swap('duration = "24 h"', "duration = 7"), "scenario duration", "a bare number"),
    "duration-power-tower": (swap('duration = "24 h"', 'duration = "9**9**9 h"'), "scenario duration",
                             "a calculation is not read"),
    "scenario-table-missing": (swap("[scenario]\n", "[scenariox]\n"), "[scenario]", "a [scenario] table"),
    "output-step-zero": (swap('output_step = "1 h"', 'output_step = "0 h"'), "scenario output_step",
                         "must be a time > 0"),
    "output-step-too-fine": (swap('output_step = "1 h"', 'output_step = "1e-9 s"'), "scenario output_step",
                             "more than 10 million output rows"),
    "output-step-and-times": (swap('output_step = "1 h"', 'output_step = "1 h"\noutput_times = ["0 h", "1 h"]'),
                              "scenario output_times", "give one of them"),
    "output-times-decreasing": (swap('output_step = "1 h"', 'output_times = ["0 h", "2 h", "1 h"]'),
                                "scenario output_times[2]", "times must increase"),
    "output-times-beyond-the-run": (swap('output_step = "1 h"', 'output_times = ["0 h", "30 h"]'),
                                    "scenario output_times[1]", "must lie between 0 h and the duration"),
    "output-times-empty": (swap('output_step = "1 h"', "output_times = []"), "scenario output_times",
                           "give at least one time"),
    "output-times-not-a-list": (swap('output_step = "1 h"', 'output_times = "1 h"'), "scenario output_times",
                                "expected a list of times"),
    "output-times-bare-number": (swap('output_step = "1 h"', 'output_times = ["1 h", 2]'),
                                 "scenario output_times[1]", "a bare number"),
    "scenario-unknown-key": (swap('output_step = "1 h"', 'output_stepp = "1 h"'), "scenario output_stepp",
                             "did you mean 'output_step'"),
    "scenario-name-number": (swap('name = "corpus base (invented)"', "name = 5"), "scenario name",
                             "expected text in quotes"),
    # --- [substance] and [output]
    "molar-mass-negative": (swap('name = "compound Z (invented)"', 'molar_mass = "-1 g/mol"'),
                            "substance molar_mass", "must be > 0"),
    "molar-mass-mass": (swap('name = "compound Z (invented)"', 'molar_mass = "250 g"'), "substance molar_mass",
                        "wrong kind of unit"),
    "solubility-amount": (swap('name = "compound Z (invented)"', 'solubility = "2 mg"'), "substance solubility",
                          "wrong kind of unit"),
    "log-kow-quoted": (swap('name = "compound Z (invented)"', 'log_kow = "1.8"'), "substance log_kow",
                       "expected a bare number"),
    "substance-not-a-table": (lambda t: t.replace('[substance]\nname = "compound Z (invented)"\n', "").replace(
        "[scenario]", 'substance = "Z"\n[scenario]'), "substance", "expected a [substance] table"),
    "output-concentration-mass": (swap('concentration = "mg/L"\n', 'concentration = "mg"\n'),
                                  "output concentration", "wrong kind of unit"),
    "output-amount-with-number": (swap('concentration = "mg/L"\n', 'amount = "2 mg"\n'), "output amount",
                                  "a unit without a number"),
    "output-time-power-tower": (swap('concentration = "mg/L"\n', 'time = "h**9**9"\n'), "output time",
                                "cannot read this unit"),
    "output-unknown-key": (swap('concentration = "mg/L"\n', 'concentrations = "mg/L"\n'), "output concentrations",
                           "did you mean 'concentration'"),
    "output-area-length": (swap('concentration = "mg/L"\n', 'area = "cm"\n'), "output area", "wrong kind of unit"),
    "unknown-table": (swap("[[exchange]]", "[[exchanges]]"), "[exchanges]", "did you mean 'exchange'"),
    # --- files that are not scenarios
    "empty-file": (b"", "[scenario]", "a [scenario] table"),
    "comments-only": (b"# nothing here but a comment\n\n   \n", "[scenario]", "a [scenario] table"),
    "binary-garbage": (random.Random(10).randbytes(2048), "file", "not UTF-8"),
    "utf16-with-bom": (BASE.encode("utf-16"), "file", "it is UTF-16 text"),
    "bom-in-the-middle": (BASE.replace("[[exchange]]", "\ufeff[[exchange]]").encode(), "TOML syntax",
                          "valid TOML document"),
    "nul-byte": (BASE.replace('name = "outer"', 'name = "out\x00er"').encode(), "TOML syntax",
                 "valid TOML document"),
    "unclosed-string": (swap('volume = "5 L"', 'volume = "5 L'), "TOML syntax", "valid TOML document"),
    "duplicate-key": (swap('volume = "5 L"', 'volume = "5 L"\nvolume = "6 L"'), "TOML syntax",
                      "valid TOML document"),
    "array-nested-5000-deep": (swap('[output]', 'x = ' + "[" * 5000 + "]" * 5000 + '\n[output]'), "TOML syntax",
                               "nested hundreds of levels deep"),
    "inline-table-nested-5000-deep": (swap('[output]', 'x = ' + "{a=" * 5000 + "1" + "}" * 5000 + '\n[output]'),
                                      "TOML syntax", "nested hundreds of levels deep"),
    "array-nested-40-deep": (swap('name = "corpus base (invented)"', "name = " + "[" * 40 + "]" * 40),
                             "scenario name", "nested more than 16 levels deep"),
    "json-instead-of-toml": (json.dumps({"scenario": {"duration": "24 h"}}).encode(), "TOML syntax",
                             "valid TOML document"),
    "key-with-line-break": (swap('clearance = "10 L/h"', 'clearance = "10 L/h"\n"clear\\nance" = "1 L/h"'),
                            f"{BODY} clear\\nance", "an unknown key"),
    "value-with-line-break": (layer1("thickness", '"15\\num"'), f"{L1} thickness", "15\\num"),
}


# cases whose refusal must name more fields than the first (every problem of a layer at once)
ALSO = {"layer-every-field-wrong": [f"{L1} thickness", f"{L1} partition"],
        "layer-missing-both-required": [f"{L2} diffusivity"]}


def build() -> dict[str, dict[str, str]]:
    """Write every case and return the index."""
    if FILES.exists():
        shutil.rmtree(FILES)
    FILES.mkdir()
    index = {}
    for n, (name, (edit, field, says)) in enumerate(CASES.items(), start=1):
        file = f"{n:03d}-{name}.toml"
        raw = edit if isinstance(edit, bytes) else edit(BASE).encode("utf-8")
        (FILES / file).write_bytes(raw)
        index[file] = {"field": field, "says": says, "also": ALSO.get(name, [])}
    lines = ["# The malformed scenario files and what each refusal must name (written by build_corpus.py).", ""]
    for file, entry in index.items():
        lines += [f'["{file}"]', f"field = {json.dumps(entry['field'], ensure_ascii=False)}",
                  f"says = {json.dumps(entry['says'], ensure_ascii=False)}"]
        if entry["also"]:
            lines.append(f"also = {json.dumps(entry['also'], ensure_ascii=False)}")
        lines.append("")
    (HERE / "index.toml").write_text("\n".join(lines), encoding="utf-8")
    return index


if __name__ == "__main__":
    print(f"wrote {len(build())} files to {FILES}")
