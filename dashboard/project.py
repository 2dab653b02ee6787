"""Project files: the scenario being edited together with the runs of the session.

A project file is a JSON document (UTF-8) of our own layout::

    {"format": "barrierflow project", "version": 1,
     "software": "barrierflow 0.1.0", "saved": "2026-12-04T10:00:00+00:00",
     "caution": "Research estimates, ...",
     "scenario": {"file": "daily_patch.toml", "toml": "<the scenario as typed>",
                  "positions": {"<compartment id>": [x, y], ...}},
     "runs": [{"name": "run 1", "source": "screen" | "last valid version" | "project file",
               "created": "10:02:11", "file": "daily_patch.toml", "wall_time_s": 0.27,
               "data": {<the run, see encode_run>}}, ...],
     "view": {"picked": [0, 1], "reference": 0, ...},
     "measured": {"name": "cells.csv", "text": "<the data file>"} or null}

A run's ``data`` holds its scenario's TOML text and everything the dashboard shows of it:
traces (``times``, each compartment's ``conc``, ``amount``, ``eliminated``, ``removed``,
``dosed``, each barrier's ``flux``, ``permeated``, ``content``, ``degraded``, ``uptake_flux``
and its profiles), the mass balance, the metrics, the warnings and the solver's status.
Numbers are in the internal units (h, mg, mL, cm; concentration mg/mL). An array is written
as ``{"dtype": "float64", "shape": [n], "zlib_base64": "..."}``: its little-endian float64
bytes, compressed with zlib and written in base64, so that every number reads back exactly.

Reading a project (:func:`read_project`) executes nothing that is in it: the JSON is parsed
(no code, no pickles), the scenario text is read by :func:`barrierflow.io.loads` (problems are
kept and shown at their fields, as for any scenario file), and every run is checked: its
scenario must be valid; its compartments and barriers must be those of that scenario; every
array must have the right shape and finite values (the amount in a held compartment without a
volume is NaN). Every problem is reported at once, in the
pattern ``<file>: <field path>: got <value>; <what was expected>``, for example
``study.bfproject.json: runs[2] data conc.central: got 672 values; expected 673 (one per output time)``.
The steady state of each barrier is computed again from the run's scenario.
"""

from __future__ import annotations

import base64
import json
import math
import zlib
from collections.abc import Mapping, Sequence
from dataclasses import asdict, fields
from datetime import UTC, datetime
from typing import Any

import numpy as np

import barrierflow
from barrierflow.analysis.metrics import BarrierMetrics, CompartmentMetrics, Metrics
from barrierflow.caution import CAUTION
from barrierflow.errors import Problem, ScenarioError
from barrierflow.io import loads_experiment

from .runs import BarrierTrace, RunData, links_of, metric_rows_in, steady_of

__all__ = ["FORMAT", "MAX_RUNS", "SUFFIX", "VERSION", "decode_run", "encode_run", "project_text", "read_project",
           "read_run"]

FORMAT = "barrierflow project"
VERSION = 1
SUFFIX = ".bfproject.json"
"""File name ending of a project file."""
MAX_RUNS = 500
"""Most runs a project file may hold."""
MAX_ARRAY_BYTES = 64 * 1024 * 1024
"""Largest array a project file may hold once decompressed (bytes)."""
MAX_NESTING = 32
"""Deepest nesting of JSON objects and arrays accepted."""

_TRACES = ("conc", "amount", "eliminated", "removed", "dosed")
_OPTIONAL_TRACES = ("sampled", "lost")  # the lab's protocol; a project written before them reads as zeros
_BARRIER_TRACES = ("flux", "permeated", "content", "degraded", "uptake_flux")


# ============================================================================ arrays
def encode_array(a: np.ndarray) -> dict[str, Any]:
    """An array as JSON: its float64 bytes (little-endian), zlib-compressed, in base64."""
    a = np.ascontiguousarray(np.asarray(a, dtype="<f8"))
    return {"dtype": "float64", "shape": list(a.shape),
            "zlib_base64": base64.b64encode(zlib.compress(a.tobytes(), 6)).decode("ascii")}


