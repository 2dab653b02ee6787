"""The editor document: the scenario as the researcher is typing it, and its edits.

The dashboard never edits a :class:`barrierflow.Scenario` (it is immutable and refuses bad
values). It edits a *draft*: plain JSON (kept in a ``dcc.Store``) that holds every value as the
text the user typed, so that nothing is lost while a value is wrong. A draft becomes a
scenario through the one route every file takes: :func:`to_document` writes the nested tables
of a scenario file and :func:`barrierflow.model.from_document` validates them, giving the
same messages as ``barrierflow check`` on the saved file.

Layout of a draft (all values are strings unless said otherwise; ``""`` means "not given")::

    {"file": "untitled.toml",             # file name shown in messages and used when saving
     "gen": "a3f9", "seq": 7,             # key prefix of this draft and the next key number
     "scenario": {"name", "description", "duration", "output_step"},
     "output_times": None or [str, ...],  # explicit output times read from a file (kept as given)
     "substance": {"name", "molar_mass", "solubility", "log_kow"},
     "output": {"time", "concentration", "amount", "area"},
     "compartments": [{"key", "id", "volume", "initial_concentration", "partition", "clearance",
                       "vmax", "km", "held_concentration", "evaporation_rate", "residual_volume",
                       "loss_rate", "description"}, ...],
     "links": [{"key", "kind" ("barrier" | "exchange" | "transfer"), "id",
                "from", "to" (compartment *keys*), "area", "model", "flow", "rate",
                "layers": [{"key", "name", "thickness", "diffusivity", "partition", "cells",
                            "degradation_rate", "initial_concentration"}, ...]}, ...],
     "doses": [{"key", "target" (a compartment id), "kind", "amount", "rate", "duration",
                "concentration", "at", "every", "count", "volume", "replace", "fraction",
                "ends_contact"}, ...],
     "positions": {compartment key: {"x": float, "y": float}}}

Compartments and links carry a stable ``key`` so that renaming a compartment keeps its links,
its place on the canvas and (through :func:`update_compartment`) the doses aimed at it.

Every edit is a pure function ``draft -> new draft``; the input is never changed.
"""

from __future__ import annotations

import copy
import hashlib
import math
import secrets
from collections.abc import Iterable, Mapping
from typing import Any

from barrierflow.errors import Problem, ScenarioError, UnitsError
from barrierflow.io import loads, read_toml
from barrierflow.model import (
    Barrier,
    Compartment,
    Dose,
    Exchange,
    Layer,
    OutputUnits,
    Scenario,
    Substance,
    Transfer,
    from_document,
    to_toml,
)
from barrierflow.units import convert, parse_quantity

__all__ = [
    "COMPARTMENT_FIELDS",
    "DOSE_FIELDS",
    "LAYER_FIELDS",
    "LINK_FIELDS",
    "add_compartment",
    "add_dose",
    "add_layer",
    "check",
    "compartment_by_id",
    "connect",
    "new_link_note",
    "delete",
    "deleted_with",
    "draft_from_scenario",
    "draft_from_toml",
    "find",
    "first_selection",
    "locate",
    "missing_to_run",
    "move_layer",
    "new_draft",
    "remove_dose",
    "remove_layer",
    "save_text",
    "set_at_path",
    "set_doses",
    "set_layers",
    "set_output",
    "set_scenario",
    "set_substance",
    "to_document",
    "tidy_positions",
    "update_compartment",
    "update_link",
]


def _fields(cls: type, shown: Mapping[str, tuple[str, str]]) -> dict[str, tuple[str, str, str]]:
    """field key -> (label, kind, example): the dashboard's label and example for each field of a
    model class, and the field's kind of quantity from the model's own field table."""
    kinds = {spec.key: spec.kind for spec in cls.SPECS}
    return {key: (label, kinds[key], example) for key, (label, example) in shown.items()}


