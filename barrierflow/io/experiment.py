"""Reading experiment data files: measured values against time, in replicate columns.

The format (fixed by the project's extension contract)::

    # lines starting with '#' are comments (say where the data come from)
    time [h],permeated:skin#1 [ug/cm^2],permeated:skin#2 [ug/cm^2],permeated:skin#3 [ug/cm^2]
    0,0,0,0
    2,0.41,0.37,
    4,1.52,1.61,1.44

- a header row; the first column is ``time [unit]``;
- every other column an observable named as the traces CSV names it (``permeated:<barrier>``,
  ``conc:<compartment>``, ``amount:<compartment>``, ``flux:<barrier>``; see
  :data:`barrierflow.model.experiment.OBSERVABLES`) with a replicate tag after ``#`` (a column
  without a tag is replicate ``1``) and its unit in brackets;
- a blank cell is a missing value; a row whose observed cells are all blank is kept;
- comma-separated, UTF-8 (a byte-order mark is allowed).

A unit missing from the header can be given to the reader instead (``time_unit``, ``unit``; a
unit in the header always wins). Concentration data are receptor concentrations measured in the
samples; the fit compares them with the model's concentration at the sample times (the
scenario's own sampling protocol applies; see :mod:`barrierflow.analysis.sampling` for the
correction of cumulative amounts).

Every problem of a file is reported at once (up to :data:`MAX_PROBLEMS`), each naming the row (the
line of the file, the header being row 1 unless comments come first) and the column::

    cells.csv: row 5, column 'permeated:skin#2 [ug/cm^2]': got -0.3; must be a number >= 0 ...
"""

from __future__ import annotations

import csv
import math
import os
import re
from pathlib import Path

from ..errors import DataError, Problem, UnitsError
from ..model.experiment import OBSERVABLES, Experiment, Series, parse_observable
from ..units import (
    KINDS,
    _tidy,  # the reader's rounding of converted values (a scenario file's values are rounded the same way)
    internal_per_unit,
)

__all__ = ["MAX_PROBLEMS", "load_experiment", "loads_experiment"]

MAX_PROBLEMS = 30
"""Most problems listed for one file (the count of the rest is given)."""

MAX_BYTES = 64 * 1024 * 1024
"""Largest data file read (64 MiB)."""

_HEADER = re.compile(r"^\s*(?P<name>[^\[\]]*?)\s*(?:\[(?P<unit>[^\[\]]*)\])?\s*$")
_NUMBER = re.compile(r"^[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?$")


class _Problems:
    """Collects the problems of one file."""

    def __init__(self, source: str) -> None:
        self.source = source
        self.items: list[Problem] = []
        self.more = 0

    def add(self, field: str, value: str, expected: str) -> None:
        if len(self.items) < MAX_PROBLEMS:
            self.items.append(Problem(field, value, expected, self.source))
        else:
            self.more += 1

    def raise_if_any(self) -> None:
        if not self.items:
            return
        items = list(self.items)
        if self.more:
            items.append(Problem("", f"{self.more} more problems", "not listed; mend the ones above first",
                                 self.source))
        raise DataError(items)


def load_experiment(path: str | os.PathLike[str], *, time_unit: str | None = None, unit: str | None = None,
                    molar_mass: float | None = None) -> Experiment:
    """Read an experiment data file.

    Parameters
    ----------
    path : path-like
        The CSV file.
    time_unit : str, optional
        Unit of the time column when its header gives none (``"h"``, ``"min"``).
    unit : str, optional
        Unit of the observed columns whose header gives none (``"ug/cm^2"``).
    molar_mass : float, optional, mg/mmol
        The substance's molar mass, needed for molar units (``umol/L``); pass
        ``scenario.substance.molar_mass``.

    Returns
    -------
    Experiment
        Values in the internal units; NaN for blank cells.

    Raises
    ------
    DataError
        Naming the file, the row and the column of every problem: a missing or malformed header,
        an unknown quantity or unit, a unit of the wrong kind, a time that is blank, not a number,
        negative or not after the time above, a value that is not a number or negative, a row
        with too many or too few cells.
    OSError
        When the file cannot be read.

    Examples
    --------
    >>> text = "time [h],permeated:skin#1 [ug/cm^2]\\n0,0\\n4,1.5\\n"
    >>> e = loads_experiment(text, name="cells.csv")
    >>> e.times, e.series[0].name, e.series[0].values
    ((0.0, 4.0), 'permeated:skin#1', (0.0, 0.0015))
    """
    source = str(path)
    size = Path(path).stat().st_size
    if size > MAX_BYTES:
        raise DataError([Problem("file", f"{size} bytes", f"is too large for a data file (at most {MAX_BYTES} bytes)",
                                 source)])
    raw = Path(path).read_bytes()
    return _read(raw, source, time_unit, unit, molar_mass)


