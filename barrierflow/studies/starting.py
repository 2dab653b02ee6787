"""Starting values from the data: the time-lag method on what the data say of Q(t).

Q(t), the cumulative amount per area through a barrier, is read from ``permeated`` data, or from
``amount`` or ``conc`` data of the compartment a single barrier feeds (with the sampling
correction, :func:`barrierflow.analysis.sampling.cumulative_from_samples`). The time-lag method
(:func:`barrierflow.analysis.timelag.time_lag`) gives J_ss and t_lag per replicate and pooled; the
freed diffusivities of that barrier's layers are scaled by the ratio of the model's lag time
to the measured one, then its freed partition coefficients by the ratio of the permeabilities.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from ..analysis.sampling import cumulative_from_samples
from ..analysis.steady import lag_time
from ..analysis.timelag import TimeLag, time_lag
from ..model import Scenario
from ..model.experiment import Experiment
from ..model.paths import Param, with_values
from .estimation import FreeParameter

__all__ = ["lag_values", "start_values", "time_lags_of"]


def _barrier_into(scenario: Scenario, cid: str):
    into = [b for b in scenario.barriers if b.to_id == cid]
    return into[0] if len(into) == 1 else None


def _source_concentration(scenario: Scenario, barrier) -> float | None:
    """The concentration held (or first given) on the ``from`` side of a barrier, mg/mL, divided by
    that compartment's partition (the potential that drives the barrier)."""
    c = scenario.compartment(barrier.from_id)
    conc = c.starting_concentration
    if not conc:
        for d in scenario.doses:
            if d.target == c.id and d.concentration:
                conc = d.concentration
                break
            if d.target == c.id and d.amount and c.volume:
                conc = d.amount / c.volume
                break
    return conc / c.partition if conc else None


def _sample_volumes(scenario: Scenario, cid: str) -> float:
    """The aliquot volume of the scenario's sampling of ``cid`` (mL; 0 when it is not sampled).

    Read from the doses of kind ``"sample"`` of the lab protocol (their ``volume``), when the
    model has them; a receptor without sampling doses gives 0.
    """
    volumes = [getattr(d, "volume", None) for d in scenario.doses if d.target == cid and d.kind == "sample"]
    volumes = [v for v in volumes if v]
    return float(volumes[0]) if volumes else 0.0


def _cumulative(scenario: Scenario, experiment: Experiment, series) -> tuple[str, np.ndarray] | None:
    """(barrier id, Q per area, mg/cm^2) from a series, or None when Q cannot be read from it."""
    if series.quantity == "permeated":
        return series.target, series.array
    if series.quantity in ("amount", "conc"):
        b = _barrier_into(scenario, series.target)
        if b is None:
            return None
        if series.quantity == "amount":
            return b.id, series.array / b.area
        comp = scenario.compartment(series.target)
        if comp.volume is None or comp.held:
            return None
        return b.id, cumulative_from_samples(series.array, comp.volume, _sample_volumes(scenario, comp.id), b.area)
    return None


def time_lags_of(scenario: Scenario, experiment: Experiment) -> dict[str, dict[str, TimeLag]]:
    """The time-lag method per observed barrier: per replicate and pooled."""
    t = experiment.time_array
    by_barrier: dict[str, list[tuple[str, np.ndarray]]] = {}
    for s in experiment.series:
        got = _cumulative(scenario, experiment, s)
        if got is not None:
            by_barrier.setdefault(got[0], []).append((s.replicate, got[1]))
    out: dict[str, dict[str, TimeLag]] = {}
    for bid, items in by_barrier.items():
        b = scenario.barrier(bid)
        thick = sum(layer.thickness for layer in b.layers)
        conc = _source_concentration(scenario, b)
        lags: dict[str, TimeLag] = {}
        for rep, q in items:
            if rep in lags:
                continue
            try:
                lags[rep] = time_lag(t, q, thickness=thick, source_concentration=conc)
            except ValueError:
                pass
        try:
            lags["pooled"] = time_lag(np.concatenate([t] * len(items)), np.concatenate([q for _, q in items]),
                                      thickness=thick, source_concentration=conc)
        except ValueError:
            pass
        if lags:
            out[bid] = lags
    return out


def _layers_of(param: Param, bid: str) -> list[int]:
    """Indices of the layers of barrier ``bid`` that a parameter sets (empty when none)."""
    return [p.layer - 1 for p in param.paths if p.table == "barrier" and p.item == bid and p.layer is not None]


def start_values(scenario: Scenario, frees: Sequence[FreeParameter], lags: Mapping[str, Mapping[str, TimeLag]]
                  ) -> list[float]:
    """Scenario values, moved by the time-lag estimates (see the module docstring), within the bounds."""
    values = [float(f.param.get(scenario)) for f in frees]
    for bid, by_rep in lags.items():
        lag = by_rep.get("pooled")
        if lag is None or not lag.lag_time > 0:
            continue
        b = scenario.barrier(bid)
        d_free = [j for j, f in enumerate(frees) if f.param.kind == "diffusivity" and _layers_of(f.param, bid)]
        k_free = [j for j, f in enumerate(frees) if f.param.spec.key == "partition" and _layers_of(f.param, bid)]
        if d_free:
            ratio = lag_time(b.layers) / lag.lag_time
            for j in d_free:
                values[j] *= ratio
        if k_free and lag.permeability:
            current = with_values(scenario, {frees[j].param: values[j] for j in d_free}) if d_free else scenario
            layers = current.barrier(bid).layers
            resistance = sum(layer.thickness / (layer.diffusivity * layer.partition) for layer in layers)
            model_p = 1.0 / resistance
            for j in k_free:
                values[j] *= lag.permeability / model_p
    out = []
    for v, f in zip(values, frees, strict=True):
        if f.lower is not None:
            v = max(v, f.lower)
        if f.upper is not None:
            v = min(v, f.upper)
        out.append(v)
    return out


def lag_values(scenario: Scenario, frees: Sequence[FreeParameter], lags) -> list[float | None]:
    """The time-lag method's D and K beside the freed D and K of a one-layer barrier."""
    out: list[float | None] = []
    for f in frees:
        value = None
        for bid, by_rep in lags.items():
            lag = by_rep.get("pooled")
            if lag is None or len(scenario.barrier(bid).layers) != 1 or not _layers_of(f.param, bid):
                continue
            if f.param.kind == "diffusivity":
                value = lag.diffusivity
            elif f.param.spec.key == "partition":
                value = lag.partition
        out.append(value)
    return out