# field key -> (label, kind of quantity or "number"/"count"/"text"/"id", example)
COMPARTMENT_FIELDS: dict[str, tuple[str, str, str]] = _fields(Compartment, {
    "id": ("Id", "donor"),
    "volume": ("Volume", "1 mL"),
    "initial_concentration": ("Initial concentration", "20 mg/mL"),
    "partition": ("Partition coefficient", "1"),
    "clearance": ("Clearance", "10 L/h"),
    "vmax": ("Saturable elimination, Vmax", "2 mg/h"),
    "km": ("Saturable elimination, Km", "0.1 mg/L"),
    "held_concentration": ("Held concentration", "0 mg/mL"),
    "evaporation_rate": ("Evaporation rate", "4 uL/(cm^2*h)"),
    "residual_volume": ("Residual volume", "0.5 uL/cm^2"),
    "loss_rate": ("Loss to the air", "0.2 1/h"),
    "description": ("Description", "receptor fluid"),
})
LINK_FIELDS: dict[str, dict[str, tuple[str, str, str]]] = {
    "barrier": _fields(Barrier, {
        "id": ("Id", "skin"),
        "area": ("Area", "10 cm^2"),
        "model": ("Model", "resolved"),
    }),
    "exchange": _fields(Exchange, {
        "id": ("Id", "blood_flow"),
        "flow": ("Flow", "5 L/h"),
    }),
    "transfer": _fields(Transfer, {
        "id": ("Id", "absorption"),
        "rate": ("Rate constant", "0.8 1/h"),
    }),
}
LAYER_FIELDS: dict[str, tuple[str, str, str]] = _fields(Layer, {
    "name": ("Name", "stratum corneum"),
    "thickness": ("Thickness", "15 um"),
    "diffusivity": ("Diffusivity", "1e-9 cm^2/s"),
    "partition": ("Partition coefficient", "10"),
    "cells": ("Cells", "40"),
    "degradation_rate": ("Degradation rate", "0 1/h"),
    "initial_concentration": ("Initial concentration", "5 mg/mL"),
})
DOSE_FIELDS: dict[str, tuple[str, str, str]] = _fields(Dose, {
    "target": ("Target", "donor"),
    "kind": ("Kind", "bolus"),
    "amount": ("Amount", "2 mg"),
    "concentration": ("Concentration", "20 mg/mL"),
    "rate": ("Rate", "0.1 mg/h"),
    "at": ("At", "0 h"),
    "every": ("Every", "24 h"),
    "count": ("Count", "6"),
    "duration": ("Duration", "8 h"),
    "volume": ("Volume", "0.5 mL"),
    "replace": ("Replace the medium", "true"),
    "fraction": ("Fraction removed", "0.9"),
    "ends_contact": ("Ends contact", "true"),
})
SCENARIO_FIELDS = ("name", "description", "duration", "output_step")
SUBSTANCE_FIELDS = ("name", "molar_mass", "solubility", "log_kow")
OUTPUT_FIELDS = ("time", "concentration", "amount", "area")
SUBSTANCE_LABELS: dict[str, tuple[str, str, str]] = _fields(Substance, {
    "name": ("Substance", "compound A"),
    "molar_mass": ("Molar mass", "250 g/mol"),
    "solubility": ("Solubility", "2 mg/mL"),
    "log_kow": ("log Kow", "1.8"),
})
OUTPUT_LABELS: dict[str, tuple[str, str, str]] = _fields(OutputUnits, {
    "time": ("Time unit", "h"),
    "concentration": ("Concentration unit", "mg/L"),
    "amount": ("Amount unit", "mg"),
    "area": ("Area unit", "cm^2"),
})

NEW_LAYER = {"name": "", "thickness": "10 um", "diffusivity": "1e-7 cm^2/s", "partition": "1",
             "cells": "", "degradation_rate": ""}
DEFAULT_LAYER_NAME = "default layer"
"""Name of the one layer a new barrier starts with (its values are those of :data:`NEW_LAYER`)."""
NEW_LINK = {"barrier": {"area": "1 cm^2"}, "exchange": {"flow": "1 mL/h"}, "transfer": {"rate": "0.1 1/h"}}
NEW_DOSE = {"kind": "bolus", "amount": "1 mg", "at": "0 h"}

_ALL_FIELDS = (COMPARTMENT_FIELDS, *LINK_FIELDS.values(), LAYER_FIELDS, DOSE_FIELDS, SUBSTANCE_LABELS)
_NUMBER_FIELDS = {k for table in _ALL_FIELDS for k, (_, kind, _) in table.items() if kind == "number"}
_COUNT_FIELDS = {k for table in _ALL_FIELDS for k, (_, kind, _) in table.items() if kind == "count"}
_FLAG_FIELDS = {k for table in _ALL_FIELDS for k, (_, kind, _) in table.items() if kind == "flag"}


# ================================================================ building drafts
def new_draft(file: str = "untitled.toml") -> dict[str, Any]:
    """An empty draft: no compartments, a 24 h run with output every 15 min."""
    return {
        "file": file,
        "gen": secrets.token_hex(2),
        "seq": 0,
        "scenario": {"name": "", "description": "", "duration": "24 h", "output_step": "15 min"},
        "output_times": None,
        "substance": dict.fromkeys(SUBSTANCE_FIELDS, ""),
        "output": {},
        "compartments": [],
        "links": [],
        "doses": [],
        "positions": {},
    }


def _text(value: Any) -> str:
    """A value of a parsed TOML document as the text shown in an input."""
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        if math.isfinite(value) and value.is_integer() and abs(value) < 1e15:
            return str(int(value))
        return repr(value)
    return str(value)