def loads_experiment(text: str | bytes, *, name: str = "<data>", time_unit: str | None = None,
                     unit: str | None = None, molar_mass: float | None = None) -> Experiment:
    """Read an experiment from the text of a data file (an upload); see :func:`load_experiment`.

    Parameters
    ----------
    text : str or bytes
        The content of the file.
    name : str
        The name shown in messages (the uploaded file's name).
    time_unit, unit, molar_mass
        As for :func:`load_experiment`.
    """
    raw = text.encode("utf-8") if isinstance(text, str) else bytes(text)
    if len(raw) > MAX_BYTES:
        raise DataError([Problem("file", f"{len(raw)} bytes",
                                 f"is too large for a data file (at most {MAX_BYTES} bytes)", name)])
    return _read(raw, name, time_unit, unit, molar_mass)


def _decode(raw: bytes, source: str) -> str:
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise DataError([Problem("file", "UTF-16 text", "must be UTF-8 text; save the file as 'CSV UTF-8'", source)])
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        raise DataError([Problem("file", f"byte {err.start + 1} is not UTF-8",
                                 "must be UTF-8 text; save the file as 'CSV UTF-8'", source)]) from None


def _read(raw: bytes, source: str, time_unit: str | None, unit: str | None,
          molar_mass: float | None) -> Experiment:
    text = _decode(raw, source)
    if "\x00" in text:
        raise DataError([Problem("file", "a NUL character", "must be a text file (CSV), not binary data", source)])
    reader = csv.reader(text.splitlines(), strict=False)
    problems = _Problems(source)
    header: list[str] | None = None
    header_row = 0
    rows: list[tuple[int, list[str]]] = []
    try:
        for cells in reader:
            row = reader.line_num
            if not cells or all(not c.strip() for c in cells):
                continue
            if cells[0].lstrip().startswith("#"):
                continue
            if header is None:
                header, header_row = cells, row
            else:
                rows.append((row, cells))
    except csv.Error as err:
        raise DataError([Problem(f"row {reader.line_num}", "unreadable CSV", f"{err}", source)]) from None
    if header is None:
        raise DataError([Problem("header", "no header row",
                                 "the first row must name the columns, such as 'time [h],permeated:skin#1 [ug/cm^2]'",
                                 source)])
    columns = _columns(header, header_row, problems, time_unit, unit, molar_mass)
    problems.raise_if_any()
    assert columns is not None
    time_factor, time_written, specs = columns
    times: list[float] = []
    values: list[list[float]] = [[] for _ in specs]
    width = len(header)
    last_time: tuple[int, float] | None = None
    for row, cells in rows:
        if len(cells) > width and any(c.strip() for c in cells[width:]):
            problems.add(f"row {row}", f"{len(cells)} cells", f"the header names {width} columns; remove the extra "
                         "cells or name their columns")
        cells = cells + [""] * (width - len(cells))
        where_time = f"row {row}, column '{header[0].strip()}'"
        t = _number(cells[0], where_time, problems, blank_ok=False)
        if t is not None:
            if t < 0:
                problems.add(where_time, cells[0].strip(), "must be a time >= 0")
            elif last_time is not None and t <= last_time[1]:
                problems.add(where_time, cells[0].strip(),
                             f"times must increase down the file; row {last_time[0]} has "
                             f"{_show(last_time[1])} {time_written} (put replicates in columns, not in repeated rows)")
            else:
                last_time = (row, t)
        times.append(_tidy(t * time_factor) if t is not None else math.nan)
        for k, (col, _, factor, _) in enumerate(specs):
            where = f"row {row}, column '{header[col].strip()}'"
            v = _number(cells[col], where, problems, blank_ok=True)
            if v is not None and v < 0:
                problems.add(where, cells[col].strip(),
                             "must be a number >= 0 (a measured amount or concentration is not negative; leave the "
                             "cell blank for a value below the limit of quantification or missing)")
                v = None
            values[k].append(_tidy(v * factor) if v is not None else math.nan)
    if not rows:
        problems.add(f"row {header_row + 1}", "no data rows",
                     "the header must be followed by at least one row of values")
    problems.raise_if_any()
    series = tuple(Series(quantity, target, rep, tuple(values[k]), written, header[col].strip())
                   for k, (col, (quantity, target, rep), _, written) in enumerate(specs))
    return Experiment(tuple(times), series, time_written, source)


