"""Parameter paths: one vocabulary for "this number in this scenario".

A :class:`ParamPath` names one field of a scenario, in the syntax of the command line and the
experiment files::

    barrier.<id>.layer.<n>.<field>   a layer's field; layers counted from 1, from the 'from' side
    barrier.<id>.<field>             a barrier's own field (area, ...)
    compartment.<id>.<field>
    exchange.<id>.<field>
    transfer.<id>.<field>
    dose.<n>.<field>                 doses counted from 1, in the order of the file
    substance.<field>
    scenario.<field>                 the [scenario] table (duration, output_step, ...)
    output.<field>                   the [output] table (units of the traces)

``<field>`` is the key of the scenario file. The text maps one to one to the field path that
error messages print (:attr:`ParamPath.label`)::

    barrier.skin.layer.1.thickness   <->   barrier 'skin' layer 1 thickness
    dose.2.amount                    <->   dose 2 amount
    scenario.duration                <->   scenario duration

:meth:`ParamPath.parse` reads both forms, and every :class:`~barrierflow.errors.Problem`
carries the dotted text of its place in :attr:`~barrierflow.errors.Problem.path`, so a program
finds the field of a problem without reading the message.

Everything a path knows comes from the field tables of the model (the ``SPECS`` of each model
class, :class:`~barrierflow.model._fields.FieldSpec`): its kind of quantity, its internal unit,
its range (:attr:`ParamPath.positive`) and whether it shapes the run rather than setting a rate
(:attr:`ParamPath.structural`). There is no second list of fields: a field added to a ``SPECS``
table is a parameter path at once.

A :class:`Tied` group gives several paths one value (the first patch and every refill at one
concentration; two layers that share a diffusivity) and is accepted wherever a path is, so that
a study varies or fits the group as one parameter.

Values go in and out in the internal units (cm, h, mg, mL; :mod:`barrierflow.units`).
:meth:`ParamPath.file_unit` is the unit the scenario file wrote the value in, and
:meth:`ParamPath.to_file_unit` / :meth:`ParamPath.from_file_unit` convert, so that a study
reports a value in the researcher's own unit.

Examples
--------
>>> from barrierflow.model.paths import ParamPath
>>> p = ParamPath.parse("barrier.skin.layer.1.diffusivity")
>>> p.label, p.kind, p.unit, p.positive
("barrier 'skin' layer 1 diffusivity", 'diffusivity', 'cm^2/h', True)
>>> ParamPath.parse("dose 2 amount").text
'dose.2.amount'
"""

from __future__ import annotations

import dataclasses
import difflib
import functools
import math
import numbers
import re
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, TypeAlias

from ..errors import Problem, ScenarioError, UnitsError
from ..units import (
    KINDS,
    _tidy,  # the reader's rounding of converted values
    convert,
    parse_quantity,
    unit_factor,
)
from ._fields import FieldSpec
from .components import ID_PATTERN, Barrier, Compartment, Dose, Exchange, Layer, OutputUnits, Substance, Transfer
from .scenario import Scenario

__all__ = ["Param", "ParamPath", "Tied", "parameter_paths", "parse_param", "units_written", "with_values"]

TABLES = ("scenario", "substance", "compartment", "barrier", "exchange", "transfer", "dose", "output")
"""The tables a path can start with, in the order of a scenario file."""

_SINGLE: dict[str, tuple[str | None, type]] = {
    # table -> (attribute of Scenario holding the object, or None for the scenario itself; class)
    "scenario": (None, Scenario),
    "substance": ("substance", Substance),
    "output": ("output_units", OutputUnits),
}
_MANY: dict[str, tuple[str, type]] = {
    # table -> (attribute of Scenario holding the tuple of objects, class); doses by number, the others by id
    "compartment": ("compartments", Compartment),
    "barrier": ("barriers", Barrier),
    "exchange": ("exchanges", Exchange),
    "transfer": ("transfers", Transfer),
    "dose": ("doses", Dose),
}
_NUMERIC = ("number", "count")
_FORMS = {
    "scenario": "scenario.<field>, such as scenario.duration",
    "substance": "substance.<field>, such as substance.solubility",
    "output": "output.<field>, such as output.concentration",
    "compartment": "compartment.<id>.<field>, such as compartment.central.clearance",
    "barrier": "barrier.<id>.<field> or barrier.<id>.layer.<n>.<field>, such as barrier.skin.layer.1.diffusivity",
    "exchange": "exchange.<id>.<field>, such as exchange.exchange_1.flow",
    "transfer": "transfer.<id>.<field>, such as transfer.absorption.rate",
    "dose": "dose.<n>.<field> (doses counted from 1 in the file's order), such as dose.1.amount",
}
_TOKEN = re.compile(r"'([^']*)'|\"([^\"]*)\"|(\S+)")
_NUMBER_AT_START = re.compile(r"\s*[-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?\s*\*?\s*")