def pretty_time(text: str) -> str:
    """A time written the way a researcher would: ``"168 h"`` -> ``"7 d"``, ``"0.25 h"`` -> ``"15 min"``.

    Whole hours below 72 h stay in hours; otherwise the largest of d, h, min, s that gives a
    whole number, else the text unchanged. The result always reads back to the same value.
    """
    try:
        value = parse_quantity(text, "time")
    except UnitsError:
        return text
    if value == 0:
        return "0 h"
    for unit in ("h", "d", "min", "s"):
        number = float(f"{convert(value, 'time', unit):.12g}")
        if not number.is_integer():
            continue
        if unit == "d" and value < 72:
            continue
        candidate = f"{int(number)} {unit}"
        if parse_quantity(candidate, "time") == value and (unit != "h" or value < 72):
            return candidate
    return text


def _next_key(d: dict[str, Any], prefix: str) -> str:
    d["seq"] = int(d.get("seq", 0)) + 1
    return f"{prefix}{d['gen']}-{d['seq']}"


def draft_from_document(doc: Mapping[str, Any], file: str = "untitled.toml") -> dict[str, Any]:
    """A draft holding the tables of a (parsed) scenario document, values as text.

    The document need not be valid: whatever it holds is kept, so that the researcher sees the
    problem at its field. Unknown keys are dropped (``barrierflow check`` names them).
    """
    d = new_draft(file)
    head = doc.get("scenario", {}) if isinstance(doc.get("scenario"), Mapping) else {}
    d["scenario"] = {k: _text(head.get(k)) for k in SCENARIO_FIELDS}
    for k in ("duration", "output_step"):
        d["scenario"][k] = pretty_time(d["scenario"][k])
    if isinstance(head.get("output_times"), list):
        d["output_times"] = [_text(t) for t in head["output_times"]]
        d["scenario"]["output_step"] = ""
    if head.get("check_ranges") is False:
        d["check_ranges"] = False  # kept as the file says (values outside the plausible ranges meant)
    sub = doc.get("substance", {}) if isinstance(doc.get("substance"), Mapping) else {}
    d["substance"] = {k: _text(sub.get(k)) for k in SUBSTANCE_FIELDS}
    out = doc.get("output", {}) if isinstance(doc.get("output"), Mapping) else {}
    d["output"] = {k: _text(out[k]) for k in OUTPUT_FIELDS if k in out}
    key_of: dict[str, str] = {}
    for table in _list(doc, "compartment"):
        c = {"key": _next_key(d, "c"), **{k: _text(table.get(k)) for k in COMPARTMENT_FIELDS}}
        d["compartments"].append(c)
        key_of.setdefault(c["id"], c["key"])
    counters = {"barrier": 0, "exchange": 0, "transfer": 0}
    for kind in ("barrier", "exchange", "transfer"):
        for table in _list(doc, kind):
            counters[kind] += 1
            link = _empty_link(kind)
            link["key"] = _next_key(d, "l")
            for k in LINK_FIELDS[kind]:
                link[k] = _text(table.get(k))
            if not link["id"] and kind != "barrier":
                link["id"] = f"{kind}_{counters[kind]}"
            for end in ("from", "to"):
                cid = _text(table.get(end))
                link[end] = key_of.get(cid, "")
            if kind == "barrier":
                layers = table.get("layer", [])
                for layer in layers if isinstance(layers, list) else []:
                    if isinstance(layer, Mapping):
                        link["layers"].append({"key": _next_key(d, "y"),
                                               **{k: _text(layer.get(k)) for k in LAYER_FIELDS}})
            d["links"].append(link)
    for table in _list(doc, "dose"):
        dose = {"key": _next_key(d, "d"), **{k: _text(table.get(k)) for k in DOSE_FIELDS}}
        for k in ("at", "every", "duration"):
            dose[k] = pretty_time(dose[k]) if dose[k] else ""
        dose["at"] = dose["at"] or "0 h"  # the default, shown
        d["doses"].append(dose)
    d["positions"] = tidy_positions(d)
    return d


def _list(doc: Mapping[str, Any], key: str) -> list[Mapping[str, Any]]:
    value = doc.get(key, [])
    return [v for v in value if isinstance(v, Mapping)] if isinstance(value, list) else []


def _empty_link(kind: str) -> dict[str, Any]:
    return {"key": "", "kind": kind, "id": "", "from": "", "to": "", "area": "", "model": "",
            "flow": "", "rate": "", "layers": []}


def draft_from_scenario(scenario: Scenario, file: str = "untitled.toml") -> dict[str, Any]:
    """A draft of a valid scenario; :func:`check` on it gives back an equal scenario."""
    return draft_from_document(scenario.to_document(), file)


def draft_from_toml(text: str, file: str = "untitled.toml") -> tuple[dict[str, Any], list[Problem]]:
    """Read TOML text into a draft, keeping what it holds even when it has problems.

    Returns
    -------
    draft : dict
        The editor document.
    problems : list of Problem
        A syntax error (the draft is then empty) or the scenario's problems.
    """
    try:
        doc = read_toml(text, file)  # never anything but a ScenarioError (deep nesting included)
    except ScenarioError as err:
        return new_draft(file), list(err.problems)
    d = draft_from_document(doc, file)
    try:
        loads(text, file)
    except ScenarioError as err:
        return d, list(err.problems)
    return d, []


