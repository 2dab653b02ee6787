"""Field tables and the shared reader that turns plain mappings into validated model objects.

Both routes into the model, a TOML file (``barrierflow.io``) and a graph with plain keyword
attributes (:meth:`barrierflow.Scenario.from_graph`), go through :func:`build`, so they give
the same objects and the same error messages.
"""

from __future__ import annotations

import contextvars
import dataclasses
import difflib
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from ..errors import Problem, ScenarioError, UnitsError
from ..units import KINDS, PER_AREA, format_quantity, parse_quantity


@dataclass(frozen=True)
class FieldSpec:
    """How one key of a table is read.

    This table is the one description of a field: the reader, the writer
    (:mod:`barrierflow.model.document`), the parameter paths (:mod:`barrierflow.model.paths`)
    and the range checks of the model (:meth:`Checker.bound`) all read it.

    Attributes
    ----------
    attr : str
        The attribute of the model object.
    key : str
        The key in the scenario file (and the last word of the field's parameter path).
    kind : str
        A kind of quantity from :data:`barrierflow.units.KINDS` (the value is a string with a
        unit), or one of ``"number"`` (a bare float), ``"count"`` (a whole number), ``"text"``,
        ``"id"``, ``"times"`` (a list of times), ``"flag"`` (true or false).
    required : bool
        The key must be given.
    unit : str or None
        The unit preferred when writing the value back.
    bound : {None, "> 0", ">= 0"}
        The range the model accepts for a number: ``"> 0"`` (a study may then work on the
        logarithm of the value), ``">= 0"``, or None (any finite number, or not a number).
    structural : bool
        True when the value shapes the run rather than setting a rate or an amount: the grid
        (``cells``) or the timeline (dose times, the run's duration, output times). Subjects of
        one population share these.
    per_area : str or None
        For a volume, amount or flow that may also be written per area (``"10 uL/cm^2"``): the
        attribute that receives such a value (in the per-area kind of :data:`~barrierflow.units.PER_AREA`).
        The scenario resolves it with the area of the one barrier the object's compartment
        touches and sets ``attr`` to the absolute value; the file keeps the per-area form.
    """

    attr: str
    key: str
    kind: str
    required: bool = False
    unit: str | None = None
    bound: str | None = None
    structural: bool = False
    per_area: str | None = None

    def __post_init__(self) -> None:
        if self.bound not in (None, "> 0", ">= 0"):
            raise ValueError(f"FieldSpec {self.key}: bound must be None, '> 0' or '>= 0', not {self.bound!r}")
        if self.per_area is not None and self.kind not in PER_AREA:
            raise ValueError(f"FieldSpec {self.key}: a {self.kind} has no per-area form")

    @property
    def per_area_spec(self) -> FieldSpec | None:
        """The field as written per area (same key and range, the per-area kind), or None."""
        if self.per_area is None:
            return None
        kind = PER_AREA[self.kind]
        return FieldSpec(self.per_area, self.key, kind, unit=_PER_AREA_UNIT[kind], bound=self.bound,
                         structural=self.structural)


_PER_AREA_UNIT = {"volume_per_area": "uL/cm^2", "amount_per_area": "ug/cm^2", "flow_per_area": "uL/(cm^2*h)"}
"""The unit a per-area value is written back in."""


def with_per_area(specs: tuple[FieldSpec, ...]) -> tuple[FieldSpec, ...]:
    """``specs`` and the per-area form of every field that has one (for checks and messages)."""
    return specs + tuple(s.per_area_spec for s in specs if s.per_area is not None)


@dataclass(frozen=True)
class Plausible:
    """The range of values a field takes in practice (internal units), and how a message shows it."""

    low: float
    high: float
    text: str


PLAUSIBLE: dict[str, Plausible] = {
    # by kind of quantity (the FieldSpec kind), in the internal units cm, h, mg, mL
    "length": Plausible(1e-6, 10.0, "10 nm to 10 cm"),
    "diffusivity": Plausible(1e-16 * 3600, 1e-2 * 3600, "1e-16 to 0.01 cm^2/s"),
    "area": Plausible(1e-4, 1e5, "1e-4 to 1e5 cm^2"),
    "volume": Plausible(1e-6, 1e8, "1 nL to 100,000 L"),
    "flow": Plausible(1e-9, 1e7, "1e-9 mL/h to 10,000 L/h"),
    "rate": Plausible(1e-9, 1e4, "1e-9 to 1e4 1/h"),
    "concentration": Plausible(1e-18, 1e4, "1e-18 to 1e4 mg/mL"),
    "amount": Plausible(1e-15, 1e7, "1e-15 mg to 10 kg"),
    "amount_rate": Plausible(1e-15, 1e7, "1e-15 mg/h to 10 kg/h"),
    "molar_mass": Plausible(1.0, 1e7, "1 to 1e7 g/mol"),
    # the one dimensionless field with a range, by its key
    "partition": Plausible(1e-6, 1e6, "1e-6 to 1e6"),
}
"""Plausible values of the fields, by kind of quantity (and ``partition`` by key): a value outside
is refused unless the scenario sets ``check_ranges = false`` in ``[scenario]``. Zero is not
checked (where a field allows it, it means "none"). The ranges hold tissue barriers, membranes,
films and bodies with wide margins (common practice; from the handbook magnitudes of diffusivity
in solids and liquids and of physiological volumes and flows, from memory); inside them the engine
computes or refuses with a SolverError, outside them arithmetic meets the limits of floating
point (a clearance of 1e34 L/h empties an unrelated compartment by rounding)."""

