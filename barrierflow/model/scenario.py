"""The scenario: a validated, immutable barrier network with its regimen and outputs."""

from __future__ import annotations

import dataclasses
import hashlib
import math
import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from functools import cached_property
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np

from ..errors import Problem, ScenarioError, UnitsError
from ..units import KINDS, parse_quantity
from ._fields import FieldSpec, finite
from .components import Barrier, Compartment, Dose, Exchange, OutputUnits, Substance, Transfer

if TYPE_CHECKING:
    import networkx as nx

    from .variability import Correlation, Variation

__all__ = ["MAX_COMPARTMENTS", "MAX_EVENTS", "MAX_TOTAL_CELLS", "Scenario", "network_problems"]

MAX_TOTAL_CELLS = 1_000_000
"""Largest grid accepted in one scenario (cells over all layers); larger grids do not fit in
memory with the Jacobian and the saved profiles."""

MAX_COMPARTMENTS = 2000
"""Most compartments in one scenario: the integrators solve the compartments as one dense block,
whose cost grows as the cube of their number (2000 take about a second per run)."""

DEFAULT_OUTPUT_POINTS = 500

MAX_EVENTS = 1_000_000
"""Most dosing events in one run (repeated doses counted one by one)."""


@dataclass(frozen=True)
class Scenario:
    """A barrier network, its dosing regimen and what to report; validated when built.

    Build one with :func:`barrierflow.load` (from a TOML file), :meth:`from_graph` (from a
    networkx graph) or directly from model objects. Values are in the internal units
    (cm, h, mg, mL).

    Parameters
    ----------
    name : str
        Free text.
    duration : float, h
        Simulated time.
    compartments : tuple of Compartment
    barriers : tuple of Barrier
    exchanges : tuple of Exchange
    transfers : tuple of Transfer
    doses : tuple of Dose
        In the order of the file: events at the same time are applied in this order.
    substance : Substance
    output_step : float or None, h
        Output every step from 0 (the end of the run always included).
    output_times : tuple of float or None, h
        Explicit output times; with neither, 500 equal steps.
    output_units : OutputUnits
        Units of the exported traces.
    description : str
        Free text.
    check_ranges : bool
        Refuse values outside the plausible range of their field (default True; see
        :data:`barrierflow.model.PLAUSIBLE`). False accepts them, for a scenario that means them.
    vary : tuple of Variation
        The ``[[vary]]`` tables: a distribution on a parameter path for populations and
        sensitivity studies (:mod:`barrierflow.model.variability`); a single run ignores them.
    correlations : tuple of Correlation
        The ``[[correlation]]`` tables: rank correlations between varied parameters.
    source : str or None
        The file the scenario came from (not part of equality).
    file_units : tuple of (str, str)
        The unit each dimensional value was written in, by parameter path
        (``("barrier.skin.layer.1.diffusivity", "cm^2/s")``), as read from the file; empty for a
        scenario built in Python. Not part of equality; a study reports values back in these
        units (:meth:`barrierflow.model.paths.ParamPath.file_unit`).

    Raises
    ------
    ScenarioError
        Listing every problem of the network: duplicated ids, links naming no compartment,
        doses on unknown or held compartments, bad output times, a grid too large.
    """

    name: str
    duration: float
    compartments: tuple[Compartment, ...]
    barriers: tuple[Barrier, ...] = ()
    exchanges: tuple[Exchange, ...] = ()
    transfers: tuple[Transfer, ...] = ()
    doses: tuple[Dose, ...] = ()
    substance: Substance = field(default_factory=Substance)
    output_step: float | None = None
    output_times: tuple[float, ...] | None = None
    output_units: OutputUnits = field(default_factory=OutputUnits)
    description: str = ""
    check_ranges: bool = True
    vary: tuple[Variation, ...] = ()
    correlations: tuple[Correlation, ...] = ()
    source: str | None = field(default=None, compare=False, repr=False)
    file_units: tuple[tuple[str, str], ...] = field(default=(), compare=False, repr=False)

    SPECS: ClassVar[tuple[FieldSpec, ...]] = (
        FieldSpec("name", "name", "text"),
        FieldSpec("description", "description", "text"),
        FieldSpec("duration", "duration", "time", required=True, unit="h", bound="> 0", structural=True),
        FieldSpec("output_step", "output_step", "time", unit="h", bound="> 0", structural=True),
        FieldSpec("output_times", "output_times", "times", structural=True),
        FieldSpec("check_ranges", "check_ranges", "flag"),
    )
    """The keys of the ``[scenario]`` table."""

    def __post_init__(self) -> None:
        for name in ("compartments", "barriers", "exchanges", "transfers", "doses", "vary", "correlations"):
            value = getattr(self, name)
            if not isinstance(value, tuple):
                object.__setattr__(self, name, tuple(value))
        if self.output_times is not None and not isinstance(self.output_times, tuple):
            object.__setattr__(self, "output_times", tuple(self.output_times))
        problems = self._resolve_per_area()
        problems += self._problems()
        if problems:
            raise ScenarioError([p.within(file=self.source) for p in problems])

    # ------------------------------------------------------------------ values per area
    def touching(self, cid: str) -> tuple[Barrier, ...]:
        """The barriers that ``cid`` touches (as their ``from`` or ``to`` compartment)."""
        return tuple(b for b in self.barriers if cid in (b.from_id, b.to_id))

    def _resolve_per_area(self) -> list[Problem]:
        """Set every value written per area to its absolute value (the area of the one barrier
        the compartment touches); problems where the compartment touches none or several."""
        out: list[Problem] = []
        ids = {c.id for c in self.compartments}

        def area_of(cid: str, field: str, path: str, value: str, kind: str) -> float | None:
            touching = self.touching(cid)
            if len(touching) == 1:
                return touching[0].area
            if not touching:
                why = f"compartment '{cid}' touches no barrier, so a value per area has no area to go with"
            else:
                named = ", ".join(f"'{b.id}'" for b in touching)
                why = (f"compartment '{cid}' touches {len(touching)} barriers ({named}), so a value per area is "
                       "ambiguous")
            out.append(Problem(field, value, f"{why}; give it as an absolute value, such as '{KINDS[kind].example}'",
                               path=path))
            return None

        comps = []
        for c in self.compartments:
            attrs = c.per_area
            if not attrs:
                comps.append(c)
                continue
            changes = {}
            for spec in c.SPECS:
                if spec.attr not in attrs:
                    continue
                per = getattr(c, spec.per_area)
                area = area_of(c.id, f"compartment '{c.id}' {spec.key}", f"compartment.{c.id}.{spec.key}",
                               _show(per, spec.per_area_spec), spec.kind)
                if area is not None:
                    changes[spec.attr] = per * area
            comps.append(_replace(c, changes))
        doses = []
        for i, d in enumerate(self.doses, start=1):
            if not d.per_area or d.target not in ids:
                doses.append(d)
                continue
            spec = next(x for x in Dose.SPECS if x.attr == "amount")
            shown = _show(d.amount_per_area, spec.per_area_spec)
            area = area_of(d.target, f"dose {i} amount", f"dose.{i}.amount", shown, "amount")
            doses.append(_replace(d, {"amount": d.amount_per_area * area}) if area is not None else d)
        object.__setattr__(self, "compartments", tuple(comps))
        object.__setattr__(self, "doses", tuple(doses))
        return out

    # ------------------------------------------------------------------ validation
    def _problems(self) -> list[Problem]:
        out: list[Problem] = []
        if not finite(self.duration) or self.duration <= 0:
            out.append(Problem("scenario duration", _h(self.duration), "must be a time > 0 such as '7 d'",
                               path="scenario.duration"))
        seen: dict[str, str] = {}
        for what, items in (("compartment", self.compartments), ("barrier", self.barriers),
                            ("exchange", self.exchanges), ("transfer", self.transfers)):
            for item in items:
                if item.id in seen:
                    out.append(Problem(f"{what} '{item.id}' id", repr(item.id),
                                       f"ids must be unique across the file; already used by a {seen[item.id]}",
                                       path=f"{what}.{item.id}.id"))
                else:
                    seen[item.id] = what
        if not self.compartments:
            out.append(Problem("compartment", "no compartments", "a scenario needs at least one [[compartment]]",
                               path="compartment"))
        elif len(self.compartments) > MAX_COMPARTMENTS:
            out.append(Problem("compartment", f"{len(self.compartments)} compartments",
                               f"must be at most {MAX_COMPARTMENTS} (the solvers treat the compartments as one dense "
                               "block whose cost grows as the cube of their number); lump compartments, or model a "
                               "long row of them as a barrier layer", path="compartment"))
        comps = {c.id: c for c in self.compartments}
        known = ", ".join(comps) or "none"
        for what, items in (("barrier", self.barriers), ("exchange", self.exchanges), ("transfer", self.transfers)):
            for item in items:
                for end, cid in (("from", item.from_id), ("to", item.to_id)):
                    if cid not in comps:
                        out.append(Problem(f"{what} '{item.id}' {end}", repr(cid),
                                           f"names no compartment (known: {known})", path=f"{what}.{item.id}.{end}"))
        for t in self.transfers:
            c = comps.get(t.from_id)
            if c is not None and c.volume is None and c.volume_per_area is None:
                out.append(Problem(f"transfer '{t.id}' from", repr(t.from_id),
                                   "a transfer moves a fraction of the amount in 'from', which needs a volume",
                                   path=f"transfer.{t.id}.from"))
        for i, d in enumerate(self.doses, start=1):
            c = comps.get(d.target)
            if c is None:
                out.append(Problem(f"dose {i} target", repr(d.target), f"names no compartment (known: {known})",
                                   path=f"dose.{i}.target"))
            elif c.held:
                out.append(Problem(f"dose {i} target", repr(d.target),
                                   "a held compartment never changes, so it cannot be dosed; "
                                   "dose another compartment or drop held_concentration", path=f"dose.{i}.target"))
            elif c.volume is None:
                if c.volume_per_area is None:  # else: its per-area volume could not be resolved (reported)
                    out.append(Problem(f"dose {i} target", repr(d.target), "a dosed compartment needs a volume",
                                       path=f"dose.{i}.target"))
            else:
                out.extend(self._dose_problems(i, d, c))
            if finite(self.duration) and d.at > self.duration:
                out.append(Problem(f"dose {i} at", _h(d.at), f"must be within the run (duration {_h(self.duration)})",
                                   path=f"dose.{i}.at"))
        events = self._event_count()
        if events > MAX_EVENTS:
            out.append(Problem("dose", f"{events:.3g} dosing events in the run",
                               f"at most {MAX_EVENTS:,} (a longer 'every' or a 'count' keeps the regimen in bounds)",
                               path="dose"))
        elif finite(self.duration):
            out.extend(self._hold_conflicts())
        if self.output_step is not None and self.output_times is not None:
            out.append(Problem("scenario output_times", "both output_step and output_times",
                               "give one of them", path="scenario.output_times"))
        if self.output_step is not None:
            if not finite(self.output_step) or self.output_step <= 0:
                out.append(Problem("scenario output_step", _h(self.output_step), "must be a time > 0",
                                   path="scenario.output_step"))
            elif finite(self.duration) and self.duration / self.output_step > 10_000_000:
                out.append(Problem("scenario output_step", _h(self.output_step),
                                   "gives more than 10 million output rows; choose a coarser step",
                                   path="scenario.output_step"))
        if self.output_times is not None:
            ts = self.output_times
            if not ts:
                out.append(Problem("scenario output_times", "an empty list", "give at least one time",
                                   path="scenario.output_times"))
            for j, t in enumerate(ts):
                if not finite(t) or t < 0 or (finite(self.duration) and t > self.duration):
                    out.append(Problem(f"scenario output_times[{j}]", _h(t),
                                       f"must lie between 0 h and the duration ({_h(self.duration)})",
                                       path="scenario.output_times"))
                elif j and t <= ts[j - 1]:
                    out.append(Problem(f"scenario output_times[{j}]", _h(t), "times must increase",
                                       path="scenario.output_times"))
        total = sum(layer.cells or 0 for b in self.barriers for layer in b.layers)
        if total > MAX_TOTAL_CELLS:
            out.append(Problem("barrier layer cells", f"{total} cells in all",
                               f"must be at most {MAX_TOTAL_CELLS} (a grid too large for memory)"))
        out.extend(p.within("output", at="output") for p in self.output_units.check(self.substance.molar_mass))
        out.extend(self._evaporation_problems())
        if self.check_ranges is not False:
            out.extend(self._range_problems())
        if self.vary or self.correlations:
            from .variability import variability_problems  # the module reads paths, which import this one

            out.extend(variability_problems(self))
        return out

    def _range_problems(self) -> list[Problem]:
        """Values outside the plausible range of their field (see :data:`~barrierflow.model.PLAUSIBLE`)."""
        from ._fields import range_problems

        out = [p.within("substance", at="substance") for p in range_problems(self.substance, self.substance.SPECS)]
        for c in self.compartments:
            out += [p.within(f"compartment '{c.id}'", at=f"compartment.{c.id}") for p in range_problems(c, c.SPECS)]
        for b in self.barriers:
            out += [p.within(f"barrier '{b.id}'", at=f"barrier.{b.id}") for p in range_problems(b, b.SPECS)]
            for i, layer in enumerate(b.layers, start=1):
                out += [p.within(f"barrier '{b.id}' layer {i}", at=f"barrier.{b.id}.layer.{i}")
                        for p in range_problems(layer, layer.SPECS)]
        for e in self.exchanges:
            out += [p.within(f"exchange '{e.id}'", at=f"exchange.{e.id}") for p in range_problems(e, e.SPECS)]
        for t in self.transfers:
            out += [p.within(f"transfer '{t.id}'", at=f"transfer.{t.id}") for p in range_problems(t, t.SPECS)]
        for i, d in enumerate(self.doses, start=1):
            out += [p.within(f"dose {i}", at=f"dose.{i}") for p in range_problems(d, d.SPECS)]
        return out

    def _dose_problems(self, i: int, d: Dose, c: Compartment) -> list[Problem]:
        """What a sample or a remove that ends contact needs of its target ``c`` (which has a volume)."""
        out: list[Problem] = []
        if d.kind == "sample" and finite(d.volume) and finite(self.duration):
            n = len(d.start_times(self.duration))
            smallest = c.residual_volume if c.evaporates and finite(c.residual_volume) else c.volume
            if d.replaces_medium and d.volume >= smallest:
                what = "its residual volume" if c.evaporates else "the volume"
                out.append(Problem(f"dose {i} volume", _v(d.volume),
                                   f"must be smaller than {what} of '{c.id}' ({_v(smallest)}): an aliquot is "
                                   "a part of the compartment", path=f"dose.{i}.volume"))
            elif not d.replaces_medium:
                if c.evaporates:
                    out.append(Problem(f"dose {i} replace", "false",
                                       f"compartment '{c.id}' evaporates; sampling it without replacement is not "
                                       "supported (set replace = true, or sample another compartment)",
                                       path=f"dose.{i}.replace"))
                elif n * d.volume >= c.volume:
                    out.append(Problem(f"dose {i} volume", _v(d.volume),
                                       f"{n} samples without replacement take {_v(n * d.volume)}, not less than the "
                                       f"volume of '{c.id}' ({_v(c.volume)}); take fewer or smaller samples, or "
                                       "replace the medium", path=f"dose.{i}.volume"))
        if d.kind == "hold" and c.evaporates:
            out.append(Problem(f"dose {i} kind", "'hold'",
                               f"compartment '{c.id}' evaporates, so its concentration cannot be held; hold "
                               "another compartment, or give the vehicle no evaporation_rate", path=f"dose.{i}.kind"))
        if d.kind == "remove" and d.closes and not self.touching(c.id):
            out.append(Problem(f"dose {i} ends_contact", "true",
                               f"compartment '{c.id}' touches no barrier, so there is no contact to end",
                               path=f"dose.{i}.ends_contact"))
        return out

    def _evaporation_problems(self) -> list[Problem]:
        """A residue that is not smaller than the volume (once both are absolute)."""
        out = []
        for c in self.compartments:
            if (c.evaporates and finite(c.residual_volume) and finite(c.volume)
                    and c.residual_volume >= c.volume and (c.volume_per_area is None) != (c.residual_volume_per_area
                                                                                         is None)):
                out.append(Problem(f"compartment '{c.id}' residual_volume", _v(c.residual_volume),
                                   f"must be smaller than the volume ({_v(c.volume)}): the residue left after "
                                   "evaporation", path=f"compartment.{c.id}.residual_volume"))
        return out

    def _event_count(self) -> float:
        """How many dosing events the regimen holds within the run (counted, not listed)."""
        total = 0.0
        for d in self.doses:
            if d.every is None or not finite(d.every) or d.every <= 0 or not finite(self.duration):
                total += 1
                continue
            ratio = max(self.duration - d.at, 0.0) / d.every * (1 + 1e-12)
            within = math.floor(ratio) + 1.0 if ratio < 1e18 else math.inf
            total += float(min(within, d.count)) if isinstance(d.count, int) and d.count < 1e18 else within
        return total

    def _hold_conflicts(self) -> list[Problem]:
        """A bolus, replace, remove or another hold while a hold clamps the same compartment.

        The clamp would either undo the change or take the new level as held, so such a
        regimen is refused rather than given a meaning of our own. An event at the hold's own
        start time that comes before it in the file is allowed (it is applied first, then the hold
        sets the level); one at the end time is allowed too (the hold has ended).
        """
        out: list[Problem] = []
        holds = [(i, d) for i, d in enumerate(self.doses, start=1) if d.kind == "hold"]
        if not holds:
            return out
        for j, other in enumerate(self.doses, start=1):
            if other.kind == "infusion":
                continue
            for i, hold in holds:
                if i == j or hold.target != other.target:
                    continue
                spans = [(t, t + hold.duration) for t in hold.start_times(self.duration)]
                for u in other.start_times(self.duration):
                    hit = next((sp for sp in spans if sp[0] <= u < sp[1] and not (u == sp[0] and j < i)), None)
                    if hit is not None:
                        out.append(Problem(
                            f"dose {j} at", _h(u),
                            f"compartment '{other.target}' is held by dose {i} from {_h(hit[0])} to "
                            f"{_h(hit[1])}; a {other.kind} cannot act on a held compartment "
                            "(move it outside the hold, or end the hold earlier)", path=f"dose.{j}.at"))
                        break
                else:
                    continue
                break
        return out

    # ------------------------------------------------------------------ derived views
    @cached_property
    def graph(self) -> nx.MultiDiGraph:
        """The network as a frozen :class:`networkx.MultiDiGraph`.

        Layout
        ------
        - ``G.graph``: ``name`` (str), ``substance`` (:class:`Substance`).
        - One node per compartment, keyed by its id, with attribute ``compartment``
          (:class:`Compartment`).
        - One edge per link, from its ``from`` to its ``to`` compartment, keyed by the link's
          id, with attribute ``kind`` (``"barrier"``, ``"exchange"`` or ``"transfer"``) and an
          attribute of that name holding the object (:class:`Barrier`, :class:`Exchange`,
          :class:`Transfer`).

        See :meth:`from_graph` for building a scenario from such a graph.
        """
        import networkx as nx  # imported on first use: it adds a tenth of a second to start-up

        g = nx.MultiDiGraph(name=self.name, substance=self.substance)
        for c in self.compartments:
            g.add_node(c.id, compartment=c)
        for kind, items in (("barrier", self.barriers), ("exchange", self.exchanges), ("transfer", self.transfers)):
            for item in items:
                g.add_edge(item.from_id, item.to_id, key=item.id, kind=kind, **{kind: item})
        return nx.freeze(g)

    def compartment(self, cid: str) -> Compartment:
        """The compartment with id ``cid``."""
        for c in self.compartments:
            if c.id == cid:
                return c
        raise KeyError(f"no compartment {cid!r}; known: {', '.join(c.id for c in self.compartments)}")

    def barrier(self, bid: str) -> Barrier:
        """The barrier with id ``bid``."""
        for b in self.barriers:
            if b.id == bid:
                return b
        raise KeyError(f"no barrier {bid!r}; known: {', '.join(b.id for b in self.barriers)}")

    @property
    def is_linear(self) -> bool:
        """True when no compartment has saturable elimination (the model is then linear)."""
        return all(c.vmax is None or c.vmax == 0 for c in self.compartments)

    def output_grid(self) -> tuple[float, ...]:
        """The output times, h: as given, or every ``output_step`` from 0 and the end, or 500 steps."""
        if self.output_times is not None:
            return self.output_times
        return tuple(self.output_array().tolist())

    def output_array(self) -> np.ndarray:
        """:meth:`output_grid` as an array, h (the same numbers: each time ``i * output_step``, or
        ``duration * i / 500``, computed as a whole)."""
        if self.output_times is not None:
            return np.array(self.output_times, dtype=np.float64)
        if self.output_step is not None:
            n = int(math.floor(self.duration / self.output_step * (1 + 1e-12)))
            times = np.arange(n + 1, dtype=np.float64) * self.output_step
            if self.duration - times[-1] > 1e-9 * self.duration:
                return np.append(times, self.duration)
            times[-1] = self.duration
            return times
        return self.duration * np.arange(DEFAULT_OUTPUT_POINTS + 1, dtype=np.float64) / DEFAULT_OUTPUT_POINTS

    def components(self) -> list[list[str]]:
        """Compartment ids of each connected part of the network (more than one is allowed)."""
        import networkx as nx

        return [sorted(part) for part in nx.weakly_connected_components(self.graph)]

    def summary(self) -> str:
        """One line describing the network."""
        parts = self.components()
        layers = sum(len(b.layers) for b in self.barriers)
        text = (f"{_n(len(self.compartments), 'compartment')}, {_n(len(self.barriers), 'barrier')} "
                f"({_n(layers, 'layer')}), {_n(len(self.exchanges), 'exchange')}, "
                f"{_n(len(self.transfers), 'transfer')}, {_n(len(self.doses), 'dose')}, "
                f"duration {_h(self.duration)}")
        if len(parts) > 1:
            listed = "; ".join("{" + ", ".join(part) + "}" for part in parts)
            text += f"; note: the network has {len(parts)} disconnected parts: {listed}"
        return text

    @cached_property
    def digest(self) -> str:
        """SHA-256 of the scenario's canonical TOML text (identifies what made a result)."""
        return hashlib.sha256(self._toml.encode()).hexdigest()

    @cached_property
    def _toml(self) -> str:
        """The canonical TOML text, written once (a scenario is immutable)."""
        from .document import to_toml
        return to_toml(self)

    # ------------------------------------------------------------------ conversions
    def to_document(self) -> dict[str, Any]:
        """The scenario as a TOML document (nested dicts of unit strings)."""
        from .document import to_document
        return to_document(self)

    def to_toml(self) -> str:
        """The scenario as TOML text that :func:`barrierflow.load` reads back to an equal model."""
        return self._toml

    @classmethod
    def from_graph(
        cls,
        graph: nx.MultiDiGraph,
        doses: Iterable[Dose | Mapping[str, Any]] = (),
        duration: float | str = 24.0,
        output: OutputUnits | Mapping[str, str] | None = None,
        *,
        output_step: float | str | None = None,
        output_times: Iterable[float | str] | None = None,
        name: str | None = None,
        substance: Substance | Mapping[str, Any] | None = None,
        description: str = "",
        check_ranges: bool = True,
    ) -> Scenario:
        """Build a scenario from a networkx graph of compartments and links.

        Parameters
        ----------
        graph : networkx.MultiDiGraph (or DiGraph)
            Nodes are compartment ids. A node holds either ``compartment=`` a
            :class:`Compartment`, or plain keyword attributes (``volume="5 L"``,
            ``clearance="10 L/h"``, ...; unit strings, or numbers already in internal units),
            validated exactly as a file would be. An edge ``u -> v`` holds either
            ``barrier=``/``exchange=``/``transfer=`` an object, or ``kind="barrier"`` (or
            ``"exchange"``, ``"transfer"``) with keyword attributes (a barrier's ``layers`` a
            list of :class:`Layer` or of mappings). The edge key is the link's id; with an
            integer key (networkx's default) an id such as ``"barrier_1"`` is made up. A
            missing ``kind`` is an error.
        doses : iterable of Dose or mappings
            The regimen, in order.
        duration : float (h) or str
            Simulated time.
        output : OutputUnits or mapping, optional
            Units of the exported traces.
        output_step, output_times : optional
            As in the file; numbers are hours.
        name : str, optional
            Defaults to ``graph.graph["name"]``.
        substance : Substance or mapping, optional
            Defaults to ``graph.graph["substance"]``.
        description : str
        check_ranges : bool
            As for the scenario (default True).

        Returns
        -------
        Scenario

        Raises
        ------
        ScenarioError
            Listing every problem, with field paths such as ``compartment 'plasma' volume``.
        """
        problems: list[Problem] = []
        g = graph
        sub = substance if substance is not None else g.graph.get("substance", Substance())
        if isinstance(sub, Mapping):
            try:
                sub = Substance(**{}) if not sub else _build_substance(sub)
            except ScenarioError as err:
                problems.extend(err.within("substance", at="substance").problems)
                sub = Substance()
        molar_mass = sub.molar_mass
        comps = []
        for node, attrs in g.nodes(data=True):
            try:
                if "compartment" in attrs:
                    c = attrs["compartment"]
                    if not isinstance(c, Compartment):
                        raise ScenarioError.single("compartment", repr(c), "must be a Compartment object")
                    if c.id != node:
                        raise ScenarioError.single("id", repr(c.id), f"must equal the node key {node!r}", path="id")
                    comps.append(c)
                else:
                    comps.append(Compartment.from_mapping({"id": node, **attrs}, molar_mass, python=True))
            except ScenarioError as err:
                problems.extend(err.within(f"compartment '{node}'", at=f"compartment.{node}").problems)
        links: dict[str, list[Any]] = {"barrier": [], "exchange": [], "transfer": []}
        multi = g.is_multigraph()
        edges = g.edges(keys=True, data=True) if multi else ((u, v, None, d) for u, v, d in g.edges(data=True))
        for u, v, key, attrs in edges:
            attrs = dict(attrs)
            kind = attrs.pop("kind", None)
            if kind is None:
                kind = next((k for k in links if k in attrs), None)
            label = key if isinstance(key, str) else f"{u} -> {v}"
            if not isinstance(kind, str) or kind not in links:
                problems.append(Problem(f"link '{label}' kind", repr(kind),
                                        "must be 'barrier', 'exchange' or 'transfer'"))
                continue
            lid = key if isinstance(key, str) else f"{kind}_{len(links[kind]) + 1}"
            try:
                obj = attrs.pop(kind, None)
                cls_ = {"barrier": Barrier, "exchange": Exchange, "transfer": Transfer}[kind]
                if obj is not None:
                    if not isinstance(obj, cls_):
                        raise ScenarioError.single(kind, repr(obj), f"must be a {cls_.__name__} object")
                    if (obj.from_id, obj.to_id) != (u, v):
                        raise ScenarioError.single("from", f"{obj.from_id} -> {obj.to_id}",
                                                   f"must match the edge {u} -> {v}", path="from")
                    links[kind].append(obj)
                else:
                    raw = {"id": lid, "from": u, "to": v, **attrs}
                    links[kind].append(cls_.from_mapping(raw, python=True))
            except ScenarioError as err:
                problems.extend(err.within(f"{kind} '{lid}'", at=f"{kind}.{lid}").problems)
        dose_objs = []
        dose_numbers = []  # the position of each built dose in the regimen given
        for i, d in enumerate(doses, start=1):
            try:
                dose_objs.append(d if isinstance(d, Dose) else Dose.from_mapping(d, molar_mass, python=True))
                dose_numbers.append(i)
            except ScenarioError as err:
                problems.extend(err.within(f"dose {i}", at=f"dose.{i}").problems)
        out_units = output if output is not None else OutputUnits()
        if isinstance(out_units, Mapping):
            try:
                out_units = OutputUnits.from_mapping(out_units)
            except ScenarioError as err:
                problems.extend(err.within("output", at="output").problems)
                out_units = OutputUnits()
        times = {}
        for label, value in (("duration", duration), ("output_step", output_step)):
            if value is None:
                times[label] = None
            elif finite(value):
                times[label] = float(value)
            else:
                try:
                    times[label] = parse_quantity(value, "time", f"scenario {label}")
                except UnitsError as err:
                    problems.append(dataclasses.replace(err.problem, path=f"scenario.{label}"))
                    times[label] = None
        otimes = None
        if output_times is not None:
            otimes = []
            for j, t in enumerate(output_times):
                try:
                    otimes.append(float(t) if finite(t) else parse_quantity(t, "time", f"scenario output_times[{j}]"))
                except UnitsError as err:
                    problems.append(dataclasses.replace(err.problem, path="scenario.output_times"))
            otimes = tuple(otimes)

        def make() -> Scenario:
            return cls(
                name=name if name is not None else str(g.graph.get("name", "")),
                duration=times["duration"] if times["duration"] is not None else float("nan"),
                compartments=tuple(comps),
                barriers=tuple(links["barrier"]),
                exchanges=tuple(links["exchange"]),
                transfers=tuple(links["transfer"]),
                doses=tuple(dose_objs),
                substance=sub,
                output_step=times["output_step"],
                output_times=otimes,
                output_units=out_units,
                description=description,
                check_ranges=check_ranges,
            )

        if not problems:
            return make()
        # Report the network's own problems too (every problem at once, as a file does), except
        # those that only follow from a part that already failed above.
        built = {c.id for c in comps} | {x.id for xs in links.values() for x in xs}
        failed = {str(n) for n in g.nodes} - built
        raise ScenarioError(network_problems(problems, make, failed, dose_numbers))