# ================================================================ draft -> document -> scenario
def _number(text: str, whole: bool = False) -> Any:
    """The TOML value for a bare-number field: a number when the text is one, else the text.

    Handing the text on unchanged lets the model refuse it with its usual message.
    """
    s = text.strip()
    try:
        if whole:
            return int(s)
        return float(s)
    except ValueError:
        return s


def _put(table: dict[str, Any], source: Mapping[str, str], fields: Iterable[str]) -> dict[str, Any]:
    for k in fields:
        v = source.get(k, "")
        if v is None or (isinstance(v, str) and not v.strip()):
            continue
        if isinstance(v, bool):
            table[k] = v
        elif k in _FLAG_FIELDS:
            table[k] = {"true": True, "false": False}.get(v.strip().lower(), v.strip())
        elif k in _COUNT_FIELDS:
            table[k] = _number(v, whole=True)
        elif k in _NUMBER_FIELDS:
            table[k] = _number(v)
        else:
            table[k] = v.strip() if k not in ("name", "description") else v
    return table


def to_document(draft: Mapping[str, Any]) -> dict[str, Any]:
    """The draft as the nested tables of a scenario file (what ``tomllib`` would give)."""
    head = _put({}, draft.get("scenario", {}), SCENARIO_FIELDS)
    if draft.get("output_times") is not None:
        head["output_times"] = list(draft["output_times"])
        head.pop("output_step", None)
    if draft.get("check_ranges") is False:
        head["check_ranges"] = False
    doc: dict[str, Any] = {"scenario": head}
    sub = _put({}, draft.get("substance", {}), SUBSTANCE_FIELDS)
    if sub:
        doc["substance"] = sub
    comps = draft.get("compartments", [])
    id_of = {c["key"]: c.get("id", "") for c in comps}
    if comps:
        doc["compartment"] = [_put({}, c, COMPARTMENT_FIELDS) for c in comps]
    for kind in ("barrier", "exchange", "transfer"):
        tables = []
        for link in draft.get("links", []):
            if link["kind"] != kind:
                continue
            table = _put({}, link, ("id",))
            table["from"] = id_of.get(link.get("from", ""), "")
            table["to"] = id_of.get(link.get("to", ""), "")
            _put(table, link, [k for k in LINK_FIELDS[kind] if k != "id"])
            if kind == "barrier":
                if table.get("model") == "resolved":
                    table.pop("model")
                table["layer"] = [_put({}, layer, LAYER_FIELDS) for layer in link.get("layers", [])]
            tables.append(table)
        if tables:
            doc[kind] = tables
    if draft.get("doses"):
        doc["dose"] = [_put({}, dose, DOSE_FIELDS) for dose in draft["doses"]]
    out = _put({}, draft.get("output", {}), OUTPUT_FIELDS)
    if out:
        doc["output"] = out
    return doc


def check(draft: Mapping[str, Any]) -> tuple[Scenario | None, dict[str, Any]]:
    """Validate a draft exactly as ``barrierflow check`` validates the saved file.

    Returns
    -------
    scenario : Scenario or None
        The validated model, or None when the draft has problems.
    found : dict
        JSON-ready (kept in a ``dcc.Store``): ``ok`` (bool), ``toml`` (canonical TOML text of
        the valid scenario, or None), ``name``, ``digest``, ``messages`` (target -> list of
        messages, see :func:`locate`), ``all`` (every message, in the order of the file) and
        ``problems`` (the ``field`` and ``path`` of each).
    """
    file = draft.get("file") or "untitled.toml"
    try:
        scenario = from_document(to_document(draft), file)
    except ScenarioError as err:
        problems = list(err.problems)
        return None, dict(ok=False, toml=None, name=None, digest=None,
                           messages=locate(problems, draft), all=[str(p) for p in problems],
                           problems=[{"field": p.field, "path": p.path} for p in problems])
    text = scenario.to_toml()
    # the same hash as Scenario.digest, without writing the TOML text a second time
    digest = hashlib.sha256(text.encode()).hexdigest()
    return scenario, dict(ok=True, toml=text, name=scenario.name, digest=digest, messages={}, all=[], problems=[])


def missing_to_run(scenario: Scenario) -> list[str]:
    """What a valid scenario lacks to be worth running (empty when nothing is missing).

    A run of a scenario in which no substance is anywhere (no compartment starts with any, none
    is held above 0, no dose) gives zeros everywhere: the dashboard does not run it, and says so.

    Examples
    --------
    >>> d, _ = add_compartment(new_draft(), "donor")
    >>> missing_to_run(check(d)[0])[0].split(":")[0]
    'No substance anywhere'
    """
    held = any(c.held and (c.held_concentration or 0) > 0 for c in scenario.compartments)
    initial = any((c.initial_concentration or 0) > 0 for c in scenario.compartments)
    if held or initial or scenario.doses:
        return []
    return ["No substance anywhere: give a compartment an initial concentration or a held concentration above 0, "
            "or add a dose."]


