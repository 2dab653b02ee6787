"""The one units registry of barrierflow, and the internal unit system.

Every dimensional value a user writes is a string with its unit (``"15 um"``, ``"10 L/h"``).
It is parsed here, once, by a single :mod:`pint` registry and converted to the internal
system; everything past the model sees plain ``float`` values in these units:

================ ============ ==========================================
kind             internal     examples accepted
================ ============ ==========================================
length           cm           ``"15 um"``, ``"15 µm"``, ``"0.1 mm"``
time             h            ``"30 min"``, ``"7 d"``, ``"3600 s"``
area             cm^2         ``"10 cm^2"``, ``"1 mm^2"``
volume           mL           ``"5 L"``, ``"1 cm^3"``
diffusivity      cm^2/h       ``"1e-9 cm^2/s"``, ``"1e-6 cm**2/s"``
concentration    mg/mL        ``"20 mg/mL"``, ``"1 ug/L"``, ``"1 mmol/L"`` *
amount           mg           ``"2 mg"``, ``"500 ug"``, ``"1 umol"`` *
amount_rate      mg/h         ``"0.1 mg/h"``, ``"1 umol/min"`` *
flow             mL/h         ``"10 L/h"``, ``"1 mL/min"``
rate             1/h          ``"0.8 1/h"``, ``"0.01 1/min"``
molar_mass       mg/mmol      ``"250 g/mol"`` (numerically g/mol)
amount_per_area  mg/cm^2      ``"12 ug/cm^2"`` * (measured cumulative amounts permeated)
flux             mg/(cm^2*h)  ``"0.5 ug/(cm^2*h)"`` * (measured fluxes)
================ ============ ==========================================

\\* molar quantities need the substance's molar mass.

Some fields also accept a value *per area* of the one barrier the compartment touches (a
volume ``"10 uL/cm^2"``, an amount ``"50 ug/cm^2"``, an evaporation rate ``"4 uL/(cm^2*h)"``);
their kinds are ``volume_per_area`` (mL/cm^2), ``amount_per_area`` (mg/cm^2, molar too) and
``flow_per_area`` (mL/(cm^2*h)), listed in :data:`PER_AREA`.

The conversion factors are pint's definitions, which follow NIST SP 811 (Thompson & Taylor,
Guide for the Use of the International System of Units, 2008), Appendix B.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import cache, lru_cache
from typing import TYPE_CHECKING, Any

from .errors import UnitsError

if TYPE_CHECKING:
    import pint

__all__ = [
    "INTERNAL_UNITS",
    "KINDS",
    "PER_AREA",
    "convert",
    "format_quantity",
    "parse_quantity",
    "get_registry",
    "internal_per_unit",
    "unit_factor",
]


@cache
def get_registry() -> pint.UnitRegistry:
    """The single pint registry of the package, created on first use. Do not create another one.

    It is made lazily so that ``import barrierflow`` stays fast (pint takes a few tenths of a
    second to load its definitions); ``barrierflow.units.registry`` is the same object.
    """
    import pint

    try:  # pint keeps its parsed definitions in the user's cache folder: 0.2 s -> 0.03 s on later starts
        return pint.UnitRegistry(autoconvert_offset_to_baseunit=True, cache_folder=":auto:")
    except Exception:  # no writable cache folder: parse the definitions every time
        return pint.UnitRegistry(autoconvert_offset_to_baseunit=True)


def __getattr__(name: str) -> Any:
    if name == "registry":
        return get_registry()
    raise AttributeError(f"module 'barrierflow.units' has no attribute {name!r}")


@dataclass(frozen=True)
class _Kind:
    internal: str
    example: str
    description: str
    molar: str | None = None  # the unit whose dimension is the molar form, if any


KINDS: dict[str, _Kind] = {
    "length": _Kind("cm", "15 um", "a length"),
    "time": _Kind("h", "24 h", "a time"),
    "area": _Kind("cm^2", "10 cm^2", "an area"),
    "volume": _Kind("mL", "5 mL", "a volume"),
    "diffusivity": _Kind("cm^2/h", "1e-9 cm^2/s", "a diffusivity (area per time)"),
    "concentration": _Kind("mg/mL", "20 mg/mL", "a concentration (mass per volume)", "mmol/mL"),
    "amount": _Kind("mg", "2 mg", "an amount (mass)", "mmol"),
    "amount_rate": _Kind("mg/h", "0.1 mg/h", "an amount per time", "mmol/h"),
    "flow": _Kind("mL/h", "10 L/h", "a flow or clearance (volume per time)"),
    "rate": _Kind("1/h", "0.8 1/h", "a rate constant (per time)"),
    "molar_mass": _Kind("mg/mmol", "250 g/mol", "a molar mass (mass per amount of substance)"),
    # per-area forms of scenario fields (see PER_AREA); amounts per area and fluxes are also the
    # kinds of measured quantities (experiment data files, the traces CSV)
    "volume_per_area": _Kind("mL/cm^2", "10 uL/cm^2", "a volume per area"),
    "amount_per_area": _Kind("mg/cm^2", "12 ug/cm^2", "an amount per area", "mmol/cm^2"),
    "flow_per_area": _Kind("mL/(cm^2*h)", "4 uL/(cm^2*h)", "a volume per area and time"),
    "flux": _Kind("mg/(cm^2*h)", "0.5 ug/(cm^2*h)", "a flux (amount per area and time)", "mmol/(cm^2*h)"),
}

PER_AREA: dict[str, str] = {"volume": "volume_per_area", "amount": "amount_per_area", "flow": "flow_per_area"}
"""The per-area kind of each kind that has one (a field of that kind may be written per area)."""

INTERNAL_UNITS: dict[str, str] = {k: v.internal for k, v in KINDS.items()}
"""Internal unit of each kind of quantity."""

@cache
def _dims() -> tuple[dict[str, Any], dict[str, Any]]:
    """Dimensionality of each kind, and of its molar form where it has one."""
    reg = get_registry()
    plain = {k: reg.parse_units(v.internal).dimensionality for k, v in KINDS.items()}
    molar = {k: reg.parse_units(v.molar).dimensionality for k, v in KINDS.items() if v.molar}
    return plain, molar


def _expected(kind: str) -> str:
    k = KINDS[kind]
    return f"{k.description} with its unit, such as '{k.example}'"


def _quantity(text: object, kind: str, field: str) -> pint.Quantity:
    """Read ``text`` as a number and a unit (see :func:`read_quantity`) and make a pint quantity."""
    if kind not in KINDS:
        raise KeyError(f"unknown kind of quantity {kind!r}; known: {', '.join(KINDS)}")
    if isinstance(text, bool) or not isinstance(text, str):
        if isinstance(text, (int, float)):
            raise UnitsError(text, f"a bare number is not accepted here; expected {_expected(kind)}", field)
        raise UnitsError(text, f"expected {_expected(kind)}", field)
    try:
        number, unit = read_quantity(text)
    except _Unreadable as err:
        raise UnitsError(text, f"{err.reason}; expected {_expected(kind)}", field) from None
    if not math.isfinite(number):
        raise UnitsError(text, "must be a finite number with its unit", field)
    if unit.dimensionless:
        raise UnitsError(text, f"the unit is missing; expected {_expected(kind)}", field)
    try:
        return get_registry().Quantity(number, unit)
    except Exception:  # pint refuses some units in a quantity (offset units such as degC/h)
        raise UnitsError(text, f"cannot read this unit; expected {_expected(kind)}", field) from None


# ---------------------------------------------------------------------------- the unit grammar
#
#   quantity := number unit?                      (spaces allowed around and between)
#   number   := [+-]? (digits [. digits?] | . digits) ([eE] [+-]? digits)?
#   unit     := term ((* | / | · | space | per) term)*
#   term     := (square | cubic)? factor ((^ | **) exponent | superscript | squared | cubed)?
#   factor   := name | 1 | ( unit )
#   exponent := [+-]? digits | ( [+-]? digits )          (a whole number from -12 to 12)
#
# A name is looked up in the pint registry and nothing is ever evaluated: the number is read by
# float(), the unit is built from the looked-up names with whole powers, products and
# quotients. So "9**9**9 um" is refused at once, where handing the text to pint would compute
# the power.

MAX_TEXT = 1000
"""Longest value text read (characters)."""
MAX_EXPONENT = 12
"""Largest power of a unit (in absolute value)."""
MAX_DEPTH = 8
"""Deepest nesting of parentheses in a unit."""
MAX_TERMS = 32
"""Most units in one unit expression."""

_SPACE = " \t\u00a0\u202f"
_NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_NON_FINITE = re.compile(r"[+-]?(?:nan|inf|infinity)(?![A-Za-z0-9_])", re.IGNORECASE)
_NAME = re.compile(r"[A-Za-z_\u00b5\u03bc\u00b0][A-Za-z0-9_\u00b5\u03bc]*")
_SUPERSCRIPT = re.compile("[\u207a\u207b]?[\u2070\u00b9\u00b2\u00b3\u2074-\u2079]+")
_SUPER_DIGITS = str.maketrans("\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079\u207a\u207b",
                              "0123456789+-")
_EXPONENT = re.compile(r"\(?[+-]?[0-9]+\)?")
_LONE_ONE = re.compile(r"1(?![0-9.eE])")  # the 1 of "1/h", a unit rather than a number
_WORDS_BEFORE = {"square": 2, "sq": 2, "cubic": 3}
_WORDS_AFTER = {"squared": 2, "cubed": 3}


class _Unreadable(Exception):
    """The text is not a number with a unit; ``reason`` says why, in a user's words."""

    def __init__(self, reason: str):
        super().__init__(reason)
        self.reason = reason