def _class_of(table: str, layer: int | None) -> type:
    if table == "barrier" and layer is not None:
        return Layer
    return _SINGLE[table][1] if table in _SINGLE else _MANY[table][1]


@functools.cache
def _specs(cls: type) -> dict[str, FieldSpec]:
    return {s.key: s for s in cls.SPECS}


def _refuse(what: str, text: Any, expected: str) -> ScenarioError:
    return ScenarioError.single(what, repr(text), expected)


def _closest(word: str, known: Sequence[str]) -> str:
    close = difflib.get_close_matches(word, list(known), n=1, cutoff=0.6)
    return f"did you mean '{close[0]}'? " if close else ""


@dataclass(frozen=True)
class ParamPath:
    """One field of a scenario, named as in ``barrier.skin.layer.1.diffusivity``.

    Build one with :meth:`parse` (from text) or directly; the constructor checks the syntax and
    that the field exists for that table, :meth:`parse` with a scenario (or :meth:`get`) that the
    item exists in it.

    Parameters
    ----------
    table : {"scenario", "substance", "compartment", "barrier", "exchange", "transfer", "dose", "output"}
    item : str, int or None
        The id (compartment, barrier, exchange, transfer), the dose number counted from 1, or
        None for a table of its own (scenario, substance, output).
    layer : int or None
        The layer number counted from 1 (barrier layers only).
    field : str
        The key in the scenario file (``"diffusivity"``, ``"from"``, ...).

    Raises
    ------
    ScenarioError
        For an unknown table, a field that the table does not have, or a malformed item.
    """

    table: str
    item: str | int | None = None
    layer: int | None = None
    field: str = ""

    def __post_init__(self) -> None:
        text = self._raw_text()
        if self.table not in TABLES:
            raise _refuse("parameter path", text, f"{_closest(str(self.table), TABLES)}a path starts with one of: "
                                                  f"{', '.join(TABLES)}")
        if self.table in _SINGLE:
            if self.item is not None or self.layer is not None:
                raise _refuse("parameter path", text, f"must read {_FORMS[self.table]}")
        elif self.table == "dose":
            if not _whole(self.item) or self.item < 1 or self.layer is not None:
                raise _refuse("parameter path", text, f"must read {_FORMS['dose']}")
        else:
            if not isinstance(self.item, str) or not ID_PATTERN.match(self.item):
                raise _refuse("parameter path", text, f"must read {_FORMS[self.table]} (an id starts with a letter "
                                                      "and holds only letters, digits, '_' and '-')")
            if self.layer is not None and (self.table != "barrier" or not _whole(self.layer) or self.layer < 1):
                raise _refuse("parameter path", text, f"must read {_FORMS[self.table]} (layers counted from 1)")
        specs = _specs(_class_of(self.table, self.layer))
        if self.field not in specs:
            if self.table in _SINGLE:
                where = f"the [{self.table}] table"
            elif self.table == "barrier" and self.layer is not None:
                where = "a barrier layer"
            else:
                where = f"{'an' if self.table[0] in 'aeiou' else 'a'} {self.table}"
            raise _refuse("parameter path", text,
                          f"{_closest(str(self.field), list(specs))}{where} has the fields {', '.join(specs)}")

    # ------------------------------------------------------------------ text
    def _raw_text(self) -> str:
        parts = [str(self.table)]
        if self.item is not None:
            parts.append(str(self.item))
        if self.layer is not None:
            parts += ["layer", str(self.layer)]
        parts.append(str(self.field))
        return ".".join(parts)

    @property
    def text(self) -> str:
        """The path as text: ``"barrier.skin.layer.1.diffusivity"``."""
        return self._raw_text()

    @property
    def label(self) -> str:
        """The field path that error messages print: ``"barrier 'skin' layer 1 diffusivity"``."""
        head, _ = self.owner_prefix
        return f"{head} {self.field}"

    @property
    def owner_prefix(self) -> tuple[str, str]:
        """The place of the object that holds the field: (message form, path form).

        ``("barrier 'skin' layer 1", "barrier.skin.layer.1")`` for a layer's field,
        ``("dose 2", "dose.2")``, ``("substance", "substance")``.
        """
        if self.table in _SINGLE:
            return self.table, self.table
        if self.table == "dose":
            return f"dose {self.item}", f"dose.{self.item}"
        head, at = f"{self.table} '{self.item}'", f"{self.table}.{self.item}"
        if self.layer is not None:
            head, at = f"{head} layer {self.layer}", f"{at}.layer.{self.layer}"
        return head, at

    def __str__(self) -> str:
        return self.text

    def __repr__(self) -> str:
        return f"ParamPath({self.text!r})"

    # ------------------------------------------------------------------ what the field tables say
    @property
    def spec(self) -> FieldSpec:
        """The field's entry in the model's field table."""
        return _specs(_class_of(self.table, self.layer))[self.field]

    @property
    def kind(self) -> str:
        """Kind of quantity (a key of :data:`barrierflow.units.KINDS`), or ``"number"``,
        ``"count"``, ``"text"``, ``"id"``, ``"times"``."""
        return self.spec.kind

    @property
    def unit(self) -> str:
        """The internal unit of the values (``"cm^2/h"``); ``""`` for a bare number or text."""
        kind = self.spec.kind
        if kind in KINDS:
            return KINDS[kind].internal
        return KINDS["time"].internal if kind == "times" else ""

    def attr_in(self, scenario: Scenario) -> str:
        """The attribute this path reads and sets in ``scenario``: the per-area one
        (``volume_per_area``) where the scenario gives the field per area, else the field's own."""
        spec = self.spec
        if spec.per_area is not None and getattr(self._owner(scenario), spec.per_area) is not None:
            return spec.per_area
        return spec.attr

    def kind_in(self, scenario: Scenario | None) -> str:
        """The kind of quantity of the value in ``scenario`` (``"volume_per_area"`` where the field
        is given per area there; :attr:`kind` without a scenario)."""
        if scenario is not None and self.spec.per_area is not None and self.attr_in(scenario) == self.spec.per_area:
            return self.spec.per_area_spec.kind
        return self.spec.kind

    def unit_in(self, scenario: Scenario | None) -> str:
        """The internal unit of the value in ``scenario`` (``"mL/cm^2"`` for a volume given per area)."""
        kind = self.kind_in(scenario)
        return KINDS[kind].internal if kind in KINDS else self.unit

    @property
    def numeric(self) -> bool:
        """True for a single number (a quantity with a unit, a bare number or a count)."""
        return self.spec.kind in KINDS or self.spec.kind in _NUMERIC

    @property
    def bound(self) -> str | None:
        """``"> 0"``, ``">= 0"`` or None: the range the model accepts."""
        return self.spec.bound

    @property
    def positive(self) -> bool:
        """True when the value must be > 0 (a study may then estimate its logarithm)."""
        return self.spec.bound == "> 0"

    @property
    def structural(self) -> bool:
        """True when the value shapes the run (the grid, dose times, the run's duration, output times)."""
        return self.spec.structural

    @property
    def paths(self) -> tuple[ParamPath, ...]:
        """This path alone (so that a path and a :class:`Tied` group are used alike)."""
        return (self,)

    # ------------------------------------------------------------------ reading text
    @classmethod
    def parse(cls, text: str | ParamPath, scenario: Scenario | None = None, *,
              what: str = "parameter path") -> ParamPath:
        """Read a path from its text, in the dotted form or the form of the messages.

        Parameters
        ----------
        text : str or ParamPath
            ``"barrier.skin.layer.1.diffusivity"`` or ``"barrier 'skin' layer 1 diffusivity"``.
        scenario : Scenario, optional
            When given, the path must name a field of this scenario.
        what : str
            The field path shown in a refusal (``"population variation"``, ``"fit --free"``).

        Returns
        -------
        ParamPath

        Raises
        ------
        ScenarioError
            Naming the text and what exists nearby ("did you mean ...").
        """
        if isinstance(text, ParamPath):
            path = text
        else:
            if not isinstance(text, str):
                raise _refuse(what, text, "must be a parameter path such as 'barrier.skin.layer.1.diffusivity'")
            parts = _split(text)
            try:
                path = _from_parts(parts, text)
            except ScenarioError as err:
                raise _retitle(err, what, text, scenario) from None
        if scenario is not None:
            try:
                path._owner(scenario)
            except ScenarioError as err:
                raise _retitle(err, what, text, scenario) from None
        return path

    # ------------------------------------------------------------------ the scenario
    def _index(self, scenario: Scenario) -> tuple[int | None, int | None]:
        """(index of the item in its tuple, index of the layer), each None where not used."""
        if self.table in _SINGLE:
            return None, None
        attr, _ = _MANY[self.table]
        items = getattr(scenario, attr)
        if self.table == "dose":
            if self.item > len(items):
                have = f"doses 1 to {len(items)}" if len(items) > 1 else ("only dose 1" if items else "no doses")
                raise _refuse("parameter path", self.text, f"the scenario has {have}")
            return self.item - 1, None
        ids = [x.id for x in items]
        if self.item not in ids:
            known = ", ".join(ids) if ids else "none"
            raise _refuse("parameter path", self.text,
                          f"{_closest(self.item, ids)}names no {self.table} of the scenario "
                          f"({self.table} ids: {known})")
        i = ids.index(self.item)
        if self.layer is None:
            return i, None
        n = len(items[i].layers)
        if self.layer > n:
            have = f"layers 1 to {n}" if n > 1 else "one layer"
            raise _refuse("parameter path", self.text, f"barrier '{self.item}' has {have}")
        return i, self.layer - 1

    def _owner(self, scenario: Scenario) -> Any:
        """The model object that holds this field in ``scenario``."""
        if self.table in _SINGLE:
            attr = _SINGLE[self.table][0]
            return scenario if attr is None else getattr(scenario, attr)
        i, j = self._index(scenario)
        obj = getattr(scenario, _MANY[self.table][0])[i]
        return obj if j is None else obj.layers[j]

    def get(self, scenario: Scenario) -> Any:
        """The value in ``scenario``, in the internal unit (None when an optional field is not set).

        A field the scenario gives per area (``volume = "10 uL/cm^2"``) is read and set per area
        (mL/cm^2; see :meth:`attr_in`, :meth:`kind_in`).

        Raises
        ------
        ScenarioError
            If the scenario has no such item (with "did you mean").
        """
        try:
            owner = self._owner(scenario)
        except ScenarioError as err:
            raise _retitle(err, "parameter path", self.text, scenario) from None
        return getattr(owner, self.attr_in(scenario))

    def exists(self, scenario: Scenario) -> bool:
        """True when the scenario has the item this path names (the field may be unset)."""
        try:
            self._owner(scenario)
        except ScenarioError:
            return False
        return True

    # ------------------------------------------------------------------ units
    def file_unit(self, scenario: Scenario | None = None) -> str:
        """The unit the scenario file wrote this value in.

        Read from :attr:`Scenario.file_units`; for a value the file did not give (or a scenario
        built in Python) the unit the model writes this field in (``um`` for a thickness,
        ``cm^2/s`` for a diffusivity), else the internal unit. ``""`` for a bare number.
        """
        kind = self.kind_in(scenario)
        if kind not in KINDS:
            return self.unit
        if scenario is not None:
            written = dict(scenario.file_units).get(self.text)
            if written is not None and _usable(kind, written, scenario.substance.molar_mass):
                return written
        spec = self.spec if kind == self.spec.kind else self.spec.per_area_spec
        return spec.unit or KINDS[kind].internal

    def to_unit(self, value: float, unit: str, scenario: Scenario | None = None) -> float:
        """``value`` (internal unit) expressed in ``unit``; a molar unit needs the scenario's molar mass.

        Rounded to 15 significant digits, as the reader rounds a converted value (so that
        ``1e-9 cm^2/s`` read from a file comes back as ``1e-9``, not ``9.999999999999999e-10``).
        A bare number or count is returned unchanged.
        """
        kind = self.kind_in(scenario)
        if kind not in KINDS:
            return value
        return _tidy(convert(float(value), kind, unit, _molar_mass(scenario)))

    def from_unit(self, number: float, unit: str, scenario: Scenario | None = None) -> float:
        """``number`` given in ``unit``, in the internal unit (rounded as the reader rounds)."""
        kind = self.kind_in(scenario)
        if kind not in KINDS:
            return number
        return _tidy(float(number) / unit_factor(kind, unit, _molar_mass(scenario)))

    def to_file_unit(self, value: float, scenario: Scenario) -> float:
        """``value`` (internal unit) in the unit the file used (:meth:`file_unit`)."""
        return self.to_unit(value, self.file_unit(scenario), scenario)

    def from_file_unit(self, number: float, scenario: Scenario) -> float:
        """``number`` in the unit the file used (:meth:`file_unit`), in the internal unit."""
        return self.from_unit(number, self.file_unit(scenario), scenario)

    def read(self, text: str | float, scenario: Scenario | None = None) -> Any:
        """A value written as in a scenario file (``"5e-9 cm^2/s"``), in the internal unit.

        A bare number or count may be given as a number or as its text.

        Raises
        ------
        UnitsError
            Naming this field's path (:attr:`label`), the value and what was expected.
        """
        kind = self.kind_in(scenario)
        if kind in KINDS:
            return parse_quantity(text, kind, self.label, _molar_mass(scenario))
        if kind in _NUMERIC and isinstance(text, str):
            try:
                value = int(text) if kind == "count" else float(text)
            except ValueError:
                expected = "a whole number such as 40" if kind == "count" else "a bare number such as 10 (no unit)"
                raise UnitsError(repr(text), expected, self.label) from None
            if not math.isfinite(value):
                raise UnitsError(text, "must be a finite number", self.label)
            return value
        return text