class _Reader:
    """Collects the problems of one project file while reading it."""

    def __init__(self, file: str):
        self.file = file
        self.problems: list[Problem] = []

    def bad(self, field: str, value: Any, expected: str) -> None:
        self.problems.append(Problem(field, _short(value), expected, self.file))

    def table(self, obj: Any, field: str) -> dict[str, Any]:
        if isinstance(obj, dict):
            return obj
        self.bad(field, obj, "expected a table (a JSON object)")
        return {}

    def text(self, obj: Mapping[str, Any], key: str, field: str, default: str | None = None) -> str:
        value = obj.get(key, default)
        if isinstance(value, str):
            return value
        self.bad(f"{field} {key}".strip(), value if key in obj else "nothing", "expected text")
        return "" if default is None else default

    def number(self, obj: Mapping[str, Any], key: str, field: str, *, none: bool = False) -> float | None:
        value = obj.get(key)
        if value is None and none:
            return None
        if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
            return float(value)
        self.bad(f"{field} {key}".strip(), value if key in obj else "nothing", "expected a finite number")
        return None

    def array(self, obj: Any, field: str, shape: tuple[int, ...] | None = None, what: str = "",
              nan: bool = False) -> np.ndarray | None:
        if not isinstance(obj, dict) or obj.get("dtype") != "float64" or not isinstance(obj.get("zlib_base64"), str) \
                or not isinstance(obj.get("shape"), list):
            self.bad(field, obj, 'expected an array {"dtype": "float64", "shape": [...], "zlib_base64": "..."}')
            return None
        dims = obj["shape"]
        if not all(isinstance(n, int) and not isinstance(n, bool) and n >= 0 for n in dims) or len(dims) > 2:
            self.bad(field + " shape", dims, "expected one or two whole numbers >= 0")
            return None
        size = 8 * math.prod(dims)
        if size > MAX_ARRAY_BYTES:
            self.bad(field + " shape", dims, f"expected at most {MAX_ARRAY_BYTES // 8} values")
            return None
        try:
            packed = base64.b64decode(obj["zlib_base64"], validate=True)
            inflater = zlib.decompressobj()
            raw = inflater.decompress(packed, size + 1)
            if inflater.unconsumed_tail or len(raw) != size:
                raise ValueError
        except (ValueError, zlib.error):
            self.bad(field, f"{len(obj['zlib_base64'])} characters of data",
                     f"expected zlib-compressed base64 of {math.prod(dims)} float64 values")
            return None
        a = np.frombuffer(raw, dtype="<f8").reshape(dims).astype(float)
        if shape is not None and a.shape != shape:
            have = f"{a.shape[0]} values" if a.ndim == 1 else f"shape {list(a.shape)}"
            need = f"{shape[0]} values" if len(shape) == 1 else f"shape {list(shape)}"
            self.bad(field, have, f"expected {need}{what}")
            return None
        wrong = np.isinf(a) if nan else ~np.isfinite(a)
        if np.any(wrong):
            self.bad(field, f"{int(np.sum(wrong))} values that are not finite", "expected finite numbers"
                     + (" or NaN" if nan else ""))
            return None
        return a


def _short(value: Any) -> str:
    text = json.dumps(value, ensure_ascii=False) if not isinstance(value, str) else value
    return text if len(text) <= 80 else text[:70] + f"... ({len(text)} characters)"


def _clean(value: Any) -> Any:
    """JSON-ready: non-finite floats as the strings "nan", "inf", "-inf"; tuples as lists."""
    if isinstance(value, float) and not math.isfinite(value):
        return "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, (list, tuple)):
        return [_clean(x) for x in value]
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, np.generic):
        return _clean(value.item())
    return value


_SPECIAL = {"nan": math.nan, "inf": math.inf, "-inf": -math.inf}