_ELEMENTS = ("compartment", "barrier", "exchange", "transfer")
_HEADS = {"scenario": "s", "substance": "sub", "output": "o"}


def locate(problems: Iterable[Problem], draft: Mapping[str, Any]) -> dict[str, list[str]]:
    """Attach each problem to the field of the draft it is about, found from :attr:`Problem.path`.

    Targets are strings:

    - ``"c:<key>:<field>"`` a compartment field; ``"l:<key>:<field>"`` a link field;
    - ``"y:<link key>:<layer index from 0>:<field>"`` a layer cell;
    - ``"d:<dose index from 0>:<field>"`` a dose cell;
    - ``"s:<field>"``, ``"sub:<field>"``, ``"o:<field>"`` scenario, substance, output fields;
    - ``"general"`` anything else (a syntax error, a network without compartments, ...).

    A problem's path names a compartment or link by its id, or by its position among those of
    its kind (counted from 1) when it has no id. Each target maps to the full messages
    (``<file>: <field path>: got <value>; <expected>``), the same text the command line prints.
    """
    out: dict[str, list[str]] = {}

    def add(target: str, p: Problem) -> None:
        out.setdefault(target, []).append(str(p))

    comps = draft.get("compartments", [])
    links = draft.get("links", [])
    for p in problems:
        parts = p.path.split(".") if p.path else []
        table = parts[0] if parts else ""
        if table in _ELEMENTS and len(parts) >= 2:
            ident, rest = parts[1], parts[2:]
            items = comps if table == "compartment" else [x for x in links if x["kind"] == table]
            matches = [x for x in items if x.get("id", "") == ident]
            if not matches and ident.isdigit() and 0 < int(ident) <= len(items):
                matches = [items[int(ident) - 1]]
            if not matches:
                add("general", p)
                continue
            item = matches[0]
            if table == "barrier" and len(rest) >= 2 and rest[0] == "layer" and rest[1].isdigit():
                add(f"y:{item['key']}:{int(rest[1]) - 1}:{rest[2] if len(rest) > 2 else 'layer'}", p)
                continue
            name = rest[0] if rest else "id"
            if name == "layer":
                name = "layers"
            add(f"{'c' if table == 'compartment' else 'l'}:{item['key']}:{name}", p)
        elif table == "dose" and len(parts) >= 2 and parts[1].isdigit():
            add(f"d:{int(parts[1]) - 1}:{parts[2] if len(parts) > 2 else 'kind'}", p)
        elif table in _HEADS and len(parts) >= 2:
            add(f"{_HEADS[table]}:{parts[1]}", p)
        else:
            add("general", p)
    return out


def set_at_path(draft: Mapping[str, Any], path: str, text: str) -> dict[str, Any]:
    """Set the field a parameter path names (``barrier.skin.layer.1.diffusivity``) to ``text``, as typed.

    The place is found as :func:`locate` finds a problem's field; several paths joined by commas
    (a tied group) are all set.

    Raises
    ------
    KeyError
        When the draft has no field at that path.
    """
    d = copy.deepcopy(dict(draft))
    for one in (p.strip() for p in path.split(",")):
        targets = list(locate([Problem("", "", "", path=one)], d))
        if targets == ["general"] or not targets:
            raise KeyError(f"the scenario has no field {one!r}")
        kind, *rest = targets[0].split(":")
        if kind in ("c", "l"):
            item = find(d, rest[0])
            item[rest[1]] = text
        elif kind == "y":
            _layers(d, rest[0])[int(rest[1])][rest[2]] = text
        elif kind == "d":
            d["doses"][int(rest[0])][rest[1]] = text
        else:
            table = {"s": "scenario", "sub": "substance", "o": "output"}[kind]
            d[table][rest[0]] = text
    return d


# ================================================================ saving
def save_text(draft: Mapping[str, Any]) -> tuple[str, bool]:
    """The TOML text to save: the canonical text of a valid draft, else the draft as typed.

    Returns
    -------
    text : str
    valid : bool
        False when the draft has problems; the text then starts with a comment listing them,
        and ``barrierflow check`` on the file shows the same messages.
    """
    scenario, found = check(draft)
    if scenario is not None:
        return scenario.to_toml(), True
    lines = ["# This scenario has problems; barrierflow refuses to run it until they are fixed:"]
    lines += [f"#   {m}" for m in found["all"]]
    return "\n".join(lines) + "\n" + to_toml(to_document(draft)), False


# ================================================================ lookups
def find(draft: Mapping[str, Any], key: str) -> dict[str, Any] | None:
    """The compartment or link with this key (None when there is none)."""
    for item in (*draft.get("compartments", []), *draft.get("links", [])):
        if item["key"] == key:
            return item
    return None