@dataclass(frozen=True)
class Tied:
    """Several paths that take one value: one parameter for a study.

    For example the first patch and every refill at one concentration
    (``compartment.patch.initial_concentration`` and ``dose.2.concentration``), or two layers
    that share a diffusivity. Accepted wherever a :class:`ParamPath` is: it has the same
    properties (those of its first path; :attr:`positive` when any member must be > 0), its
    :meth:`get` is the common value and :func:`with_values` sets every member.

    Its text is the members' texts joined by commas: ``"barrier.skin.layer.1.diffusivity,
    barrier.skin.layer.2.diffusivity"`` (without the space).

    Parameters
    ----------
    paths : sequence of ParamPath or str
        Two or more distinct paths of one kind of quantity.

    Raises
    ------
    ScenarioError
        For fewer than two paths, a path given twice, or members of different kinds.
    """

    paths: tuple[ParamPath, ...]

    def __post_init__(self) -> None:
        members = tuple(ParamPath.parse(p) if isinstance(p, str) else p for p in self.paths)
        object.__setattr__(self, "paths", members)
        text = ",".join(str(p) for p in members)
        if not all(isinstance(p, ParamPath) for p in members):
            raise _refuse("tied parameters", text, "every member must be a parameter path")
        if len(members) < 2:
            raise _refuse("tied parameters", text, "a tied group needs at least two paths")
        if len(set(members)) != len(members):
            raise _refuse("tied parameters", text, "a path appears twice in the group")
        kinds = {p.kind for p in members}
        if len(kinds) > 1:
            raise _refuse("tied parameters", text,
                          f"tied paths must hold one kind of quantity; these hold {', '.join(sorted(kinds))}")

    @classmethod
    def parse(cls, text: str, scenario: Scenario | None = None, *, what: str = "parameter path") -> Tied:
        """Read a group from its text (paths joined by commas); with a scenario, each must exist in it."""
        parts = [t.strip() for t in str(text).split(",")]
        return cls(tuple(ParamPath.parse(p, scenario, what=what) for p in parts))

    @property
    def text(self) -> str:
        """The members' texts joined by commas."""
        return ",".join(p.text for p in self.paths)

    @property
    def label(self) -> str:
        """The members' labels joined by commas, as messages print them."""
        return ", ".join(p.label for p in self.paths)

    def __str__(self) -> str:
        return self.text

    @property
    def spec(self) -> FieldSpec:
        """The field table entry of the first member."""
        return self.paths[0].spec

    @property
    def kind(self) -> str:
        """The members' kind of quantity."""
        return self.paths[0].kind

    @property
    def unit(self) -> str:
        """The internal unit of the value."""
        return self.paths[0].unit

    @property
    def numeric(self) -> bool:
        """True when the members are numbers."""
        return self.paths[0].numeric

    @property
    def bound(self) -> str | None:
        """The strictest range of the members."""
        bounds = {p.bound for p in self.paths}
        return "> 0" if "> 0" in bounds else (">= 0" if ">= 0" in bounds else None)

    @property
    def positive(self) -> bool:
        """True when the value must be > 0 (any member requires it)."""
        return self.bound == "> 0"

    @property
    def structural(self) -> bool:
        """True when any member shapes the run."""
        return any(p.structural for p in self.paths)

    def get(self, scenario: Scenario) -> Any:
        """The members' common value in ``scenario``.

        Raises
        ------
        ScenarioError
            If a member does not exist, or the members hold different values (give them one
            value in the scenario first, or set it with :func:`with_values`).
        """
        values = [p.get(scenario) for p in self.paths]
        if any(v != values[0] for v in values[1:]):
            shown = ", ".join(f"{p.text} = {v!r}" for p, v in zip(self.paths, values, strict=True))
            raise ScenarioError.single("tied parameters", shown,
                                       "tied paths take one value; these differ in the scenario")
        return values[0]

    def exists(self, scenario: Scenario) -> bool:
        """True when every member exists in the scenario."""
        return all(p.exists(scenario) for p in self.paths)

    def file_unit(self, scenario: Scenario | None = None) -> str:
        """The unit the file used for the first member."""
        return self.paths[0].file_unit(scenario)

    def to_unit(self, value: float, unit: str, scenario: Scenario | None = None) -> float:
        """As :meth:`ParamPath.to_unit`."""
        return self.paths[0].to_unit(value, unit, scenario)

    def from_unit(self, number: float, unit: str, scenario: Scenario | None = None) -> float:
        """As :meth:`ParamPath.from_unit`."""
        return self.paths[0].from_unit(number, unit, scenario)

    def to_file_unit(self, value: float, scenario: Scenario) -> float:
        """As :meth:`ParamPath.to_file_unit` (the first member's unit)."""
        return self.paths[0].to_file_unit(value, scenario)

    def from_file_unit(self, number: float, scenario: Scenario) -> float:
        """As :meth:`ParamPath.from_file_unit` (the first member's unit)."""
        return self.paths[0].from_file_unit(number, scenario)

    def read(self, text: str | float, scenario: Scenario | None = None) -> Any:
        """As :meth:`ParamPath.read`."""
        return self.paths[0].read(text, scenario)