def _columns(header: list[str], row: int, problems: _Problems, time_unit: str | None, unit: str | None,
             molar_mass: float | None):
    """(time factor, time unit, [(column, (quantity, target, replicate), factor, unit)]) or None on problems."""
    if len(header) == 1 and (";" in header[0] or "\t" in header[0]):
        sep = "semicolons" if ";" in header[0] else "tabs"
        problems.add(f"row {row}", repr(header[0]), f"the columns seem separated by {sep}; save the file as "
                     "comma-separated values (CSV) with '.' as the decimal mark")
        return None
    name, written = _split_header(header[0])
    where = f"row {row}, column 1"
    if name is None or name.lower() != "time":
        problems.add(where, repr(header[0].strip()), "the first column must be the time, such as 'time [h]'")
        return None
    written = written or time_unit
    time_factor = 1.0
    if not written:
        problems.add(where, repr(header[0].strip()), "the time needs a unit: write it in the header as 'time [h]' "
                     "(or give the time unit as an option)")
    else:
        time_factor = _factor("time", written, f"{where} '{header[0].strip()}'", problems, None)
    if len(header) < 2:
        problems.add(f"row {row}", repr(",".join(header)), "needs at least one observed column after the time, such "
                     "as 'permeated:skin#1 [ug/cm^2]'")
        return None
    specs = []
    seen: dict[tuple[str, str, str], int] = {}
    for col in range(1, len(header)):
        cell = header[col].strip()
        where = f"row {row}, column {col + 1}"
        if not cell:
            problems.add(where, "a blank header", "every column needs a name, such as 'permeated:skin#2 [ug/cm^2]'")
            continue
        name, col_unit = _split_header(cell)
        if name is None:
            problems.add(where, repr(cell), "write the name, then the unit in brackets: 'permeated:skin#2 [ug/cm^2]'")
            continue
        try:
            quantity, target, rep = parse_observable(name)
        except ValueError as err:
            problems.add(where, repr(cell), str(err))
            continue
        rep = rep or "1"
        key = (quantity, target, rep)
        if key in seen:
            problems.add(where, repr(cell), f"repeats column {seen[key] + 1} ({quantity}:{target}#{rep}); give each "
                         "replicate its own tag (#1, #2, ...)")
            continue
        seen[key] = col
        col_unit = col_unit or unit
        kind = OBSERVABLES[quantity].kind
        if not col_unit:
            problems.add(where, repr(cell), f"needs a unit: write it in brackets, such as '{name} "
                         f"[{KINDS[kind].example.split(' ', 1)[1]}]' (or give the unit as an option)")
            continue
        factor = _factor(kind, col_unit, f"{where} '{cell}'", problems, molar_mass)
        specs.append((col, key, factor, col_unit))
    return time_factor, written or "h", specs


def _split_header(cell: str) -> tuple[str | None, str | None]:
    m = _HEADER.match(cell)
    if m is None:
        return None, None
    unit = m.group("unit")
    return m.group("name"), (unit.strip() or None) if unit is not None else None


def _factor(kind: str, unit: str, where: str, problems: _Problems, molar_mass: float | None) -> float:
    try:
        return internal_per_unit(kind, unit, molar_mass)
    except UnitsError as err:
        if "molar" in err.expected and molar_mass is None:
            expected = ("a molar unit needs the substance's molar mass: give [substance] molar_mass in the scenario, "
                        f"or write the column in mass units, such as '{KINDS[kind].example.split(' ', 1)[1]}'")
        else:
            example = KINDS[kind].example.split(" ", 1)[1]
            reason = "a unit of another kind" if "wrong kind" in err.expected else err.expected.split("; expected")[0]
            expected = f"{reason}; {KINDS[kind].description} needs a unit such as '{example}'"
        problems.add(where, repr(unit), expected)
        return 1.0


def _number(cell: str, where: str, problems: _Problems, *, blank_ok: bool) -> float | None:
    text = cell.strip()
    if not text:
        if not blank_ok:
            problems.add(where, "a blank cell", "every row needs its time")
        return None
    if not _NUMBER.match(text):
        hint = ("; write '.' as the decimal mark" if re.fullmatch(r"[+-]?\d+,\d+", text) else
                "; leave the cell blank for a missing value" if text.lower() in ("nan", "na", "n/a", "-", "nd", "bloq",
                                                                                 "<loq", "inf", "none") else "")
        problems.add(where, repr(text), f"must be a number{hint}")
        return None
    value = float(text)
    if not math.isfinite(value):
        problems.add(where, repr(text), "must be a finite number")
        return None
    return value


def _show(x: float) -> str:
    return format(x, ".12g")
