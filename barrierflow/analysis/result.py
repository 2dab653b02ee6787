"""The typed result of a simulation: traces by id, profiles, the mass balance, CSV export."""

from __future__ import annotations

import csv
import dataclasses
import io
import math
import os
import platform
from dataclasses import dataclass
from datetime import UTC, datetime
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np

from ..caution import CAUTION
from ..engine import Trajectory
from ..engine.compiled import limited_compartments
from ..engine.ledger import rows_ledger
from ..io import traces_digest, write_traces
from ..io.csv_numbers import csv_row_bytes
from ..model import Scenario
from ..units import unit_factor

__all__ = ["CAUTION", "BarrierProfile", "MassBalance", "Result", "trace_columns"]



@dataclass(frozen=True)
class BarrierProfile:
    """Concentration through a barrier at one time.

    Attributes
    ----------
    barrier_id : str
    time : float, h
        The output time the profile belongs to.
    x : ndarray, cm
        Cell centres, from the ``from`` face.
    conc : ndarray, mg/mL
        Cell concentrations.
    layer : ndarray of int
        Index of the layer of each cell.
    interfaces : tuple of float, cm
        0, each interface, and the total thickness.
    """

    barrier_id: str
    time: float
    x: np.ndarray
    conc: np.ndarray
    layer: np.ndarray
    interfaces: tuple[float, ...]


@dataclass(frozen=True)
class MassBalance:
    """Where every milligram went, at the end of the run and as the worst error over time.

    The ledger is ``initial + dosed + held_supply = present + eliminated + degraded + removed +
    sampled + lost``, where ``held_supply`` is what held compartments gave (negative when a sink
    took substance), ``present`` counts dissolved and undissolved solute, ``sampled`` what samples
    withdrew and ``lost`` what went to the air.

    Attributes (mg unless said)
    ----------
    initial, dosed, held_supply, present, eliminated, degraded, removed, sampled, lost : float
        Values at the end of the run.
    absolute_error : float, mg
        Largest |left - right| over all output times.
    relative_error : float
        ``absolute_error`` divided by the largest amount that entered the ledger.
    """

    initial: float
    dosed: float
    held_supply: float
    present: float
    eliminated: float
    degraded: float
    removed: float
    absolute_error: float
    relative_error: float
    sampled: float = 0.0
    lost: float = 0.0

    def as_dict(self) -> dict[str, float]:
        """The fields as a plain dict (mg, and the relative error)."""
        return _flat_dict(self)