Param: TypeAlias = ParamPath | Tied
"""A parameter of a study: one path, or a tied group of paths."""


def parse_param(text: str | Param, scenario: Scenario | None = None, *, what: str = "parameter path") -> Param:
    """A :class:`ParamPath`, or a :class:`Tied` group when the text joins paths with commas.

    See :meth:`ParamPath.parse` for the arguments.
    """
    if isinstance(text, Tied):
        if scenario is not None:
            for p in text.paths:
                ParamPath.parse(p, scenario, what=what)
        return text
    if isinstance(text, str) and "," in text:
        return Tied.parse(text, scenario, what=what)
    return ParamPath.parse(text, scenario, what=what)


# ---------------------------------------------------------------------- listing and changing
def _objects(scenario: Scenario) -> Iterator[tuple[str, str | int | None, int | None, Any]]:
    """(table, item, layer, object) for every object of a scenario, in the order of a file."""
    yield "scenario", None, None, scenario
    yield "substance", None, None, scenario.substance
    for table in ("compartment", "barrier", "exchange", "transfer"):
        for obj in getattr(scenario, _MANY[table][0]):
            yield table, obj.id, None, obj
            if table == "barrier":
                for j, layer in enumerate(obj.layers, start=1):
                    yield "barrier", obj.id, j, layer
    for n, dose in enumerate(scenario.doses, start=1):
        yield "dose", n, None, dose
    yield "output", None, None, scenario.output_units