def first_selection(draft: Mapping[str, Any]) -> str | None:
    """What to show first in the properties panel: the first barrier, else the first compartment.

    Returns ``"l:<key>"``, ``"c:<key>"`` or None for an empty draft.
    """
    barrier = next((x for x in draft.get("links", []) if x["kind"] == "barrier"), None)
    if barrier is not None:
        return f"l:{barrier['key']}"
    comps = draft.get("compartments", [])
    return f"c:{comps[0]['key']}" if comps else None


def compartment_by_id(draft: Mapping[str, Any], cid: str) -> dict[str, Any] | None:
    """The first compartment whose id is ``cid``."""
    return next((c for c in draft.get("compartments", []) if c.get("id") == cid), None)


def _unique_id(draft: Mapping[str, Any], stem: str) -> str:
    """``<stem>_<n>``, n one more than the number of such elements (or the next free number)."""
    used = {c.get("id") for c in draft.get("compartments", [])} | {x.get("id") for x in draft.get("links", [])}
    if stem == "compartment":
        i = len(draft.get("compartments", [])) + 1
    else:
        i = sum(1 for x in draft.get("links", []) if x.get("kind") == stem) + 1
    while f"{stem}_{i}" in used:
        i += 1
    return f"{stem}_{i}"


# ================================================================ edits (pure: draft -> new draft)
def add_compartment(draft: Mapping[str, Any], cid: str | None = None,
                    position: Mapping[str, float] | None = None, **values: str) -> tuple[dict[str, Any], str]:
    """Add a compartment (1 mL, empty) and return the new draft and its key."""
    d = copy.deepcopy(dict(draft))
    key = _next_key(d, "c")
    comp = {"key": key, **dict.fromkeys(COMPARTMENT_FIELDS, "")}
    comp["id"] = cid or _unique_id(d, "compartment")
    comp["volume"] = "1 mL"
    comp.update({k: v for k, v in values.items() if k in COMPARTMENT_FIELDS})
    d["compartments"].append(comp)
    if position is None:
        n = len(d["compartments"]) - 1
        position = {"x": 110.0 + 250.0 * (n % 3), "y": 80.0 + 120.0 * (n // 3)}
    d["positions"][key] = {"x": float(position["x"]), "y": float(position["y"])}
    return d, key


def connect(draft: Mapping[str, Any], kind: str, from_key: str, to_key: str) -> tuple[dict[str, Any], str]:
    """Join two compartments with a barrier, an exchange or a transfer.

    A barrier starts with one layer named :data:`DEFAULT_LAYER_NAME`, with the values of
    :data:`NEW_LAYER` (see :func:`new_link_note`).

    Raises
    ------
    ValueError
        For an unknown kind, an unknown compartment or a compartment joined to itself.
    """
    if kind not in LINK_FIELDS:
        raise ValueError(f"link kind: got {kind!r}; must be barrier, exchange or transfer")
    keys = {c["key"] for c in draft.get("compartments", [])}
    if from_key not in keys or to_key not in keys:
        raise ValueError("pick two compartments to connect")
    if from_key == to_key:
        raise ValueError("a link joins two different compartments; pick another 'to'")
    d = copy.deepcopy(dict(draft))
    key = _next_key(d, "l")
    link = _empty_link(kind)
    link.update(key=key, id=_unique_id(d, kind), **{"from": from_key, "to": to_key}, **NEW_LINK[kind])
    if kind == "barrier":
        # one layer, named so: the barrier has no hidden values (the dashboard selects it and says so)
        link["layers"] = [{"key": _next_key(d, "y"), **NEW_LAYER, "name": DEFAULT_LAYER_NAME}]
    d["links"].append(link)
    return d, key


def new_link_note(draft: Mapping[str, Any], key: str) -> str:
    """What a new link starts with, said plainly (a barrier's default layer and its values)."""
    link = find(draft, key)
    if link is None:
        return ""
    kind, ident = link["kind"], link.get("id") or ""
    if kind == "barrier":
        return (f"Connected with barrier {ident}. It starts with one layer named '{DEFAULT_LAYER_NAME}' (thickness "
                f"{NEW_LAYER['thickness']}, diffusivity {NEW_LAYER['diffusivity']}, partition coefficient "
                f"{NEW_LAYER['partition']}), selected in the layer table on the right: give it your values, or "
                "remove it once you have added your own layers.")
    value = link.get("flow") if kind == "exchange" else link.get("rate")
    what = "flow" if kind == "exchange" else "rate constant"
    return f"Connected with {kind} {ident} ({what} {value} to start with); edit it on the right."


def delete(draft: Mapping[str, Any], key: str) -> dict[str, Any]:
    """Delete a compartment (with its links and the doses aimed at it) or a link."""
    d = copy.deepcopy(dict(draft))
    comp = next((c for c in d["compartments"] if c["key"] == key), None)
    if comp is not None:
        d["compartments"] = [c for c in d["compartments"] if c["key"] != key]
        d["links"] = [x for x in d["links"] if key not in (x["from"], x["to"])]
        if compartment_by_id(d, comp["id"]) is None:
            d["doses"] = [x for x in d["doses"] if x.get("target") != comp["id"]]
        d["positions"].pop(key, None)
    else:
        d["links"] = [x for x in d["links"] if x["key"] != key]
    return d


def deleted_with(draft: Mapping[str, Any], key: str) -> tuple[str, list[str]]:
    """What :func:`delete` of ``key`` removes: the element's name and the other elements it takes.

    Returns
    -------
    name : str
        ``"compartment 'central'"`` or ``"barrier 'skin' (2 layers)"``.
    taken : list of str
        The links and doses that go with a compartment (``"barrier 'skin'"``, ``"3 doses aimed at
        'central'"``); empty for a link.

    Examples
    --------
    >>> d, a = add_compartment(new_draft(), "a")
    >>> d, b = add_compartment(d, "b")
    >>> d, _ = connect(d, "exchange", a, b)
    >>> deleted_with(d, a)
    ("compartment 'a'", ["exchange 'exchange_1'"])
    """
    comps = draft.get("compartments", [])
    comp = next((c for c in comps if c["key"] == key), None)
    if comp is None:
        link = next((x for x in draft.get("links", []) if x["key"] == key), None)
        if link is None:
            return "", []
        n = len(link.get("layers", []))
        extra = f" ({n} layer{'s' if n != 1 else ''})" if link["kind"] == "barrier" else ""
        return f"{link['kind']} '{link.get('id') or ''}'{extra}", []
    taken = [f"{x['kind']} '{x.get('id') or ''}'" for x in draft.get("links", []) if key in (x["from"], x["to"])]
    if sum(1 for c in comps if c.get("id") == comp.get("id")) == 1:
        n = sum(1 for x in draft.get("doses", []) if x.get("target") == comp.get("id"))
        if n:
            taken.append(f"{n} dose{'s' if n != 1 else ''} aimed at '{comp.get('id')}'")
    return f"compartment '{comp.get('id') or ''}'", taken


def update_compartment(draft: Mapping[str, Any], key: str, values: Mapping[str, Any]) -> dict[str, Any]:
    """Set fields of a compartment; a new id is carried over to the doses aimed at the old one."""
    d = copy.deepcopy(dict(draft))
    comp = next((c for c in d["compartments"] if c["key"] == key), None)
    if comp is None:
        return d
    old = comp.get("id", "")
    for k, v in values.items():
        if k in COMPARTMENT_FIELDS:
            comp[k] = "" if v is None else str(v)
    new = comp.get("id", "")
    if new != old and not any(c.get("id") == old for c in d["compartments"]):
        for dose in d["doses"]:
            if dose.get("target") == old:
                dose["target"] = new
    return d


def update_link(draft: Mapping[str, Any], key: str, values: Mapping[str, Any]) -> dict[str, Any]:
    """Set fields of a link (id, area, model, flow, rate; ``from``/``to`` as compartment keys)."""
    d = copy.deepcopy(dict(draft))
    link = next((x for x in d["links"] if x["key"] == key), None)
    if link is None:
        return d
    allowed = set(LINK_FIELDS[link["kind"]]) | {"from", "to"}
    for k, v in values.items():
        if k in allowed:
            link[k] = "" if v is None else str(v)
    return d


def _layers(d: dict[str, Any], link_key: str) -> list[dict[str, Any]]:
    link = next((x for x in d["links"] if x["key"] == link_key and x["kind"] == "barrier"), None)
    if link is None:
        raise KeyError(f"no barrier with key {link_key!r}")
    return link["layers"]


def set_layers(draft: Mapping[str, Any], link_key: str, rows: Iterable[Mapping[str, Any]]) -> dict[str, Any]:
    """Replace a barrier's layers by grid rows (dicts of the layer fields; other keys ignored)."""
    d = copy.deepcopy(dict(draft))
    layers = _layers(d, link_key)
    new = []
    for row in rows:
        layer = {"key": row.get("key") or _next_key(d, "y")}
        for k in LAYER_FIELDS:
            v = row.get(k, "")
            layer[k] = "" if v is None else _text(v)
        new.append(layer)
    layers[:] = new
    return d


def add_layer(draft: Mapping[str, Any], link_key: str, after: int | None = None) -> dict[str, Any]:
    """Add a layer to a barrier after the layer ``after`` (from 0), or at the end."""
    d = copy.deepcopy(dict(draft))
    layers = _layers(d, link_key)
    layer = {"key": _next_key(d, "y"), **NEW_LAYER, "name": f"layer {len(layers) + 1}"}
    layers.insert(len(layers) if after is None else after + 1, layer)
    return d


def remove_layer(draft: Mapping[str, Any], link_key: str, index: int) -> dict[str, Any]:
    """Remove the layer ``index`` (from 0) of a barrier."""
    d = copy.deepcopy(dict(draft))
    layers = _layers(d, link_key)
    if 0 <= index < len(layers):
        del layers[index]
    return d


def move_layer(draft: Mapping[str, Any], link_key: str, index: int, step: int) -> dict[str, Any]:
    """Move the layer ``index`` by ``step`` places (-1: toward the ``from`` side)."""
    d = copy.deepcopy(dict(draft))
    layers = _layers(d, link_key)
    j = index + step
    if 0 <= index < len(layers) and 0 <= j < len(layers):
        layers[index], layers[j] = layers[j], layers[index]
    return d


def set_doses(draft: Mapping[str, Any], rows: Iterable[Mapping[str, Any]]) -> dict[str, Any]:
    """Replace the doses by grid rows (dicts of the dose fields)."""
    d = copy.deepcopy(dict(draft))
    new = []
    for row in rows:
        dose = {"key": row.get("key") or _next_key(d, "d")}
        for k in DOSE_FIELDS:
            v = row.get(k, "")
            dose[k] = "" if v is None else _text(v)
        new.append(dose)
    d["doses"] = new
    return d


def add_dose(draft: Mapping[str, Any], target: str | None = None) -> dict[str, Any]:
    """Add a dose (a 1 mg bolus at 0 h) on ``target`` or the first compartment."""
    d = copy.deepcopy(dict(draft))
    if target is None:
        target = next((c["id"] for c in d["compartments"] if not c.get("held_concentration")), "")
    d["doses"].append({"key": _next_key(d, "d"), **dict.fromkeys(DOSE_FIELDS, ""), **NEW_DOSE, "target": target})
    return d


def remove_dose(draft: Mapping[str, Any], index: int) -> dict[str, Any]:
    """Remove the dose ``index`` (from 0)."""
    d = copy.deepcopy(dict(draft))
    if 0 <= index < len(d["doses"]):
        del d["doses"][index]
    return d


def set_scenario(draft: Mapping[str, Any], **values: Any) -> dict[str, Any]:
    """Set scenario-wide fields (name, description, duration, output_step, file).

    Setting ``output_step`` drops explicit output times read from a file.
    """
    d = copy.deepcopy(dict(draft))
    for k, v in values.items():
        if k == "file":
            name = (str(v or "").strip() or "untitled.toml")
            d["file"] = name if name.endswith(".toml") else name + ".toml"
        elif k in SCENARIO_FIELDS:
            d["scenario"][k] = "" if v is None else str(v)
            if k == "output_step" and str(v or "").strip():
                d["output_times"] = None
    return d


def set_substance(draft: Mapping[str, Any], **values: Any) -> dict[str, Any]:
    """Set fields of the substance (name, molar_mass, solubility, log_kow)."""
    d = copy.deepcopy(dict(draft))
    for k, v in values.items():
        if k in SUBSTANCE_FIELDS:
            d["substance"][k] = "" if v is None else str(v)
    return d


def set_output(draft: Mapping[str, Any], **values: Any) -> dict[str, Any]:
    """Set units of the exported traces (time, concentration, amount, area); empty: the default."""
    d = copy.deepcopy(dict(draft))
    for k, v in values.items():
        if k in OUTPUT_FIELDS:
            text = "" if v is None else str(v).strip()
            if text:
                d["output"][k] = text
            else:
                d["output"].pop(k, None)
    return d


# ================================================================ layout of the canvas
def tidy_positions(draft: Mapping[str, Any], dx: float = 250.0, dy: float = 120.0) -> dict[str, dict[str, float]]:
    """Place compartments in columns following the direction of the links (sources at the left).

    A compartment's column is the length of the longest chain of links leading to it (links
    that close a loop are ignored); compartments of one column are stacked.
    """
    keys = [c["key"] for c in draft.get("compartments", [])]
    preds: dict[str, list[str]] = {k: [] for k in keys}
    for link in draft.get("links", []):
        if link.get("from") in preds and link.get("to") in preds and link["from"] != link["to"]:
            preds[link["to"]].append(link["from"])
    depth: dict[str, int] = {}

    def level(k: str, stack: frozenset[str]) -> int:
        if k in depth:
            return depth[k]
        parents = [p for p in preds[k] if p not in stack]
        value = 1 + max((level(p, stack | {k}) for p in parents), default=-1)
        depth[k] = value
        return value

    for k in keys:
        level(k, frozenset())
    rows: dict[int, int] = {}
    pos = {}
    for k in keys:
        col = depth[k]
        row = rows.get(col, 0)
        rows[col] = row + 1
        pos[k] = {"x": 110.0 + dx * col, "y": 80.0 + dy * row}
    return pos