def _build_substance(raw: Mapping[str, Any]) -> Substance:
    from ._fields import build
    return build(Substance, Substance.SPECS, raw, python=True)


def network_problems(problems: list[Problem], make: Callable[[], Scenario], failed_ids: set[str],
                     dose_numbers: list[int]) -> list[Problem]:
    """Add the whole-network problems to those already found in the parts of a scenario.

    ``make`` builds the scenario from the parts that were valid; its own problems are added
    except those that only follow from a failed part (a link to a compartment that failed, a
    field already reported). Doses are renumbered to their position in the input, since
    ``make`` sees only the doses that were valid (``dose_numbers``: their positions).
    """
    out = list(problems)
    seen = {p.field for p in problems}
    try:
        make()
    except ScenarioError as err:
        for p in err.problems:
            m = re.match(r"dose\.(\d+)(\..*)?\Z", p.path)
            if m and 0 < int(m.group(1)) <= len(dose_numbers):
                n = dose_numbers[int(m.group(1)) - 1]
                p = dataclasses.replace(p, field=re.sub(r"\Adose \d+", f"dose {n}", p.field),
                                        path=f"dose.{n}{m.group(2) or ''}")
            if p.field in seen or any(repr(f) in p.value for f in failed_ids):
                continue
            out.append(p)
    return out


def _replace(obj: Any, changes: dict[str, Any]) -> Any:
    """``obj`` with ``changes``, or ``obj`` itself when nothing changes."""
    if all(getattr(obj, k) == v for k, v in changes.items()):
        return obj
    return dataclasses.replace(obj, **changes)


def _show(value: Any, spec: FieldSpec) -> str:
    from ._fields import show
    return show(value, spec)


def _v(value: Any) -> str:
    if finite(value):
        from ..units import format_quantity
        return format_quantity(float(value), "volume", ("mL", "uL", "L"))
    return str(value)


def _n(count: int, noun: str) -> str:
    return f"{count} {noun}" if count == 1 else f"{count} {noun}s"


def _h(value: Any) -> str:
    if finite(value):
        from ..units import format_quantity
        return format_quantity(float(value), "time", "h")
    return str(value)
