"""The scenario document: the nested tables of a TOML scenario file, both ways.

:func:`from_document` turns a parsed TOML document into a validated :class:`Scenario`,
reporting every problem of the file at once; :func:`to_document` and :func:`to_toml` write a
scenario back so that reading it again gives an equal model. Reading and writing *files* is
the job of :mod:`barrierflow.io`.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from json.encoder import encode_basestring
from typing import Any

from ..errors import Problem, ScenarioError, UnitsError
from ..units import KINDS, format_quantity
from ._fields import FieldSpec, build, parse_value, suggest
from .components import Barrier, Compartment, Dose, Exchange, Layer, OutputUnits, Substance, Transfer
from .paths import units_written
from .scenario import Scenario, network_problems
from .variability import Correlation, Variation

__all__ = ["from_document", "to_document", "to_toml"]

TOP_KEYS = ("scenario", "substance", "compartment", "barrier", "exchange", "transfer", "dose", "output", "vary",
            "correlation")
SCENARIO_SPECS = Scenario.SPECS


def _tables(doc: Mapping[str, Any], key: str, problems: list[Problem]) -> list[Mapping[str, Any]]:
    value = doc.get(key, [])
    if isinstance(value, Mapping):
        problems.append(Problem(key, f"[{key}]", f"write [[{key}]] (a list of tables), one per {key}", path=key))
        return []
    if not isinstance(value, list) or not all(isinstance(v, Mapping) for v in value):
        problems.append(Problem(key, str(value), f"expected [[{key}]] tables", path=key))
        return []
    return value


def _place(kind: str, table: Mapping[str, Any], index: int) -> tuple[str, str]:
    """The field-path prefix of a table in messages and as a parameter path (by id, else by position)."""
    ident = table.get("id")
    if isinstance(ident, str) and ident:
        return f"{kind} '{ident}'", f"{kind}.{ident}"
    return f"{kind} {index}", f"{kind}.{index}"


def from_document(doc: Mapping[str, Any], file: str | None = None) -> Scenario:
    """Build a scenario from a parsed TOML document.

    Parameters
    ----------
    doc : mapping
        The document as :func:`barrierflow.io.read_toml` returns it.
    file : str or None
        The file name shown in messages.

    Returns
    -------
    Scenario

    Raises
    ------
    ScenarioError
        With every problem of the document, each naming the file, the field path, the value and
        what was expected.
    """
    if not isinstance(doc, Mapping):
        raise ScenarioError([Problem("file", type(doc).__name__, "a document of TOML tables", file)])
    deep = _nesting(doc)
    if deep is not None:
        raise ScenarioError([Problem(deep, f"values nested more than {MAX_NESTING} levels deep",
                                     "a scenario value is a number, a text or a short list of them", file)])
    problems: list[Problem] = []
    failed_ids: set[str] = set()
    for key in doc:
        if key not in TOP_KEYS:
            problems.append(Problem(f"[{key}]", "an unknown table", suggest(key, list(TOP_KEYS))))

    substance = Substance()
    sub_raw = doc.get("substance", {})
    if not isinstance(sub_raw, Mapping):
        problems.append(Problem("substance", str(sub_raw), "expected a [substance] table", path="substance"))
    elif sub_raw:
        try:
            substance = build(Substance, Substance.SPECS, sub_raw)
        except ScenarioError as err:
            problems.extend(err.within("substance", at="substance").problems)
    mm = substance.molar_mass

    head: dict[str, Any] = {}
    scen_raw = doc.get("scenario")
    if not isinstance(scen_raw, Mapping):
        problems.append(Problem("[scenario]", "nothing" if scen_raw is None else str(scen_raw),
                                "a [scenario] table with at least duration, such as duration = \"7 d\"",
                                path="scenario"))
    else:
        by_key = {s.key: s for s in SCENARIO_SPECS}
        for key, value in scen_raw.items():
            spec = by_key.get(key)
            if spec is None:
                problems.append(Problem(f"scenario {key}", "an unknown key", suggest(key, list(by_key)),
                                        path=f"scenario.{key}"))
                continue
            try:
                head[spec.attr] = parse_value(value, spec, mm)
            except UnitsError as err:
                problems.append(Problem(f"scenario {err.field}", err.value, err.expected, path=f"scenario.{key}"))
        if "duration" not in head and not any(p.field == "scenario duration" for p in problems):
            problems.append(Problem("scenario duration", "nothing", "this key is required, such as duration = \"7 d\"",
                                    path="scenario.duration"))

    built_at: dict[str, list[int]] = {}  # kind -> position in the file of each part built

    def collect(kind: str, maker) -> list[Any]:
        out = []
        built_at[kind] = []
        for i, table in enumerate(_tables(doc, kind, problems), start=1):
            label, at = _place(kind, table, i)
            try:
                out.append(maker(table, i))
                built_at[kind].append(i)
            except ScenarioError as err:
                problems.extend(err.within(label, at=at).problems)
                if isinstance(table.get("id"), str):
                    failed_ids.add(table["id"])
        return out

    compartments = collect("compartment", lambda t, i: Compartment.from_mapping(t, mm))
    barriers = collect("barrier", lambda t, i: Barrier.from_mapping(t, molar_mass=mm))
    exchanges = collect("exchange", lambda t, i: Exchange.from_mapping(t, default_id=f"exchange_{i}"))
    transfers = collect("transfer", lambda t, i: Transfer.from_mapping(t, default_id=f"transfer_{i}"))
    doses = collect("dose", lambda t, i: Dose.from_mapping(t, mm))

    variations = []
    for i, table in enumerate(_tables(doc, "vary", problems), start=1):
        try:
            variations.append(Variation.from_mapping(table, mm))
        except ScenarioError as err:
            problems.extend(err.within(f"vary {i}", at=f"vary.{i}").problems)
    correlations = []
    for i, table in enumerate(_tables(doc, "correlation", problems), start=1):
        try:
            correlations.append(Correlation.from_mapping(table))
        except ScenarioError as err:
            problems.extend(err.within(f"correlation {i}", at=f"correlation.{i}").problems)

    output = OutputUnits()
    out_raw = doc.get("output", {})
    if not isinstance(out_raw, Mapping):
        problems.append(Problem("output", str(out_raw), "expected an [output] table", path="output"))
    elif out_raw:
        try:
            output = OutputUnits.from_mapping(out_raw)
        except ScenarioError as err:
            problems.extend(err.within("output", at="output").problems)

    def make(file_units: tuple[tuple[str, str], ...] = ()) -> Scenario:
        return Scenario(
            name=head.get("name", ""), description=head.get("description", ""),
            duration=head["duration"], output_step=head.get("output_step"),
            output_times=head.get("output_times"), check_ranges=head.get("check_ranges", True), substance=substance,
            compartments=tuple(compartments), barriers=tuple(barriers), exchanges=tuple(exchanges),
            transfers=tuple(transfers), doses=tuple(doses), output_units=output,
            vary=tuple(variations), correlations=tuple(correlations), source=file, file_units=file_units)

    if not problems:
        # raises its own ScenarioError, with the file, for network problems
        return make(units_written(doc, {"compartment": compartments, "barrier": barriers,
                                        "exchange": exchanges, "transfer": transfers}))
    if "duration" in head:
        # also report the network's problems, except those caused by a part that failed above
        problems = network_problems(problems, make, failed_ids, built_at["dose"])
    raise ScenarioError([p.within(file=file) for p in problems])


MAX_NESTING = 16
"""Deepest nesting of tables and lists read from a document (a scenario file needs five)."""


def _nesting(doc: Mapping[str, Any]) -> str | None:
    """The key path of the first value nested deeper than :data:`MAX_NESTING`, or None.

    Walks the document without recursion, so that no depth of nesting can exhaust the stack
    (and no message later prints such a value).
    """
    stack: list[tuple[Any, int, str]] = [(doc, 0, "")]
    while stack:
        value, depth, path = stack.pop()
        if depth > MAX_NESTING:
            return path or "file"
        if isinstance(value, Mapping):
            stack.extend((v, depth + 1, f"{path} {k}".strip() if depth < 3 else path) for k, v in value.items())
        elif isinstance(value, (list, tuple)):
            stack.extend((v, depth + 1, path) for v in value)
    return None


def _default(cls: type, attr: str) -> Any:
    defaults = _DEFAULTS.get(cls)
    if defaults is None:  # (found once per class)
        defaults = _DEFAULTS[cls] = {f.name: f.default for f in dataclasses.fields(cls)}
    return defaults.get(attr)


_DEFAULTS: dict[type, dict[str, Any]] = {}


def _put(table: dict[str, Any], obj: Any, specs: tuple[FieldSpec, ...]) -> dict[str, Any]:
    """Write the fields of ``obj`` that differ from their defaults (required ones always)."""
    for spec in specs:
        if spec.per_area is not None and getattr(obj, spec.per_area) is not None:
            spec = spec.per_area_spec  # written per area: the absolute value is the scenario's
        value = getattr(obj, spec.attr)
        if value is None or (not spec.required and value == _default(type(obj), spec.attr)):
            continue
        if spec.kind in KINDS:
            table[spec.key] = format_quantity(value, spec.kind, spec.unit)
        elif spec.kind == "number":
            table[spec.key] = float(value)
        else:
            table[spec.key] = value
    return table


def to_document(scenario: Scenario) -> dict[str, Any]:
    """The scenario as nested dicts of unit strings, in the layout of a scenario file.

    Values are written in readable units (um for thickness, cm^2/s for diffusivity, ...) when the
    number reads back to the identical float, else in the internal unit.
    """
    head = _put({}, scenario, SCENARIO_SPECS[:4])
    if scenario.output_times is not None:
        head["output_times"] = [format_quantity(t, "time", "h") for t in scenario.output_times]
    if scenario.check_ranges is False:
        head["check_ranges"] = False
    doc: dict[str, Any] = {"scenario": head}
    if scenario.substance != Substance():
        doc["substance"] = _put({}, scenario.substance, Substance.SPECS)
    doc["compartment"] = [
        _put({}, c, Compartment.SPECS) for c in scenario.compartments]
    if scenario.barriers:
        doc["barrier"] = []
        for b in scenario.barriers:
            table = _put({}, b, Barrier.SPECS)
            if b.model == "resolved":
                table.pop("model", None)
            table["layer"] = [_put({}, layer, Layer.SPECS) for layer in b.layers]
            doc["barrier"].append(table)
    if scenario.exchanges:
        doc["exchange"] = [_put({}, e, Exchange.SPECS) for e in scenario.exchanges]
    if scenario.transfers:
        doc["transfer"] = [_put({}, t, Transfer.SPECS) for t in scenario.transfers]
    if scenario.doses:
        doc["dose"] = [_put({}, d, Dose.SPECS) for d in scenario.doses]
    if scenario.output_units != OutputUnits():
        doc["output"] = {k: getattr(scenario.output_units, k) for k in OutputUnits.KIND_OF}
    if scenario.vary:
        doc["vary"] = [v.to_table() for v in scenario.vary]
    if scenario.correlations:
        doc["correlation"] = [c.to_table() for c in scenario.correlations]
    return doc


def to_toml(scenario: Scenario | Mapping[str, Any]) -> str:
    """The scenario as TOML text (see :func:`to_document`), tables in the order of the format.

    This is the one TOML writer of barrierflow. It also writes a scenario *document* as it
    stands (nested tables of unit strings and numbers, valid or not, such as the dashboard's
    draft of a scenario being typed), so that a file saved with problems shows them to
    ``barrierflow check`` exactly as typed. Numbers that are not finite are written as TOML's
    ``nan`` and ``inf``, which the reader then refuses with its usual message.
    """
    doc = to_document(scenario) if isinstance(scenario, Scenario) else scenario
    lines: list[str] = []
    for key in TOP_KEYS:
        if key not in doc:
            continue
        value = doc[key]
        if isinstance(value, list):
            for table in value:
                _emit_table(lines, key, table, array=True)
        else:
            _emit_table(lines, key, value, array=False)
    return "\n".join(lines).strip() + "\n"


def _emit_table(lines: list[str], name: str, table: Mapping[str, Any], array: bool) -> None:
    lines.append("")
    lines.append(f"[[{name}]]" if array else f"[{name}]")
    nested = []
    for key, value in table.items():
        if isinstance(value, list) and value and isinstance(value[0], Mapping):
            nested.append((key, value))
        else:
            lines.append(f"{key} = {_scalar(value)}")
    for key, tables in nested:
        for sub in tables:
            _emit_table(lines, f"{name}.{key}", sub, array=True)


def _scalar(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, str):
        # JSON escapes what TOML forbids in a basic string, except DEL (U+007F), which TOML also forbids
        # (json's own compiled quoting, what json.dumps(value, ensure_ascii=False) gives for a text)
        return encode_basestring(value).replace("\x7f", "\\u007f")
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_scalar(v) for v in value) + "]"
    raise TypeError(f"cannot write {value!r} to TOML")