RANGES_OFF = "set check_ranges = false in [scenario] if the value is meant"


def range_problems(obj: Any, specs: tuple[FieldSpec, ...]) -> list[Problem]:
    """A problem for each field of ``obj`` outside its :data:`PLAUSIBLE` range (relative paths)."""
    out = []
    for spec in specs:
        rng = PLAUSIBLE.get(spec.key) if spec.kind == "number" else PLAUSIBLE.get(spec.kind)
        if rng is None:
            continue
        value = getattr(obj, spec.attr)
        if not finite(value) or value == 0:
            continue
        if not rng.low <= abs(value) <= rng.high:
            out.append(Problem(spec.key, show(value, spec), f"outside the plausible range {rng.text}; {RANGES_OFF}",
                               path=spec.key))
    return out


def finite(x: float) -> bool:
    """True for a finite number that a float can hold (not a bool, not a whole number beyond 1.8e308)."""
    if not isinstance(x, (int, float)) or isinstance(x, bool):
        return False
    try:
        return math.isfinite(x)
    except OverflowError:  # an int too large for a float
        return False


def show(value: Any, spec: FieldSpec | None) -> str:
    """How a model value is shown in a message."""
    if spec is not None and spec.kind in KINDS and finite(value):
        return format_quantity(float(value), spec.kind, spec.unit)
    return str(value)


def suggest(key: str, known: list[str]) -> str:
    """A 'did you mean' hint for an unknown key."""
    close = difflib.get_close_matches(key, known, n=1, cutoff=0.6)
    hint = f"did you mean '{close[0]}'? " if close else ""
    return f"{hint}known keys here: {', '.join(known)}"


def _quoted(raw: Any) -> Any:
    """A text value shown in quotes, so that ``"5"`` where 5 was meant is seen for what it is."""
    return f'"{raw}"' if isinstance(raw, str) else raw


def parse_value(raw: Any, spec: FieldSpec, molar_mass: float | None) -> Any:
    """Parse one raw value (from TOML or a keyword attribute) according to its spec.

    Numbers given for a dimensional field are taken as already in the internal unit only when
    they come from Python code (``allow_internal``); the TOML reader never passes them.
    """
    kind = spec.kind
    if kind in KINDS:
        return parse_quantity(raw, kind, spec.key, molar_mass=molar_mass)
    if kind == "number":
        if isinstance(raw, bool) or not isinstance(raw, (int, float)):
            raise UnitsError(_quoted(raw), "expected a bare number such as 10 (no unit, no quotes)", spec.key)
        if not finite(raw):
            raise UnitsError(raw, "must be a finite number", spec.key)
        return float(raw)
    if kind == "flag":
        if not isinstance(raw, bool):
            raise UnitsError(_quoted(raw), "expected true or false (no quotes)", spec.key)
        return raw
    if kind == "count":
        if isinstance(raw, bool) or not isinstance(raw, int):
            raise UnitsError(_quoted(raw), "expected a whole number such as 40 (no quotes)", spec.key)
        return int(raw)
    if kind in ("text", "id"):
        if not isinstance(raw, str):
            raise UnitsError(raw, "expected text in quotes", spec.key)
        return raw
    if kind == "times":
        if not isinstance(raw, (list, tuple)):
            raise UnitsError(raw, "expected a list of times such as [\"0 h\", \"1 h\"]", spec.key)
        return tuple(parse_quantity(t, "time", f"{spec.key}[{i}]") for i, t in enumerate(raw))
    raise AssertionError(kind)


def parse_either(raw: Any, spec: FieldSpec, molar_mass: float | None) -> tuple[str, Any]:
    """Parse a value of a field that may be written per area: ``(attribute, value)``.

    The absolute form goes to ``spec.attr``, the per-area form (``"10 uL/cm^2"``) to
    ``spec.per_area``; a value of neither kind is refused naming both.
    """
    try:
        return spec.attr, parse_value(raw, spec, molar_mass)
    except UnitsError as err:
        if "wrong kind of unit" not in err.expected:
            raise
        per = spec.per_area_spec
        try:
            return per.attr, parse_quantity(raw, per.kind, spec.key, molar_mass=molar_mass)
        except UnitsError:
            pass
        k, pk = KINDS[spec.kind], KINDS[per.kind]
        expected = err.expected.replace(f"such as '{k.example}'",
                                        f"such as '{k.example}', or {pk.description} such as '{pk.example}' (times "
                                        "the area of the one barrier the compartment touches)")
        raise UnitsError(err.value, expected, err.field) from None