def read_quantity(text: str) -> tuple[float, pint.Unit]:
    """Read a value written as a number and a unit, by the strict grammar of this module.

    The number is read as a float; the unit is built from unit names looked up in the pint
    registry, joined by ``*`` (or a space, or ``·``), ``/`` (or ``per``) and whole powers
    (``^2``, ``**2``, ``²``, ``^-1``) from -12 to 12, with parentheses. Nothing is evaluated:
    a number inside the unit (other than a lone ``1``, as in ``1/h``), a power of a power or a
    fractional power is refused. ``µ`` (micro sign) and ``μ`` (Greek mu) read as ``u``.

    Parameters
    ----------
    text : str
        For example ``"15 um"``, ``"1e-9 cm^2/s"``, ``"4 uL/(cm^2*h)"``.

    Returns
    -------
    number : float
        The number as written (may be infinite when it overflows a float).
    unit : pint.Unit
        The unit (dimensionless when none is written).

    Raises
    ------
    _Unreadable
        With the reason, in words a user understands (callers turn it into a UnitsError that
        names the field).

    Examples
    --------
    >>> number, unit = read_quantity("4 uL/(cm^2*h)")
    >>> number, str(unit)
    (4.0, 'microliter / centimeter ** 2 / hour')
    """
    if len(text) > MAX_TEXT:
        raise _Unreadable(f"too long ({len(text)} characters; at most {MAX_TEXT})")
    body = text.strip(_SPACE)
    if not body:
        raise _Unreadable("nothing is written")
    if _NON_FINITE.match(body):
        return math.nan, get_registry().Unit("")
    m = _NUMBER.match(body)
    if m is None:
        if _NAME.match(body):
            raise _Unreadable("the number is missing (write the number, then the unit)")
        raise _Unreadable("cannot read this as a number followed by a unit")
    number = float(m.group()) + 0.0  # + 0.0: "-0 um" reads as 0, as it did before
    rest = body[m.end():]
    if not rest.strip(_SPACE):
        return number, get_registry().Unit("")
    if rest.startswith(("**", "^")):
        raise _Unreadable("a calculation is not read; write one number (digits, with an exponent such as "
                          "1e-9 if needed), then the unit")
    if rest[0] not in _SPACE and not _NAME.match(rest) and rest[0] not in "(/":
        raise _Unreadable(f"cannot read this unit ({_near(rest, 0)}; write the number once, then the unit)")
    parser = _UnitParser(rest.strip(_SPACE))
    return number, parser.parse()


