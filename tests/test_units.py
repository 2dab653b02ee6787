"""Unit parsing and conversion, checked against the published definitions of the units.

Sources named beside each check:

- NIST SP 811: A. Thompson and B. N. Taylor, *Guide for the Use of the International System of
  Units (SI)*, NIST Special Publication 811, 2008 edition. Table 5 (SI prefixes), Table 6
  (units accepted for use with the SI: minute, hour, day, litre) and Appendix B.8 (conversion
  factors, listed alphabetically). Factors printed there with seven digits are compared with a
  relative tolerance of 1e-6; exact ones with 1e-12.
- IUPAC Green Book: E. R. Cohen et al., *Quantities, Units and Symbols in Physical Chemistry*,
  3rd edition, 2007, section 2.10: molar mass M = m / n, so c_mass = c_amount * M.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import pytest

from barrierflow import UnitsError
from barrierflow.units import (
    INTERNAL_UNITS,
    KINDS,
    convert,
    format_quantity,
    parse_quantity,
    registry,
    unit_factor,
)

EXACT = 1e-12
SEVEN_DIGITS = 1e-6

# (text, kind, value in the internal unit, relative tolerance, source)
DEFINITIONS = [
    # NIST SP 811 Appendix B.8: inch = 2.54 E-02 m (exact)  ->  2.54 cm
    ("1 in", "length", 2.54, EXACT, "SP 811 B.8 inch"),
    # NIST SP 811 Table 5: micro = 1e-6, so 1 um = 1e-4 cm; 15 um = 0.0015 cm
    ("15 um", "length", 0.0015, EXACT, "SP 811 Table 5 micro"),
    ("1 nm", "length", 1e-7, EXACT, "SP 811 Table 5 nano"),
    # NIST SP 811 Appendix B.8: square foot = 9.290 304 E-02 m^2 (exact)  ->  929.0304 cm^2
    ("1 ft^2", "area", 929.0304, EXACT, "SP 811 B.8 square foot"),
    ("1 mm^2", "area", 0.01, EXACT, "SP 811 Table 5 milli"),
    # NIST SP 811 Table 6: litre L = 1 dm^3 = 1e-3 m^3  ->  1000 mL
    ("1 L", "volume", 1000.0, EXACT, "SP 811 Table 6 litre"),
    ("10 uL", "volume", 0.01, EXACT, "SP 811 Table 6 litre, Table 5 micro"),
    ("1 cm^3", "volume", 1.0, EXACT, "SP 811 Table 6 litre (1 mL = 1 cm^3)"),
    # NIST SP 811 Appendix B.8: gallon [U.S.] = 3.785 412 E-03 m^3
    ("1 gal", "volume", 3785.412, SEVEN_DIGITS, "SP 811 B.8 gallon [U.S.]"),
    # NIST SP 811 Table 6: min = 60 s, h = 3600 s, d = 86 400 s
    ("1 d", "time", 24.0, EXACT, "SP 811 Table 6 day"),
    ("90 min", "time", 1.5, EXACT, "SP 811 Table 6 minute"),
    ("7200 s", "time", 2.0, EXACT, "SP 811 Table 6 hour"),
    # NIST SP 811 Appendix B.8: pound (avoirdupois) = 4.535 924 E-01 kg
    ("1 lb", "amount", 453592.4, SEVEN_DIGITS, "SP 811 B.8 pound (avoirdupois)"),
    # NIST SP 811 Appendix B.8: grain = 6.479 891 E-05 kg  ->  64.79891 mg
    ("1 grain", "amount", 64.79891, SEVEN_DIGITS, "SP 811 B.8 grain"),
    ("500 ug", "amount", 0.5, EXACT, "SP 811 Table 5 micro"),
    # NIST SP 811 Appendix B.8: square foot per hour = 2.580 64 E-05 m^2/s
    #   -> 2.58064e-5 m^2/s * 1e4 cm^2/m^2 * 3600 s/h = 929.0304 cm^2/h
    ("1 ft^2/h", "diffusivity", 2.58064e-5 * 1e4 * 3600, SEVEN_DIGITS, "SP 811 B.8 square foot per hour"),
    # SP 811 Table 6 hour: 1 cm^2/s = 3600 cm^2/h
    ("1e-9 cm^2/s", "diffusivity", 3.6e-6, EXACT, "SP 811 Table 6 hour"),
    ("1e-9 cm**2/s", "diffusivity", 3.6e-6, EXACT, "SP 811 Table 6 hour"),
    # NIST SP 811 Appendix B.8: pound per cubic foot = 1.601 846 E+01 kg/m^3 = 16.01846 mg/mL
    ("1 lb/ft^3", "concentration", 16.01846, SEVEN_DIGITS, "SP 811 B.8 pound per cubic foot"),
    # kg/m^3 = g/L = mg/mL (SP 811 Table 6 litre)
    ("20 mg/mL", "concentration", 20.0, EXACT, "definition"),
    ("1 ug/L", "concentration", 1e-6, EXACT, "SP 811 Table 5, Table 6"),
    ("1 kg/m^3", "concentration", 1.0, EXACT, "SP 811 Table 6 litre"),
    # NIST SP 811 Appendix B.8: gallon [U.S.] per minute = 6.309 020 E-05 m^3/s
    #   -> 6.30902e-5 m^3/s * 1e6 mL/m^3 * 3600 s/h
    ("1 gal/min", "flow", 6.309020e-5 * 1e6 * 3600, SEVEN_DIGITS, "SP 811 B.8 gallon [U.S.] per minute"),
    # NIST SP 811 Appendix B.8: cubic foot per minute = 4.719 474 E-04 m^3/s
    ("1 ft^3/min", "flow", 4.719474e-4 * 1e6 * 3600, SEVEN_DIGITS, "SP 811 B.8 cubic foot per minute"),
    ("10 L/h", "flow", 10000.0, EXACT, "SP 811 Table 6 litre"),
    ("1 mL/min", "flow", 60.0, EXACT, "SP 811 Table 6 minute"),
    ("0.01 1/min", "rate", 0.6, EXACT, "SP 811 Table 6 minute"),
    ("1 min^-1", "rate", 60.0, EXACT, "SP 811 Table 6 minute"),
    ("2 mg/h", "amount_rate", 2.0, EXACT, "definition"),
    ("1 g/day", "amount_rate", 1000.0 / 24.0, EXACT, "SP 811 Table 6 day"),
    ("250 g/mol", "molar_mass", 250.0, EXACT, "g/mol = mg/mmol"),
]


@pytest.mark.parametrize(("text", "kind", "expected", "rtol", "source"), DEFINITIONS,
                         ids=[f"{d[0]} ({d[4]})" for d in DEFINITIONS])
def test_conversion_matches_the_definition(text, kind, expected, rtol, source):
    assert parse_quantity(text, kind) == pytest.approx(expected, rel=rtol, abs=0.0)


def test_micro_sign_and_greek_mu_read_as_u():
    # The scenario format accepts both spellings: "um" and "µm" (micro sign U+00B5); the Greek
    # small letter mu (U+03BC) looks the same and is accepted too.
    assert parse_quantity("15 \u00b5m", "length") == parse_quantity("15 um", "length") == 0.0015
    assert parse_quantity("15 \u03bcm", "length") == 0.0015
    assert parse_quantity("5 \u00b5L", "volume") == pytest.approx(0.005, rel=EXACT)


# IUPAC Green Book (2007) section 2.10: mass concentration = amount concentration * molar mass.
@pytest.mark.parametrize(("text", "kind", "molar_mass", "expected"), [
    ("1 mmol/L", "concentration", 250.0, 0.25),      # 1e-3 mol/L * 250 g/mol = 0.25 g/L
    ("2 umol/L", "concentration", 320.0, 6.4e-4),    # 2e-6 mol/L * 320 g/mol = 6.4e-4 g/L
    ("1 umol", "amount", 250.0, 0.25),               # 1e-6 mol * 250 g/mol = 0.25 mg
    ("1 umol/min", "amount_rate", 250.0, 15.0),      # 0.25 mg/min = 15 mg/h
])
def test_molar_units_use_the_molar_mass(text, kind, molar_mass, expected):
    assert parse_quantity(text, kind, molar_mass=molar_mass) == pytest.approx(expected, rel=EXACT)


def test_remembered_values_keep_kind_molar_mass_and_field_apart():
    # parse_quantity remembers what it read; a value read for one kind or molar mass must not
    # answer for another, and a refusal still names its own field (common practice for a memo)
    assert parse_quantity("2 mmol/L", "concentration", molar_mass=250.0) == pytest.approx(0.5, rel=EXACT)
    assert parse_quantity("2 mmol/L", "concentration", molar_mass=100.0) == pytest.approx(0.2, rel=EXACT)
    assert parse_quantity("3 mL", "volume") == 3.0
    assert parse_quantity("3 mL", "volume") == 3.0  # the remembered value
    with pytest.raises(UnitsError) as info:
        parse_quantity("3 mL", "length", field="layer 1 thickness")
    assert str(info.value).startswith("layer 1 thickness: got 3 mL; wrong kind of unit")
    with pytest.raises(UnitsError, match="molar_mass"):
        parse_quantity("2 mmol/L", "concentration", field="km")


def test_molar_unit_without_molar_mass_is_refused():
    with pytest.raises(UnitsError, match="molar_mass"):
        parse_quantity("1 mmol/L", "concentration", field="km")


def test_output_factors():
    # 1 mg/mL = 1000 mg/L (SP 811 Table 6 litre); 1 h = 60 min (Table 6)
    assert unit_factor("concentration", "mg/L") == pytest.approx(1000.0, rel=EXACT)
    assert convert(2.0, "time", "min") == pytest.approx(120.0, rel=EXACT)
    assert convert(1.0, "area", "mm^2") == pytest.approx(100.0, rel=EXACT)
    # 1 mg/mL of a 250 g/mol compound is 4 mmol/L (Green Book 2.10)
    assert convert(1.0, "concentration", "mmol/L", molar_mass=250.0) == pytest.approx(4.0, rel=EXACT)


def test_internal_units_are_the_documented_ones():
    assert INTERNAL_UNITS == {
        "length": "cm", "time": "h", "area": "cm^2", "volume": "mL", "diffusivity": "cm^2/h",
        "concentration": "mg/mL", "amount": "mg", "amount_rate": "mg/h", "flow": "mL/h",
        "rate": "1/h", "molar_mass": "mg/mmol", "amount_per_area": "mg/cm^2", "flux": "mg/(cm^2*h)",
        "volume_per_area": "mL/cm^2", "flow_per_area": "mL/(cm^2*h)",
    }
    # every internal unit parses back to 1 in itself
    for kind, unit in INTERNAL_UNITS.items():
        assert parse_quantity(f"1 {unit}", kind) == 1.0, kind


# ----------------------------------------------------------------------------- refusals
def test_bare_number_is_refused_with_the_expected_wording():
    with pytest.raises(UnitsError) as info:
        parse_quantity(5, "volume", field="volume")
    assert str(info.value) == ("volume: got 5; a bare number is not accepted here; "
                               "expected a volume with its unit, such as '5 mL'")


def test_number_in_a_string_without_unit_is_refused():
    with pytest.raises(UnitsError, match="the unit is missing; expected a length"):
        parse_quantity("15", "length")


def test_wrong_dimension_is_refused_with_the_expected_wording():
    with pytest.raises(UnitsError) as info:
        parse_quantity("5 kg", "volume", field="volume")
    assert str(info.value) == ("volume: got 5 kg; wrong kind of unit (kg); "
                               "expected a volume with its unit, such as '5 mL'")


@pytest.mark.parametrize("text, message", [("1" + "0" * 400 + " mg", "must be a finite number"),
                                           ("1e308 km", "is too large")])
def test_numbers_beyond_floating_point_are_refused(text, message):
    # IEEE 754 binary64 (the float of numpy and Python) ends near 1.8e308
    kind = "amount" if text.endswith("mg") else "length"
    with pytest.raises(UnitsError, match=message) as info:
        parse_quantity(text, kind, field="dose 1 amount")
    assert str(info.value).startswith("dose 1 amount: got ")


@pytest.mark.parametrize("text", ["nan cm", "inf cm", "-inf cm"])
def test_non_finite_number_is_refused(text):
    with pytest.raises(UnitsError, match="must be a finite number"):
        parse_quantity(text, "length")


@pytest.mark.parametrize("text", ["15 blorbs", "fifteen um", "15 um um um ("])
def test_unreadable_unit_is_refused(text):
    with pytest.raises(UnitsError, match="expected a length"):
        parse_quantity(text, "length")


@pytest.mark.parametrize("value", [True, None, [1, "cm"], {"cm": 1}])
def test_values_of_the_wrong_type_are_refused(value):
    with pytest.raises(UnitsError):
        parse_quantity(value, "length")


def test_unknown_kind_is_a_programming_error():
    with pytest.raises(KeyError):
        parse_quantity("1 cm", "speed")


# ----------------------------------------------------------------------------- writing back
@pytest.mark.parametrize(("value", "kind", "unit"), [
    (0.0015, "length", "um"), (0.01, "length", "um"), (0.1, "length", "um"),
    (3.6e-6, "diffusivity", "cm^2/s"), (3.6e-7, "diffusivity", "cm^2/s"), (7.2e-7, "diffusivity", "cm^2/s"),
    (10 / 60, "time", "h"), (168.0, "time", "h"), (1 / 12, "time", "h"),
    (15000.0, "volume", "mL"), (0.007, "volume", "mL"), (0.18, "flow", "mL/h"),
    (6.4e-4, "concentration", "mg/mL"), (1e-6, "concentration", "mg/mL"), (123.456789, "amount", "mg"),
])
def test_format_quantity_reads_back_to_the_same_float(value, kind, unit):
    text = format_quantity(value, kind, unit)
    assert parse_quantity(text, kind) == value, text


def test_format_quantity_prefers_readable_units():
    assert format_quantity(0.0015, "length", "um") == "15 um"
    assert format_quantity(parse_quantity("10 min", "time"), "time") == "10 min"
    assert format_quantity(parse_quantity("7 d", "time"), "time") == "168 h"  # the first unit wins unless much shorter
    assert format_quantity(15000.0, "volume", "mL") == "15 L"


def test_one_registry_in_the_package():
    # Habit 4 of the style guide: a single pint registry; nothing else creates one.
    import barrierflow

    root = Path(barrierflow.__file__).parent
    makers = [p.relative_to(root).as_posix() for p in root.rglob("*.py")
              if re.search(r"UnitRegistry\(", p.read_text(encoding="utf-8"))]
    assert makers == ["units.py"]
    assert all(math.isfinite(parse_quantity(f"1 {k.internal}", name)) for name, k in KINDS.items())
    assert registry.Quantity("1 cm").to("um").magnitude == pytest.approx(1e4)


# ----------------------------------------------------------------------------- the strict grammar
# A value is a number and a unit, never an expression: the grammar in barrierflow/units.py reads
# the number with float() and builds the unit from names looked up in the registry. Every form
# the scenario format and the README promise reads as before (the conversion factors are those of
# NIST SP 811, as in DEFINITIONS above).
PROMISED = [
    ("15 um", "length", 0.0015), ("15 \u00b5m", "length", 0.0015), ("15um", "length", 0.0015),
    ("0.1 mm", "length", 0.01), (".5 mm", "length", 0.05), ("5. mm", "length", 0.5),
    ("1e-9 cm^2/s", "diffusivity", 3.6e-6), ("1E-9 cm**2/s", "diffusivity", 3.6e-6),
    ("1e-9 cm^2 / s", "diffusivity", 3.6e-6), ("1e-9 cm\u00b2/s", "diffusivity", 3.6e-6),
    ("1e-9 cm^2 s^-1", "diffusivity", 3.6e-6), ("1e-9 cm^2*s^(-1)", "diffusivity", 3.6e-6),
    ("10 cm^2", "area", 10.0), ("5 L", "volume", 5000.0), ("10 L/h", "flow", 10000.0),
    ("2 mg", "amount", 2.0), ("20 mg/mL", "concentration", 20.0), ("24 h", "time", 24.0),
    ("7 d", "time", 168.0), ("0.8 1/h", "rate", 0.8), ("0.8/h", "rate", 0.8), ("0.8 per hour", "rate", 0.8),
    ("1 mg/(cm^2*h)*cm^2", "amount_rate", 1.0), ("2 mg/L*L/h", "amount_rate", 2.0),
    ("250 g/mol", "molar_mass", 250.0), ("+3 mL", "volume", 3.0), ("-0 um", "length", 0.0),
    ("1 mg\u00b7mL\u207b\u00b9", "concentration", 1.0), ("3 square centimeters", "area", 3.0),
    (" 15 um ", "length", 0.0015), ("15\u00a0um", "length", 0.0015),
]


@pytest.mark.parametrize(("text", "kind", "expected"), PROMISED, ids=[p[0] for p in PROMISED])
def test_every_promised_form_still_reads(text, kind, expected):
    assert parse_quantity(text, kind) == pytest.approx(expected, rel=EXACT, abs=0.0)


def test_molar_and_per_area_forms_read():
    # IUPAC Green Book (2007) 2.10 as above; 4 uL/(cm^2*h) is a volume per area and time (a
    # per-area rate of application): 4e-3 mL/(cm^2 h), read here as a pint unit
    from barrierflow.units import read_quantity

    assert parse_quantity("1 mmol/L", "concentration", molar_mass=250.0) == pytest.approx(0.25, rel=EXACT)
    number, unit = read_quantity("4 uL/(cm^2*h)")
    assert number == 4.0
    assert registry.Quantity(number, unit).to("mL/(cm^2*h)").magnitude == pytest.approx(4e-3, rel=EXACT)


REFUSED = [
    ("um", "the number is missing"),                      # issue 10: was read as 1 um
    ("cm^2/s", "the number is missing"),
    ("9**9**9 um", "a calculation is not read"),          # issue 10: hung the process
    ("9^9 um", "a calculation is not read"),
    ("2 um^9^9", "a power of a power"),
    ("2 um**2**3", "a power of a power"),
    ("2 um^99", "a power must be a whole number from -12 to 12"),
    ("2 um^0.5", "a power must be a whole number"),
    ("2 um^x", "a power must be a whole number"),
    ("2 100 um", "a number inside the unit"),
    ("2 um*3", "a number inside the unit"),
    ("1,5 um", "unexpected ','"),
    ("15 um um um (", "it ends too early"),
    ("15 (um", "a parenthesis is not closed"),
    ("15 um)", "unexpected ')'"),
    ("15 " + "(" * 9 + "um" + ")" * 9, "parentheses nested more than 8 deep"),
    ("15 " + "*".join(["um"] * 40), "more than 32 units"),
    ("15 blorbs", "unknown unit 'blorbs'"),
    ("15 __import__", "unknown unit '__import__'"),
    ("15 um; 3 mm", "unexpected ';'"),
    ("", "nothing is written"),
    ("   ", "nothing is written"),
    ("x" * 1001, "too long"),
    ("fifteen um", "the number is missing"),
    ("0x10 um", "unknown unit 'x10'"),
    ("1_000 um", "unknown unit '_000'"),
    ("1e um", "wrong kind of unit"),
]


@pytest.mark.parametrize(("text", "reason"), REFUSED, ids=[r[0][:30] for r in REFUSED])
def test_what_is_not_a_number_and_a_unit_is_refused_with_the_reason(text, reason):
    with pytest.raises(UnitsError) as info:
        parse_quantity(text, "length", field="barrier 'skin' layer 1 thickness")
    message = str(info.value)
    assert reason in message, message
    assert message.startswith("barrier 'skin' layer 1 thickness: got ")
    assert message.endswith("expected a length with its unit, such as '15 um'")


def test_a_power_tower_is_refused_at_once_in_a_new_process():
    # the text that made pint compute 9**(9**9) (a number of 370 million digits): a new process
    # must answer well within the limit (it takes a few tenths of a second to start)
    import subprocess
    import sys

    code = ("from barrierflow.units import parse_quantity\n"
            "try:\n    parse_quantity('9**9**9 um', 'length')\nexcept Exception as e:\n    print(type(e).__name__)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.stdout.strip() == "UnitsError", out.stderr


def test_unit_without_number_is_refused_for_output_units_too():
    with pytest.raises(UnitsError, match="a unit without a number is expected"):
        unit_factor("amount", "2 mg")
    with pytest.raises(UnitsError, match="a calculation is not read|cannot read this unit"):
        unit_factor("amount", "mg**9**9")
    assert unit_factor("rate", "1/min") == pytest.approx(1 / 60, rel=EXACT)
    assert unit_factor("concentration", "ug/L") == pytest.approx(1e6, rel=EXACT)


# ---------------------------------------------------------------- a unit text is read once
# A value whose unit text was read before is converted by multiplying its number with the kept
# factor. The reference is pint's own conversion of the whole text (the registry multiplies the
# magnitude by the factor between the two units, pint/facets/plain/registry.py ``_convert``):
# both must give the same float, to the last bit, for every kind of number a file holds.
KEPT_UNITS = {
    "length": ["um", "mm", "cm", "m", "nm", "µm", "in"],
    "time": ["h", "min", "d", "s", "week"],
    "volume": ["mL", "L", "uL", "cm^3", "cm**3"],
    "diffusivity": ["cm^2/s", "cm**2/h", "m^2/s", "um^2/min", "cm² per s"],
    "concentration": ["mg/mL", "ug/L", "g/L", "mg/L", "ng/mL"],
    "flow": ["L/h", "mL/min", "uL/(cm^2*h) * cm^2"],
    "amount": ["mg", "ug", "g", "ng"],
    "rate": ["1/h", "1/min", "/d"],
    "area": ["cm^2", "mm^2", "m²"],
}


def _numbers(seed: int, n: int):
    import random

    rng = random.Random(seed)
    for _ in range(n):
        x = rng.uniform(1, 10) * 10 ** rng.uniform(-30, 30)
        r = rng.random()
        # short texts (rounded to 15 digits on reading) and full-precision ones (kept as written)
        yield repr(x) if r < 0.3 else f"{x:.3g}" if r < 0.6 else f"{x:.15g}" if r < 0.8 else f"{x:.17g}"


@pytest.mark.parametrize("kind", sorted(KEPT_UNITS))
def test_a_kept_unit_gives_the_value_of_a_full_reading(kind):
    from barrierflow import units

    for unit in KEPT_UNITS[kind]:
        for number in _numbers(hash(unit) % 1000, 400):
            text = f"{number} {unit}"
            units.clear_caches()
            full = parse_quantity(text, kind)  # read through pint; the unit's factor is kept
            units._PARSED.clear()
            kept = parse_quantity(text, kind)  # the number times the kept factor
            assert kept == full and math.copysign(1.0, kept) == math.copysign(1.0, full), text


def test_a_kept_molar_unit_gives_the_value_of_a_full_reading():
    # IUPAC Green Book 2.10: c_mass = c_amount * M
    from barrierflow import units

    for text, kind in (("1.5 mmol/L", "concentration"), ("2.5 umol", "amount"), ("3 umol/min", "amount_rate")):
        units.clear_caches()
        full = parse_quantity(text, kind, molar_mass=250.0)
        units._PARSED.clear()
        assert parse_quantity(text, kind, molar_mass=250.0) == full
        # the same unit text with another molar mass is its own entry
        assert parse_quantity(text, kind, molar_mass=100.0) == pytest.approx(full * 100.0 / 250.0, rel=1e-15)


def test_a_unit_is_read_once_per_text_and_bad_values_still_name_their_field():
    from barrierflow import units

    units.clear_caches()
    parse_quantity("15 um", "length")
    assert len(units._UNIT_FACTORS) == 1
    parse_quantity("100 um", "length")
    parse_quantity("1000 um", "length")
    assert len(units._UNIT_FACTORS) == 1
    # a number that overflows, and a wrong kind for a kept unit text: the full reading's messages
    with pytest.raises(UnitsError, match="thickness"):
        parse_quantity("1e999 um", "length", "thickness")
    with pytest.raises(UnitsError, match="wrong kind of unit"):
        parse_quantity("15 um", "time", "duration")
