"""Random valid networks for the property tests and the reliability sweep (invented scenarios).

:func:`random_scenario` builds a scenario from a :class:`random.Random`: hypothesis hands one in
(``st.randoms()``, so its draws are recorded, replayed and shrunk) and
``tests/benchmarks/reliability_sweep.py`` a seeded one. Every scenario it returns is valid; the
draws span the documented plausible ranges of the fields (``barrierflow.model.PLAUSIBLE``) on a
log scale, with the shapes users build: isolated compartments, held reservoirs and sinks,
chains, stars and loops of barriers, exchanges and one-way transfers, steady barriers,
degrading layers, saturable elimination and every dose kind.
"""

from __future__ import annotations

import math
import random

from barrierflow import Barrier, Compartment, Dose, Exchange, Layer, Scenario, ScenarioError, Transfer

H = 3600.0  # s per h: diffusivities below are drawn in cm^2/s and stored in cm^2/h


def _log(rng: random.Random, lo: float, hi: float) -> float:
    return math.exp(rng.uniform(math.log(lo), math.log(hi)))


def _layer(rng: random.Random, small_grid: bool, default_grid: bool = False) -> Layer:
    deg = 0.0 if rng.random() < 0.7 else _log(rng, 1e-3, 10.0)
    cells = rng.randint(2, 8) if small_grid else (None if rng.random() < 0.8 else rng.randint(2, 30))
    if default_grid:
        cells = None
    return Layer(thickness=_log(rng, 1e-4, 0.2), diffusivity=_log(rng, 1e-12, 1e-5) * H,
                 partition=_log(rng, 0.01, 100.0), cells=cells, degradation_rate=deg)


def _compartment(rng: random.Random, i: int, prefix: str = "") -> Compartment:
    if rng.random() < 0.15:
        return Compartment(f"{prefix}c{i}", held_concentration=0.0 if rng.random() < 0.5 else _log(rng, 1e-3, 10.0),
                           partition=_log(rng, 0.1, 10.0))
    mm = {}
    if rng.random() < 0.1:
        mm = {"vmax": _log(rng, 1e-3, 10.0), "km": _log(rng, 1e-5, 1.0)}
    return Compartment(f"{prefix}c{i}", volume=_log(rng, 1e-3, 1e5),
                       initial_concentration=0.0 if rng.random() < 0.5 else _log(rng, 1e-3, 10.0),
                       partition=_log(rng, 0.1, 10.0),
                       clearance=0.0 if rng.random() < 0.6 else _log(rng, 1e-2, 1e5), **mm)


def _dose(rng: random.Random, target: str, duration: float, few: bool = False) -> Dose:
    kind = rng.choice(("bolus", "infusion", "hold", "replace", "remove"))
    at = rng.uniform(0.0, duration) if rng.random() < 0.7 else 0.0
    every = None
    count = None
    if rng.random() < 0.3:
        every = _log(rng, duration / (4 if few else 20), duration)
        count = rng.randint(2, 5) if rng.random() < 0.5 else None
    kw: dict = {}
    if kind == "bolus":
        kw["amount"] = _log(rng, 1e-3, 100.0)
    elif kind == "infusion":
        kw["rate"] = _log(rng, 1e-3, 100.0)
        kw["duration"] = _log(rng, duration / 100, duration)
    elif kind == "hold":
        kw["concentration"] = _log(rng, 1e-3, 10.0)
        kw["duration"] = min(_log(rng, duration / 100, duration), every or math.inf)
    elif kind == "replace":
        kw["concentration"] = _log(rng, 1e-3, 10.0)
    return Dose(target, kind, at=at, every=every, count=count, **kw)


def random_scenario(rng: random.Random, *, max_comp: int = 6, small_grid: bool = False,
                    linear: bool | None = None, prefix: str = "", duration: float | None = None,
                    default_grid: bool = False, max_barriers: int = 3, min_barriers: int = 0) -> Scenario:
    """A random valid scenario (internal units: cm, h, mg, mL).

    Parameters
    ----------
    rng : random.Random
    max_comp : int
        Most compartments.
    small_grid : bool
        Small and quick (references in CI): every layer 2 to 8 equal cells, at most two doses
        repeated at most about four times, 5 to 40 output steps.
    default_grid : bool
        Every layer on the engine's default grid (no ``cells``); with ``small_grid`` the rest
        stays small.
    max_barriers, min_barriers : int
        Most and fewest barriers (at least two compartments are drawn when ``min_barriers`` > 0).
    linear : bool or None
        True: no saturable elimination; False: at least one compartment has it; None: either.
    prefix : str
        Put in front of every id (to join two random networks into one file).
    duration : float or None, h
        The run's duration (drawn when None).
    """
    for _attempt in range(50):
        n = rng.randint(2 if min_barriers else 1, max_comp)
        comps = [_compartment(rng, i, prefix) for i in range(n)]
        if linear is True:
            comps = [Compartment(c.id, volume=c.volume, initial_concentration=c.initial_concentration,
                                 partition=c.partition, clearance=c.clearance, held_concentration=c.held_concentration)
                     for c in comps]
        elif linear is False and not any(c.vmax for c in comps):
            free = [i for i, c in enumerate(comps) if not c.held]
            if not free:
                continue
            c = comps[free[0]]
            comps[free[0]] = Compartment(c.id, volume=c.volume, initial_concentration=c.initial_concentration,
                                         partition=c.partition, clearance=c.clearance, vmax=_log(rng, 1e-3, 10.0),
                                         km=_log(rng, 1e-5, 1.0))
        ids = [c.id for c in comps]
        with_volume = [c.id for c in comps if c.volume is not None]
        free_ids = [c.id for c in comps if not c.held]
        links: dict[str, list] = {"barriers": [], "exchanges": [], "transfers": []}
        if n >= 2:
            for j in range(rng.randint(min_barriers, max_barriers)):
                a, b = rng.sample(ids, 2)
                layers = tuple(_layer(rng, small_grid, default_grid) for _ in range(rng.randint(1, 3)))
                links["barriers"].append(Barrier(f"{prefix}b{j}", a, b, _log(rng, 0.01, 100.0), layers,
                                                 model="steady" if rng.random() < 0.15 else "resolved"))
            for j in range(rng.randint(0, 2)):
                a, b = rng.sample(ids, 2)
                links["exchanges"].append(Exchange(f"{prefix}x{j}", a, b, _log(rng, 1.0, 1e5)))
            for j in range(rng.randint(0, 2)):
                if not with_volume:
                    break
                a = rng.choice(with_volume)
                others = [i for i in ids if i != a]
                links["transfers"].append(Transfer(f"{prefix}t{j}", a, rng.choice(others), _log(rng, 1e-2, 10.0)))
        run = duration if duration is not None else _log(rng, 0.5, 500.0)
        doses = []
        dosable = [i for i in free_ids if i in with_volume]
        for _ in range(rng.randint(0, 2 if small_grid else 3) if dosable else 0):
            doses.append(_dose(rng, rng.choice(dosable), run, few=small_grid))
        output = {}
        if small_grid:
            output["output_step"] = run / rng.randint(5, 40)
        elif rng.random() < 0.3:
            output["output_step"] = _log(rng, run / 300, run / 5)
        try:
            return Scenario(name="random network (invented)", duration=run, compartments=tuple(comps),
                            barriers=tuple(links["barriers"]), exchanges=tuple(links["exchanges"]),
                            transfers=tuple(links["transfers"]), doses=tuple(doses), **output)
        except ScenarioError:
            continue  # a regimen the format refuses (a dose inside a hold, say): draw again
    raise RuntimeError("no valid scenario in 50 draws")