# ============================================================================ runs
def encode_run(data: RunData) -> dict[str, Any]:
    """A packed run as JSON (see the module's documentation)."""
    table = data.metrics_table
    return {
        "scenario_toml": data.toml,
        "scenario_name": data.scenario_name,
        "times": encode_array(data.times),
        "compartments": list(data.compartments),
        "volume": {c: data.volume.get(c) for c in data.compartments},
        "held": {c: bool(data.held.get(c)) for c in data.compartments},
        **{name: {c: encode_array(getattr(data, name)[c]) for c in data.compartments} for name in _TRACES},
        **{name: {c: encode_array(getattr(data, name)[c]) for c in data.compartments}
           for name in _OPTIONAL_TRACES if getattr(data, name)},
        "barriers": {bid: {
            "from": b.from_id, "to": b.to_id, "area": b.area, "model": b.model,
            "layer_names": list(b.layer_names), "interfaces": list(b.interfaces),
            **{name: encode_array(getattr(b, name)) for name in _BARRIER_TRACES},
            "profile_times": encode_array(b.profile_times), "profile_x": encode_array(b.profile_x),
            "profile_layer": encode_array(b.profile_layer), "profile_conc": encode_array(b.profile_conc),
        } for bid, b in data.barriers.items()},
        "initial_amount": data.initial_amount,
        "mass_balance": _clean(dict(data.mass_balance)),
        "metrics": None if table is None else {
            "compartments": [_clean(asdict(m)) for m in table.compartments],
            "barriers": [_clean(asdict(m)) for m in table.barriers],
            "application_times": _clean(table.application_times), "intervals": _clean(table.intervals),
            "duration": table.duration},
        "warnings": list(data.warnings),
        "status": int(data.status),
        "message": data.message,
        "stats": {k: _clean(v) for k, v in data.stats.items() if isinstance(v, (int, float, str, bool))},
        "dose_times": [[t, target, kind] for t, target, kind in data.dose_times],
    }


def _metric_value(r: _Reader, value: Any, kind: Any, field: str) -> Any:
    if isinstance(value, str) and value in _SPECIAL:
        return _SPECIAL[value]
    if value is None:
        return None
    if kind is bool or kind == "bool | None":
        if isinstance(value, bool):
            return value
    elif isinstance(value, list):
        return tuple(_metric_value(r, v, float, field) for v in value)
    elif isinstance(value, (int, float)) and not isinstance(value, bool):
        return value
    r.bad(field, value, "expected a number")
    return math.nan


def _metrics(r: _Reader, obj: Any, field: str, scenario: Any) -> Metrics | None:
    if obj is None:
        return None
    obj = r.table(obj, field)

    def rows(key: str, cls: type) -> tuple[Any, ...]:
        out = []
        items = obj.get(key)
        if not isinstance(items, list):
            r.bad(f"{field} {key}", items, "expected a list of tables")
            return ()
        names = [f.name for f in fields(cls)]
        required = set(names) - {"notes"}  # notes: reasons for blanks and flags (absent from older files)
        for i, item in enumerate(items, start=1):
            item = r.table(item, f"{field} {key}[{i}]")
            if not required <= set(item) <= set(names):
                r.bad(f"{field} {key}[{i}]", sorted(item), f"expected the keys {', '.join(names)}")
                continue
            values = {}
            for f in fields(cls):
                if f.name == "notes":
                    notes = item.get("notes", {})
                    if not (isinstance(notes, dict) and all(isinstance(k, str) and isinstance(v, str)
                                                            for k, v in notes.items())):
                        r.bad(f"{field} {key}[{i}] notes", notes, "expected a table of texts")
                        notes = {}
                    values["notes"] = dict(notes)
                    continue
                v = item[f.name]
                if f.name == "id":
                    values["id"] = v if isinstance(v, str) else r.bad(f"{field} {key}[{i}] id", v, "expected text")
                else:
                    values[f.name] = _metric_value(r, v, f.type, f"{field} {key}[{i}] {f.name}")
            out.append(cls(**values))
        return tuple(out)

    comps = rows("compartments", CompartmentMetrics)
    bars = rows("barriers", BarrierMetrics)
    apps = _metric_value(r, obj.get("application_times", []), list, f"{field} application_times")
    intervals = obj.get("intervals", [])
    if not isinstance(intervals, list) or not all(isinstance(i, list) and len(i) == 2 for i in intervals):
        r.bad(f"{field} intervals", intervals, "expected a list of [start, end] pairs")
        intervals = []
    duration = r.number(obj, "duration", field)
    return Metrics(comps, bars, tuple(apps or ()), tuple((float(a), float(b)) for a, b in intervals),
                   duration or 0.0, scenario.output_units, scenario.substance.molar_mass)


