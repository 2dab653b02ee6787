"""Many subjects of one scenario as one object: the scenario with one value per subject.

A population, a sweep or a sensitivity design is a scenario and, for each subject, the values of
a few parameters (:class:`~barrierflow.model.paths.ParamPath` or
:class:`~barrierflow.model.paths.Tied`). :func:`stacked` gives the scenario in which each varied
field holds an array of shape (n, 1), one value per subject, instead of a number (and every value
written per area its absolute value per subject, as the scenario resolves it). The compiled
arrays (:func:`barrierflow.engine.compiled.compile_scenario`) and the metrics
(:mod:`barrierflow.analysis.metrics`) compute on it exactly as on one scenario, with numpy's
element-wise arithmetic, so subject i's row is what the same code gives for subject i's own
scenario, operation for operation, without building n scenarios.

Such a scenario is not validated as a whole (its numbers are arrays); :func:`refused` checks
every subject's values by the model's own rules first (the range of each field and its plausible
range; the few rules that tie a varied field to another are checked by the model itself, subject
by subject) and gives the model's own message for a refused subject.

Where the code takes a decision on a value (a clearance of zero or not, the number of cells of a
degrading layer), :func:`decide` gives the common answer, or raises :class:`Diverging` with the
subjects for which the answer is yes: the caller then splits the subjects there and goes on with
each part.
"""

from __future__ import annotations

import copy
from collections.abc import Sequence
from typing import Any

import numpy as np

from ..errors import BarrierflowError
from ._fields import PLAUSIBLE, FieldSpec
from .components import Dose
from .paths import _MANY, _SINGLE, Param, ParamPath, with_values
from .scenario import Scenario

__all__ = ["Diverging", "cohort_size", "decide", "refused", "stacked"]


class Diverging(Exception):  # noqa: N818 (a signal to split the subjects, not an error)
    """A decision on values that goes one way for some subjects and the other way for the rest.

    Attributes
    ----------
    mask : ndarray of bool (n,)
        The subjects for which the answer is yes.
    """

    def __init__(self, mask: np.ndarray):
        super().__init__("the subjects differ in structure")
        self.mask = np.asarray(mask, dtype=bool).reshape(-1)


def decide(flag: Any) -> bool:
    """The answer of a yes/no question on values: a number's, or the common answer of every subject.

    Raises
    ------
    Diverging
        When ``flag`` holds one answer per subject and they differ.
    """
    if isinstance(flag, np.ndarray) and flag.size > 1:
        if flag.all():
            return True
        if not flag.any():
            return False
        raise Diverging(flag)
    return bool(flag)


def cohort_size(scenario: Scenario) -> int | None:
    """The number of subjects of a :func:`stacked` scenario (None for a plain one)."""
    return scenario.__dict__.get("_cohort_size")


def _owner_index(path: ParamPath, scenario: Scenario) -> tuple[str, int | None, int | None]:
    i, j = path._index(scenario)
    return path.table, i, j


def stacked(scenario: Scenario, params: Sequence[Param], values: np.ndarray) -> Scenario:
    """The scenario whose varied fields hold one value per subject (arrays of shape (n, 1)).

    Parameters
    ----------
    scenario : Scenario
        The base every subject shares.
    params : sequence of Param
        The varied paths (a tied group sets each member).
    values : array (n, len(params))
        Each subject's values, internal units (checked by :func:`refused` first).

    Returns
    -------
    Scenario
        Not validated; for compiled arrays and metrics only (:func:`cohort_size` gives n).
    """
    values = np.asarray(values, dtype=np.float64)
    n = values.shape[0]
    view = copy.copy(scenario)
    new_items: dict[str, list[Any]] = {}
    singles: dict[str, Any] = {}
    layers: dict[tuple[int, int], Any] = {}

    def obj_of(path: ParamPath) -> Any:
        table, i, j = _owner_index(path, scenario)
        if table in _SINGLE:
            attr = _SINGLE[table][0]
            if attr is None:
                return view
            if attr not in singles:
                singles[attr] = copy.copy(getattr(scenario, attr))
            return singles[attr]
        attr = _MANY[table][0]
        items = new_items.setdefault(attr, list(getattr(scenario, attr)))
        if items[i] is getattr(scenario, attr)[i]:
            items[i] = copy.copy(items[i])
        if j is None:
            return items[i]
        key = (i, j)
        if key not in layers:
            stack = list(items[i].layers)
            stack[j] = copy.copy(stack[j])
            object.__setattr__(items[i], "layers", tuple(stack))
            layers[key] = stack[j]
        return layers[key]

    per_area_set = False
    for k, param in enumerate(params):
        column = values[:, k:k + 1].copy()
        for path in param.paths:
            attr = path.attr_in(scenario)
            per_area_set |= attr != path.spec.attr
            object.__setattr__(obj_of(path), attr, column)
    for attr, value in singles.items():
        object.__setattr__(view, attr, value)
    for attr, items in new_items.items():
        object.__setattr__(view, attr, tuple(items))
    if per_area_set or "barriers" in new_items:
        _resolve_per_area(view)
    view.__dict__.pop("graph", None)  # a cached network of the base scenario
    view.__dict__["_cohort_size"] = n
    return view