def _near(text: str, pos: int) -> str:
    """Where a unit stops being readable, for a message."""
    return f"unexpected '{text[pos]}'" if pos < len(text) else "it ends too early"


class _UnitParser:
    """A recursive-descent reader of the unit grammar above, building a pint unit."""

    def __init__(self, text: str):
        self.text = text
        self.pos = 0
        self.terms = 0

    # -- lexing helpers
    def _skip(self) -> None:
        while self.pos < len(self.text) and self.text[self.pos] in _SPACE:
            self.pos += 1

    def _fail(self, why: str | None = None) -> _Unreadable:
        hint = ("a unit is unit names joined by *, / and whole powers such as ^2 or ^-1 "
                "(for example 'cm^2/s' or 'uL/(cm^2*h)')")
        return _Unreadable(f"cannot read this unit ({why or _near(self.text, self.pos)}); {hint}")

    def _op(self) -> str | None:
        """The operator at the current position (consumed), or None."""
        t = self.text
        if t.startswith("**", self.pos) or t.startswith("^", self.pos):
            return None
        if self.pos < len(t) and t[self.pos] in "*/\u00b7\u22c5":
            op = "/" if t[self.pos] == "/" else "*"
            self.pos += 1
            return op
        m = _NAME.match(t, self.pos)
        if m and m.group() == "per":
            self.pos = m.end()
            return "/"
        return None

    # -- grammar
    def parse(self) -> pint.Unit:
        unit = self._unit(0)
        self._skip()
        if self.pos != len(self.text):
            raise self._fail()
        return unit

    def _unit(self, depth: int) -> pint.Unit:
        if self._op() == "/":  # "0.5/h" or "0.5 per hour": one over what follows
            self._skip()
            unit = get_registry().Unit("") / self._term(depth)
        else:
            unit = self._term(depth)
        while True:
            start = self.pos
            self._skip()
            if self.pos >= len(self.text) or self.text[self.pos] == ")":
                return unit
            op = self._op()
            if op is None:
                if self.pos == start:  # two names with nothing between them
                    raise self._fail()
                op = "*"  # a space between two units multiplies them
            self._skip()
            term = self._term(depth)
            unit = unit / term if op == "/" else unit * term

    def _term(self, depth: int) -> pint.Unit:
        self.terms += 1
        if self.terms > MAX_TERMS:
            raise self._fail(f"more than {MAX_TERMS} units")
        power = 1
        m = _NAME.match(self.text, self.pos)
        if m and m.group() in _WORDS_BEFORE:
            power = _WORDS_BEFORE[m.group()]
            self.pos = m.end()
            self._skip()
        unit = self._factor(depth)
        t = self.text
        if t.startswith("**", self.pos) or t.startswith("^", self.pos):
            self.pos += 2 if t.startswith("**", self.pos) else 1
            power *= self._exponent()
        elif (s := _SUPERSCRIPT.match(t, self.pos)) is not None:
            self.pos = s.end()
            power *= self._whole(s.group().translate(_SUPER_DIGITS))
        else:
            save = self.pos
            self._skip()
            w = _NAME.match(t, self.pos)
            if w and w.group() in _WORDS_AFTER:
                power *= _WORDS_AFTER[w.group()]
                self.pos = w.end()
            else:
                self.pos = save
        if t.startswith("**", self.pos) or t.startswith("^", self.pos) or _SUPERSCRIPT.match(t, self.pos):
            raise self._fail("a power of a power; write one whole power such as ^2")
        return unit if power == 1 else unit**power

    def _factor(self, depth: int) -> pint.Unit:
        t = self.text
        if self.pos >= len(t):
            raise self._fail()
        if t[self.pos] == "(":
            if depth >= MAX_DEPTH:
                raise self._fail(f"parentheses nested more than {MAX_DEPTH} deep")
            self.pos += 1
            self._skip()
            unit = self._unit(depth + 1)
            self._skip()
            if self.pos >= len(t) or t[self.pos] != ")":
                raise self._fail("a parenthesis is not closed")
            self.pos += 1
            return unit
        m = _NAME.match(t, self.pos)
        if m:
            self.pos = m.end()
            return _unit_named(m.group())
        if t[self.pos] == "1" and not t[self.pos + 1:self.pos + 2].isdigit() and t[self.pos + 1:self.pos + 2] != ".":
            self.pos += 1
            return get_registry().Unit("")
        if t[self.pos].isdigit() or t[self.pos] == ".":
            raise self._fail("a number inside the unit; write the number once, before the unit")
        raise self._fail()

    def _exponent(self) -> int:
        t = self.text
        m = _EXPONENT.match(t, self.pos)
        if m is None or m.group().count("(") != m.group().count(")"):
            raise self._fail("a power must be a whole number such as ^2 or ^-1")
        self.pos = m.end()
        if self.pos < len(t) and t[self.pos] == ".":
            raise self._fail("a power must be a whole number such as ^2 or ^-1")
        return self._whole(m.group().strip("()"))

    def _whole(self, digits: str) -> int:
        value = int(digits) if len(digits) <= 4 else MAX_EXPONENT + 1
        if abs(value) > MAX_EXPONENT or value == 0:
            raise self._fail(f"a power must be a whole number from -{MAX_EXPONENT} to {MAX_EXPONENT}, not 0")
        return value


