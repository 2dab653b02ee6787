"""The parts of a scenario: substance, compartments, layers, barriers, links and doses.

All are frozen dataclasses holding plain floats in the internal unit system (cm, h, mg, mL;
see :mod:`barrierflow.units`). Each checks its own invariants when it is built and raises
:class:`~barrierflow.errors.ScenarioError` listing every problem. A change is a new object
(:func:`dataclasses.replace`), never an edit in place.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

from ..errors import Problem, ScenarioError
from ._fields import Checker, FieldSpec, build, finite

__all__ = [
    "DOSE_KINDS",
    "DOSE_OPTIONS",
    "Barrier",
    "Compartment",
    "Dose",
    "Exchange",
    "Layer",
    "OutputUnits",
    "Substance",
    "Transfer",
]

ID_PATTERN = re.compile(r"[A-Za-z][A-Za-z0-9_-]*\Z")
MAX_CELLS_PER_LAYER = 100_000


def _check_id(chk: Checker, value: Any, attr: str = "id") -> None:
    if not isinstance(value, str) or not ID_PATTERN.match(value):
        chk.add(attr, repr(value), "an id starts with a letter and holds only letters, digits, '_' and '-'")


@dataclass(frozen=True)
class Substance:
    """The substance that is applied and followed.

    Parameters
    ----------
    name : str
        Free text.
    molar_mass : float or None, mg/mmol (numerically g/mol)
        Enables molar units in the scenario.
    solubility : float or None, mg/mL
        Solubility in the reference phase; enables sink-condition and saturation warnings.
    log_kow : float or None
        Octanol/water partition coefficient (log10), for screening estimates.
    """

    name: str = ""
    molar_mass: float | None = None
    solubility: float | None = None
    log_kow: float | None = None

    SPECS: ClassVar[tuple[FieldSpec, ...]] = (
        FieldSpec("name", "name", "text"),
        FieldSpec("molar_mass", "molar_mass", "molar_mass", unit="g/mol", bound="> 0"),
        FieldSpec("solubility", "solubility", "concentration", unit="mg/mL", bound="> 0"),
        FieldSpec("log_kow", "log_kow", "number"),
    )

    def __post_init__(self) -> None:
        chk = Checker(self.SPECS)
        chk.bound("molar_mass", self.molar_mass, optional=True)
        chk.bound("solubility", self.solubility, optional=True)
        if self.log_kow is not None and not finite(self.log_kow):
            chk.add("log_kow", self.log_kow, "must be a finite number")
        chk.done()


@dataclass(frozen=True)
class Compartment:
    """A well-mixed volume: vehicle, donor chamber, receptor fluid, plasma, a tissue.

    Parameters
    ----------
    id : str
        Unique id, ``[A-Za-z][A-Za-z0-9_-]*``.
    volume : float or None, mL
        Required unless the compartment is held.
    initial_concentration : float, mg/mL
        Concentration at time 0 (default 0).
    partition : float
        Partition coefficient relative to the reference phase (dimensionless, default 1).
    clearance : float, mL/h
        Linear elimination, rate = clearance * C.
    vmax : float or None, mg/h
        Maximal rate of saturable (Michaelis-Menten) elimination; needs ``km``.
    km : float or None, mg/mL
        Concentration at half the maximal rate.
    held_concentration : float or None, mg/mL
        Makes the compartment a reservoir whose concentration never changes (0: a perfect sink).
    description : str
        Free text.
    volume_per_area : float or None, mL/cm^2
        The volume as written per area (``volume = "10 uL/cm^2"``). When set, the scenario sets
        ``volume`` to it times the area of the one barrier the compartment touches.
    evaporation_rate : float or None, mL/h
        The volume shrinks at this rate (a volatile vehicle) down to ``residual_volume``.
    evaporation_rate_per_area : float or None, mL/(cm^2 h)
        The same written per area; resolved by the scenario into ``evaporation_rate``.
    residual_volume : float or None, mL
        What is left when the volatile part has evaporated (required with an evaporation rate).
    residual_volume_per_area : float or None, mL/cm^2
        The same written per area; resolved by the scenario into ``residual_volume``.
    loss_rate : float, 1/h
        First-order loss of the dissolved solute from the compartment to the air (default 0);
        the ledger counts it as lost.
    """

    id: str
    volume: float | None = None
    initial_concentration: float = 0.0
    partition: float = 1.0
    clearance: float = 0.0
    vmax: float | None = None
    km: float | None = None
    held_concentration: float | None = None
    description: str = ""
    volume_per_area: float | None = None
    evaporation_rate: float | None = None
    evaporation_rate_per_area: float | None = None
    residual_volume: float | None = None
    residual_volume_per_area: float | None = None
    loss_rate: float = 0.0

    SPECS: ClassVar[tuple[FieldSpec, ...]] = (
        FieldSpec("id", "id", "id", required=True),
        FieldSpec("volume", "volume", "volume", unit="mL", bound="> 0", per_area="volume_per_area"),
        FieldSpec("initial_concentration", "initial_concentration", "concentration", unit="mg/mL",
                  bound=">= 0"),
        FieldSpec("partition", "partition", "number", bound="> 0"),
        FieldSpec("clearance", "clearance", "flow", unit="mL/h", bound=">= 0"),
        FieldSpec("vmax", "vmax", "amount_rate", unit="mg/h", bound=">= 0"),
        FieldSpec("km", "km", "concentration", unit="mg/mL", bound="> 0"),
        FieldSpec("held_concentration", "held_concentration", "concentration", unit="mg/mL", bound=">= 0"),
        FieldSpec("evaporation_rate", "evaporation_rate", "flow", unit="mL/h", bound="> 0",
                  per_area="evaporation_rate_per_area"),
        FieldSpec("residual_volume", "residual_volume", "volume", unit="mL", bound="> 0",
                  per_area="residual_volume_per_area"),
        FieldSpec("loss_rate", "loss_rate", "rate", unit="1/h", bound=">= 0"),
        FieldSpec("description", "description", "text"),
    )

    def __post_init__(self) -> None:
        chk = Checker(self.SPECS)
        _check_id(chk, self.id)
        if self.volume is None and self.volume_per_area is None:
            if self.held_concentration is None:
                chk.add("volume", "nothing", "a volume such as '5 mL' is required unless the "
                        "compartment is held (held_concentration)")
        else:
            chk.bound("volume", self.volume, optional=True)
            chk.bound("volume_per_area", self.volume_per_area, optional=True)
        chk.bound("evaporation_rate", self.evaporation_rate, optional=True)
        chk.bound("evaporation_rate_per_area", self.evaporation_rate_per_area, optional=True)
        chk.bound("residual_volume", self.residual_volume, optional=True)
        chk.bound("residual_volume_per_area", self.residual_volume_per_area, optional=True)
        chk.bound("loss_rate", self.loss_rate)
        evaporates = self.evaporation_rate is not None or self.evaporation_rate_per_area is not None
        residue = self.residual_volume is not None or self.residual_volume_per_area is not None
        if evaporates and not residue and chk.read("evaporation_rate", "residual_volume"):
            rate = self.evaporation_rate_per_area if self.evaporation_rate is None else self.evaporation_rate
            attr = "evaporation_rate_per_area" if self.evaporation_rate is None else "evaporation_rate"
            chk.add(attr, rate, "an evaporating compartment needs residual_volume too (what is left when the "
                    "volatile part has gone), such as '0.5 uL/cm^2'")
        elif residue and not evaporates and chk.read("evaporation_rate", "residual_volume"):
            attr = "residual_volume_per_area" if self.residual_volume is None else "residual_volume"
            chk.add(attr, getattr(self, attr), "residual_volume goes with evaporation_rate; give the rate, or "
                    "remove residual_volume")
        elif evaporates and residue and chk.read("volume", "residual_volume"):
            for whole, part in (("volume", "residual_volume"), ("volume_per_area", "residual_volume_per_area")):
                v, r = getattr(self, whole), getattr(self, part)
                if finite(v) and finite(r) and r >= v and (whole == "volume_per_area" or self.volume_per_area is None):
                    chk.add(part, r, "must be smaller than the volume (the residue left after evaporation)")
        if self.held_concentration is not None and chk.read("held_concentration"):
            for attr in ("evaporation_rate", "evaporation_rate_per_area"):
                if getattr(self, attr) is not None:
                    chk.add(attr, getattr(self, attr), "a held compartment does not change, so it cannot evaporate; "
                            "remove the evaporation or held_concentration")
            if finite(self.loss_rate) and self.loss_rate > 0:
                chk.add("loss_rate", self.loss_rate, "a held compartment does not change, so it loses nothing; "
                        "remove loss_rate or held_concentration")
        chk.bound("initial_concentration", self.initial_concentration)
        chk.bound("partition", self.partition)
        chk.bound("clearance", self.clearance)
        chk.bound("held_concentration", self.held_concentration, optional=True)
        if (self.vmax is None) != (self.km is None):
            missing = "km" if self.km is None else "vmax"
            given = "vmax" if self.km is None else "km"
            chk.add(given, getattr(self, given), f"{given} needs {missing} too (Michaelis-Menten elimination)")
        else:
            chk.bound("vmax", self.vmax, optional=True)
            chk.bound("km", self.km, optional=True)
        if (self.held_concentration is not None and self.initial_concentration and chk.read("held_concentration")
                and self.initial_concentration != self.held_concentration):
            chk.add("initial_concentration", self.initial_concentration,
                    "a held compartment stays at its held_concentration; leave initial_concentration out")
        if self.held_concentration is not None and (self.clearance or self.vmax) and chk.read("held_concentration"):
            chk.add("clearance" if self.clearance else "vmax", self.clearance or self.vmax,
                    "a held compartment does not change, so it cannot eliminate; remove the elimination")
        chk.done()

    @property
    def held(self) -> bool:
        """True for a reservoir or perfect sink whose concentration never changes."""
        return self.held_concentration is not None

    @property
    def per_area(self) -> tuple[str, ...]:
        """The attributes written per area (``volume``, ...), which the scenario resolves."""
        return tuple(s.attr for s in self.SPECS if s.per_area is not None and getattr(self, s.per_area) is not None)

    @property
    def evaporates(self) -> bool:
        """True for a volatile vehicle (an evaporation rate is given)."""
        return self.evaporation_rate is not None or self.evaporation_rate_per_area is not None

    @property
    def starting_concentration(self) -> float:
        """Concentration at time 0, mg/mL (the held one for a held compartment)."""
        return self.held_concentration if self.held_concentration is not None else self.initial_concentration

    @classmethod
    def from_mapping(cls, raw: Mapping[str, Any], molar_mass: float | None = None, *,
                     python: bool = False) -> Compartment:
        """Build from a mapping of unit strings (a TOML table or keyword attributes)."""
        return build(cls, cls.SPECS, raw, molar_mass=molar_mass, python=python)


@dataclass(frozen=True)
class Layer:
    """One homogeneous layer of a barrier, in which dC/dt = D d2C/dx2 - k_deg C.

    Parameters
    ----------
    thickness : float, cm
    diffusivity : float, cm^2/h
    partition : float
        Partition coefficient relative to the reference phase (default 1).
    name : str
        Free text, for example ``"stratum corneum"``.
    cells : int or None
        Number of equal cells of the grid; None lets the engine choose.
    degradation_rate : float, 1/h
        First-order degradation inside the layer.
    initial_concentration : float, mg/mL
        Concentration in the layer itself at time 0 (default 0): a loaded layer, such as a
        drug-in-adhesive matrix or a membrane loaded for a desorption experiment.
    """

    thickness: float
    diffusivity: float
    partition: float = 1.0
    name: str = ""
    cells: int | None = None
    degradation_rate: float = 0.0
    initial_concentration: float = 0.0

    SPECS: ClassVar[tuple[FieldSpec, ...]] = (
        FieldSpec("name", "name", "text"),
        FieldSpec("thickness", "thickness", "length", required=True, unit="um", bound="> 0"),
        FieldSpec("diffusivity", "diffusivity", "diffusivity", required=True, unit="cm^2/s", bound="> 0"),
        FieldSpec("partition", "partition", "number", bound="> 0"),
        FieldSpec("cells", "cells", "count", bound="> 0", structural=True),
        FieldSpec("degradation_rate", "degradation_rate", "rate", unit="1/h", bound=">= 0"),
        FieldSpec("initial_concentration", "initial_concentration", "concentration", unit="mg/mL",
                  bound=">= 0"),
    )

    def __post_init__(self) -> None:
        chk = Checker(self.SPECS)
        chk.bound("thickness", self.thickness)
        chk.bound("diffusivity", self.diffusivity)
        chk.bound("partition", self.partition)
        chk.bound("degradation_rate", self.degradation_rate)
        chk.bound("initial_concentration", self.initial_concentration)
        if self.cells is not None:
            if isinstance(self.cells, bool) or not isinstance(self.cells, int) or self.cells < 1:
                chk.add("cells", self.cells, "must be a whole number >= 1")
            elif self.cells > MAX_CELLS_PER_LAYER:
                chk.add("cells", self.cells, f"must be at most {MAX_CELLS_PER_LAYER} (a grid too large for memory)")
        chk.done()

    @property
    def resistance(self) -> float:
        """Steady resistance L/(D K) of the layer, h/cm."""
        return self.thickness / (self.diffusivity * self.partition)

    @classmethod
    def from_mapping(cls, raw: Mapping[str, Any], *, python: bool = False, molar_mass: float | None = None) -> Layer:
        """Build from a mapping of unit strings (a TOML table or keyword attributes)."""
        return build(cls, cls.SPECS, raw, python=python, molar_mass=molar_mass)


BARRIER_MODELS = ("resolved", "steady")


@dataclass(frozen=True)
class Barrier:
    """A stack of layers joining two compartments through an area.

    Parameters
    ----------
    id : str
        Unique id.
    from_id, to_id : str
        The compartments on the two sides; ``from`` touches the first layer.
    area : float, cm^2
    layers : tuple of Layer
        In order from the ``from`` side.
    model : {"resolved", "steady"}
        ``resolved`` solves the diffusion equation in every layer; ``steady`` is a quasi-steady
        resistance without storage.
    """

    id: str
    from_id: str
    to_id: str
    area: float
    layers: tuple[Layer, ...]
    model: str = "resolved"

    SPECS: ClassVar[tuple[FieldSpec, ...]] = (
        FieldSpec("id", "id", "id", required=True),
        FieldSpec("from_id", "from", "id", required=True),
        FieldSpec("to_id", "to", "id", required=True),
        FieldSpec("area", "area", "area", required=True, unit="cm^2", bound="> 0"),
        FieldSpec("model", "model", "text"),
    )

    def __post_init__(self) -> None:
        if isinstance(self.layers, list):
            object.__setattr__(self, "layers", tuple(self.layers))
        chk = Checker(self.SPECS)
        _check_id(chk, self.id)
        chk.bound("area", self.area)
        if self.model not in BARRIER_MODELS:
            chk.add("model", repr(self.model), "must be 'resolved' or 'steady'")
        if not self.layers:
            chk.add("layer", "no layers", "a barrier needs at least one [[barrier.layer]]")
        elif not all(isinstance(layer, Layer) for layer in self.layers):
            chk.add("layer", self.layers, "layers must be Layer objects")
        if self.from_id == self.to_id:
            chk.add("to_id", repr(self.to_id), "a barrier must join two different compartments")
        if self.model == "steady" and any(isinstance(x, Layer) and x.initial_concentration for x in self.layers):
            chk.add("model", repr(self.model), "a steady barrier holds nothing, so its layers cannot start loaded "
                    "(initial_concentration); use model = 'resolved'")
        chk.done()

    @property
    def loaded(self) -> bool:
        """True when a layer starts with substance in it."""
        return any(layer.initial_concentration > 0 for layer in self.layers)

    @property
    def resistances(self) -> tuple[float, ...]:
        """Steady resistance L/(D K) of each layer, h/cm, in the order of the layers."""
        return tuple(layer.resistance for layer in self.layers)

    @property
    def resistance(self) -> float:
        """Total steady resistance, the sum of the layers', h/cm."""
        return math.fsum(self.resistances)

    @property
    def thickness(self) -> float:
        """Total thickness, cm."""
        return math.fsum(layer.thickness for layer in self.layers)

    @classmethod
    def from_mapping(cls, raw: Mapping[str, Any], *, python: bool = False, molar_mass: float | None = None) -> Barrier:
        """Build from a mapping; ``raw['layer']`` (or ``'layers'``) is a list of layer mappings."""
        raw = dict(raw)
        layer_raw = raw.pop("layer", None)
        if layer_raw is None:
            layer_raw = raw.pop("layers", [])
        problems: list[Problem] = []
        layers = []
        if not isinstance(layer_raw, (list, tuple)):
            problems.append(Problem("layer", str(layer_raw), "expected a list of layer tables", path="layer"))
            layer_raw = []
        for i, item in enumerate(layer_raw, start=1):
            try:
                if isinstance(item, Layer):
                    layers.append(item)
                elif isinstance(item, Mapping):
                    layers.append(Layer.from_mapping(item, python=python, molar_mass=molar_mass))
                else:
                    problems.append(Problem(f"layer {i}", str(item), "expected a table of layer fields",
                                            path=f"layer.{i}"))
            except ScenarioError as err:
                problems.extend(err.within(f"layer {i}", at=f"layer.{i}").problems)
        try:
            if problems:
                # still check the barrier's own fields, so every problem is reported
                build(cls, cls.SPECS, raw, python=python, extra={"layers": (Layer(1.0, 1.0),)})
            else:
                return build(cls, cls.SPECS, raw, python=python, extra={"layers": tuple(layers)})
        except ScenarioError as err:
            problems = list(err.problems) + problems
        raise ScenarioError(problems)