@dataclass(frozen=True, eq=False)
class Result:
    """The result of :func:`barrierflow.simulate`, looked up by compartment and barrier id.

    All accessors return numpy arrays with one value per output time, in internal units
    (h, mg, mL, cm); :meth:`to_csv` converts to the scenario's ``[output]`` units.
    Concentrations are clipped at 0 in every accessor and export; the most negative raw value is
    reported by :attr:`most_negative` (tiny negatives are integration noise).

    Attributes
    ----------
    scenario : Scenario
        What was simulated.
    trajectory : Trajectory
        The engine's raw output.
    """

    scenario: Scenario
    trajectory: Trajectory

    # ----------------------------------------------------------------- status
    @property
    def times(self) -> np.ndarray:
        """Output times, h."""
        return self.trajectory.times

    @property
    def status(self) -> int:
        """0 when the run finished, -1 when it stopped early."""
        return self.trajectory.status

    @property
    def message(self) -> str:
        """What happened, in words."""
        return self.trajectory.message

    @property
    def stats(self) -> dict[str, Any]:
        """Run statistics: steps, rejected steps, evaluations, intervals, and wall time (s)."""
        return {**self.trajectory.stats, "wall_time_s": self.trajectory.wall_time}

    @property
    def integrator(self) -> str:
        """Name of the integrator that made the result."""
        return self.trajectory.integrator

    @property
    def dose_times(self) -> tuple[tuple[float, str, str], ...]:
        """Every event applied: (time h, compartment id, kind)."""
        ids = self.trajectory.model.comp_ids
        return tuple((e.time, ids[e.comp], e.kind) for e in self.trajectory.events)

    # ----------------------------------------------------------------- lookups
    def _c(self, cid: str) -> int:
        try:
            return self.trajectory.model.comp_index[cid]
        except KeyError:
            raise KeyError(f"no compartment {cid!r}; known: {', '.join(self.trajectory.model.comp_ids)}") from None

    def _b(self, bid: str) -> int:
        try:
            return self.trajectory.model.barrier_index[bid]
        except KeyError:
            raise KeyError(f"no barrier {bid!r}; known: {', '.join(self.trajectory.model.barrier_ids)}") from None

    @property
    def compartment_ids(self) -> tuple[str, ...]:
        """Ids of the compartments, in the order of the scenario."""
        return self.trajectory.model.comp_ids

    @property
    def barrier_ids(self) -> tuple[str, ...]:
        """Ids of the barriers, in the order of the scenario."""
        return self.trajectory.model.barrier_ids

    def concentration(self, cid: str) -> np.ndarray:
        """Concentration in compartment ``cid``, clipped at 0: the dissolved concentration where
        the compartment holds undissolved solid (it is at the solubility there).

        Parameters
        ----------
        cid : str
            Compartment id.

        Returns
        -------
        ndarray, mg/mL
            One value per output time.
        """
        clipped = self._concentrations.get(cid)
        if clipped is None:
            i = self._c(cid)
            clipped = np.maximum(np.minimum(self.trajectory.column(i), self.trajectory.model.solubility[i]), 0.0)
            clipped.flags.writeable = False
            self._concentrations[cid] = clipped
        return clipped.copy()

    @cached_property
    def _concentrations(self) -> dict[str, np.ndarray]:
        """Each compartment's clipped concentrations once found (read-only; :meth:`concentration`
        gives copies): the export, the metrics and the warnings of a run read them several times."""
        return {}

    def volume(self, cid: str) -> np.ndarray:
        """Volume of compartment ``cid`` (it changes with evaporation and samples without
        replacement; NaN for a held compartment without volume).

        Parameters
        ----------
        cid : str
            Compartment id.

        Returns
        -------
        ndarray, mL
            One value per output time.
        """
        i = self._c(cid)
        tr = self.trajectory
        if not tr.model.has_volume[i]:
            return np.full(len(self.times), np.nan)
        if tr.volumes is not None:
            return tr.volumes[:, i].copy()
        return np.full(len(self.times), tr.model.capacity[i])

    def amount(self, cid: str) -> np.ndarray:
        """Amount in compartment ``cid``, dissolved and undissolved (NaN for a held compartment
        without volume).

        Parameters
        ----------
        cid : str
            Compartment id.

        Returns
        -------
        ndarray, mg
            One value per output time.
        """
        i = self._c(cid)
        return np.maximum(self.trajectory.column(i), 0.0) * self.volume(cid)

    def solid(self, cid: str) -> np.ndarray:
        """Undissolved amount in compartment ``cid``: what exceeds the solubility (times its
        partition) is held there as solid (0 where no limit applies).

        Parameters
        ----------
        cid : str
            Compartment id.

        Returns
        -------
        ndarray, mg
            One value per output time.
        """
        i = self._c(cid)
        excess = np.maximum(self.trajectory.column(i) - self.trajectory.model.solubility[i], 0.0)
        return np.nan_to_num(excess * self.volume(cid), nan=0.0)

    def sampled(self, cid: str) -> np.ndarray:
        """Cumulative amount withdrawn from ``cid`` by samples.

        Parameters
        ----------
        cid : str
            Compartment id.

        Returns
        -------
        ndarray, mg
            One value per output time.
        """
        m = self.trajectory.model
        return self.trajectory.column(m.q_sampled + self._c(cid)).copy()

    def lost(self, cid: str) -> np.ndarray:
        """Cumulative amount lost from ``cid`` to the air (its ``loss_rate``).

        Parameters
        ----------
        cid : str
            Compartment id.

        Returns
        -------
        ndarray, mg
            One value per output time.
        """
        m = self.trajectory.model
        return self.trajectory.column(m.q_lost + self._c(cid)).copy()

    def eliminated(self, cid: str) -> np.ndarray:
        """Cumulative amount eliminated from ``cid`` (clearance and saturable).

        Parameters
        ----------
        cid : str
            Compartment id.

        Returns
        -------
        ndarray, mg
            One value per output time.
        """
        m = self.trajectory.model
        return self.trajectory.column(m.q_elim + self._c(cid)).copy()

    def removed(self, cid: str) -> np.ndarray:
        """Cumulative amount taken out of ``cid`` by replace and remove doses.

        Parameters
        ----------
        cid : str
            Compartment id.

        Returns
        -------
        ndarray, mg
            One value per output time.
        """
        return self.trajectory.event_removed[:, self._c(cid)].copy()

    def dosed(self, cid: str) -> np.ndarray:
        """Cumulative amount dosed into ``cid``, mg: boluses, infusions, refills and holds.

        For a held compartment this is what it gave to keep its concentration (negative when
        it took substance, as a perfect sink does).
        """
        m = self.trajectory.model
        i = self._c(cid)
        col = self.trajectory.column
        return self.trajectory.event_dosed[:, i] + col(m.q_infused + i) + col(m.q_supply + i)

    def dose_parts(self, cid: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """What entered ``cid`` by each route, cumulative, mg: the instantaneous events (boluses,
        refills, hold starts; a hold start below the content counts negative), infusions, and what
        hold doses supplied to keep their level (negative when a hold took substance).
        :meth:`dosed` is their sum."""
        m = self.trajectory.model
        i = self._c(cid)
        col = self.trajectory.column
        return self.trajectory.event_dosed[:, i].copy(), col(m.q_infused + i).copy(), col(m.q_supply + i).copy()

    def _link_rate(self, link: int, into: bool) -> np.ndarray:
        m = self.trajectory.model
        p, q = m.link_p[link], m.link_q[link]
        up, uq = self._potential(p), self._potential(q)
        rate = m.link_c[link] * up - m.link_d[link] * uq if into else m.link_a[link] * up - m.link_b[link] * uq
        return np.where(self._link_open(link), rate, 0.0)

    def _potential(self, i: int) -> np.ndarray:
        """The potential C/K of state ``i`` at each output time: of the dissolved part where a
        compartment holds solid (a held, saturated reservoir has its potential in its partition
        entry already)."""
        m = self.trajectory.model
        y = self.trajectory.column(i)
        if i < m.n_comp and not m.held[i]:
            y = np.minimum(y, m.solubility[i])
        return y * m.inv_partition[i]

    def _link_open(self, link: int) -> np.ndarray | bool:
        """Whether a link carries flux at each output time (a closed face carries none)."""
        m = self.trajectory.model
        if link not in set(m.face_link.tolist()):
            return True
        closed = self._closed
        p, q = int(m.link_p[link]), int(m.link_q[link])
        shut = np.zeros(len(self.times), dtype=bool)
        for c in (p, q):
            if c < m.n_comp:
                shut |= closed[:, c]
        return ~shut

    @cached_property
    def _closed(self) -> np.ndarray:
        from ..engine.schedule import closed_rows

        return closed_rows(self.trajectory.events, self.times, self.trajectory.model.n_comp)

    def flux(self, bid: str) -> np.ndarray:
        """Flux per area from barrier ``bid`` into its ``to`` compartment.

        Parameters
        ----------
        bid : str
            Barrier id.

        Returns
        -------
        ndarray, mg/(cm^2 h)
            One value per output time.
        """
        b = self._b(bid)
        m = self.trajectory.model
        return self._link_rate(m.grids[b].out_link, True) / m.area[b]

    def uptake_flux(self, bid: str) -> np.ndarray:
        """Flux per area from the ``from`` compartment into barrier ``bid``.

        Parameters
        ----------
        bid : str
            Barrier id.

        Returns
        -------
        ndarray, mg/(cm^2 h)
            One value per output time.
        """
        b = self._b(bid)
        m = self.trajectory.model
        return self._link_rate(m.grids[b].in_link, False) / m.area[b]

    def permeated(self, bid: str) -> np.ndarray:
        """Cumulative amount per area that entered the ``to`` compartment through ``bid`` (net).

        Parameters
        ----------
        bid : str
            Barrier id.

        Returns
        -------
        ndarray, mg/cm^2
            One value per output time.
        """
        b = self._b(bid)
        m = self.trajectory.model
        return self.trajectory.column(m.q_perm + b) / m.area[b]

    def content(self, bid: str) -> np.ndarray:
        """Amount held inside the layers of ``bid`` (0 for a steady barrier).

        Parameters
        ----------
        bid : str
            Barrier id.

        Returns
        -------
        ndarray, mg
            One value per output time.
        """
        # each cell counted at 0 where it is negative (kept by the run at every row)
        return self.trajectory.rows.clipped[:, self._b(bid)].copy()

    def degraded(self, bid: str) -> np.ndarray:
        """Cumulative amount degraded inside ``bid``.

        Parameters
        ----------
        bid : str
            Barrier id.

        Returns
        -------
        ndarray, mg
            One value per output time.
        """
        m = self.trajectory.model
        return self.trajectory.column(m.q_degr + self._b(bid)).copy()

    def profile(self, bid: str, time: float) -> BarrierProfile:
        """Concentration profile through ``bid`` at the output time nearest to ``time``.

        The run keeps only what it exports; the first profile asked of it computes every state
        again (:attr:`barrierflow.engine.Trajectory.states`), the later ones read them.

        Parameters
        ----------
        bid : str
            Barrier id.
        time : float, h
            The time wanted; the nearest output time is used (``BarrierProfile.time`` says which).

        Returns
        -------
        BarrierProfile
            Cell centres (cm) and concentrations (mg/mL), layer of each cell, interfaces (cm).
        """
        g = self.trajectory.model.grids[self._b(bid)]
        k = int(np.argmin(np.abs(self.times - time)))
        conc = np.maximum(self.trajectory.states[k, g.start:g.stop], 0.0)
        return BarrierProfile(bid, float(self.times[k]), g.centres.copy(), conc, g.layer_of_cell.copy(),
                              g.interfaces)

    @cached_property
    def most_negative(self) -> float:
        """The most negative raw concentration met (mg/mL; 0 when none), before clipping (over
        every state at every output time, kept by the run)."""
        return float(min(0.0, self.trajectory.rows.most_negative))

    # ----------------------------------------------------------------- mass balance
    @cached_property
    def mass_balance(self) -> MassBalance:
        """The ledger of the run (see :class:`MassBalance`; computed by :func:`barrierflow.engine.ledger`,
        the same ledger the engine checks every run against)."""
        tr = self.trajectory
        led = rows_ledger(tr.model, tr.rows, tr.event_dosed, tr.event_removed, tr.initial_amount, tr.volumes)

        def last(x: np.ndarray) -> float:
            return float(x[-1]) if len(x) else 0.0

        return MassBalance(
            initial=float(led.initial), dosed=last(led.dosed), held_supply=last(led.held_supply),
            present=last(led.present), eliminated=last(led.eliminated), degraded=last(led.degraded),
            removed=last(led.removed), absolute_error=led.absolute_error, relative_error=led.relative_error,
            sampled=last(led.sampled), lost=last(led.lost))

    # ----------------------------------------------------------------- analysis hooks
    def metrics(self, threshold: float | None = None):
        """Exposure and barrier metrics (see :func:`barrierflow.analysis.metrics.compute_metrics`).

        Parameters
        ----------
        threshold : float or None, mg/mL
            Concentration for the time-above-threshold metric.
        """
        if threshold is None:
            return self._metrics  # computed once: the summary and the sidecar both show them
        from .metrics import compute_metrics

        return compute_metrics(self, threshold=threshold)

    @cached_property
    def _metrics(self):
        from .metrics import compute_metrics

        return compute_metrics(self)

    def warnings(self) -> tuple[str, ...]:
        """Practitioner warnings about the run (sink conditions, unreached steady state, ...)."""
        return self._warnings  # found once: the summary and the sidecar both show them

    @cached_property
    def _warnings(self) -> tuple[str, ...]:
        out: list[str] = []
        if self.most_negative < -1e-9 * float(np.max(self.trajectory.model.scale[: self.trajectory.model.n_dyn])):
            out.append(f"the solver produced negative concentrations down to {self.most_negative:.3g} mg/mL; "
                       "they are clipped to 0 in the output (tighten the tolerance if this matters)")
        from .warnings import find_warnings

        return tuple(out) + tuple(find_warnings(self))

    # ----------------------------------------------------------------- export
    def columns(self) -> list[tuple[str, np.ndarray]]:
        """The export columns (header with unit, values in the ``[output]`` units), in order."""
        return trace_columns(self, self.scenario)

    def csv_text(self) -> str:
        """The traces as CSV text (header row with units, one row per output time).

        Every value is written as ``format(x, ".12g")`` writes it; a value that is not a number
        (the amount of a held compartment without a volume) leaves its cell empty.
        """
        return self.csv_bytes().decode("utf-8")

    def csv_bytes(self) -> bytes:
        """:meth:`csv_text` as UTF-8 bytes (what :meth:`to_csv` writes)."""
        return _csv_bytes(*self._csv_parts())

    def _csv_parts(self) -> tuple[bytes, np.ndarray | None]:
        """The header line of the traces CSV (UTF-8) and the table of its values (None without columns)."""
        cols = self.columns()
        buf = io.StringIO()
        csv.writer(buf, lineterminator="\n").writerow([name for name, _ in cols])
        return buf.getvalue().encode("utf-8"), (np.column_stack([v for _, v in cols]) if cols else None)

    def sidecar(self, csv_text: str | bytes | None = None) -> dict[str, Any]:
        """The JSON sidecar: scenario, software version, solver settings, grid, mass balance, and
        the SHA-256 of the traces CSV it belongs with (key ``traces``).

        Parameters
        ----------
        csv_text : str or bytes, optional
            The CSV text (:meth:`csv_text`, or its UTF-8 bytes), when already made.
        """
        return self._sidecar(traces_digest(self.csv_bytes() if csv_text is None else csv_text))

    def _sidecar(self, digest: dict[str, object]) -> dict[str, Any]:
        """:meth:`sidecar` with the CSV's ``traces_digest`` given."""
        from .. import __version__

        tr = self.trajectory
        m = tr.model
        grid = {}
        for g in m.grids:
            b = self.scenario.barrier(g.barrier_id)
            if b.model == "steady":
                grid[g.barrier_id] = {"model": "steady"}
                continue
            grid[g.barrier_id] = {
                "model": "resolved",
                "cells_per_layer": np.bincount(g.layer_of_cell, minlength=len(b.layers)).tolist(),
                "smallest_cell_um": float(g.widths.min() * 1e4),
                "largest_cell_um": float(g.widths.max() * 1e4),
            }
        doc: dict[str, Any] = {
            "caution": CAUTION,
            "software": {"name": "barrierflow", "version": __version__, "python": platform.python_version()},
            "created": datetime.now(UTC).isoformat(timespec="seconds"),
            "scenario": {"name": self.scenario.name, "file": self.scenario.source, "sha256": self.scenario.digest,
                         "toml": self.scenario.to_toml()},
            "solver": {"integrator": tr.integrator, "options": tr.integrator_options, "status": tr.status,
                       "message": tr.message, "statistics": self.stats, "grid_defaults": _flat_dict(tr.grid)},
            "grid": grid,
            "units": _flat_dict(self.scenario.output_units),
            "mass_balance_mg": self.mass_balance.as_dict(),
            "most_negative_concentration_mg_per_mL": self.most_negative,
            "warnings": list(self.warnings()),
            "traces": digest,
        }
        doc["metrics"] = self.metrics().as_dict()
        return doc

    def to_csv(self, path: str | os.PathLike[str] | None = None) -> Path:
        """Write the traces CSV and its JSON sidecar ``<name>.json`` beside it, atomically, as a pair.

        The CSV is made and hashed first (compiled formatting, in this thread), then written to a
        temporary file whose flush to disk another thread waits for while this one computes the
        sidecar's content (metrics, warnings, the ledger); the sidecar is then written to its own
        temporary file and flushed; only then are both renamed into place, the CSV first and the
        sidecar last, and the folder flushed (a failure before the renames leaves no file). The
        sidecar records the CSV's SHA-256 (``traces``), so :func:`barrierflow.io.traces_match` tells
        whether the two belong together, even after a run killed between the renames.

        Parameters
        ----------
        path : path-like, optional
            Default: the scenario file's name with ``.csv``, in the current folder.

        Returns
        -------
        pathlib.Path
            The CSV path.
        """
        if path is None:
            stem = Path(self.scenario.source).stem if self.scenario.source else "barrierflow-run"
            path = Path(f"{stem}.csv")
        # all the making in this thread, one piece after the other: on two shared cores a thread
        # that formats while this one computes the sidecar waits for the interpreter's lock at each
        # hand-over (up to the 5 ms switch interval), which cost more than the overlap saved; only
        # the waits for the disk (the CSV's flush while the sidecar is made) run in another thread
        raw = self.csv_bytes()
        digest = traces_digest(raw)
        return write_traces(path, raw, lambda: self._sidecar_text(digest))

    def sidecar_text(self, csv_text: str | bytes | None = None) -> str:
        """The JSON sidecar as text, exactly as :meth:`to_csv` writes it (``csv_text``: as in :meth:`sidecar`)."""
        return self._sidecar_text(traces_digest(self.csv_bytes() if csv_text is None else csv_text))

    def _sidecar_text(self, digest: dict[str, object]) -> str:
        from ..io.json_text import indented_json

        return indented_json(self._sidecar(digest), default=_json_default) + "\n"


def _csv_bytes(head: bytes, table: np.ndarray | None) -> bytes:
    """The traces CSV: its header line, then the rows of its values."""
    return head if table is None else head + csv_row_bytes(table)


def trace_columns(source: Any, scenario: Scenario) -> list[tuple[str, np.ndarray]]:
    """The traces of the CSV export: (header with unit, values in the ``[output]`` units), in order.

    The one list of trace columns, shared by a single run (:meth:`Result.columns`) and a
    population (one row per subject, :func:`barrierflow.analysis.population.population_columns`).

    Parameters
    ----------
    source : Result or Population
        Anything with ``times`` and the trace methods ``concentration``, ``amount``, ``flux``,
        ``permeated``, ``eliminated``, ``content``, ``degraded``, ``removed`` and ``dosed`` (by
        compartment or barrier id), each giving an array whose last axis is time.
    scenario : Scenario
        For the ids, the output units and the molar mass.

    Returns
    -------
    list of (str, ndarray)
        The first column is the time, ``time [h]``; then ``conc:<id> [unit]``, ``amount:<id>``,
        ``flux:<id>``, ``permeated:<id>``, ``eliminated:<id>``, ``content:<id>``,
        ``degraded:<id>``, ``removed:<id>``, ``dosed:<id>``; and where they apply
        ``sampled:<id>`` (a sampled compartment), ``lost:<id>`` (one with a ``loss_rate``),
        ``volume:<id> [mL]`` (a volume that changes) and ``solid:<id>`` (one that may hold solid;
        ``source`` then has ``sampled``, ``lost``, ``volume``, ``solid``).
    """
    s = scenario
    u = s.output_units
    mm = s.substance.molar_mass
    ft = unit_factor("time", u.time)
    fc = unit_factor("concentration", u.concentration, mm)
    fa = unit_factor("amount", u.amount, mm)
    farea = unit_factor("area", u.area)
    flux_unit = f"{u.amount}/({u.area}*{u.time})"
    perm_unit = f"{u.amount}/{u.area}"
    cols: list[tuple[str, np.ndarray]] = [(f"time [{u.time}]", np.asarray(source.times) * ft)]
    cids = [c.id for c in s.compartments]
    bids = [b.id for b in s.barriers]
    cols += [(f"conc:{c} [{u.concentration}]", source.concentration(c) * fc) for c in cids]
    cols += [(f"amount:{c} [{u.amount}]", source.amount(c) * fa) for c in cids]
    # flux per area: mg/(cm^2 h) -> amount/(area time): amount factor, divided by area and time factors
    cols += [(f"flux:{b} [{flux_unit}]", source.flux(b) * fa / farea / ft) for b in bids]
    cols += [(f"permeated:{b} [{perm_unit}]", source.permeated(b) * fa / farea) for b in bids]
    cols += [(f"eliminated:{c} [{u.amount}]", source.eliminated(c) * fa) for c in cids]
    cols += [(f"content:{b} [{u.amount}]", source.content(b) * fa) for b in bids]
    cols += [(f"degraded:{b} [{u.amount}]", source.degraded(b) * fa) for b in bids]
    cols += [(f"removed:{c} [{u.amount}]", source.removed(c) * fa) for c in cids]
    cols += [(f"dosed:{c} [{u.amount}]", source.dosed(c) * fa) for c in cids]
    # the lab's protocol, where it applies
    sampled = {d.target for d in s.doses if d.kind == "sample"}
    cols += [(f"sampled:{c.id} [{u.amount}]", source.sampled(c.id) * fa) for c in s.compartments if c.id in sampled]
    cols += [(f"lost:{c.id} [{u.amount}]", source.lost(c.id) * fa) for c in s.compartments if c.loss_rate > 0]
    changing = {d.target for d in s.doses if d.kind == "sample" and not d.replaces_medium}
    changing |= {c.id for c in s.compartments if c.evaporates}
    cols += [(f"volume:{c} [mL]", source.volume(c)) for c in cids if c in changing]
    cols += [(f"solid:{c} [{u.amount}]", source.solid(c) * fa) for c in limited_compartments(s)]
    return cols


def _flat_dict(x: Any) -> dict[str, Any]:
    """``dataclasses.asdict`` of a dataclass whose fields are plain values (without its deep copies)."""
    out = {f.name: getattr(x, f.name) for f in dataclasses.fields(x)}
    if all(v is None or isinstance(v, str | int | float) for v in out.values()):
        return out
    return dataclasses.asdict(x)


def _json_default(x: Any) -> Any:
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, np.ndarray):
        return x.tolist()
    if dataclasses.is_dataclass(x):
        return dataclasses.asdict(x)
    if isinstance(x, float) and not math.isfinite(x):
        return str(x)
    return str(x)