@lru_cache(maxsize=4096)
def _unit_named(name: str) -> pint.Unit:
    """The pint unit of one name (``µ`` and ``μ`` read as ``u``)."""
    reg = get_registry()
    try:
        unit = reg.Unit(name.replace("\u00b5", "u").replace("\u03bc", "u"))
    except Exception:  # pint's UndefinedUnitError, or anything it cannot take as a unit name
        raise _Unreadable(f"cannot read this unit (unknown unit '{name}')") from None
    return unit


def parse_quantity(text: object, kind: str, field: str = "", molar_mass: float | None = None) -> float:
    """Parse a value with its unit and return it in the internal unit of ``kind``.

    Parameters
    ----------
    text : str
        The value with its unit, for example ``"15 um"``.
    kind : str
        One of :data:`KINDS` (``"length"``, ``"concentration"``, ...).
    field : str
        Field path used in the error message.
    molar_mass : float or None, mg/mmol
        Molar mass of the substance; enables molar units for concentrations, amounts and
        amount rates.

    Returns
    -------
    float
        The value in the internal unit (see :data:`INTERNAL_UNITS`).

    Raises
    ------
    UnitsError
        For a bare number, an unknown unit, a unit of the wrong dimension, a molar unit
        without a molar mass, or a non-finite number.

    Examples
    --------
    >>> parse_quantity("15 um", "length")
    0.0015
    >>> parse_quantity("1 L/h", "flow")
    1000.0
    """
    key = (text, kind, molar_mass) if isinstance(text, str) else None
    if key is not None:
        hit = _PARSED.get(key)
        if hit is not None:
            return hit
    value = _parse(text, kind, field, molar_mass)
    if key is not None:
        if len(_PARSED) >= _PARSED_MAX:
            _PARSED.clear()
        _PARSED[key] = value
    return value


