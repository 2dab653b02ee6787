"""Runs of the session: simulate a scenario, pack what the plots need, keep it on the server.

A run is simulated once. What the plots, tables and exports need is packed into a
:class:`RunData` (plain numpy arrays and the exact CSV text) and kept in a :class:`RunArchive`,
a disk cache shared by the web server and its background workers, keyed by a hash of the
scenario text. The browser only holds the small *run record* (name, scenario TOML, key) in a
``dcc.Store``; if the archive has dropped a run, it is simulated again from that TOML, which
gives the same numbers (the engine is deterministic).
"""

from __future__ import annotations

import atexit
import hashlib
import math
import shutil
import tempfile
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

import barrierflow
from barrierflow.errors import BarrierflowError

__all__ = ["MAX_PROFILE_FRAMES", "MAX_PROFILE_POINTS", "Exports", "RunArchive", "RunData", "execute", "exports",
           "pack", "profile_cells", "run_key"]

MAX_PROFILE_FRAMES = 241
"""Most output times kept for the profile slider (evenly picked from the output times)."""


@dataclass(frozen=True, eq=False)
class BarrierTrace:
    """Traces of one barrier (internal units: h, mg, cm, mg/mL)."""

    id: str
    from_id: str
    to_id: str
    area: float
    model: str
    layer_names: tuple[str, ...]
    interfaces: tuple[float, ...]
    flux: np.ndarray
    permeated: np.ndarray
    content: np.ndarray
    degraded: np.ndarray
    uptake_flux: np.ndarray
    profile_times: np.ndarray
    profile_x: np.ndarray
    profile_layer: np.ndarray
    profile_conc: np.ndarray  # (frames, cells)


@dataclass(frozen=True, eq=False)
class RunData:
    """Everything the dashboard shows of one run, in internal units.

    Attributes
    ----------
    name : str
        The run's name in the session.
    scenario_name : str
    times : ndarray, h
    compartments : tuple of str
    held : dict of str to bool
    volume : dict of str to float or None, mL
    conc, amount, eliminated, removed, dosed : dict of str to ndarray
        mg/mL, mg, mg, mg, mg.
    barriers : dict of str to BarrierTrace
    mass_balance : dict of str to float, mg
    metrics : list of dict
        Rows of the metrics table, in the scenario's output units (see :func:`metric_rows`).
    metrics_csv : str
        The metrics CSV, the text ``barrierflow run --metrics`` writes.
    warnings : tuple of str
    status : int
    message : str
    stats : dict
    molar_mass : float or None, mg/mmol
    dose_times : tuple of (float, str, str)
    toml : str
        The scenario's TOML text.
    steady : dict of str to BarrierSteady
        Steady state of each barrier between its compartments' starting conditions.
    metrics_table : barrierflow.analysis.metrics.Metrics or None
        The metrics in internal units; :func:`metric_rows_in` gives its rows in any units.
    output_units : barrierflow.model.OutputUnits or None
        The scenario's ``[output]`` units (the plots and tables start in them).
    links : tuple of (str, str, str)
        ``(kind, from id, to id)`` of every barrier, exchange and transfer.
    sampled, lost : dict of str to ndarray
        mg: what samples withdrew from each compartment and what it lost to the air.
    """

    name: str
    scenario_name: str
    times: np.ndarray
    compartments: tuple[str, ...]
    held: dict[str, bool]
    volume: dict[str, float | None]
    conc: dict[str, np.ndarray]
    amount: dict[str, np.ndarray]
    eliminated: dict[str, np.ndarray]
    removed: dict[str, np.ndarray]
    dosed: dict[str, np.ndarray]
    barriers: dict[str, BarrierTrace]
    initial_amount: float
    mass_balance: dict[str, float]
    metrics: list[dict[str, Any]]
    metrics_csv: str
    warnings: tuple[str, ...]
    status: int
    message: str
    stats: dict[str, Any]
    molar_mass: float | None
    dose_times: tuple[tuple[float, str, str], ...] = field(default=())
    toml: str = ""
    steady: dict[str, Any] = field(default_factory=dict)
    metrics_table: Any = None
    output_units: Any = None
    links: tuple[tuple[str, str, str], ...] = ()
    sampled: dict[str, np.ndarray] = field(default_factory=dict)
    lost: dict[str, np.ndarray] = field(default_factory=dict)

    def renamed(self, name: str) -> RunData:
        """The same run under another name."""
        import dataclasses

        return dataclasses.replace(self, name=name)