def decode_run(obj: Any, name: str, field: str, r: _Reader) -> RunData | None:
    """A run read back from its JSON (problems go to ``r``; None when it cannot be used)."""
    before = len(r.problems)
    obj = r.table(obj, field)
    toml = r.text(obj, "scenario_toml", field)
    try:
        scenario = barrierflow.loads(toml, f"{r.file}, {field.removesuffix(' data')} scenario")
    except ScenarioError as err:
        for p in err.problems:
            r.problems.append(p)
        return None
    times = r.array(obj.get("times"), f"{field} times")
    if times is None:
        return None
    if times.ndim != 1 or times.size == 0 or np.any(np.diff(times) <= 0):
        r.bad(f"{field} times", f"{times.size} values", "expected increasing output times")
        return None
    n = (len(times),)
    one = " (one per output time)"
    comps = [c.id for c in scenario.compartments]
    if obj.get("compartments") != comps:
        r.bad(f"{field} compartments", obj.get("compartments"), f"expected those of its scenario: {comps}")
        return None
    traces: dict[str, dict[str, np.ndarray]] = {}
    no_volume = {c.id for c in scenario.compartments if c.volume is None}
    for name_ in _TRACES:
        table = r.table(obj.get(name_), f"{field} {name_}")
        traces[name_] = {}
        for c in comps:
            # the amount in a held compartment without a volume is not defined (NaN)
            a = r.array(table.get(c), f"{field} {name_}.{c}", n, one, nan=name_ == "amount" and c in no_volume)
            if a is not None:
                traces[name_][c] = a
    for name_ in _OPTIONAL_TRACES:
        table = r.table(obj.get(name_, {}), f"{field} {name_}")
        traces[name_] = {}
        for c in comps:
            a = r.array(table[c], f"{field} {name_}.{c}", n, one) if c in table else np.zeros(len(times))
            if a is not None:
                traces[name_][c] = a
    barriers = {}
    table = r.table(obj.get("barriers"), f"{field} barriers")
    wanted = [b.id for b in scenario.barriers]
    if list(table) != wanted:
        r.bad(f"{field} barriers", list(table), f"expected those of its scenario: {wanted}")
    for b in scenario.barriers:
        bt = r.table(table.get(b.id, {}), f"{field} barriers.{b.id}")
        where = f"{field} barriers.{b.id}"
        arrays = {k: r.array(bt.get(k), f"{where} {k}", n, one) for k in _BARRIER_TRACES}
        ptimes = r.array(bt.get("profile_times"), f"{where} profile_times")
        px = r.array(bt.get("profile_x"), f"{where} profile_x")
        player = r.array(bt.get("profile_layer"), f"{where} profile_layer", None if px is None else px.shape)
        pconc = None
        if ptimes is not None and px is not None:
            pconc = r.array(bt.get("profile_conc"), f"{where} profile_conc", (len(ptimes), len(px)),
                            " (output times of the profile by cells)")
        interfaces = bt.get("interfaces")
        names = bt.get("layer_names")
        if not (isinstance(interfaces, list) and len(interfaces) == len(b.layers) + 1
                and all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in interfaces)):
            r.bad(f"{where} interfaces", interfaces, f"expected {len(b.layers) + 1} depths (cm)")
            interfaces = None
        if not (isinstance(names, list) and len(names) == len(b.layers) and all(isinstance(x, str) for x in names)):
            r.bad(f"{where} layer_names", names, f"expected {len(b.layers)} names")
            names = None
        if any(x is None for x in (*arrays.values(), ptimes, px, player, pconc, interfaces, names)):
            continue
        barriers[b.id] = BarrierTrace(
            id=b.id, from_id=b.from_id, to_id=b.to_id, area=b.area, model=b.model, layer_names=tuple(names),
            interfaces=tuple(float(x) for x in interfaces), **arrays, profile_times=ptimes, profile_x=px,
            profile_layer=player.astype(int), profile_conc=pconc)
    mb = r.table(obj.get("mass_balance"), f"{field} mass_balance")
    balance = {}
    for k, v in mb.items():
        if isinstance(v, str) and v in _SPECIAL:
            balance[k] = _SPECIAL[v]
        elif isinstance(v, (int, float)) and not isinstance(v, bool):
            balance[k] = float(v)
        else:
            r.bad(f"{field} mass_balance {k}", v, "expected a number")
    initial = r.number(obj, "initial_amount", field)
    metrics = _metrics(r, obj.get("metrics"), f"{field} metrics", scenario)
    warnings = obj.get("warnings", [])
    if not isinstance(warnings, list) or not all(isinstance(w, str) for w in warnings):
        r.bad(f"{field} warnings", warnings, "expected a list of texts")
        warnings = []
    status = obj.get("status")
    if not isinstance(status, int) or isinstance(status, bool):
        r.bad(f"{field} status", status, "expected a whole number")
        status = -1
    message = r.text(obj, "message", field, "")
    stats = obj.get("stats", {})
    if not isinstance(stats, dict) or not all(isinstance(v, (int, float, str, bool)) for v in stats.values()):
        r.bad(f"{field} stats", stats, "expected a table of numbers and texts")
        stats = {}
    doses = obj.get("dose_times", [])
    if not (isinstance(doses, list) and all(
            isinstance(d, list) and len(d) == 3 and isinstance(d[0], (int, float)) and isinstance(d[1], str)
            and isinstance(d[2], str) for d in doses)):
        r.bad(f"{field} dose_times", doses, "expected a list of [time, target, kind]")
        doses = []
    if len(r.problems) > before:
        return None
    return RunData(
        name=name, scenario_name=scenario.name, times=times, compartments=tuple(comps),
        held={c.id: c.held for c in scenario.compartments}, volume={c.id: c.volume for c in scenario.compartments},
        conc=traces["conc"], amount=traces["amount"], eliminated=traces["eliminated"], removed=traces["removed"],
        dosed=traces["dosed"], barriers=barriers, initial_amount=float(initial), mass_balance=balance,
        metrics=metric_rows_in(metrics) if metrics is not None else [], metrics_csv=metrics.to_csv() if metrics else "",
        warnings=tuple(warnings), status=status, message=message, stats=dict(stats),
        molar_mass=scenario.substance.molar_mass, dose_times=tuple((float(t), g, k) for t, g, k in doses),
        toml=toml, steady=steady_of(scenario), metrics_table=metrics, output_units=scenario.output_units,
        links=links_of(scenario), sampled=traces["sampled"], lost=traces["lost"])