#: Values already parsed, by (text, kind, molar mass): pint takes about 0.1-0.25 ms a string, and
#: the dashboard checks the whole draft on every edit. Only successful parses are kept (a
#: failure raises before it is stored), so every error message still names its own field.
_PARSED: dict[tuple[str, str, float | None], float] = {}
_PARSED_MAX = 20_000


def _parse(text: object, kind: str, field: str, molar_mass: float | None) -> float:
    """:func:`parse_quantity` without the memo of whole texts.

    A unit text read before (for the same kind and molar mass) is not read again: its
    conversion factor is kept in :data:`_UNIT_FACTORS`, and the value is the number times that
    factor -- the same arithmetic, to the last bit, as pint's conversion, which multiplies the
    number by the factor between the two units (checked for each unit when it is first kept).
    """
    split = _split(text) if isinstance(text, str) else None
    if split is not None:
        factor = _UNIT_FACTORS.get((split[1], kind, molar_mass))
        if factor is not None:
            value = _known(float(split[0]) + 0.0, factor, kind, molar_mass)
            if value is not None:
                return value
    value, q = _convert(text, kind, field, molar_mass)
    number = float(q.magnitude)
    if split is not None:
        _keep_factor(split[1], kind, molar_mass, q, number, value)
    return _finish(value, number, kind)


def _finish(value: float, number: float, kind: str) -> float:
    """The converted value as the reader gives it: rounded to 15 digits unless written with more."""
    if kind == "length" and abs(value) < 1e-300 and value != 0:
        value = 0.0
    if _digits(number) > 15:
        # the number was written with full double precision (as format_quantity writes a value
        # that has no shorter exact form): keep every digit, do not round
        return value
    return _tidy(value)


def _split(text: str) -> tuple[str, str] | None:
    """The number and the rest (the unit, with the spaces before it) of a value text, as
    :func:`read_quantity` splits it; None for a text it would not read as a plain number."""
    if len(text) > MAX_TEXT:
        return None
    body = text.strip(_SPACE)
    if not body or _NON_FINITE.match(body):
        return None
    m = _NUMBER.match(body)
    if m is None:
        return None
    return m.group(), body[m.end():]


