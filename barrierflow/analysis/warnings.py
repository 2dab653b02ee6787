"""Warnings a practitioner expects about a scenario and a run.

Each warning is one sentence that names the part of the model, the value and what it means:

- **Sink condition lost.** Diffusion-cell studies assume the receptor fluid is a sink: OECD Test
  Guideline 428 (Skin absorption: in vitro method, 2004) asks that the solubility of the test
  substance in the receptor fluid not limit absorption, and common practice keeps the receptor
  concentration below 10 % of the solubility. With ``solubility`` given in ``[substance]``, a
  barrier's ``to`` compartment whose C/K rises above :data:`SINK_FRACTION` of it is reported
  with the time it happens.
- **Above solubility.** A compartment whose C/K reaches the solubility: the excess is held as
  undissolved solid there (the dose cannot all be dissolved).
- **Closed receptor.** A barrier's ``to`` compartment that is not held (a closed receptor) whose
  C/K rises above :data:`~barrierflow.analysis.metrics.CLOSED_RECEPTOR_FRACTION` (10 %) of the
  ``from`` side's during the first dosing interval: it is no sink, so the apparent lag time and
  steady flux of the time-lag method are biased.
- **Steady state never seen.** A resolved barrier whose lag time (exact, from
  :func:`barrierflow.analysis.steady.lag_time`) exceeds the simulated duration.
- **Output too coarse.** An output step coarser than a tenth of the shortest lag time or dosing
  interval: peaks, troughs and lag times read off the traces lose accuracy.

Solubility is given in the reference phase; a phase with partition coefficient K dissolves K
times as much, so concentrations are compared as C/K.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..model import Scenario
from ..units import unit_factor
from .metrics import CLOSED_RECEPTOR_FRACTION, application_times, closed_receptor_time, first_interval_end
from .steady import lag_time

__all__ = ["COARSE_FRACTION", "SINK_FRACTION", "find_warnings", "scenario_warnings"]

SINK_FRACTION = 0.1
"""Receptor C/K above this fraction of the solubility breaks the sink condition (common practice)."""
COARSE_FRACTION = 0.1
"""Output step above this fraction of the shortest lag time or dosing interval is too coarse."""


def _h(t: float) -> str:
    return f"{t:.4g} h"


def _conc(scenario: Scenario, c: float) -> str:
    unit = scenario.output_units.concentration
    try:
        f = unit_factor("concentration", unit, scenario.substance.molar_mass)
    except Exception:  # an unusable output unit is reported by the model itself
        f, unit = 1.0, "mg/mL"
    return f"{c * f:.4g} {unit}"


def _amount(scenario: Scenario, m: float) -> str:
    unit = scenario.output_units.amount
    try:
        f = unit_factor("amount", unit, scenario.substance.molar_mass)
    except Exception:  # an unusable output unit is reported by the model itself
        f, unit = 1.0, "mg"
    return f"{m * f:.4g} {unit}"


def _step_text(t: float, down: bool = False) -> str:
    """A time, h, written in h, min or s with at most 2 (``down``: rounded down) or 4 digits."""
    for unit, per_h in (("h", 1.0), ("min", 60.0), ("s", 3600.0)):
        v = t * per_h
        if v >= 1.0 or unit == "s":
            if down and v > 0:
                e = 10.0 ** (math.floor(math.log10(v)) - 1)
                v = math.floor(v / e * (1 + 1e-12)) * e
                return f"{float(f'{v:.2g}'):g} {unit}"
            return f"{float(f'{v:.4g}'):g} {unit}"
    return _h(t)


def _shortest_lag(lags: dict[str, float]) -> tuple[float, str]:
    """The shortest positive lag time of the resolved barriers (``lags``: by barrier id) and whose."""
    best, who = math.inf, ""
    for bid, lag in lags.items():
        if 0 < lag < best:
            best, who = lag, bid
    return best, who


def _shortest_interval(scenario: Scenario) -> float:
    best = math.inf
    for d in scenario.doses:
        if d.every is not None and (d.count is None or d.count > 1):
            best = min(best, d.every)
    apps = application_times(scenario)
    gaps = [b - a for a, b in zip(apps, apps[1:], strict=False) if b > a]
    if gaps:
        best = min(best, min(gaps))
    return best


def scenario_warnings(scenario: Scenario, *, solubility: bool = True,
                      times: np.ndarray | None = None) -> tuple[str, ...]:
    """Warnings that follow from the scenario alone, before any run.

    Parameters
    ----------
    scenario : Scenario
    solubility : bool
        Also check starting and dosed concentrations against the solubility (a run checks the
        traces instead).
    times : array or None, h
        Output times to judge the output step by (default: the scenario's output grid).

    Returns
    -------
    tuple of str
    """
    out: list[str] = []
    lags = {b.id: lag_time(b.layers) for b in scenario.barriers if b.model == "resolved"}
    for b in scenario.barriers:
        if b.model != "resolved":
            continue
        lag = lags[b.id]
        if lag > scenario.duration:
            out.append(f"barrier '{b.id}': the lag time ({_h(lag)}) exceeds the simulated duration "
                       f"({_h(scenario.duration)}); the run never sees steady state, so flux and permeated "
                       "amounts are still rising at the end")
    grid = np.asarray(scenario.output_grid() if times is None else times, dtype=float)
    if len(grid) and (grid[0] > 0.0 or grid[-1] < scenario.duration * (1 - 1e-12)):
        out.append(f"the output times cover only {_h(float(grid[0]))} to {_h(float(grid[-1]))} of the run "
                   f"(0 h to {_h(scenario.duration)}); Cmax, AUC and the other metrics see only those rows")
    if len(grid) > 1:
        step = float(np.max(np.diff(grid)))
        lag, who = _shortest_lag(lags)
        tau = _shortest_interval(scenario)
        if step > COARSE_FRACTION * lag and lag <= tau:
            out.append(f"the output step ({_step_text(step)}) is coarser than a tenth of the shortest lag time "
                       f"(barrier '{who}', {_h(lag)}); lag times and early fluxes read off the traces lose "
                       f"accuracy: choose an output step of {_step_text(COARSE_FRACTION * lag, True)} or less")
        elif step > COARSE_FRACTION * tau:
            out.append(f"the output step ({_step_text(step)}) is coarser than a tenth of the shortest dosing "
                       f"interval ({_h(tau)}); peaks, troughs and interval AUCs lose accuracy: choose an output "
                       f"step of {_step_text(COARSE_FRACTION * tau, True)} or less")
    sol = scenario.substance.solubility
    if solubility and sol:
        for c in scenario.compartments:
            if c.starting_concentration / c.partition > sol * (1 + 1e-12):
                start = _conc(scenario, c.starting_concentration)
                out.append(f"compartment '{c.id}': the starting concentration ({start}) exceeds the solubility "
                           f"there ({_conc(scenario, sol * c.partition)})")
        for i, d in enumerate(scenario.doses, start=1):
            comp = scenario.compartment(d.target)
            conc = d.concentration
            if d.kind == "bolus" and comp.volume:
                conc = d.amount / comp.volume
            if conc is not None and conc / comp.partition > sol * (1 + 1e-12):
                out.append(f"dose {i} ({d.kind} on '{d.target}'): gives {_conc(scenario, conc)}, above the "
                           f"solubility there ({_conc(scenario, sol * comp.partition)})")
    return tuple(out)


def _first_above(t: np.ndarray, u: np.ndarray, level: float) -> float | None:
    idx = np.nonzero(u > level * (1 + 1e-9))[0]
    if not len(idx):
        return None
    j = int(idx[0])
    if j == 0 or u[j - 1] >= u[j]:
        return float(t[j])
    # linear crossing between the rows
    return float(t[j - 1] + (t[j] - t[j - 1]) * (level - u[j - 1]) / (u[j] - u[j - 1]))


def find_warnings(result: Any) -> tuple[str, ...]:
    """Warnings about a simulated run: sink condition, solubility, steady state, output step.

    Parameters
    ----------
    result : Result
        From :func:`barrierflow.simulate`.

    Returns
    -------
    tuple of str
        One sentence each, in a fixed order (scenario first, then the traces).
    """
    sc: Scenario = result.scenario
    t = np.asarray(result.times, dtype=float)
    out = list(scenario_warnings(sc, solubility=False, times=t))
    if len(t):
        apps = application_times(sc, float(t[-1]))
        origin = min(apps) if apps else float(t[0])
        for b in sc.barriers:
            when = closed_receptor_time(result, b, origin, first_interval_end(sc, b.from_id, apps, float(t[-1])))
            if when is not None:
                out.append(f"barrier '{b.id}': the closed receptor '{b.to_id}' rises above "
                           f"{CLOSED_RECEPTOR_FRACTION:.0%} of the donor side's concentration (partition considered) "
                           f"at {_h(when)}; it is no sink, so the apparent lag time and steady flux of the time-lag "
                           "method are biased (sample and replace the receptor fluid, or use a larger volume)")
    sol = sc.substance.solubility
    if not sol or len(t) == 0:
        return tuple(out)
    receivers = {b.to_id for b in sc.barriers}
    for comp in sc.compartments:
        u = np.asarray(result.concentration(comp.id), dtype=float) / comp.partition
        solid = np.asarray(result.solid(comp.id), dtype=float)
        held_solid = np.nonzero(solid > 0)[0]
        if len(held_solid):
            when = float(t[held_solid[0]])
            out.append(f"compartment '{comp.id}': the dose exceeds the solubility there "
                       f"({_conc(sc, sol * comp.partition)}) from {_h(when)} on; up to "
                       f"{_amount(sc, float(solid.max()))} is held as undissolved solid, and only the dissolved part "
                       "moves on")
        if comp.id in receivers and not comp.held:
            when = _first_above(t, u, SINK_FRACTION * sol)
            if when is not None:
                out.append(f"compartment '{comp.id}': the concentration rises above {SINK_FRACTION:.0%} of the "
                           f"solubility there ({_conc(sc, SINK_FRACTION * sol * comp.partition)}) at {_h(when)}; "
                           "from then on it is no longer a sink, which diffusion-cell studies rely on "
                           "(OECD Test Guideline 428): replace the receptor fluid more often or use a larger volume")
    return tuple(out)
