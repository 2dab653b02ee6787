"""Measured data: what a lab observed against time, in replicate cells.

An :class:`Experiment` holds the times of a data file and one :class:`Series` per column. A
series is an *observable* named as the traces CSV names its columns, with a replicate tag:
``permeated:skin#2`` is the cumulative amount per area that crossed barrier ``skin`` in cell 2,
``conc:receptor#1`` the receptor concentration measured in the samples of cell 1.

:data:`OBSERVABLES` is the one list of what can be observed: the quantity, what it belongs to (a
compartment or a barrier) and its kind of quantity (:data:`barrierflow.units.KINDS`). Values are
held in the internal units (h, mg/mL, mg, mg/cm^2, mg/(cm^2 h)); a missing value is NaN. The
file's own units are kept (:attr:`Experiment.time_unit`, :attr:`Series.unit`) so that a report
shows the numbers as the lab wrote them.

Files are read by :func:`barrierflow.io.load_experiment`; this module checks the invariants of
an experiment however it was made.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from ..errors import DataError, Problem

__all__ = ["OBSERVABLES", "Experiment", "Observable", "Series", "parse_observable"]


class Observable(NamedTuple):
    """What a quantity of the traces belongs to, and its kind of quantity."""

    owner: str   # "compartment" or "barrier"
    kind: str    # a key of barrierflow.units.KINDS
    words: str   # what it is, for messages and reports


OBSERVABLES: dict[str, Observable] = {
    "conc": Observable("compartment", "concentration", "concentration in a compartment"),
    "amount": Observable("compartment", "amount", "amount in a compartment"),
    "permeated": Observable("barrier", "amount_per_area",
                            "cumulative amount per area that crossed a barrier into its 'to' compartment"),
    "flux": Observable("barrier", "flux", "flux per area out of a barrier into its 'to' compartment"),
}
"""The quantities an experiment can observe, by the name the traces CSV gives them."""

_NAME = re.compile(r"^(?P<quantity>[A-Za-z_]+):(?P<target>[A-Za-z][A-Za-z0-9_\-]*)(?:#(?P<rep>[A-Za-z0-9_\-]+))?$")


def parse_observable(text: str) -> tuple[str, str, str | None]:
    """Split ``"permeated:skin#2"`` into ``("permeated", "skin", "2")``.

    The replicate tag may be missing (``None``).

    Raises
    ------
    ValueError
        With what is wrong, in words (the reader adds the row and column).
    """
    m = _NAME.match(text.strip())
    if m is None:
        raise ValueError("must be named like a trace with a replicate tag, such as 'permeated:skin#1' or "
                         f"'conc:receptor#2' (quantities: {', '.join(OBSERVABLES)})")
    quantity = m.group("quantity")
    if quantity not in OBSERVABLES:
        raise ValueError(f"unknown quantity '{quantity}'; an experiment can observe {', '.join(OBSERVABLES)}")
    return quantity, m.group("target"), m.group("rep")


@dataclass(frozen=True)
class Series:
    """One column of an experiment: an observable in one replicate.

    Parameters
    ----------
    quantity : str
        A key of :data:`OBSERVABLES` (``"permeated"``, ``"conc"``, ...).
    target : str
        The barrier or compartment id.
    replicate : str
        The replicate tag (``"1"``).
    values : tuple of float
        One per time of the experiment, in the internal unit of the quantity's kind; NaN where
        the cell was blank.
    unit : str
        The unit the file wrote the values in (for reports).
    column : str
        The column's header as written.
    """

    quantity: str
    target: str
    replicate: str
    values: tuple[float, ...]
    unit: str
    column: str = ""

    @property
    def observable(self) -> str:
        """``"permeated:skin"``: the trace this series measures."""
        return f"{self.quantity}:{self.target}"

    @property
    def name(self) -> str:
        """``"permeated:skin#2"``."""
        return f"{self.observable}#{self.replicate}"

    @property
    def kind(self) -> str:
        """The kind of quantity (a key of :data:`barrierflow.units.KINDS`)."""
        return OBSERVABLES[self.quantity].kind

    @property
    def owner(self) -> str:
        """``"compartment"`` or ``"barrier"``."""
        return OBSERVABLES[self.quantity].owner

    @property
    def array(self) -> np.ndarray:
        """The values as a new float array (NaN where missing), internal unit."""
        return np.array(self.values, dtype=float)


@dataclass(frozen=True)
class Experiment:
    """Measured values against time: the content of one experiment data file.

    Parameters
    ----------
    times : tuple of float, h
        Increasing, >= 0.
    series : tuple of Series
        One per column; every one has a value (or NaN) at every time; no two share observable and
        replicate.
    time_unit : str
        The unit the file wrote the times in.
    source : str or None
        The file the data came from (not part of equality).

    Raises
    ------
    DataError
        Listing every problem: times not increasing or negative, values negative or not finite
        numbers, a series of the wrong length, a repeated column, an unknown quantity.
    """

    times: tuple[float, ...]
    series: tuple[Series, ...]
    time_unit: str = "h"
    source: str | None = field(default=None, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "times", tuple(float(t) for t in self.times))
        object.__setattr__(self, "series", tuple(self.series))
        problems: list[Problem] = []
        if not self.times:
            problems.append(Problem("time", "no rows", "an experiment needs at least one time with a value",
                                    self.source))
        for i, t in enumerate(self.times):
            if not math.isfinite(t) or t < 0:
                problems.append(Problem(f"time {i + 1}", f"{t:g} h", "must be a finite time >= 0", self.source))
            elif i and t <= self.times[i - 1]:
                problems.append(Problem(f"time {i + 1}", f"{t:g} h",
                                        f"times must increase; the time before is {self.times[i - 1]:g} h",
                                        self.source))
        if not self.series:
            problems.append(Problem("series", "no columns", "an experiment needs at least one observed column",
                                    self.source))
        seen: set[tuple[str, str, str]] = set()
        for s in self.series:
            where = f"series '{s.column or s.name}'"
            if s.quantity not in OBSERVABLES:
                problems.append(Problem(where, repr(s.quantity), f"an experiment can observe {', '.join(OBSERVABLES)}",
                                        self.source))
                continue
            key = (s.quantity, s.target, s.replicate)
            if key in seen:
                problems.append(Problem(where, s.name, "appears twice; give each replicate its own tag (#1, #2, ...)",
                                        self.source))
            seen.add(key)
            if len(s.values) != len(self.times):
                problems.append(Problem(where, f"{len(s.values)} values", f"needs one per time ({len(self.times)})",
                                        self.source))
                continue
            for i, v in enumerate(s.values):
                if not isinstance(v, float | int) or isinstance(v, bool) or math.isinf(v) or (v < 0):
                    problems.append(Problem(f"{where} at time {i + 1}", repr(v),
                                            "must be a number >= 0 (NaN for a missing value)", self.source))
        if not problems and not any(np.isfinite(s.array).any() for s in self.series):
            problems.append(Problem("series", "only blank values", "an experiment needs at least one measured value",
                                    self.source))
        if problems:
            raise DataError(problems)

    # ------------------------------------------------------------------ views
    @property
    def time_array(self) -> np.ndarray:
        """The times as a new float array, h."""
        return np.array(self.times, dtype=float)

    @property
    def observables(self) -> tuple[str, ...]:
        """The observables measured (``"permeated:skin"``), in column order, each once."""
        return tuple(dict.fromkeys(s.observable for s in self.series))

    @property
    def replicates(self) -> tuple[str, ...]:
        """The replicate tags, in column order, each once."""
        return tuple(dict.fromkeys(s.replicate for s in self.series))

    @property
    def n_observations(self) -> int:
        """Number of measured values (blank cells not counted)."""
        return int(sum(np.isfinite(s.array).sum() for s in self.series))

    def of(self, observable: str) -> tuple[Series, ...]:
        """The series of one observable (every replicate), in column order."""
        return tuple(s for s in self.series if s.observable == observable)

    def replicate(self, tag: str) -> Experiment:
        """The experiment restricted to one replicate's columns."""
        chosen = tuple(s for s in self.series if s.replicate == tag)
        if not chosen:
            raise DataError([Problem("replicate", repr(tag), f"the data have replicates {', '.join(self.replicates)}",
                                     self.source)])
        return Experiment(self.times, chosen, self.time_unit, self.source)