def field_paths(scenario: Scenario) -> tuple[ParamPath, ...]:
    """Every field of every object of ``scenario``, set or not, numeric or not, in file order."""
    return tuple(ParamPath(table, item, layer, spec.key)
                 for table, item, layer, obj in _objects(scenario) for spec in type(obj).SPECS)


def parameter_paths(scenario: Scenario, *, structural: bool = True) -> tuple[ParamPath, ...]:
    """Every numeric field of ``scenario`` that holds a value, in the order of the file.

    Parameters
    ----------
    scenario : Scenario
    structural : bool
        False leaves out the fields that shape the run (cells, dose times and counts, the run's
        duration, the output step): what a population may vary while its subjects share one
        structure.

    Returns
    -------
    tuple of ParamPath
    """
    out = []
    for table, item, layer, obj in _objects(scenario):
        for spec in type(obj).SPECS:
            if ((spec.kind in KINDS or spec.kind in _NUMERIC) and getattr(obj, spec.attr) is not None
                    and (structural or not spec.structural)):
                out.append(ParamPath(table, item, layer, spec.key))
    return tuple(out)


def with_values(scenario: Scenario, values: Mapping[Param | str, Any]) -> Scenario:
    """A new scenario with the given fields set, validated once.

    Parameters
    ----------
    scenario : Scenario
    values : mapping
        Path (a :class:`ParamPath`, a :class:`Tied` group, or their text) to the new value, in
        the internal unit (see :meth:`ParamPath.from_file_unit` to convert from the file's).
        A tied group sets every member.

    Returns
    -------
    Scenario
        Each changed object is rebuilt once with :func:`dataclasses.replace` (which checks it),
        then the scenario once (which checks the network). ``source`` and ``file_units`` are
        kept.

    Raises
    ------
    ScenarioError
        For a path that does not exist ("did you mean"), a path set twice, or a value the model
        refuses (every problem at once, each with its field path and :attr:`Problem.path`).

    Examples
    --------
    >>> import barrierflow as bf                                                 # doctest: +SKIP
    >>> s = bf.load("scenarios/diffusion_cell.toml")                             # doctest: +SKIP
    >>> s2 = with_values(s, {"barrier.membrane.layer.1.diffusivity": 2e-5})     # doctest: +SKIP
    """
    changes: dict[ParamPath, Any] = {}
    problems: list[Problem] = []
    for key, value in values.items():
        param = key if isinstance(key, ParamPath | Tied) else parse_param(key, scenario)
        for p in param.paths:
            if p in changes:
                problems.append(Problem("parameter path", repr(p.text), "is set twice; give each path once"))
            changes[p] = _coerce(p, value)
    if problems:
        raise ScenarioError(problems)
    single: dict[str, dict[str, Any]] = {}
    many: dict[tuple[str, int], dict[str, Any]] = {}
    layers: dict[int, dict[int, dict[str, Any]]] = {}
    for p, value in changes.items():
        try:
            i, j = p._index(scenario)
        except ScenarioError as err:
            raise _retitle(err, "parameter path", p.text, scenario) from None
        attr = p.attr_in(scenario)
        if p.table in _SINGLE:
            single.setdefault(p.table, {})[attr] = value
            continue
        attrs = many.setdefault((p.table, i), {})
        if j is None:
            attrs[attr] = value
        else:
            layers.setdefault(i, {}).setdefault(j, {})[attr] = value
    new: dict[str, Any] = dict(single.pop("scenario", {}))
    for table, attrs in single.items():
        attr = _SINGLE[table][0]
        try:
            new[attr] = dataclasses.replace(getattr(scenario, attr), **attrs)
        except ScenarioError as err:
            problems.extend(err.within(table, at=table).problems)
    lists: dict[str, list[Any]] = {}
    for (table, i), attrs in many.items():
        items = lists.setdefault(table, list(getattr(scenario, _MANY[table][0])))
        obj = items[i]
        if table == "dose":
            head, at = f"dose {i + 1}", f"dose.{i + 1}"
        else:
            head, at = f"{table} '{obj.id}'", f"{table}.{obj.id}"
        if i in layers and table == "barrier":
            stack = list(obj.layers)
            failed = False
            for j, layer_attrs in layers[i].items():
                try:
                    stack[j] = dataclasses.replace(stack[j], **layer_attrs)
                except ScenarioError as err:
                    problems.extend(err.within(f"{head} layer {j + 1}", at=f"{at}.layer.{j + 1}").problems)
                    failed = True
            if failed:  # still check the barrier's own fields, so that every problem is reported
                try:
                    dataclasses.replace(obj, **attrs)
                except ScenarioError as err:
                    problems.extend(err.within(head, at=at).problems)
                continue
            attrs = {**attrs, "layers": tuple(stack)}
        try:
            items[i] = dataclasses.replace(obj, **attrs)
        except ScenarioError as err:
            problems.extend(err.within(head, at=at).problems)
    if problems:
        raise ScenarioError(problems)
    for table, items in lists.items():
        new[_MANY[table][0]] = tuple(items)
    return dataclasses.replace(scenario, **new)