@dataclass(frozen=True)
class Exchange:
    """A lumped, storage-free two-way link: rate = flow * (C_from/K_from - C_to/K_to).

    Parameters
    ----------
    id : str
    from_id, to_id : str
    flow : float, mL/h
    """

    id: str
    from_id: str
    to_id: str
    flow: float

    SPECS: ClassVar[tuple[FieldSpec, ...]] = (
        FieldSpec("id", "id", "id"),
        FieldSpec("from_id", "from", "id", required=True),
        FieldSpec("to_id", "to", "id", required=True),
        FieldSpec("flow", "flow", "flow", required=True, unit="mL/h", bound="> 0"),
    )

    def __post_init__(self) -> None:
        chk = Checker(self.SPECS)
        _check_id(chk, self.id)
        chk.bound("flow", self.flow)
        if self.from_id == self.to_id:
            chk.add("to_id", repr(self.to_id), "an exchange must join two different compartments")
        chk.done()

    @classmethod
    def from_mapping(cls, raw: Mapping[str, Any], *, python: bool = False, default_id: str = "") -> Exchange:
        """Build from a mapping of unit strings; ``default_id`` is used when no id is given."""
        raw = dict(raw)
        if "id" not in raw and default_id:
            raw["id"] = default_id
        return build(cls, cls.SPECS, raw, python=python)