def run_key(toml_text: str) -> str:
    """Key of a run in the archive: SHA-256 of the scenario text and the software version."""
    return hashlib.sha256(f"{barrierflow.__version__}\n{toml_text}".encode()).hexdigest()


MAX_PROFILE_POINTS = 480
"""Most cells of a barrier kept for the profile plot (evenly picked within each layer, the cells
next to every interface always kept, so the jumps show)."""


def profile_cells(layer_of_cell: np.ndarray, most: int = MAX_PROFILE_POINTS) -> np.ndarray:
    """Indices of the cells kept for the profile plot (all of them for a small grid)."""
    n = len(layer_of_cell)
    if n <= most:
        return np.arange(n)
    keep = []
    layers = np.unique(layer_of_cell)
    per_layer = max(2, most // max(len(layers), 1))
    for layer in layers:
        idx = np.flatnonzero(layer_of_cell == layer)
        if len(idx) <= per_layer:
            keep.append(idx)
        else:
            keep.append(idx[np.unique(np.round(np.linspace(0, len(idx) - 1, per_layer)).astype(int))])
    return np.concatenate(keep)


def _frames(n: int, most: int = MAX_PROFILE_FRAMES) -> np.ndarray:
    if n <= most:
        return np.arange(n)
    return np.unique(np.round(np.linspace(0, n - 1, most)).astype(int))


METRIC_LABELS = {
    "cmax": "Cmax", "tmax": "tmax", "cmin": "Cmin", "cmax_interval": "Cmax in the last interval",
    "auc": "AUC over the run", "auc_inf": "AUC to infinity", "auc_extrapolated_percent": "AUC extrapolated",
    "lambda_z": "terminal slope λz", "half_life": "terminal half-life", "terminal_points": "points in the terminal fit",
    "terminal_start": "terminal fit from", "terminal_r2": "terminal fit R²", "c_avg": "Cavg over the run",
    "c_avg_interval": "Cavg in the last interval", "threshold": "threshold", "time_above": "time above threshold",
    "accumulation_ratio": "accumulation ratio", "steady_state_reached": "steady state reached",
    "interval_start": "last interval from", "interval_end": "last interval to",
    "peak_flux": "peak flux", "peak_flux_time": "time of peak flux", "permeated": "permeated per area",
    "permeated_amount": "permeated amount", "lag_time": "lag time (time-lag method)",
    "steady_flux": "steady flux (time-lag method)", "lag_points": "points in the time-lag fit",
    "lag_r2": "time-lag fit R²", "lag_window_start": "time-lag window from", "lag_window_end": "time-lag window to",
    "applied": "applied dose", "fraction_absorbed": "fraction of the dose absorbed",
    "content": "left in the barrier", "content_fraction": "fraction left in the barrier",
}
"""Names of the metrics as shown in the table (the CSV keeps the analysis package's names)."""


def metric_label(name: str) -> str:
    """The table name of a metric (``auc_interval_3`` -> ``AUC of dosing interval 3``)."""
    if name.startswith("auc_interval_"):
        return f"AUC of dosing interval {name.rsplit('_', 1)[1]}"
    return METRIC_LABELS.get(name, name.replace("_", " "))


def metric_rows(result: Any) -> tuple[list[dict[str, Any]], str, Any]:
    """The metrics of a result as table rows, in the scenario's output units, their CSV and the table.

    Each row is ``{"part", "id", "name", "metric", "unit", "value", "note"}``; ``name`` is the
    analysis package's name of the metric, ``metric`` the label shown, ``note`` why a value is
    blank or a flag on it. The CSV is the text that ``barrierflow run --metrics`` writes. Rows
    and CSV are empty (and the table None) when the metrics cannot be computed.
    """
    try:
        table = result.metrics()
    except (ImportError, ValueError, ArithmeticError):
        return [], "", None
    return metric_rows_in(table), table.to_csv(), table


def metric_rows_in(table: Any, units: Any = None) -> list[dict[str, Any]]:
    """Rows of a metrics table (see :func:`metric_rows`) in ``units`` (an
    :class:`barrierflow.model.OutputUnits`; default: the scenario's output units)."""
    rows = []
    for kind, ident, name, value, unit, note in table.to_rows(units):
        if isinstance(value, bool):
            value = "yes" if value else "no"
        elif isinstance(value, (int, float)) and not math.isfinite(float(value)):
            value = None
        rows.append({"part": kind, "id": ident, "name": name, "metric": metric_label(name), "unit": unit,
                     "value": value, "note": note})
    return rows


def pack(result: Any, name: str, toml_text: str = "") -> RunData:
    """Pack a :class:`barrierflow.Result` into a :class:`RunData`.

    ``toml_text`` is the scenario's TOML text, kept with the run.
    """
    s = result.scenario
    times = np.asarray(result.times, dtype=float)
    comps = tuple(result.compartment_ids)
    frames = _frames(len(times))
    barriers = {}
    for bid in result.barrier_ids:
        b = s.barrier(bid)
        first = result.profile(bid, float(times[0]))
        cells = profile_cells(np.asarray(first.layer))
        conc = np.empty((len(frames), len(cells)))
        for j, k in enumerate(frames):
            conc[j] = result.profile(bid, float(times[k])).conc[cells]
        barriers[bid] = BarrierTrace(
            id=bid, from_id=b.from_id, to_id=b.to_id, area=b.area, model=b.model,
            layer_names=tuple(layer.name or f"layer {i + 1}" for i, layer in enumerate(b.layers)),
            interfaces=tuple(first.interfaces), flux=result.flux(bid), permeated=result.permeated(bid),
            content=result.content(bid), degraded=result.degraded(bid), uptake_flux=result.uptake_flux(bid),
            profile_times=times[frames], profile_x=np.asarray(first.x)[cells],
            profile_layer=np.asarray(first.layer)[cells],
            profile_conc=conc)
    mb = result.mass_balance
    metrics, metrics_csv, table = metric_rows(result)
    return RunData(
        name=name, scenario_name=s.name, times=times, compartments=comps,
        held={c.id: c.held for c in s.compartments},
        volume={c.id: c.volume for c in s.compartments},
        conc={c: result.concentration(c) for c in comps}, amount={c: result.amount(c) for c in comps},
        eliminated={c: result.eliminated(c) for c in comps}, removed={c: result.removed(c) for c in comps},
        dosed={c: result.dosed(c) for c in comps}, barriers=barriers,
        initial_amount=float(mb.initial), mass_balance=mb.as_dict(), metrics=metrics, metrics_csv=metrics_csv,
        warnings=tuple(result.warnings()),
        status=int(result.status), message=str(result.message), stats=dict(result.stats),
        molar_mass=s.substance.molar_mass, dose_times=tuple(result.dose_times), toml=toml_text,
        steady=steady_of(s), metrics_table=table, output_units=s.output_units, links=links_of(s),
        sampled={c: result.sampled(c) for c in comps}, lost={c: result.lost(c) for c in comps})


def links_of(scenario: Any) -> tuple[tuple[str, str, str], ...]:
    """``(kind, from id, to id)`` of every barrier, exchange and transfer of a scenario."""
    return tuple((kind, x.from_id, x.to_id) for kind, items in
                 (("barrier", scenario.barriers), ("exchange", scenario.exchanges), ("transfer", scenario.transfers))
                 for x in items)


def steady_of(scenario: Any) -> dict[str, Any]:
    """The steady state of each barrier of a scenario by id (empty when it cannot be computed)."""
    try:
        from barrierflow.analysis.steady import steady_state

        return {b.barrier_id: b for b in steady_state(scenario).barriers}
    except (ValueError, ArithmeticError):  # the steady state is an extra; the run stands without it
        return {}


WARM_UP = """
[scenario]
name = "warm-up (invented)"
duration = "2 h"
output_step = "30 min"
[[compartment]]
id = "donor"
volume = "1 mL"
initial_concentration = "1 mg/mL"
[[compartment]]
id = "receiver"
volume = "5 mL"
clearance = "1 mL/h"
[[barrier]]
id = "film"
from = "donor"
to = "receiver"
area = "1 cm^2"
  [[barrier.layer]]
  thickness = "10 um"
  diffusivity = "1e-7 cm^2/s"
"""
"""A small invented scenario whose run loads the compiled engine (:func:`warm_up`)."""


def warm_up() -> None:
    """Run :data:`WARM_UP` once, so that the compiled engine is loaded before the first real run."""
    execute(WARM_UP, "warm-up")


def execute(toml_text: str, name: str, file: str | None = None,
            progress: Callable[[float], None] | None = None) -> RunData:
    """Simulate a scenario given as TOML text and pack the result.

    Raises
    ------
    barrierflow.ScenarioError
        When the text is not a valid scenario.
    barrierflow.SolverError
        When the numerical solution fails.
    """
    scenario = barrierflow.loads(toml_text, file)
    result = barrierflow.simulate(scenario, progress=progress)
    return pack(result, name, toml_text)


class RunArchive:
    """Packed runs on disk, shared by the server process and its background workers.

    Parameters
    ----------
    directory : path-like or None
        Where the cache lives (default: a new temporary folder, removed when the process ends).
    size_limit : int, bytes
        The oldest runs are dropped beyond this size (they are simulated again when asked for).
    """

    def __init__(self, directory: str | Path | None = None, size_limit: int = 2**30):
        import diskcache

        if directory:
            self.directory = Path(directory)
        else:
            # a folder of our own: removed when the server process ends (not by its workers,
            # which leave with os._exit)
            self.directory = Path(tempfile.mkdtemp(prefix="barrierflow-runs-"))
            atexit.register(shutil.rmtree, self.directory, ignore_errors=True)
        self.cache = diskcache.Cache(str(self.directory / "runs"), size_limit=size_limit)

    def put(self, key: str, data: RunData) -> None:
        """Keep ``data`` under ``key``."""
        self.cache.set(key, data)

    def get(self, key: str) -> RunData | None:
        """The run under ``key``, or None when it is not (or no longer) kept."""
        return self.cache.get(key)

    def exports(self, record: Mapping[str, Any]) -> Exports:
        """The traces CSV and sidecar of a run record (made once, then kept)."""
        key = f"{record['key']}:exports"
        found = self.cache.get(key)
        if found is None:
            found = exports(record["toml"], record.get("file"))
            self.cache.set(key, found)
        return found

    def fetch(self, record: Mapping[str, Any],
              kept: Callable[[Mapping[str, Any]], RunData | None] | None = None) -> RunData | None:
        """The run of a run record: from the archive, else from ``kept(record)`` (the browser's
        session), else simulated again from its TOML.

        Returns None when the run cannot be made (it failed when it was made, too).
        """
        data = self.get(record["key"])
        if data is None and kept is not None:
            data = kept(record)
            if data is not None:
                self.put(record["key"], data)
        if data is None:
            try:
                data = execute(record["toml"], record["name"], record.get("file"))
            except BarrierflowError:
                return None
            self.put(record["key"], data)
        if data.name != record["name"]:
            data = data.renamed(record["name"])
        return data


def imported_key(data: RunData) -> str:
    """Archive key of a run read from a project file: ``p`` and a hash of its scenario and traces
    (never the key of a run simulated here, whose numbers may differ)."""
    h = hashlib.sha256(data.toml.encode())
    h.update(np.ascontiguousarray(data.times, dtype="<f8").tobytes())
    for c in data.compartments:
        h.update(np.ascontiguousarray(data.conc[c], dtype="<f8").tobytes())
    return "p" + h.hexdigest()[:40]


def new_record(run_id: str, name: str, toml_text: str, file: str | None, data: RunData | None,
               error: str = "", source: str = "screen") -> dict[str, Any]:
    """The small record of a run kept in the browser (``dcc.Store``).

    ``source`` says what was run: ``"screen"`` (the scenario on the screen), ``"last valid
    version"`` (the last valid version, chosen while the screen had problems) or ``"project
    file"`` (read from a project file; ``made_as`` then keeps how it was made).
    """
    return {
        "id": run_id, "name": name, "key": run_key(toml_text), "toml": toml_text, "file": file, "source": source,
        "scenario": data.scenario_name if data is not None else "",
        "created": datetime.now(UTC).astimezone().strftime("%H:%M:%S"),
        "status": data.status if data is not None else -1,
        "message": data.message if data is not None else error,
        "wall_time_s": float(data.stats.get("wall_time_s", math.nan)) if data is not None else None,
        "error": error,
    }


@dataclass(frozen=True)
class Exports:
    """The files ``barrierflow run`` writes for a scenario, as text.

    Attributes
    ----------
    csv : str
        The traces CSV.
    sidecar : str
        The JSON sidecar (its ``created`` time is when the export was made).
    """

    csv: str
    sidecar: str


def exports(toml_text: str, file: str | None = None) -> Exports:
    """Simulate a scenario and write its traces and sidecar with the library's own writer.

    The run is made again (the engine is deterministic, so the numbers are those of the run
    shown) and written by the library's own writers (:meth:`barrierflow.Result.csv_text` and
    :meth:`~barrierflow.Result.sidecar_text`, which :meth:`~barrierflow.Result.to_csv` uses), so
    the text is byte for byte what ``barrierflow run`` writes for the same scenario.
    """
    scenario = barrierflow.loads(toml_text, file)
    result = barrierflow.simulate(scenario)
    return Exports(result.csv_text(), result.sidecar_text())