def _coerce(path: ParamPath, value: Any) -> Any:
    """A value as the model holds it: numbers as float (counts as int); anything else as given,
    for the model to refuse with its own message."""
    if type(value) is float:
        return value if path.spec.kind != "count" else _coerce_count(value)
    kind = path.spec.kind
    if isinstance(value, bool):
        return value
    if kind == "count":
        return _coerce_count(value)
    if kind in KINDS or kind == "number":
        return float(value) if isinstance(value, numbers.Real) else value
    if kind == "times" and isinstance(value, Sequence) and not isinstance(value, str):
        return tuple(float(v) if isinstance(v, numbers.Real) and not isinstance(v, bool) else v for v in value)
    return value


def _coerce_count(value: Any) -> Any:
    if isinstance(value, numbers.Integral) and not isinstance(value, bool):
        return int(value)
    if isinstance(value, numbers.Real) and not isinstance(value, bool) and float(value).is_integer():
        return int(value)
    return value


# ---------------------------------------------------------------------- text of paths
def _split(text: str) -> list[str]:
    """The words of a path in either form."""
    s = text.strip()
    if re.search(r"[\s'\"]", s):
        return [a or b or c for a, b, c in _TOKEN.findall(s)]
    return s.split(".")


def _whole(x: Any) -> bool:
    return isinstance(x, int) and not isinstance(x, bool)