@dataclass(frozen=True)
class Transfer:
    """A one-way first-order link: rate = rate constant * amount in the ``from`` compartment.

    Parameters
    ----------
    id : str
    from_id, to_id : str
    rate : float, 1/h
    """

    id: str
    from_id: str
    to_id: str
    rate: float

    SPECS: ClassVar[tuple[FieldSpec, ...]] = (
        FieldSpec("id", "id", "id"),
        FieldSpec("from_id", "from", "id", required=True),
        FieldSpec("to_id", "to", "id", required=True),
        FieldSpec("rate", "rate", "rate", required=True, unit="1/h", bound="> 0"),
    )

    def __post_init__(self) -> None:
        chk = Checker(self.SPECS)
        _check_id(chk, self.id)
        chk.bound("rate", self.rate)
        if self.from_id == self.to_id:
            chk.add("to_id", repr(self.to_id), "a transfer must join two different compartments")
        chk.done()

    @classmethod
    def from_mapping(cls, raw: Mapping[str, Any], *, python: bool = False, default_id: str = "") -> Transfer:
        """Build from a mapping of unit strings; ``default_id`` is used when no id is given."""
        raw = dict(raw)
        if "id" not in raw and default_id:
            raw["id"] = default_id
        return build(cls, cls.SPECS, raw, python=python)


