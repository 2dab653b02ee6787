"""The one units registry of barrierflow, and the internal unit system.

Every dimensional value a user writes is a string with its unit (``"15 um"``, ``"10 L/h"``).
It is parsed here, once, by a single :mod:`pint` registry and converted to the internal
system; everything past the model sees plain ``float`` values in these units:

============== ============ ==========================================
kind           internal     examples accepted
============== ============ ==========================================
length         cm           ``"15 um"``, ``"15 µm"``, ``"0.1 mm"``
time           h            ``"30 min"``, ``"7 d"``, ``"3600 s"``
area           cm^2         ``"10 cm^2"``, ``"1 mm^2"``
volume         mL           ``"5 L"``, ``"1 cm^3"``
diffusivity    cm^2/h       ``"1e-9 cm^2/s"``, ``"1e-6 cm**2/s"``
concentration  mg/mL        ``"20 mg/mL"``, ``"1 ug/L"``, ``"1 mmol/L"`` *
amount         mg           ``"2 mg"``, ``"500 ug"``, ``"1 umol"`` *
amount_rate    mg/h         ``"0.1 mg/h"``, ``"1 umol/min"`` *
flow           mL/h         ``"10 L/h"``, ``"1 mL/min"``
rate           1/h          ``"0.8 1/h"``, ``"0.01 1/min"``
molar_mass     mg/mmol      ``"250 g/mol"`` (numerically g/mol)
============== ============ ==========================================

\\* molar quantities need the substance's molar mass.

The conversion factors are pint's definitions, which follow NIST SP 811 (Thompson & Taylor,
Guide for the Use of the International System of Units, 2008), Appendix B.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cache, lru_cache
from typing import TYPE_CHECKING, Any

from .errors import UnitsError

if TYPE_CHECKING:
    import pint

__all__ = [
    "INTERNAL_UNITS",
    "KINDS",
    "convert",
    "format_quantity",
    "parse_quantity",
    "get_registry",
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
}

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
    if kind not in KINDS:
        raise KeyError(f"unknown kind of quantity {kind!r}; known: {', '.join(KINDS)}")
    if isinstance(text, bool) or not isinstance(text, str):
        if isinstance(text, (int, float)):
            raise UnitsError(text, f"a bare number is not accepted here; expected {_expected(kind)}", field)
        raise UnitsError(text, f"expected {_expected(kind)}", field)
    stripped = text.strip()
    try:
        q = get_registry().Quantity(stripped.replace("µ", "u").replace("μ", "u"))
    except Exception:  # pint raises several types for unparsable text
        raise UnitsError(text, f"cannot read this unit; expected {_expected(kind)}", field) from None
    try:
        if not isinstance(q, get_registry().Quantity) or q.dimensionless:
            raise UnitsError(text, f"the unit is missing; expected {_expected(kind)}", field)
        finite = isinstance(q.magnitude, (int, float)) and math.isfinite(float(q.magnitude))
    except OverflowError:  # a whole number too large for a float
        finite = False
    if not finite:
        raise UnitsError(text, "must be a finite number with its unit", field)
    return q


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
    """:func:`parse_quantity` without the memo."""
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
    if kind == "length" and abs(value) < 1e-300 and value != 0:
        value = 0.0
    if _digits(float(q.magnitude)) > 15:
        # the number was written with full double precision (as format_quantity writes a value
        # that has no shorter exact form): keep every digit, do not round
        return value
    return _tidy(value)


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
    q = _quantity(f"1 {unit}", kind, field)
    if q.magnitude != 1:  # "2 mg" or "0 mg" is a quantity, not a unit
        k = KINDS[kind]
        raise UnitsError(unit, f"a unit without a number is expected; {k.description} unit, such as '{k.internal}'",
                         field)
    per_internal = parse_quantity(f"1 {unit}", kind, field=field, molar_mass=molar_mass)
    return 1.0 / per_internal


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
    units = (unit,) if isinstance(unit, str) else tuple(unit or ())
    extra = _ALTERNATIVES.get(kind, ())
    units = units + tuple(u for u in (*extra, internal) if u not in units)
    best = None
    for u in units:
        number = value if u == internal else _tidy(convert(value, kind, u))
        text = f"{_num(number)} {u}"
        try:
            exact = parse_quantity(text, kind) == value
        except UnitsError:
            exact = False
        if exact and (best is None or len(text) <= len(best) - 3):
            best = text
    return best if best is not None else f"{_num(value)} {internal}"


_ALTERNATIVES = {
    "time": ("h", "min", "d", "s"),
    "volume": ("mL", "L", "uL"),
    "flow": ("mL/h", "L/h", "mL/min"),
    "concentration": ("mg/mL", "mg/L", "ug/mL", "ug/L"),
    "amount": ("mg", "ug", "g"),
    "length": ("um", "mm", "cm"),
}


def _num(x: float) -> str:
    r = repr(float(x))
    if r.endswith(".0"):
        r = r[:-2]
    return r