@dataclass(frozen=True)
class _Shape:
    """What :func:`build` needs to know of a class and its specs, found once per class."""

    specs: tuple[FieldSpec, ...]
    by_key: dict[str, FieldSpec]
    key_of_attr: dict[str, str]
    names: tuple[str, ...]  # every field of the class
    without_default: tuple[str, ...]  # the constructor arguments without a default


_SHAPES: dict[type, _Shape] = {}


def _shape(cls: type, specs: tuple[FieldSpec, ...]) -> _Shape:
    known = _SHAPES.get(cls)
    if known is not None and known.specs is specs:
        return known
    fs = dataclasses.fields(cls)
    shape = _Shape(specs, {s.key: s for s in specs}, {s.attr: s.key for s in with_per_area(specs)},
                   tuple(f.name for f in fs),
                   tuple(f.name for f in fs if f.init and f.default is dataclasses.MISSING
                         and f.default_factory is dataclasses.MISSING))
    _SHAPES[cls] = shape
    return shape


def build(cls: type, specs: tuple[FieldSpec, ...], raw: Mapping[str, Any], *,
          molar_mass: float | None = None, python: bool = False, extra: Mapping[str, Any] | None = None):
    """Build ``cls`` from a mapping of raw values, reporting every problem at once.

    Parameters
    ----------
    cls : type
        A frozen model dataclass whose ``__post_init__`` validates it.
    specs : tuple of FieldSpec
        The keys it reads.
    raw : mapping
        Key to raw value (unit strings, numbers, text).
    molar_mass : float or None, mg/mmol
        Enables molar units.
    python : bool
        True when the mapping comes from Python code: then a plain number in a dimensional field
        is taken as already in the internal unit, and attribute names are accepted as keys.
    extra : mapping
        Already-built attributes passed through unchanged (for example a barrier's layers).

    Raises
    ------
    ScenarioError
        With one problem per unknown key, unreadable value, missing key or failed check; field
        paths are relative (the caller prefixes them).
    """
    shape = _shape(cls, specs)
    by_key = shape.by_key
    if python:
        by_key = dict(by_key)
        by_key.update({s.attr: s for s in specs})
        by_key.update({s.per_area: s.per_area_spec for s in specs if s.per_area is not None})
    problems: list[Problem] = []
    values: dict[str, Any] = dict(extra or {})
    raw_text: dict[str, str] = {}
    for key, value in raw.items():
        spec = by_key.get(key)
        if spec is None:
            problems.append(Problem(key, "an unknown key", suggest(key, [s.key for s in specs]), path=key))
            continue
        if spec.kind in ("id", "text"):
            raw_text[spec.attr] = repr(value)  # quoted in messages, as the model's own checks show them
        else:
            raw_text[spec.attr] = value if isinstance(value, str) else str(value)
        if python and spec.kind in KINDS and finite(value):
            values[spec.attr] = float(value)
            continue
        if python and spec.kind == "times" and isinstance(value, (list, tuple)) and all(finite(v) for v in value):
            values[spec.attr] = tuple(float(v) for v in value)
            continue
        try:
            if spec.per_area is not None:
                attr, parsed = parse_either(value, spec, molar_mass)
                values[attr] = parsed
                if attr != spec.attr:
                    raw_text[attr] = raw_text.pop(spec.attr)
            else:
                values[spec.attr] = parse_value(value, spec, molar_mass)
        except UnitsError as err:
            problems.append(Problem(spec.key, err.value, err.expected, path=spec.key))
    for spec in specs:
        if spec.required and spec.attr not in values and not any(p.field == spec.key for p in problems):
            example = f", such as '{KINDS[spec.kind].example}'" if spec.kind in KINDS else ""
            problems.append(Problem(spec.key, "nothing", f"this key is required{example}", path=spec.key))
    failed = {p.field for p in problems}
    # constructor arguments without a default (an exchange's id, say) that are still missing
    key_of_attr = shape.key_of_attr
    for name in shape.without_default:
        if name not in values and key_of_attr.get(name, name) not in failed:
            key = key_of_attr.get(name, name)
            problems.append(Problem(key, "nothing", "this key is required", path=key))
    failed = {p.field for p in problems}
    # Fields that could not be read, or are missing, stand in as placeholders so that the
    # object's own checks still run on every other field: all the problems of a layer are
    # reported at once. The checks leave the placeholders alone (see Checker and UNREAD).
    unread = {s.attr for s in specs if s.key in failed}
    unread |= {name for name in shape.names if name in failed}
    if unread:
        spec_of = {s.attr: s for s in specs}
        for f in dataclasses.fields(cls):
            if f.init and f.name in unread:
                values[f.name] = _placeholder(spec_of.get(f.name), f.name)
    token = UNREAD.set(frozenset(unread))
    try:
        built = cls(**values)
    except ScenarioError as err:
        key_of = {s.attr: s.key for s in with_per_area(specs)}
        fixed = []
        for p in err.problems:
            attrs = [a for a, k in key_of.items() if k == p.field or a == p.field]
            attr = next((a for a in attrs if a in raw_text), attrs[0] if attrs else None)
            if attr is not None and attr in raw_text:
                p = Problem(key_of[attr], raw_text[attr], p.expected, p.file, key_of[attr])
            elif attr is not None:
                p = Problem(key_of[attr], p.value, p.expected, p.file, key_of[attr])
            if p.field not in failed:
                fixed.append(p)
        raise ScenarioError(_in_file_order(problems + fixed, raw)) from None
    finally:
        UNREAD.reset(token)
    if problems:
        raise ScenarioError(_in_file_order(problems, raw))
    return built