DOSE_KINDS: dict[str, tuple[str, ...]] = {
    "bolus": ("amount",),
    "infusion": ("rate", "duration"),
    "hold": ("concentration", "duration"),
    "replace": ("concentration",),
    "remove": (),
    "sample": ("volume",),
}
"""Each dose kind and the fields it needs (besides ``target``, ``at``, ``every``, ``count``)."""

DOSE_OPTIONS: dict[str, tuple[str, ...]] = {
    "remove": ("fraction", "ends_contact"),
    "sample": ("replace",),
}
"""The optional fields of a kind (each with a default of its own meaning; see :class:`Dose`)."""

_DOSE_OPTIONAL = tuple(dict.fromkeys(name for fields in (*DOSE_KINDS.values(), *DOSE_OPTIONS.values())
                                     for name in fields))
"""The fields some kind needs or takes: each is refused on a dose whose kind does not use it."""


@dataclass(frozen=True)
class Dose:
    """A dosing event, possibly repeated.

    Parameters
    ----------
    target : str
        The compartment dosed.
    kind : {"bolus", "infusion", "hold", "replace", "remove", "sample"}
    at : float, h
        Time of the first event.
    amount : float or None, mg
        Bolus amount.
    rate : float or None, mg/h
        Infusion rate.
    duration : float or None, h
        Infusion or hold duration.
    concentration : float or None, mg/mL
        Held or refill concentration.
    every : float or None, h
        Repetition interval.
    count : int or None
        How many events in all (default 1 without ``every``; without ``count``, ``every``
        repeats until the end of the run).
    amount_per_area : float or None, mg/cm^2
        A bolus amount written per area (``amount = "50 ug/cm^2"``); the scenario sets ``amount``
        to it times the area of the one barrier the target touches.
    volume : float or None, mL
        The aliquot a sample withdraws from the well-mixed target.
    replace : bool or None
        Sample only: fresh medium (concentration 0) restores the volume (None, the default,
        means True); False lets the volume shrink by the aliquot.
    fraction : float or None
        Remove only: the share of the content removed (None, the default, means 1); the volume
        stays.
    ends_contact : bool or None
        Remove only: afterwards no flux between the target and its barriers (the barrier faces
        become no-flux) until a new application (a bolus, refill, hold or infusion) on it; None,
        the default, means False.
    """

    target: str
    kind: str
    at: float = 0.0
    amount: float | None = None
    rate: float | None = None
    duration: float | None = None
    concentration: float | None = None
    every: float | None = None
    count: int | None = None
    amount_per_area: float | None = None
    volume: float | None = None
    replace: bool | None = None
    fraction: float | None = None
    ends_contact: bool | None = None

    SPECS: ClassVar[tuple[FieldSpec, ...]] = (
        FieldSpec("target", "target", "id", required=True),
        FieldSpec("kind", "kind", "text", required=True),
        FieldSpec("amount", "amount", "amount", unit="mg", bound="> 0", per_area="amount_per_area"),
        FieldSpec("rate", "rate", "amount_rate", unit="mg/h", bound="> 0"),
        FieldSpec("duration", "duration", "time", unit="h", bound="> 0", structural=True),
        FieldSpec("concentration", "concentration", "concentration", unit="mg/mL", bound=">= 0"),
        FieldSpec("volume", "volume", "volume", unit="mL", bound="> 0"),
        FieldSpec("replace", "replace", "flag", structural=True),
        FieldSpec("fraction", "fraction", "number", bound="> 0"),
        FieldSpec("ends_contact", "ends_contact", "flag", structural=True),
        FieldSpec("at", "at", "time", unit="h", bound=">= 0", structural=True),
        FieldSpec("every", "every", "time", unit="h", bound="> 0", structural=True),
        FieldSpec("count", "count", "count", bound="> 0", structural=True),
    )

    def __post_init__(self) -> None:
        chk = Checker(self.SPECS)
        known = isinstance(self.kind, str) and self.kind in DOSE_KINDS
        if not known:
            chk.add("kind", repr(self.kind), f"must be one of {', '.join(DOSE_KINDS)}")
        else:  # which fields the kind needs; without a known kind, only the fields' own checks
            needed = DOSE_KINDS[self.kind]
            allowed = needed + DOSE_OPTIONS.get(self.kind, ())
            article = "an" if self.kind[0] in "aeiou" else "a"
            for name in _DOSE_OPTIONAL:
                value = getattr(self, name)
                if name == "amount" and value is None:
                    value = self.amount_per_area
                if name in needed and value is None:
                    chk.add(name, "nothing", f"{article} {self.kind} dose needs {name}")
                elif name not in allowed and value is not None:
                    attr = "amount_per_area" if name == "amount" and self.amount is None else name
                    chk.add(attr, value, f"{article} {self.kind} dose does not use {name}; remove it")
        for name in ("replace", "ends_contact"):
            value = getattr(self, name)
            if value is not None and not isinstance(value, bool):
                chk.add(name, value, "must be true or false")
        if self.fraction is not None:
            if not finite(self.fraction):
                chk.add("fraction", self.fraction, "must be a finite number")
            elif not 0 < self.fraction <= 1:
                chk.add("fraction", self.fraction, "must be > 0 and at most 1 (the share of the content removed)")
        chk.bound("at", self.at)
        chk.bound("amount", self.amount, optional=True)
        chk.bound("amount_per_area", self.amount_per_area, optional=True)
        chk.bound("volume", self.volume, optional=True)
        chk.bound("rate", self.rate, optional=True)
        chk.bound("duration", self.duration, optional=True)
        chk.bound("concentration", self.concentration, optional=True)
        chk.bound("every", self.every, optional=True)
        if self.count is not None:
            if isinstance(self.count, bool) or not isinstance(self.count, int) or self.count < 1:
                chk.add("count", self.count, "must be a whole number >= 1")
            elif self.count > 1 and self.every is None:
                chk.add("count", self.count, "a repeated dose needs 'every' (the interval)")
        if (self.kind == "hold" and self.every is not None and self.duration is not None
                and chk.read("every", "duration") and finite(self.every) and finite(self.duration)
                and self.duration > self.every):
            chk.add("duration", self.duration, "a repeated hold must end before the next one starts "
                    "(duration <= every)")
        chk.done()

    @property
    def per_area(self) -> tuple[str, ...]:
        """The attributes written per area (``amount``), which the scenario resolves."""
        return ("amount",) if self.amount_per_area is not None else ()

    @property
    def replaces_medium(self) -> bool:
        """A sample: True when fresh medium restores the volume (the default)."""
        return self.replace is not False

    @property
    def removed_fraction(self) -> float | np.ndarray:
        """A remove: the share of the content it takes (1 by default; one value per subject in a
        stacked scenario, :func:`barrierflow.model.cohort.stacked`)."""
        if self.fraction is None:
            return 1.0
        return self.fraction if isinstance(self.fraction, np.ndarray) else float(self.fraction)

    @property
    def closes(self) -> bool:
        """A remove that ends contact between the target and its barriers."""
        return self.ends_contact is True

    def start_times(self, end: float) -> tuple[float, ...]:
        """Start times of every event of this dose up to and including ``end`` (h)."""
        if self.every is None:
            return (self.at,) if self.at <= end else ()
        n = self.count if self.count is not None else int(math.floor((end - self.at) / self.every + 1e-9)) + 1
        times = []
        for i in range(max(n, 0)):
            t = self.at + i * self.every
            if t > end * (1 + 1e-12):
                break
            times.append(min(t, end))
        return tuple(times)

    @classmethod
    def from_mapping(cls, raw: Mapping[str, Any], molar_mass: float | None = None, *,
                     python: bool = False) -> Dose:
        """Build from a mapping of unit strings (a TOML table or keyword attributes)."""
        return build(cls, cls.SPECS, raw, molar_mass=molar_mass, python=python)