def _known(number: float, factor: tuple[float, bool], kind: str, molar_mass: float | None) -> float | None:
    """The value of ``number`` in a unit whose factor is kept; None when the full reading must
    decide (a number too large for a float, or a value that overflows: their messages)."""
    if not math.isfinite(number):
        return None
    f, molar = factor
    value = number * f
    if molar:
        value = value * molar_mass
    if not math.isfinite(value):
        return None
    return _finish(value, number, kind)


def _keep_factor(rest: str, kind: str, molar_mass: float | None, q: pint.Quantity, number: float,
                 value: float) -> None:
    """Keep the conversion factor of a unit text just read, if it gives back ``value`` exactly."""
    plain, _ = _dims()
    molar = q.dimensionality != plain[kind]
    target = KINDS[kind].molar if molar else KINDS[kind].internal
    f = float(get_registry().Quantity(1.0, q.units).to(target).magnitude)
    factor = (f, molar)
    if not math.isfinite(number) or _known_raw(number, factor, molar_mass) != value:
        return  # (never seen: pint converts by one multiplication) -- read such a unit in full each time
    if len(_UNIT_FACTORS) >= _UNIT_FACTORS_MAX:
        _UNIT_FACTORS.clear()
    _UNIT_FACTORS[(rest, kind, molar_mass)] = factor


def _known_raw(number: float, factor: tuple[float, bool], molar_mass: float | None) -> float:
    value = number * factor[0]
    return value * molar_mass if factor[1] else value


#: Conversion factor of every unit text read so far, by (the text after the number, kind, molar
#: mass): (factor to the internal unit, or to the molar unit when molar is True; molar). Only
#: units read without error are kept, so that a refused unit is read (and refused) in full again.
_UNIT_FACTORS: dict[tuple[str, str, float | None], tuple[float, bool]] = {}
_UNIT_FACTORS_MAX = 4096


def clear_caches() -> None:
    """Forget every value and unit text read so far, as in a new process (for benchmarks and tests).

    The pint registry itself and its own caches stay.
    """
    _PARSED.clear()
    _UNIT_FACTORS.clear()
    _unit_named.cache_clear()
    unit_factor.cache_clear()
    internal_per_unit.cache_clear()


def _convert(text: object, kind: str, field: str, molar_mass: float | None) -> tuple[float, pint.Quantity]:
    """The value of ``text`` in the internal unit of ``kind``, not rounded, and the quantity read."""
    q = _quantity(text, kind, field)
    dim = q.dimensionality
    plain, molar = _dims()
    if dim == plain[kind]:
        value = float(q.to(KINDS[kind].internal).magnitude)
    elif kind in molar and dim == molar[kind]:
        if molar_mass is None:
            raise UnitsError(
                text, "a molar unit needs the substance's molar_mass in [substance]; "
                f"give it, or write {_expected(kind)}", field)
        value = float(q.to(KINDS[kind].molar).magnitude) * molar_mass
    else:
        raise UnitsError(text, f"wrong kind of unit ({q.units:~}); expected {_expected(kind)}", field)
    if not math.isfinite(value):
        raise UnitsError(text, f"is too large: it does not fit a floating-point number in {KINDS[kind].internal}",
                         field)
    return value, q


def _digits(x: float) -> int:
    """Significant digits of the shortest text that reads back to ``x``."""
    return len(repr(abs(x)).split("e")[0].replace(".", "").strip("0"))


def _tidy(value: float) -> float:
    """Round a converted value to 15 significant digits when that is what it really is.

    Unit factors such as 1e-4 cm/um are not exact in binary: 15 um becomes
    0.0014999999999999998 cm. Rounding to 15 digits (below double precision's 15.95)
    gives the value the user meant, so that a saved and re-read file compares equal.
    A number written with 16 or 17 digits is not rounded (see :func:`parse_quantity`).
    """
    if value == 0.0 or not math.isfinite(value):
        return value
    return float(f"{value:.15g}")