def _from_parts(parts: list[str], text: str) -> ParamPath:
    table = parts[0] if parts else ""
    if table not in TABLES:
        raise _refuse("parameter path", text,
                      f"{_closest(table, TABLES)}a path starts with one of: {', '.join(TABLES)}")
    n = len(parts)
    if table in _SINGLE:
        if n != 2:
            raise _refuse("parameter path", text, f"must read {_FORMS[table]}")
        return ParamPath(table, None, None, parts[1])
    if table == "dose":
        if n != 3 or not parts[1].isdigit() or int(parts[1]) < 1:
            raise _refuse("parameter path", text, f"must read {_FORMS['dose']}")
        return ParamPath("dose", int(parts[1]), None, parts[2])
    if table == "barrier" and n >= 4 and parts[2] == "layer":
        if n != 5 or not parts[3].isdigit() or int(parts[3]) < 1:
            raise _refuse("parameter path", text, f"must read {_FORMS['barrier']} (layers counted from 1)")
        return ParamPath("barrier", parts[1], int(parts[3]), parts[4])
    if n != 3:
        raise _refuse("parameter path", text, f"must read {_FORMS[table]}")
    return ParamPath(table, parts[1], None, parts[2])


def _retitle(err: ScenarioError, what: str, text: Any, scenario: Scenario | None) -> ScenarioError:
    """The refusal of a path, titled ``what``, naming the text as given, with the closest path of the scenario."""
    expected = err.problems[0].expected
    if scenario is not None:
        known = [p.text for p in field_paths(scenario)]
        close = difflib.get_close_matches(_dotted(text), known, n=1, cutoff=0.6)
        if close:
            rest = re.sub(r"\Adid you mean '[^']*'\? ", "", expected)
            expected = f"did you mean '{close[0]}'? {rest}"
    return ScenarioError.single(what, repr(text), expected)


