"""Exception types of barrierflow.

The hierarchy is small on purpose::

    BarrierflowError
    ├── ScenarioError   a scenario (file, graph or object) cannot be run as given
    │   └── DataError   an experiment data file cannot be used as given
    ├── UnitsError      a value has no unit, an unknown unit or a unit of the wrong dimension
    └── SolverError     the numerical solution failed

Every message follows one pattern, so that a scientist reads at once what is wrong::

    <file>: <field path>: got <value>; <what was expected>

for example ``patch.toml: barrier 'skin' layer 1 thickness: got -15 um; must be > 0``.
A :class:`ScenarioError` carries *all* the problems found in one file, not only the first.
Each :class:`Problem` also carries its place as a parameter path (``barrier.skin.layer.1.thickness``,
see :mod:`barrierflow.model.paths`), so that a program finds the field without reading the message.

Every error pickles and unpickles to an equal error (the same type, message and attributes), so
that a worker process or a cluster can send it back intact.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, replace

__all__ = [
    "BarrierflowError",
    "DataError",
    "Problem",
    "ScenarioError",
    "SolverError",
    "UnitsError",
]


MAX_SHOWN = 200
"""Longest value shown in a message (characters); a longer one is cut, with its length."""


def _rebuild(cls: type, args: tuple) -> BaseException:
    """Recreate an error without calling its ``__init__`` (pickle then restores its attributes)."""
    return cls.__new__(cls, *args)


class BarrierflowError(Exception):
    """Base class of every error that barrierflow raises on purpose.

    Subclasses may take any constructor arguments: pickling stores the message arguments and the
    instance attributes, not the constructor call, so a new subclass travels intact too.
    """

    def __reduce__(self):
        return _rebuild, (type(self), self.args), self.__dict__


@dataclass(frozen=True)
class Problem:
    """One thing wrong with a scenario.

    Parameters
    ----------
    field : str
        Path of the offending field, for example ``"barrier 'skin' layer 1 thickness"``.
    value : str
        The offending value as the user wrote it (or as the model holds it).
    expected : str
        What would have been accepted, for example ``"must be > 0"``.
    file : str or None
        The scenario file the value came from, if any.
    path : str
        The same place as a parameter path (the text of a
        :class:`barrierflow.model.paths.ParamPath`), for example
        ``"barrier.skin.layer.1.thickness"``; a table without a usable id is named by its
        position from 1 (``"compartment.3.volume"``); a table alone by its name
        (``"compartment"``); ``""`` when the problem has no single place (a syntax error, the
        size of the whole grid, an option outside the scenario).
    """

    field: str
    value: str
    expected: str
    file: str | None = None
    path: str = ""

    def __post_init__(self) -> None:
        # one problem, one line: control characters (a line break inside a value or an id) are
        # shown as escapes, and a value of thousands of characters by its start and its length
        value = _visible(self.value if isinstance(self.value, str) else str(self.value))
        if len(value) > MAX_SHOWN:
            value = f"{value[:MAX_SHOWN - 40]}... ({len(value)} characters)"
        object.__setattr__(self, "value", value)
        object.__setattr__(self, "field", _visible(str(self.field)))
        object.__setattr__(self, "expected", _visible(str(self.expected)))

    def __str__(self) -> str:
        head = f"{self.file}: " if self.file else ""
        field = f"{self.field}: " if self.field else ""
        return f"{head}{field}got {self.value}; {self.expected}"

    def within(self, prefix: str = "", file: str | None = None, at: str = "") -> Problem:
        """Return this problem placed inside a table.

        Parameters
        ----------
        prefix : str
            Put in front of the field path of the message (``"barrier 'skin'"``).
        file : str or None
            The file, when given.
        at : str
            Put in front of :attr:`path` (``"barrier.skin"``), the same place as ``prefix``.
        """
        field = f"{prefix} {self.field}".strip() if prefix else self.field
        path = ".".join(x for x in (at, self.path) if x)
        return replace(self, field=field, file=file if file is not None else self.file, path=path)


_CONTROL = re.compile("[\x00-\x1f\x7f-\x9f\u2028\u2029]")


def _visible(text: str) -> str:
    """``text`` with control characters written as escapes (``\\n``, ``\\x00``)."""
    return _CONTROL.sub(lambda m: repr(m.group())[1:-1], text)


class ScenarioError(BarrierflowError, ValueError):
    """A scenario cannot be run as given; carries every :class:`Problem` found.

    Parameters
    ----------
    problems : sequence of Problem
        All problems found, in the order of the file.
    """

    def __init__(self, problems: list[Problem] | tuple[Problem, ...]):
        self.problems: tuple[Problem, ...] = tuple(problems)
        super().__init__("\n".join(str(p) for p in self.problems))

    @classmethod
    def single(cls, field: str, value: object, expected: str, file: str | None = None,
               path: str = "") -> ScenarioError:
        """Build an error that holds one problem."""
        return cls([Problem(field, str(value), expected, file, path)])

    def within(self, prefix: str = "", file: str | None = None, at: str = "") -> ScenarioError:
        """Return the same error with every field path prefixed and the file set (see :meth:`Problem.within`)."""
        return type(self)([p.within(prefix, file, at) for p in self.problems])


class DataError(ScenarioError):
    """An experiment data file (measured values against time) cannot be used as given.

    Carries every :class:`Problem` found, each naming the row and the column
    (``field = "row 7, column 'permeated:skin#2 [ug/cm^2]'"``), the value and what was expected.
    A subclass of :class:`ScenarioError`, so that whatever refuses a bad input refuses a bad data
    file the same way (the command line exits with status 2).
    """


class UnitsError(BarrierflowError, ValueError):
    """A dimensional value is missing its unit, has an unknown unit or a unit of the wrong kind.

    Parameters
    ----------
    value : str
        The text or number that was given.
    expected : str
        What was expected, for example ``"a length such as '15 um'"``.
    field : str
        The field path, when known.
    """

    def __init__(self, value: object, expected: str, field: str = ""):
        self.value = str(value)
        self.expected = expected
        self.field = field
        self.problem = Problem(field, self.value, expected)
        super().__init__(str(self.problem))


class SolverError(BarrierflowError, RuntimeError):
    """The numerical solution failed.

    Parameters
    ----------
    message : str
        What failed and what to change.
    time : float or None, h
        Simulated time at which the failure happened.
    part : str
        The part of the model most involved (a barrier or compartment id), when known.
    result : object or None
        The partial result up to the failure, when one could be built.
    """

    def __init__(self, message: str, time: float | None = None, part: str = "", result: object = None):
        self.time = time
        self.part = part
        self.result = result
        super().__init__(message)