def read_run(obj: Any, name: str, file: str) -> RunData | None:
    """A run kept as JSON on its own (a session's ``runs/<key>.json``), or None when it does not check."""
    return decode_run(obj, name, "run", _Reader(file))


# ============================================================================ project files
def project_text(draft_toml: str, file: str, positions: Mapping[str, Sequence[float]],
                 runs: Sequence[tuple[Mapping[str, Any], RunData]], view: Mapping[str, Any] | None = None,
                 measured: Mapping[str, str] | None = None) -> str:
    """The text of a project file.

    Parameters
    ----------
    draft_toml : str
        The scenario being edited, as TOML text (as typed when it has problems).
    file : str
        Its file name.
    positions : mapping
        Compartment id -> (x, y) on the canvas.
    runs : sequence of (record, RunData)
        The runs, each with its record (``name``, ``source``, ``created``, ``file``, ``wall_time_s``).
    view : mapping, optional
        Which runs are ticked (``picked``: indexes into ``runs``), the reference, the units.
    measured : mapping, optional
        The measured data shown over the plots: ``{"name", "text"}`` of its data file.
    """
    doc = {
        "format": FORMAT, "version": VERSION, "software": f"barrierflow {barrierflow.__version__}",
        "saved": datetime.now(UTC).isoformat(timespec="seconds"), "caution": CAUTION,
        "scenario": {"file": file, "toml": draft_toml,
                     "positions": {k: [float(v[0]), float(v[1])] for k, v in positions.items()}},
        "runs": [{"name": rec.get("name", ""), "source": rec.get("made_as") or rec.get("source") or "screen",
                  "created": rec.get("created", ""), "file": rec.get("file") or "",
                  "wall_time_s": _clean(rec.get("wall_time_s")), "data": encode_run(data)} for rec, data in runs],
        "view": _clean(dict(view or {})),
        "measured": {"name": measured["name"], "text": measured["text"]} if measured else None,
    }
    return json.dumps(doc, ensure_ascii=False, allow_nan=False, indent=1) + "\n"


def _depth(obj: Any) -> int:
    """Nesting depth of parsed JSON (iterative, so that it cannot overflow)."""
    deepest, stack = 0, [(obj, 1)]
    while stack:
        node, d = stack.pop()
        deepest = max(deepest, d)
        if isinstance(node, dict):
            stack.extend((v, d + 1) for v in node.values())
        elif isinstance(node, list):
            stack.extend((v, d + 1) for v in node)
    return deepest