def _dotted(text: Any) -> str:
    if isinstance(text, ParamPath):
        return text.text
    return ".".join(_split(str(text)))


# ---------------------------------------------------------------------- units of a file
def _molar_mass(scenario: Scenario | None) -> float | None:
    return scenario.substance.molar_mass if scenario is not None else None


def _usable(kind: str, unit: str, molar_mass: float | None) -> bool:
    try:
        unit_factor(kind, unit, molar_mass)
    except (UnitsError, KeyError):
        return False
    return True


def _unit_of(raw: str) -> str:
    """The unit part of a value as written: ``"1e-9 cm^2/s"`` -> ``"cm^2/s"``."""
    m = _NUMBER_AT_START.match(raw)
    return raw[m.end():].strip() if m else ""


_DIMENSIONAL: dict[int, tuple[tuple[FieldSpec, ...], tuple[FieldSpec, ...]]] = {}


def _dimensional(specs: tuple[FieldSpec, ...]) -> tuple[FieldSpec, ...]:
    """The specs of quantities with a unit, in order (found once per tuple of specs)."""
    known = _DIMENSIONAL.get(id(specs))
    if known is None or known[0] is not specs:
        known = _DIMENSIONAL[id(specs)] = (specs, tuple(s for s in specs if s.kind in KINDS))
    return known[1]


def units_written(doc: Mapping[str, Any], parts: Mapping[str, Sequence[Any]]) -> tuple[tuple[str, str], ...]:
    """The unit of every dimensional value of a scenario document, by parameter path.

    Parameters
    ----------
    doc : mapping
        The parsed TOML document (that built without problems).
    parts : mapping
        ``"compartment"``, ``"barrier"``, ``"exchange"``, ``"transfer"`` to the objects built from
        its tables, in the same order (they give the ids, defaults included).

    Returns
    -------
    tuple of (str, str)
        For :attr:`Scenario.file_units`.
    """
    out: list[tuple[str, str]] = []

    def scan(at: str, table: Any, specs: tuple[FieldSpec, ...]) -> None:
        if not isinstance(table, Mapping):
            return
        for spec in _dimensional(specs):
            raw = table.get(spec.key)
            if isinstance(raw, str):
                unit = _unit_of(raw)
                if unit:
                    out.append((f"{at}.{spec.key}", unit))

    scan("scenario", doc.get("scenario"), Scenario.SPECS)
    scan("substance", doc.get("substance"), Substance.SPECS)
    for table in ("compartment", "barrier", "exchange", "transfer"):
        raw_tables = doc.get(table, [])
        for raw, obj in zip(raw_tables if isinstance(raw_tables, list) else [], parts.get(table, ()), strict=False):
            scan(f"{table}.{obj.id}", raw, _MANY[table][1].SPECS)
            if table == "barrier" and isinstance(raw, Mapping) and isinstance(raw.get("layer"), list):
                for j, layer in enumerate(raw["layer"], start=1):
                    scan(f"barrier.{obj.id}.layer.{j}", layer, Layer.SPECS)
    doses = doc.get("dose", [])
    for n, raw in enumerate(doses if isinstance(doses, list) else [], start=1):
        scan(f"dose.{n}", raw, Dose.SPECS)
    return tuple(out)