def _resolve_per_area(view: Scenario) -> None:
    """Every value written per area set to its absolute value with the area of the one barrier
    its compartment touches, per subject (as :meth:`Scenario._resolve_per_area` does for one)."""
    comps = []
    for c in view.compartments:
        specs = [s for s in c.SPECS if s.per_area is not None and getattr(c, s.per_area) is not None]
        if not specs:
            comps.append(c)
            continue
        area = view.touching(c.id)[0].area
        c = copy.copy(c)
        for spec in specs:
            object.__setattr__(c, spec.attr, getattr(c, spec.per_area) * area)
        comps.append(c)
    doses = []
    for d in view.doses:
        if d.amount_per_area is None:
            doses.append(d)
            continue
        d = copy.copy(d)
        object.__setattr__(d, "amount", d.amount_per_area * view.touching(d.target)[0].area)
        doses.append(d)
    object.__setattr__(view, "compartments", tuple(comps))
    object.__setattr__(view, "doses", tuple(doses))


# ---------------------------------------------------------------- checking the values
def refused(scenario: Scenario, params: Sequence[Param], values: np.ndarray) -> dict[int, str]:
    """The subjects whose values the model refuses, with the model's message.

    Every varied field is checked against its range (``> 0``, ``>= 0``, a finite number) and,
    unless the scenario sets ``check_ranges = false``, its plausible range (for a value written
    per area, the absolute value it gives, as the model checks it; a barrier's area checks the
    values written per area that it scales); a dose's fraction is at most 1. The few fields that
    a model rule ties to another (a held compartment's concentrations and elimination, a sampled
    compartment's volume and the sample's, the volumes of an evaporating vehicle) are checked by
    the model itself, subject by subject. The message of a refused subject is the model's
    (:func:`~barrierflow.model.paths.with_values`).

    Returns
    -------
    dict of int to str
        Row of ``values`` to the message.
    """
    values = np.asarray(values, dtype=np.float64)
    n = values.shape[0]
    bad = np.zeros(n, dtype=bool)
    ranges = scenario.check_ranges is not False
    tied_up = False
    for k, param in enumerate(params):
        col = values[:, k]
        for path in param.paths:
            attr = path.attr_in(scenario)
            spec = path.spec if attr == path.spec.attr else path.spec.per_area_spec
            bad |= ~_within(col, spec)
            if path.table == "dose" and path.field == "fraction":
                bad |= ~(col <= 1.0)
            tied_up |= _tied(scenario, path)
            if ranges:
                if attr == path.spec.attr:
                    bad |= ~_plausible(col, path.spec)
                else:  # the absolute value it gives is what the model checks for range
                    area = _touching_area(scenario, path)
                    bad |= ~_plausible(col * area, path.spec)
    if ranges:  # a varied area scales the values written per area of its compartments
        for k, param in enumerate(params):
            for path in param.paths:
                if path.table == "barrier" and path.layer is None and path.field == "area":
                    b = scenario.barrier(path.item)
                    for cid in (b.from_id, b.to_id):
                        if len(scenario.touching(cid)) != 1:
                            continue
                        bad |= ~_per_area_ok(scenario, cid, values[:, k])
    check = np.flatnonzero(bad) if not tied_up else np.arange(n)
    out: dict[int, str] = {}
    for i in check.tolist():
        try:
            with_values(scenario, dict(zip(params, values[i].tolist(), strict=True)))
        except BarrierflowError as err:
            out[i] = " / ".join(str(err).splitlines())
    return out


def _within(col: np.ndarray, spec: FieldSpec) -> np.ndarray:
    ok = np.isfinite(col)
    if spec.bound == "> 0":
        ok &= col > 0
    elif spec.bound == ">= 0":
        ok &= col >= 0
    return ok


def _plausible(col: np.ndarray, spec: FieldSpec) -> np.ndarray:
    rng = PLAUSIBLE.get(spec.key) if spec.kind == "number" else PLAUSIBLE.get(spec.kind)
    if rng is None:
        return np.ones(len(col), dtype=bool)
    a = np.abs(col)
    return ~np.isfinite(col) | (col == 0) | ((rng.low <= a) & (a <= rng.high))


def _touching_area(scenario: Scenario, path: ParamPath) -> float:
    cid = path.item if path.table == "compartment" else scenario.doses[path.item - 1].target
    return scenario.touching(cid)[0].area


def _per_area_ok(scenario: Scenario, cid: str, area: np.ndarray) -> np.ndarray:
    ok = np.ones(len(area), dtype=bool)
    c = scenario.compartment(cid)
    for spec in c.SPECS:
        if spec.per_area is not None and getattr(c, spec.per_area) is not None:
            ok &= _plausible(getattr(c, spec.per_area) * area, spec)
    for d in scenario.doses:
        if d.target == cid and d.amount_per_area is not None:
            ok &= _plausible(d.amount_per_area * area, next(s for s in Dose.SPECS if s.attr == "amount"))
    return ok


def _tied(scenario: Scenario, path: ParamPath) -> bool:
    """True when a model rule ties this field to another in ``scenario`` (checked subject by subject)."""
    if path.table == "compartment":
        c = scenario.compartment(path.item)
        if c.held and path.field in ("initial_concentration", "held_concentration", "clearance", "vmax",
                                     "loss_rate"):
            return True
        if c.evaporates and path.field in ("volume", "residual_volume", "evaporation_rate"):
            return True
        if path.field == "volume" and any(d.target == c.id and d.kind == "sample" for d in scenario.doses):
            return True
        return False
    if path.table == "dose":
        return scenario.doses[path.item - 1].kind == "sample" and path.field == "volume"
    if path.table == "barrier" and path.layer is None and path.field == "area":
        b = scenario.barrier(path.item)
        return any(scenario.compartment(cid).evaporates for cid in (b.from_id, b.to_id))
    return False