def read_project(text: str | bytes, file: str) -> dict[str, Any]:
    """Read a project file; every run is checked (see the module's documentation).

    Returns
    -------
    dict
        ``toml`` and ``file`` (the scenario being edited, as text: open it with
        :func:`dashboard.draft.draft_from_toml`), ``positions`` (compartment id -> [x, y]),
        ``runs`` (a list of ``(record fields, RunData)``), ``view`` and ``measured`` (``{"name",
        "text"}`` of the measured data's file, read and checked by
        :func:`barrierflow.io.loads_experiment`, or None).

    Raises
    ------
    barrierflow.ScenarioError
        With every problem of the file (not JSON, not a project, a run that does not check).
    """
    r = _Reader(file)
    if isinstance(text, bytes):
        try:
            text = text.decode("utf-8")
        except UnicodeDecodeError:
            raise ScenarioError.single("file", "bytes that are not UTF-8", "expected a project file (JSON text)",
                                       file) from None

    def no_constant(name: str) -> Any:
        raise ValueError(f"{name} is not a number JSON allows")

    try:
        doc = json.loads(text, parse_constant=no_constant)
    except RecursionError:
        raise ScenarioError.single("file", "nesting too deep to read", "expected a project file", file) from None
    except ValueError as err:
        raise ScenarioError.single("file", f"text that is not JSON ({err})",
                                   f"expected a project file (JSON, ending {SUFFIX})", file) from None
    if _depth(doc) > MAX_NESTING:
        raise ScenarioError.single("file", f"nesting deeper than {MAX_NESTING}", "expected a project file", file)
    if not isinstance(doc, dict) or doc.get("format") != FORMAT:
        got = doc.get("format") if isinstance(doc, dict) else type(doc).__name__
        raise ScenarioError.single("format", got if got is not None else "nothing",
                                   f'expected "{FORMAT}" (a project file saved by the dashboard)', file)
    if doc.get("version") != VERSION:
        raise ScenarioError.single("version", doc.get("version"), f"expected {VERSION}", file)
    head = r.table(doc.get("scenario"), "scenario")
    toml = r.text(head, "toml", "scenario")
    name = r.text(head, "file", "scenario", "untitled.toml") or "untitled.toml"
    positions = {}
    raw_positions = head.get("positions", {})
    if isinstance(raw_positions, dict):
        for cid, xy in raw_positions.items():
            if isinstance(xy, list) and len(xy) == 2 and all(
                    isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) for v in xy):
                positions[cid] = [float(xy[0]), float(xy[1])]
            else:
                r.bad(f"scenario positions {cid}", xy, "expected [x, y]")
    else:
        r.bad("scenario positions", raw_positions, "expected a table of compartment id -> [x, y]")
    items = doc.get("runs", [])
    if not isinstance(items, list):
        r.bad("runs", items, "expected a list of runs")
        items = []
    if len(items) > MAX_RUNS:
        r.bad("runs", f"{len(items)} runs", f"expected at most {MAX_RUNS}")
        items = []
    runs = []
    for i, item in enumerate(items, start=1):
        field = f"runs[{i}]"
        item = r.table(item, field)
        run_name = r.text(item, "name", field, "") or f"run {i}"
        source = item.get("source", "screen")
        if source not in ("screen", "last valid version", "project file"):
            r.bad(f"{field} source", source, 'expected "screen", "last valid version" or "project file"')
        wall = item.get("wall_time_s")
        record = {"name": run_name, "source": source if isinstance(source, str) else "screen",
                  "created": item.get("created") if isinstance(item.get("created"), str) else "",
                  "file": item.get("file") if isinstance(item.get("file"), str) else "",
                  "wall_time_s": float(wall) if isinstance(wall, (int, float)) and not isinstance(wall, bool) else None}
        data = decode_run(item.get("data"), run_name, f"{field} data", r)
        if data is not None:
            runs.append((record, data))
    view = doc.get("view", {})
    if not isinstance(view, dict):
        r.bad("view", view, "expected a table")
        view = {}
    measured = doc.get("measured")
    if measured is not None:
        measured = r.table(measured, "measured")
        data_name, data_text = r.text(measured, "name", "measured", ""), r.text(measured, "text", "measured", "")
        try:
            loads_experiment(data_text, name=f"{file}, measured {data_name}")  # the one reader of data files
        except ScenarioError as err:
            r.problems.extend(err.problems)
        measured = {"name": data_name, "text": data_text}
    if r.problems:
        raise ScenarioError(r.problems)
    return {"toml": toml, "file": name, "positions": positions, "runs": runs, "view": view, "measured": measured}