@dataclass(frozen=True)
class OutputUnits:
    """Units of the exported traces.

    Parameters
    ----------
    time : str
        Unit of the time column (default ``"h"``).
    concentration : str
        Default ``"mg/L"``.
    amount : str
        Default ``"mg"``.
    area : str
        Flux and permeated amounts are per this area (default ``"cm^2"``).
    """

    time: str = "h"
    concentration: str = "mg/L"
    amount: str = "mg"
    area: str = "cm^2"

    KIND_OF: ClassVar[dict[str, str]] = {
        "time": "time", "concentration": "concentration", "amount": "amount", "area": "area"}
    SPECS: ClassVar[tuple[FieldSpec, ...]] = tuple(
        FieldSpec(k, k, "text") for k in ("time", "concentration", "amount", "area"))

    def check(self, molar_mass: float | None) -> list[Problem]:
        """Problems with these units (wrong dimension, molar unit without molar mass)."""
        from ..errors import UnitsError
        from ..units import KINDS, unit_factor
        problems = []
        for attr, kind in self.KIND_OF.items():
            unit = getattr(self, attr)
            try:
                unit_factor(kind, unit, molar_mass)
            except UnitsError as err:
                k = KINDS[kind]
                expected = err.expected.replace("with its unit, such as", "unit, such as")
                problems.append(Problem(attr, unit, expected.replace(f"'{k.example}'", f"'{k.internal}'"), path=attr))
        return problems

    @classmethod
    def from_mapping(cls, raw: Mapping[str, Any]) -> OutputUnits:
        """Build from a mapping of unit names."""
        return build(cls, cls.SPECS, raw)


_unused = field  # keep dataclasses.field importable for subclasses