def _in_file_order(problems: list[Problem], raw: Mapping[str, Any]) -> list[Problem]:
    """The problems in the order of their keys in the table (missing keys last)."""
    position = {key: i for i, key in enumerate(raw)}
    return sorted(problems, key=lambda p: position.get(p.field, len(position)))


UNREAD: contextvars.ContextVar[frozenset[str]] = contextvars.ContextVar("UNREAD", default=frozenset())
"""Attributes that :func:`build` could not read and filled with placeholders while an object
checks itself; :class:`Checker` skips them (their problem is already reported)."""


def _placeholder(spec: FieldSpec | None, attr: str) -> Any:
    """A value of the right type that stands in for a field that could not be read."""
    kind = spec.kind if spec is not None else "number"
    if kind == "id":
        return f"unread-{attr}"  # distinct per field: from and to never look equal
    if kind == "text":
        return ""
    if kind == "count":
        return 1
    if kind == "times":
        return ()
    return 1.0


class Checker:
    """Collects problems while a model object validates itself."""

    def __init__(self, specs: tuple[FieldSpec, ...] = ()):
        self.problems: list[Problem] = []
        self._specs = {s.attr: s for s in with_per_area(specs)}
        self._unread = UNREAD.get()
        self._skipped = False

    def read(self, *attrs: str) -> bool:
        """True when every one of ``attrs`` was read (none is a placeholder for an unreadable value).

        A check that compares two fields asks this first, so that a field that could not be read
        causes no second, misleading message about another field.
        """
        return not self._unread.intersection(attrs)

    def add(self, attr: str, value: Any, expected: str) -> None:
        """Record that ``attr`` holds ``value`` where ``expected`` was wanted.

        Nothing is recorded for a field that could not be read (its problem is already known).
        """
        if attr in self._unread:
            self._skipped = True
            return
        spec = self._specs.get(attr)
        key = spec.key if spec else attr
        self.problems.append(Problem(key, show(value, spec), expected, path=key))

    def bound(self, attr: str, value: Any, *, optional: bool = False) -> None:
        """``value`` must be a finite number in the range of its field's :attr:`FieldSpec.bound`.

        None is accepted when ``optional``. The bound is read from the field table, so that the
        range a study works in (:attr:`barrierflow.model.paths.ParamPath.positive`) is the range
        the model checks.
        """
        bound = self._specs[attr].bound
        if bound == "> 0":
            self.positive(attr, value, optional=optional)
        elif bound == ">= 0":
            self.nonnegative(attr, value, optional=optional)
        else:
            raise AssertionError(f"field {attr!r} has no bound in its FieldSpec")

    def positive(self, attr: str, value: Any, *, optional: bool = False) -> None:
        """``value`` must be a finite number > 0 (or None when optional)."""
        if value is None and optional:
            return
        if not finite(value):
            self.add(attr, value, "must be a finite number")
        elif value <= 0:
            self.add(attr, value, "must be > 0")

    def nonnegative(self, attr: str, value: Any, *, optional: bool = False) -> None:
        """``value`` must be a finite number >= 0 (or None when optional)."""
        if value is None and optional:
            return
        if not finite(value):
            self.add(attr, value, "must be a finite number")
        elif value < 0:
            self.add(attr, value, "must be >= 0")

    def done(self) -> None:
        """Raise a :class:`ScenarioError` if anything was recorded (or skipped on an unread field)."""
        if self.problems or self._skipped:
            raise ScenarioError(self.problems)