@lru_cache(maxsize=1024)
def unit_factor(kind: str, unit: str, molar_mass: float | None = None) -> float:
    """Return the factor f such that ``value_in_unit = f * value_internal``.

    Results are cached (the same few output units are converted for every scenario and result).

    Parameters
    ----------
    kind : str
        One of :data:`KINDS`.
    unit : str
        A unit of that kind, for example ``"mg/L"`` for a concentration.
    molar_mass : float or None, mg/mmol
        Needed for molar units.

    Raises
    ------
    UnitsError
        If the unit is not of that kind.
    """
    field = f"unit {unit!r}"
    k = KINDS[kind]
    if isinstance(unit, str) and _NUMBER.match(unit.strip(_SPACE)) and not _LONE_ONE.match(unit.strip(_SPACE)):
        # "2 mg" or "0 mg" is a quantity, not a unit
        raise UnitsError(unit, f"a unit without a number is expected; {k.description} unit, such as '{k.internal}'",
                         field)
    _quantity(f"1 {unit}", kind, field)
    per_internal = parse_quantity(f"1 {unit}", kind, field=field, molar_mass=molar_mass)
    return 1.0 / per_internal


@lru_cache(maxsize=1024)
def internal_per_unit(kind: str, unit: str, molar_mass: float | None = None) -> float:
    """The value of one ``unit`` in the internal unit of ``kind``, exactly as pint converts it (not rounded).

    Multiply numbers written in ``unit`` by it to read a column of numbers in one unit (an
    experiment data file) without parsing each number with its unit; round the products as the
    reader rounds (15 significant digits) to get the values a scenario file would give.

    Raises
    ------
    UnitsError
        As :func:`unit_factor`.

    Examples
    --------
    >>> internal_per_unit("time", "min") * 30
    0.5
    """
    unit_factor(kind, unit, molar_mass)  # the checks and messages of a unit alone
    return _convert(f"1 {unit}", kind, f"unit {unit!r}", molar_mass)[0]


def convert(value: float, kind: str, unit: str, molar_mass: float | None = None) -> float:
    """Convert ``value`` (internal unit of ``kind``) to ``unit``."""
    return value * unit_factor(kind, unit, molar_mass)


def format_quantity(value: float, kind: str, unit: str | tuple[str, ...] | None = None) -> str:
    """Write ``value`` (internal unit) as a string that parses back to the same float.

    ``unit`` may be one unit or several to choose from; the shortest text that reads back
    exactly wins, and the internal unit is the fallback.

    Examples
    --------
    >>> format_quantity(0.0015, "length", "um")
    '15 um'
    >>> format_quantity(parse_quantity("10 min", "time"), "time")
    '10 min'
    >>> format_quantity(10 / 60, "time")  # not exactly what "10 min" reads as: every digit kept
    '0.16666666666666666 h'
    """
    internal = KINDS[kind].internal
    best = None
    for u in _candidates(kind, unit if isinstance(unit, str) or unit is None else tuple(unit)):
        if best is not None and len(u) + 2 > len(best) - 3:
            continue  # even one digit in this unit could not win
        number = value if u == internal else _tidy(convert(value, kind, u))
        text = f"{_num(number)} {u}"
        if best is not None and len(text) > len(best) - 3:
            continue  # it could not win: no need to read it back
        try:
            exact = parse_quantity(text, kind) == value
        except UnitsError:
            exact = False
        if exact:
            best = text
    return best if best is not None else f"{_num(value)} {internal}"


@lru_cache(maxsize=256)
def _candidates(kind: str, unit: str | tuple[str, ...] | None) -> tuple[str, ...]:
    """The units :func:`format_quantity` tries, in order: those given, the usual ones of the kind,
    the internal unit (each once; the same few for every scenario, so found once)."""
    units = (unit,) if isinstance(unit, str) else tuple(unit or ())
    return units + tuple(u for u in (*_ALTERNATIVES.get(kind, ()), KINDS[kind].internal) if u not in units)


_ALTERNATIVES = {
    "time": ("h", "min", "d", "s"),
    "volume": ("mL", "L", "uL"),
    "flow": ("mL/h", "L/h", "mL/min"),
    "concentration": ("mg/mL", "mg/L", "ug/mL", "ug/L"),
    "amount": ("mg", "ug", "g"),
    "length": ("um", "mm", "cm"),
    "volume_per_area": ("uL/cm^2", "mL/cm^2"),
    "amount_per_area": ("ug/cm^2", "mg/cm^2"),
    "flow_per_area": ("uL/(cm^2*h)", "mL/(cm^2*h)"),
}


def _num(x: float) -> str:
    r = repr(float(x))
    if r.endswith(".0"):
        r = r[:-2]
    return r
