"""The reference benchmark of the project's benchmark contract, with its two baselines.

Runs the fixed problem ("patch to body", scenarios/benchmark_patch.toml, an invented scenario)
and its variants (20, 50 and 200 cells per layer, a 0.1 mL finite dose, saturable
elimination) through the product's real path -- ``barrierflow.load`` + ``simulate`` +
``Result.to_csv`` (the traces CSV and its sidecar, written to disk) -- and, in the same run on the
same machine:

* baseline 1, what a capable user writes by hand: the same discretisation with
  ``scipy.integrate.solve_ivp(method="BDF")``, a numpy-vectorised right-hand side, an analytic
  sparse Jacobian, rtol 1e-6, restarting at each dose;
* baseline 2, the strongest scipy set-up: LSODA with a banded Jacobian and a numba-compiled
  right-hand side;
* the reference: scipy Radau, rtol 1e-11, analytic Jacobian, on the same grid.

Both baselines and the reference are written here, from the numbers of the contract, and
checked to be the same discretisation as the product's (their right-hand sides agree to
rounding). For each it prints the median and the minimum wall time over repeated runs after a
warm-up, the steps taken, the errors against the reference (central concentration relative to
its peak, cumulative amount absorbed relative to its final value; the contract asks 1e-5 and
1e-6) and the ratios; the parts of the file-to-traces path (reading, simulating, the CSV text, the
sidecar, the writing). Then the warm start (new processes), the first-ever compile time, a
population of 1,000 subjects and the memory per subject of a population study asked for metrics
and bands only (new processes); the targets table; and the first use from an empty cache: the set-up (``barrierflow
prepare``) and the first result after it, of a run and of the dashboard (``--cold``: the same from
a fresh clone, installation included). Speed is judged on ratios: absolute times are noisy on a shared
2-core machine.

A full run writes what it printed to ``tests/benchmarks/LAST_RUN.md`` (generated: date, commit,
machine, load average at the start and the end, versions), replacing the previous run's;
``--quick`` and ``--only`` runs print only.

Usage: ``make bench`` or ``.venv/bin/python tests/benchmarks/run_benchmark.py [--quick]``;
``make bench-cold`` (``--cold``) for the first use from a fresh clone.
"""

from __future__ import annotations

import argparse
import datetime
import gc
import os
import platform
import random
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import scipy
import scipy.sparse as sp
from numba import njit
from scipy.integrate import BDF, LSODA, Radau, solve_ivp

import barrierflow as bf
from barrierflow import units
from barrierflow.engine import integrator_from_name

ROOT = Path(__file__).resolve().parents[2]
SCENARIO = ROOT / "scenarios" / "benchmark_patch.toml"
LAST_RUN = Path(__file__).resolve().parent / "LAST_RUN.md"
H = 3600.0  # s per h

STAR = "star of 64"
CELLS_800 = "800 cells"
NEAR_EVENT = "200 cells, an output 0.36 s after a dose"

CENTRAL_TOL = 1e-5   # of the peak central concentration, at every output time (the contract)
ABSORBED_TOL = 1e-6  # of the final cumulative amount absorbed (the contract)


# ---------------------------------------------------------------- the problem, by hand
@dataclass(frozen=True)
class Variant:
    """One variant of the reference problem."""

    label: str
    cells: int | tuple[int, int, int] = 50
    patch_volume_ml: float = 1.0
    saturable: bool = False
    extra_times: tuple[float, ...] = ()  # output times (h) added to the grid of every 10 min

    @property
    def layer_cells(self) -> tuple[int, int, int]:
        """Cells of the three layers."""
        return (self.cells,) * 3 if isinstance(self.cells, int) else self.cells

    @property
    def total_cells(self) -> int:
        return sum(self.layer_cells)

    def grid(self) -> np.ndarray:
        """The output times, h: every 10 min over 7 days, and the extra times."""
        return np.union1d(np.arange(1009) * (1.0 / 6.0), np.asarray(self.extra_times, dtype=float))

    def toml(self, extra: bool = True) -> str:
        """The scenario file of this variant (the reference file with its values changed); without
        ``extra``, on the plain grid of every 10 min."""
        text = SCENARIO.read_text()
        parts = text.split("cells = 50\n")
        text = parts[0] + "".join(f"cells = {n}\n{rest}" for n, rest in zip(self.layer_cells, parts[1:], strict=True))
        if self.extra_times and extra:
            listed = ", ".join(f'"{t!r} h"' for t in self.grid().tolist())
            text = text.replace('output_step = "10 min"', f"output_times = [{listed}]")
        if self.patch_volume_ml != 1.0:
            text = text.replace('volume = "1 mL"', f'volume = "{self.patch_volume_ml:g} mL"')
        if self.saturable:
            text = text.replace('clearance = "10 L/h"', 'clearance = "10 L/h"\nvmax = "0.1 mg/h"\nkm = "2e-5 mg/mL"')
        return text


class HandModel:
    """The contract's problem discretised by hand, as a user would (internal units cm, h, mg, mL).

    States: [patch, cells of the three layers (equal cells per layer), central, peripheral,
    cumulative amount absorbed into central]. Finite volumes: each cell holds C; between
    neighbours the conductance is area / (w_i / (2 D_i K_i) + w_j / (2 D_j K_j)) acting on C/K.
    """

    def __init__(self, v: Variant):
        self.v_patch, self.v_central, self.v_peri = v.patch_volume_ml, 5000.0, 20000.0
        self.cl, self.q, self.area = 10000.0, 5000.0, 10.0  # mL/h, mL/h, cm^2
        self.vmax, self.km = (0.1, 2e-5) if v.saturable else (0.0, 1.0)  # mg/h, mg/mL
        layers = [(15e-4, 1e-9 * H, 10.0), (100e-4, 1e-6 * H, 1.0), (1000e-4, 1e-6 * H, 1.0)]  # cm, cm^2/h, K
        cells = v.layer_cells
        w = np.concatenate([np.full(n, L / n) for (L, _, _), n in zip(layers, cells, strict=True)])
        d = np.concatenate([np.full(n, D) for (_, D, _), n in zip(layers, cells, strict=True)])
        k = np.concatenate([np.full(n, K) for (_, _, K), n in zip(layers, cells, strict=True)])
        self.nx = nx = len(w)
        half = w / (2 * d * k)
        self.k = k
        self.g_in = self.area / half[0]
        self.g = self.area / (half[:-1] + half[1:])
        self.g_out = self.area / half[-1]
        self.cap = self.area * w
        self.n = nx + 4
        self.ic, self.ip, self.ia = nx + 1, nx + 2, nx + 3
        self.jac_const = self._jacobian(np.zeros(self.n))

    def y0(self) -> np.ndarray:
        y = np.zeros(self.n)
        y[0] = 10.0
        return y

    def rhs(self, t: float, y: np.ndarray) -> np.ndarray:
        """Numpy-vectorised right-hand side."""
        nx, ic, ip = self.nx, self.ic, self.ip
        u = y[1:nx + 1] / self.k
        f_in = self.g_in * (y[0] - u[0])
        f = self.g * (u[:-1] - u[1:])
        f_out = self.g_out * (u[-1] - y[ic])
        net = np.empty(nx)
        net[0] = f_in
        net[1:] = f
        net[:-1] -= f
        net[-1] -= f_out
        ex = self.q * (y[ic] - y[ip])
        c = y[ic]
        mm = self.vmax * c / (self.km + abs(c))
        out = np.empty(self.n)
        out[0] = -f_in / self.v_patch
        out[1:nx + 1] = net / self.cap
        out[ic] = (f_out - self.cl * c - mm - ex) / self.v_central
        out[ip] = ex / self.v_peri
        out[self.ia] = f_out
        return out

    def _jacobian(self, y: np.ndarray) -> sp.csc_matrix:
        nx, ic, ip, ia = self.nx, self.ic, self.ip, self.ia
        r, c, v = [], [], []

        def add(i, j, x):
            r.append(i)
            c.append(j)
            v.append(x)

        k, cap = self.k, self.cap
        add(0, 0, -self.g_in / self.v_patch)
        add(0, 1, self.g_in / k[0] / self.v_patch)
        add(1, 0, self.g_in / cap[0])
        add(1, 1, -self.g_in / k[0] / cap[0])
        i = np.arange(nx - 1)
        a, b = 1 + i, 2 + i
        for rows_, cols_, vals_ in ((a, a, -self.g / k[i] / cap[i]), (a, b, self.g / k[i + 1] / cap[i]),
                                    (b, a, self.g / k[i] / cap[i + 1]), (b, b, -self.g / k[i + 1] / cap[i + 1])):
            r.extend(rows_.tolist())
            c.extend(cols_.tolist())
            v.extend(vals_.tolist())
        add(nx, nx, -self.g_out / k[-1] / cap[-1])
        add(nx, ic, self.g_out / cap[-1])
        add(ic, nx, self.g_out / k[-1] / self.v_central)
        dmm = self.vmax * self.km / (self.km + abs(y[ic])) ** 2
        add(ic, ic, (-self.g_out - self.cl - self.q - dmm) / self.v_central)
        add(ic, ip, self.q / self.v_central)
        add(ip, ic, self.q / self.v_peri)
        add(ip, ip, -self.q / self.v_peri)
        add(ia, nx, self.g_out / k[-1])
        add(ia, ic, -self.g_out)
        return sp.csc_matrix((v, (r, c)), shape=(self.n, self.n))

    def jac(self, t: float, y: np.ndarray):
        """Analytic sparse Jacobian (constant unless the elimination is saturable)."""
        return self._jacobian(y) if self.vmax else self.jac_const

    # banded form for LSODA: lower bandwidth 3 (the absorbed amount depends on the last cell), upper 1
    LBAND, UBAND = 3, 1

    def jac_banded(self, t: float, y: np.ndarray) -> np.ndarray:
        jd = self.jac(t, y).toarray()
        lb, ub = self.LBAND, self.UBAND
        out = np.zeros((lb + ub + 1, self.n))
        for d in range(-lb, ub + 1):
            diag = np.diagonal(jd, offset=d)
            if d >= 0:
                out[ub - d, d:] = diag
            else:
                out[ub - d, :d] = diag
        return out

    def rhs_numba(self):
        """A numba-compiled right-hand side with the arrays bound (baseline 2)."""
        args = (self.k, self.g_in, self.g, self.g_out, self.cap, self.v_patch, self.v_central, self.v_peri, self.cl,
                self.q, self.vmax, self.km)
        return lambda t, y: _rhs_numba(y, *args)

    def run(self, method: str, rtol: float, atol, rhs=None, jac=None, times=None, **kw):
        """Integrate dose interval by dose interval (restarting at each dose); states at ``times``."""
        rhs = rhs or self.rhs
        jac = jac or self.jac
        out = np.empty((len(times), self.n))
        y = self.y0()
        for k in range(7):
            t0, t1 = 24.0 * k, 24.0 * (k + 1)
            if k > 0:
                y[0] = 10.0  # replace: a fresh patch at 10 mg/mL
            sel = np.flatnonzero((times >= t0) & ((times < t1) | (k == 6)))
            te = times[sel]
            t_eval = te if te[-1] == t1 else np.append(te, t1)
            sol = solve_ivp(rhs, (t0, t1), y, method=method, t_eval=t_eval, rtol=rtol, atol=atol, jac=jac, **kw)
            if sol.status != 0:
                raise RuntimeError(f"{method} failed: {sol.message}")
            out[sel] = sol.y.T[: len(te)]
            y = sol.y[:, -1].copy()
        return out

    def count_steps(self, method: str, rtol: float, atol, rhs=None, jac=None, **kw) -> int:
        """Steps the same solver takes over the run (an untimed pass through its step loop)."""
        cls = {"BDF": BDF, "LSODA": LSODA, "Radau": Radau}[method]
        rhs = rhs or self.rhs
        jac = jac or self.jac
        y = self.y0()
        steps = 0
        for k in range(7):
            if k > 0:
                y[0] = 10.0
            s = cls(rhs, 24.0 * k, y, 24.0 * (k + 1), rtol=rtol, atol=atol, jac=jac, **kw)
            while s.status == "running":
                s.step()
                steps += 1
            y = s.y.copy()
        return steps


@njit(cache=False)
def _rhs_numba(y, k, g_in, g, g_out, cap, v_patch, v_central, v_peri, cl, q, vmax, km):
    nx = k.shape[0]
    ic, ip, ia = nx + 1, nx + 2, nx + 3
    out = np.empty(nx + 4)
    f_prev = g_in * (y[0] - y[1] / k[0])
    out[0] = -f_prev / v_patch
    for i in range(nx - 1):
        f = g[i] * (y[1 + i] / k[i] - y[2 + i] / k[i + 1])
        out[1 + i] = (f_prev - f) / cap[i]
        f_prev = f
    f_out = g_out * (y[nx] / k[nx - 1] - y[ic])
    out[nx] = (f_prev - f_out) / cap[nx - 1]
    ex = q * (y[ic] - y[ip])
    c = y[ic]
    out[ic] = (f_out - cl * c - vmax * c / (km + abs(c)) - ex) / v_central
    out[ip] = ex / v_peri
    out[ia] = f_out
    return out


def check_same_discretisation(hand: HandModel, scenario: bf.Scenario) -> float:
    """Largest relative difference between the product's right-hand side and the hand one."""
    from barrierflow.engine import compile_scenario
    from barrierflow.engine.kernels import rates

    m = compile_scenario(scenario)
    rng = np.random.default_rng(7)
    worst = 0.0
    cells = np.arange(m.n_comp, m.n_dyn)
    for _ in range(3):
        y_hand = rng.random(hand.n) * np.r_[10.0, hand.k * 10.0, 1e-4, 1e-4, 1.0]
        y_prod = np.zeros(m.n_state)
        y_prod[0], y_prod[1], y_prod[2] = y_hand[0], y_hand[hand.ic], y_hand[hand.ip]
        y_prod[cells] = y_hand[1:hand.nx + 1]
        out = np.empty(m.n_state)
        rates(y_prod, out, m.arrays, np.zeros(m.n_comp), m.held.copy())
        f = hand.rhs(0.0, y_hand)
        got = np.r_[out[0], out[cells], out[1], out[2], out[m.q_perm]]
        worst = max(worst, float(np.max(np.abs(got - f) / (np.abs(f) + 1e-300 + 1e-12 * np.abs(f).max()))))
    return worst


# ---------------------------------------------------------------- timing
@dataclass
class Timing:
    """Wall times (s) of repeated runs after a warm-up."""

    times: list[float] = field(default_factory=list)

    @property
    def median(self) -> float:
        return statistics.median(self.times)

    @property
    def best(self) -> float:
        return min(self.times)


@dataclass
class Row:
    variant: str
    path: str
    timing: Timing
    steps: int | str
    central_err: float
    absorbed_err: float
    total: Timing | None = None  # file to traces (product rows)

    @property
    def accurate(self) -> bool:
        return self.central_err <= CENTRAL_TOL and self.absorbed_err <= ABSORBED_TOL


def errors(central: np.ndarray, absorbed: np.ndarray, ref: np.ndarray, hand: HandModel) -> tuple[float, float]:
    c_ref, a_ref = ref[:, hand.ic], ref[:, hand.ia]
    return (float(np.max(np.abs(central - c_ref)) / np.max(c_ref)),
            float(np.max(np.abs(absorbed - a_ref)) / a_ref[-1]))


def time_rounds(runners: dict, quick: bool) -> tuple[dict, dict[str, Timing], dict[str, Timing]]:
    """Time each runner (a callable returning engine seconds, total seconds and its output) over
    rounds after a warm-up; returns the last outputs and the engine and total timings."""
    last = {k: f() for k, f in runners.items()}  # warm-up
    # rounds: every runner once per round, in a new shuffled order each round (seeded), so that the
    # load of a shared machine falls on all of them alike and no runner always follows the same
    # one (a rotation kept the cyclic order: the default always ran right after the LSODA baseline
    # and took 3x its time there); at least 5 rounds (3 with --quick), up to 15 within ~12 s
    eng = {k: Timing() for k in runners}
    tot = {k: Timing() for k in runners}
    keys = list(runners)
    min_rounds, budget = (3, 2.0) if quick else (5, 12.0)
    spent, rnd = 0.0, 0
    while rnd < min_rounds or (spent < budget and rnd < 15):
        order = random.Random(rnd).sample(keys, len(keys))
        for k in order:
            # as timeit does: the collector off during a timed call (so no runner pays for another's
            # garbage), and no collection forced before it (a full collection right before a call
            # evicts the caches and made the sub-millisecond product calls up to 5x slower)
            gc.disable()
            try:
                e_t, t_t, last[k] = runners[k]()
            finally:
                gc.enable()
            eng[k].times.append(e_t)
            tot[k].times.append(t_t)
            spent += t_t
        rnd += 1
    return last, eng, tot


def file_to_traces(path: Path, traces: Path, integ) -> tuple[float, float, object]:
    """One timed run of the product's whole path, as `barrierflow run` takes it.

    Read the file, simulate, write the traces CSV and its sidecar (both complete on disk, then
    renamed into place). Every value of the file is read again (the memo of whole value texts is
    emptied); the unit texts, which a process reads once, stay known (a process's first file:
    file_to_traces_parts). Returns (engine seconds, file-to-traces seconds, the Result).
    """
    units._PARSED.clear()
    t_a = time.perf_counter()
    s = bf.load(path)
    t_b = time.perf_counter()
    r = bf.simulate(s, integrator=integ)
    t_c = time.perf_counter()
    r.to_csv(traces)
    return t_c - t_b, time.perf_counter() - t_a, r


def run_variant(v: Variant, paths: list[str], quick: bool, tmp: Path) -> list[Row]:
    hand = HandModel(v)
    path = tmp / f"bench_{v.total_cells}_{v.patch_volume_ml:g}_{int(v.saturable)}_{len(v.extra_times)}.toml"
    path.write_text(v.toml())
    plain = tmp / f"{path.stem}_plain.toml"  # without the extra output times
    plain.write_text(v.toml(extra=False))
    scenario = bf.load(path)
    times = np.asarray(scenario.output_grid(), dtype=float)
    diff = check_same_discretisation(hand, scenario)
    if diff > 1e-10:
        raise SystemExit(f"{v.label}: the hand discretisation differs from the product's by {diff:.2e}")
    t0 = time.perf_counter()
    ref = hand.run("Radau", 1e-11, 1e-16, times=times)
    print(f"  {v.label}: same discretisation (right-hand sides agree to {diff:.1e}); "
          f"Radau rtol 1e-11 reference in {time.perf_counter() - t0:.1f} s", flush=True)
    atol_b = 1e-10
    f_nb = hand.rhs_numba()
    lsoda_kw = dict(rhs=f_nb, jac=hand.jac_banded, lband=HandModel.LBAND, uband=HandModel.UBAND)

    traces = tmp / f"{path.stem}.csv"

    def product(integ, path=path):
        return file_to_traces(path, traces, integ)

    def baseline(method, **kw):
        t_a = time.perf_counter()
        out = hand.run(method, 1e-6, atol_b, times=times, **kw)
        dt = time.perf_counter() - t_a
        return dt, dt, out

    integrators = {name: None if name == "default" else integrator_from_name(name) for name in paths}
    runners = {f"product {name}": (lambda integ=integ: product(integ)) for name, integ in integrators.items()}
    if v.extra_times:  # the same default run without the extra output times, in the same rounds
        runners["product default, grid only"] = lambda: product(None, plain)
    runners["baseline BDF (solve_ivp, sparse J)"] = lambda: baseline("BDF")
    runners["baseline LSODA (banded J, numba f)"] = lambda: baseline("LSODA", **lsoda_kw)
    last, eng, tot = time_rounds(runners, quick)
    keys = list(runners)
    rows = []
    for k in keys:
        if k.startswith("product"):
            r = last[k]
            rows_ref = ref if len(r.times) == len(times) else ref[
                np.any(np.abs(times[:, None] - np.asarray(r.times)[None, :]) < 1e-9, axis=1)]
            ce, ae = errors(r.concentration("central"), r.permeated("skin") * hand.area, rows_ref, hand)
            label = k + (f" ({r.integrator})" if k.endswith("default") else "")
            rows.append(Row(v.label, label, eng[k], r.stats["steps"], ce, ae, tot[k]))
        else:
            out = last[k]
            ce, ae = errors(out[:, hand.ic], out[:, hand.ia], ref, hand)
            steps = (hand.count_steps("BDF", 1e-6, atol_b) if "BDF" in k else
                     hand.count_steps("LSODA", 1e-6, atol_b, rhs=f_nb, jac=hand.jac_banded, lband=HandModel.LBAND,
                                      uband=HandModel.UBAND))
            rows.append(Row(v.label, k, eng[k], steps, ce, ae))
    return rows


# ---------------------------------------------------------------- a star of barriers
def star_toml(n_barriers: int, cells: int | None = None, transfer: bool = False) -> str:
    """The reference problem's patch repeated around one body (an invented scenario): ``n_barriers``
    patches of 1 mL at 10 mg/mL, each on its own three-layer skin site (the reference layers, their
    thicknesses and the middle layer's diffusivity varied by up to 1.5x, the areas summing to about
    the reference's 10 cm^2; ``cells`` per layer, or the engine's default grid) into the central
    compartment of the two-compartment body, each patch replaced every 24 h; with ``transfer`` a
    one-way return from the peripheral compartment to the central one (0.1 1/h)."""
    out = [f'''[scenario]
name = "benchmark: {n_barriers} patches around one body compartment"
description = "Invented scenario for the speed benchmark. Not for clinical use."
duration = "7 d"
output_step = "10 min"

[[compartment]]
id = "central"
volume = "5 L"
clearance = "10 L/h"

[[compartment]]
id = "peripheral"
volume = "20 L"

[[exchange]]
from = "central"
to = "peripheral"
flow = "5 L/h"
''']
    if transfer:
        out.append('\n[[transfer]]\nfrom = "peripheral"\nto = "central"\nrate = "0.1 1/h"\n')
    grid = "" if cells is None else f"\n  cells = {cells}"
    for i in range(n_barriers):
        f = 1.0 + 0.05 * ((i * 37) % 11)
        out.append(f'''
[[compartment]]
id = "patch{i}"
volume = "1 mL"
initial_concentration = "10 mg/mL"

[[barrier]]
id = "skin{i}"
from = "patch{i}"
to = "central"
area = "{10 / n_barriers * f:.4g} cm^2"
  [[barrier.layer]]
  thickness = "{15 * f:.4g} um"
  diffusivity = "1e-9 cm^2/s"
  partition = 10{grid}
  [[barrier.layer]]
  thickness = "100 um"
  diffusivity = "{1e-6 / f:.4g} cm^2/s"{grid}
  [[barrier.layer]]
  thickness = "{1000 / f:.4g} um"
  diffusivity = "1e-6 cm^2/s"{grid}

[[dose]]
target = "patch{i}"
kind = "replace"
concentration = "10 mg/mL"
at = "24 h"
every = "24 h"
count = 6
''')
    return "".join(out)


class NetworkHand:
    """A linear network, by hand: ``dy/dt = J y`` with the sparse matrix J assembled from the
    product's compiled model (the same discretisation; :func:`check_linear` compares J y with the
    product's own rates), the patches' replacements applied between restarts, as
    :class:`HandModel` does. Its BDF run is baseline 1 (a numpy sparse product as the right-hand
    side, J as the analytic Jacobian); LSODA's banded Jacobian does not apply (a star is not
    banded in any order), so there is no baseline 2."""

    def __init__(self, scenario: bf.Scenario):
        from barrierflow.engine import compile_scenario
        from barrierflow.engine.kernels import jacobian_coo, jacobian_size

        m = compile_scenario(scenario)
        size = jacobian_size(m)
        r, c, v = np.zeros(size, dtype=np.int64), np.zeros(size, dtype=np.int64), np.zeros(size)
        k = jacobian_coo(np.zeros(m.n_state), r, c, v, m.arrays, m.held.copy())
        self.model = m
        self.n = m.n_state
        self.jac_const = sp.csr_matrix((v[:k], (r[:k], c[:k])), shape=(self.n, self.n))
        self.patches = np.array([i for i, cid in enumerate(m.comp_ids) if cid.startswith("patch")])
        self.ic = m.comp_index["central"]
        self.perm = slice(m.q_perm, m.q_perm + m.n_bar)

    def check_linear(self) -> float:
        """Largest relative difference between J y and the product's rates, over random states."""
        from barrierflow.engine.kernels import rates

        m = self.model
        rng = np.random.default_rng(7)
        worst = 0.0
        for _ in range(3):
            y = rng.random(self.n) * m.scale
            out = np.empty(self.n)
            rates(y, out, m.arrays, np.zeros(m.n_comp), m.held.copy())
            f = self.jac_const @ y
            worst = max(worst, float(np.max(np.abs(out - f)) / np.max(np.abs(f))))
        return worst

    def rhs(self, t: float, y: np.ndarray) -> np.ndarray:
        return self.jac_const @ y

    def jac(self, t: float, y: np.ndarray):
        return self.jac_const

    def run(self, method: str, rtol: float, atol, times: np.ndarray) -> np.ndarray:
        """Integrate day by day, the patches replaced at each restart; states at ``times``."""
        out = np.empty((len(times), self.n))
        y = self.model.y0.copy()
        for k in range(7):
            t0, t1 = 24.0 * k, 24.0 * (k + 1)
            if k > 0:
                y[self.patches] = 10.0
            sel = np.flatnonzero((times >= t0) & ((times < t1) | (k == 6)))
            te = times[sel]
            t_eval = te if te[-1] == t1 else np.append(te, t1)
            sol = solve_ivp(self.rhs, (t0, t1), y, method=method, t_eval=t_eval, rtol=rtol,
                            atol=atol * self.model.scale, jac=self.jac)
            if sol.status != 0:
                raise RuntimeError(f"{method} failed: {sol.message}")
            out[sel] = sol.y.T[: len(te)]
            y = sol.y[:, -1].copy()
        return out


def run_star(label: str, n_barriers: int, paths: list[str], quick: bool, tmp: Path, cells: int | None = None,
             transfer: bool = False) -> list[Row]:
    """A star of ``n_barriers`` barriers (:func:`star_toml`): the product's paths and baseline 1,
    errors against Radau."""
    path = tmp / f"star_{n_barriers}_{cells}_{int(transfer)}.toml"
    path.write_text(star_toml(n_barriers, cells, transfer))
    scenario = bf.load(path)
    hand = NetworkHand(scenario)
    diff = hand.check_linear()
    if diff > 1e-12:
        raise SystemExit(f"{label}: J y differs from the product's rates by {diff:.2e}")
    times = np.asarray(scenario.output_grid(), dtype=float)
    t0 = time.perf_counter()
    # rtol 1e-9 (its errors near 1e-9, far below the contract's 1e-5 and 1e-6): at 1e-11 the
    # reference of 8,000 states took over 3 minutes
    ref = hand.run("Radau", 1e-9, 1e-13, times)
    print(f"  {label}: {hand.n} states; J y agrees with the product's rates to {diff:.1e}; Radau rtol 1e-9 "
          f"reference in {time.perf_counter() - t0:.1f} s", flush=True)
    c_ref = ref[:, hand.ic]
    a_ref = ref[:, hand.perm].sum(axis=1)

    def errs(central, absorbed):
        return (float(np.max(np.abs(central - c_ref)) / np.max(c_ref)),
                float(np.max(np.abs(absorbed - a_ref)) / a_ref[-1]))

    traces = tmp / f"{path.stem}.csv"

    def product(integ):
        return file_to_traces(path, traces, integ)

    def baseline():
        t_a = time.perf_counter()
        out = hand.run("BDF", 1e-6, 1e-10, times)
        dt = time.perf_counter() - t_a
        return dt, dt, out

    integrators = {name: None if name == "default" else integrator_from_name(name) for name in paths}
    runners = {f"product {name}": (lambda integ=integ: product(integ)) for name, integ in integrators.items()}
    runners["baseline BDF (solve_ivp, sparse J)"] = baseline
    last, eng, tot = time_rounds(runners, quick)
    rows = []
    area = hand.model.area
    for k in runners:
        if k.startswith("product"):
            r = last[k]
            absorbed = sum(r.permeated(f"skin{i}") * area[i] for i in range(n_barriers))
            ce, ae = errs(r.concentration("central"), absorbed)
            name = k + (f" ({r.integrator})" if k.endswith("default") else "")
            rows.append(Row(label, name, eng[k], r.stats["steps"], ce, ae, tot[k]))
        else:
            out = last[k]
            ce, ae = errs(out[:, hand.ic], out[:, hand.perm].sum(axis=1))
            rows.append(Row(label, k, eng[k], "", ce, ae))
    return rows


# ---------------------------------------------------------------- the parts of file to traces
def file_to_traces_parts(tmp: Path, rounds: int) -> dict[str, float]:
    """Median seconds of each part of the product's path on the reference problem (default path).

    Each round: a load with the unit texts known (as every load after a process's first), a load
    with every memo of the units module emptied (a process's first file: each distinct unit text
    is read once by pint), ``simulate``, the CSV text, what the sidecar shows (the metrics, the
    warnings and the ledger, computed once per result), the sidecar text, and the writing of both
    (temporary files flushed to disk, renamed into place); then ``to_csv`` as a whole on a new
    result of the same run, which waits for the CSV's flush to disk in another thread while it
    makes the sidecar's content (so it takes less than the CSV, the sidecar and the writing one
    after the other).
    Rounds alternate with nothing else.
    """
    from barrierflow.io import write_traces

    path = tmp / "parts.toml"
    path.write_text(SCENARIO.read_text())
    target = tmp / "parts.csv"
    bf.load(path).to_toml()
    bf.simulate(bf.load(path)).to_csv(target)  # warm-up
    parts: dict[str, list[float]] = {k: [] for k in ("first_load", "load", "simulate", "csv", "content", "sidecar",
                                                     "write", "to_csv")}
    for _ in range(rounds):
        gc.disable()
        try:
            units.clear_caches()
            t0 = time.perf_counter()
            bf.load(path).to_toml()  # a first file: its values, then the sidecar's units
            t1 = time.perf_counter()
            units._PARSED.clear()
            t2 = time.perf_counter()
            s = bf.load(path)
            t3 = time.perf_counter()
            r = bf.simulate(s)
            t4 = time.perf_counter()
            text = r.csv_text()
            t5 = time.perf_counter()
            r.metrics(), r.warnings(), r.mass_balance
            t5b = time.perf_counter()
            side = r.sidecar_text(text)
            t6 = time.perf_counter()
            write_traces(target, text, side)
            t7 = time.perf_counter()
            r = bf.simulate(s)  # (a new result: nothing of the first one's is reused)
            t8 = time.perf_counter()
            r.to_csv(target)
            t9 = time.perf_counter()
        finally:
            gc.enable()
        for k, v in zip(parts, (t1 - t0, t3 - t2, t4 - t3, t5 - t4, t5b - t5, t6 - t5b, t7 - t6, t9 - t8), strict=True):
            parts[k].append(v)
    return {k: statistics.median(v) for k, v in parts.items()}


# ---------------------------------------------------------------- warm start, compile, population
def _python() -> str:
    return sys.executable


def warm_start(tmp: Path, runs: int) -> dict[str, float]:
    """New processes: import time, barrierflow run (warm cache), first-ever compile (empty cache)."""
    exe = Path(_python()).parent / "barrierflow"
    env = dict(os.environ)
    code = "import time; t = time.perf_counter(); import barrierflow; print(time.perf_counter() - t)"
    imports = [float(subprocess.run([_python(), "-c", code], capture_output=True, text=True, check=True).stdout)
               for _ in range(runs)]
    out = {"import_s": min(imports)}
    cmd = [str(exe), "run", str(SCENARIO), "-o", str(tmp / "warm.csv"), "--no-progress"]
    subprocess.run(cmd, capture_output=True, check=True, env=env)  # make sure the cache is filled
    walls = []
    for _ in range(runs):
        t0 = time.perf_counter()
        subprocess.run(cmd, capture_output=True, check=True, env=env)
        walls.append(time.perf_counter() - t0)
    out["run_warm_s"] = min(walls)
    out["run_warm_median_s"] = statistics.median(walls)
    for label, text in (("reference", SCENARIO.read_text()), ("saturable", Variant("s", saturable=True).toml())):
        f = tmp / f"first_{label}.toml"
        f.write_text(text)
        with tempfile.TemporaryDirectory() as cache:
            env_c = dict(env, NUMBA_CACHE_DIR=cache)
            c = [str(exe), "run", str(f), "-o", str(tmp / f"first_{label}.csv"), "--no-progress"]
            t0 = time.perf_counter()
            subprocess.run(c, capture_output=True, check=True, env=env_c)
            out[f"first_{label}_s"] = time.perf_counter() - t0
            t0 = time.perf_counter()
            subprocess.run(c, capture_output=True, check=True, env=env_c)
            out[f"second_{label}_s"] = time.perf_counter() - t0
    return out


def first_use(tmp: Path, clone: bool, chromium: str | None) -> dict[str, float]:
    """From an empty cache to the first result, in new processes, as a new user meets it.

    Without ``clone``: this installation's ``barrierflow``, with ``NUMBA_CACHE_DIR`` set to new,
    empty folders. With ``clone`` (``--cold``): a fresh clone of this repository's HEAD in a
    temporary folder, set up as ``make run`` sets it up (``make venv``: a virtual environment and
    the package installed, timed as the installation), with its own empty cache in the clone. Then:

    1. for comparison, the first result without the preparation: ``barrierflow run`` of the demo
       (scenarios/daily_patch.toml) with an empty cache, which compiles what the run needs;
    2. the set-up: ``barrierflow prepare`` (its steps timed; the populations step is the
       compile time of the population kernels, the single-run kernels they share being ready);
    3. the first result after the set-up: ``barrierflow run`` of the demo in a new process;
    4. the dashboard: ``barrierflow serve`` of the demo until it answers, then, with chromium,
       the first Run in a browser as soon as the page is ready: from the click to the curves.
    """
    out: dict[str, float] = {}
    env = dict(os.environ)
    env.pop("NUMBA_CACHE_DIR", None)
    if clone:
        src = tmp / "clone"
        subprocess.run(["git", "clone", "--quiet", "--no-hardlinks", str(ROOT), str(src)], check=True)
        t0 = time.perf_counter()
        subprocess.run(["make", "venv"], cwd=src, check=True, capture_output=True, env=env)
        out["install_s"] = time.perf_counter() - t0
        python = src / ".venv" / "bin" / "python"
        prepared_env = env  # the clone's own cache, beside its sources (empty)
    else:
        src = ROOT
        python = Path(_python())
        (tmp / "prepared-cache").mkdir()
        prepared_env = dict(env, NUMBA_CACHE_DIR=str(tmp / "prepared-cache"))
    exe = python.parent / "barrierflow"
    demo = src / "scenarios" / "daily_patch.toml"
    run = [str(exe), "run", str(demo), "-o", str(tmp / "first.csv"), "--no-progress"]
    (tmp / "unprepared-cache").mkdir()
    t0 = time.perf_counter()
    subprocess.run(run, capture_output=True, check=True, cwd=src,
                   env=dict(env, NUMBA_CACHE_DIR=str(tmp / "unprepared-cache")))
    out["unprepared_run_s"] = time.perf_counter() - t0
    code = ("import json, time; t = time.perf_counter(); from barrierflow.studies.prepare import prepare; "
            "r = prepare(); print(json.dumps({'steps': r.steps, 'kernels': r.kernels, 'cold': r.cold, "
            "'total': time.perf_counter() - t}))")
    t0 = time.perf_counter()
    done = subprocess.run([str(python), "-c", code], capture_output=True, text=True, check=True, cwd=src,
                          env=prepared_env)
    out["prepare_s"] = time.perf_counter() - t0
    import json

    report = json.loads(done.stdout.strip().splitlines()[-1])
    out["prepare_single_s"], out["prepare_population_s"], out["prepare_studies_s"] = (t for _, t in report["steps"])
    out["kernels"] = report["kernels"]
    out["cold"] = len(report["cold"])
    walls = []
    for _ in range(3):
        t0 = time.perf_counter()
        subprocess.run(run, capture_output=True, check=True, cwd=src, env=prepared_env)
        walls.append(time.perf_counter() - t0)
    out["prepared_run_s"] = walls[0]
    out["prepared_run_later_s"] = min(walls[1:])
    out.update(_first_dashboard_run(exe, demo, tmp, prepared_env, chromium))
    return out


def _first_dashboard_run(exe: Path, demo: Path, tmp: Path, env: dict[str, str], chromium: str | None) -> dict:
    """Start ``barrierflow serve`` of the demo; seconds until it answers, and the first Run's click to curves."""
    import socket
    import urllib.request

    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    (tmp / "state").mkdir(exist_ok=True)
    t0 = time.perf_counter()
    proc = subprocess.Popen([str(exe), "serve", str(demo), "--host", "127.0.0.1", "--port", str(port)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            env=dict(env, BARRIERFLOW_STATE_DIR=str(tmp / "state")))
    out: dict[str, float] = {}
    try:
        url = f"http://127.0.0.1:{port}/"
        while True:
            if proc.poll() is not None or time.perf_counter() - t0 > 600:
                raise RuntimeError("barrierflow serve did not answer")
            try:
                with urllib.request.urlopen(url + "_dash-layout", timeout=5):
                    break
            except OSError:
                time.sleep(0.1)
        out["serve_s"] = time.perf_counter() - t0
        if chromium and Path(chromium).exists():
            from dashboard_rerun import FINGERPRINT, LAUNCH_ARGS
            from playwright.sync_api import sync_playwright

            with sync_playwright() as p:
                browser = p.chromium.launch(executable_path=chromium, args=LAUNCH_ARGS, headless=True)
                page = browser.new_page(viewport={"width": 1440, "height": 900})
                page.goto(url)
                page.wait_for_selector("#run-button", timeout=60_000)
                page.wait_for_function("() => !document.querySelector('[data-dash-is-loading=\"true\"]')")
                before = page.evaluate(FINGERPRINT)
                t1 = time.perf_counter()
                page.locator("#run-button").click()
                page.wait_for_function(f"(old) => {{ const fp = ({FINGERPRINT})(); return fp && fp !== old; }}",
                                       arg=before, timeout=600_000, polling="raf")
                out["dashboard_run_s"] = time.perf_counter() - t1
                out["dashboard_from_start_s"] = time.perf_counter() - t0
                browser.close()
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
    return out


def report_first_use(fu: dict[str, float], clone: bool, out: Report) -> None:
    where = ("a fresh clone of HEAD, set up as `make run` does" if clone
             else "this installation, numba's cache in new empty folders")
    out(f"first use ({where}):")
    if clone:
        out(f"  installation (make venv: virtual environment, package and extras) {fu['install_s']:.0f} s")
    out(f"  without the preparation: barrierflow run of the demo, compiling as it goes, {fu['unprepared_run_s']:.1f} s")
    out(f"  set-up, barrierflow prepare: {fu['prepare_s']:.0f} s ({fu['kernels']:.0f} kernels, {fu['cold']:.0f} left "
        f"cold; single runs {fu['prepare_single_s']:.0f} s, population kernels {fu['prepare_population_s']:.0f} s, "
        f"studies {fu['prepare_studies_s']:.1f} s)")
    out(f"  after the set-up: barrierflow run of the demo in a new process {fu['prepared_run_s']:.2f} s "
        f"(then {fu['prepared_run_later_s']:.2f} s)")
    line = f"  dashboard: barrierflow serve answers after {fu['serve_s']:.1f} s"
    if "dashboard_run_s" in fu:
        line += (f"; the first Run, clicked as soon as the page is ready: {fu['dashboard_run_s']:.2f} s from the "
                 f"click to the curves ({fu['dashboard_from_start_s']:.1f} s from the start of the server)")
    else:
        line += "; no chromium, the first Run in a browser not measured"
    out(line)


POPULATION_VARIED = ("barrier 'skin' layer 1 diffusivity", "barrier 'skin' layer 1 partition",
                     "barrier 'skin' layer 1 thickness", "barrier 'skin' layer 2 diffusivity",
                     "barrier 'skin' layer 2 thickness", "barrier 'skin' layer 3 diffusivity",
                     "barrier 'skin' layer 3 thickness", "barrier 'skin' area", "compartment 'central' volume",
                     "compartment 'central' clearance", "compartment 'peripheral' volume",
                     "exchange 'exchange_1' flow")


def population(n: int, runs: int) -> dict[str, float]:
    s = bf.load(SCENARIO)
    var = dict.fromkeys(POPULATION_VARIED, 0.3)
    bf.simulate_population(s, var, 4, seed=1)  # warm-up
    walls = []
    pop = None
    for _ in range(runs):
        t0 = time.perf_counter()
        pop = bf.simulate_population(s, var, n, seed=1)
        walls.append(time.perf_counter() - t0)
    # spot check: subject 0 against a single run of the same subject
    from barrierflow.engine.population import sample_scenarios

    subjects, _ = sample_scenarios(s, var, n, seed=1)
    single = bf.simulate(subjects[0]).concentration("central")
    err = float(np.max(np.abs(pop.concentration("central")[0] - single)) / np.max(single))
    # the same population on the compiled RODAS4 path (what a nonlinear model would take)
    rodas = integrator_from_name("rodas")
    bf.simulate_population(s, var, 4, seed=1, integrator=rodas)  # warm-up
    walls_r = []
    for _ in range(max(1, runs - 1)):
        t0 = time.perf_counter()
        pop_r = bf.simulate_population(s, var, n, seed=1, integrator=rodas)
        walls_r.append(time.perf_counter() - t0)
    return {"n": n, "best_s": min(walls), "median_s": statistics.median(walls), "failed": int((pop.status != 0).sum()),
            "check": err, "integrator": pop.integrator, "threads": int(__import__("numba").get_num_threads()),
            "rodas_best_s": min(walls_r), "rodas_failed": int((pop_r.status != 0).sum())}


_MEMORY_CHILD = """
import json, sys
import barrierflow as bf
from barrierflow.studies import run_population
n, vary = int(sys.argv[1]), json.loads(sys.argv[2])
r = run_population(bf.load(sys.argv[3]), n, seed=1, vary=vary)
with open("/proc/self/status") as fh:  # the peak of this process's own memory
    peak = next(int(line.split()[1]) for line in fh if line.startswith("VmHWM:")) / 1024
print(json.dumps({"n": n, "peak_mb": peak, "failed": r.n_failed, "chunk": r.chunk}))
"""


def population_memory(n: int) -> dict[str, float]:
    """Memory per subject when only metrics and bands are asked for: the peak resident set of a new
    process running ``run_population`` of ``n`` subjects of the benchmark patch (the population
    case's variability, no per-subject output) above that of a process running one subject,
    divided by ``n``."""
    import json

    s = bf.load(SCENARIO)
    from barrierflow.model.paths import parse_param

    vary = json.dumps([f"{parse_param(p, s).text}=lognormal:cv=0.3" for p in POPULATION_VARIED])
    peaks = {}
    for k in (1, n):
        proc = subprocess.run([_python(), "-c", _MEMORY_CHILD, str(k), vary, str(SCENARIO)], capture_output=True,
                              text=True, check=True)
        peaks[k] = json.loads(proc.stdout.strip().splitlines()[-1])
    return {"n": n, "one_mb": peaks[1]["peak_mb"], "peak_mb": peaks[n]["peak_mb"], "chunk": peaks[n]["chunk"],
            "per_subject_mb": (peaks[n]["peak_mb"] - peaks[1]["peak_mb"]) / n, "failed": peaks[n]["failed"]}


# ---------------------------------------------------------------- report
@dataclass
class Target:
    """One row of the targets table: a case, what this run measured, the target, and whether it holds."""

    case: str
    measured: str
    target: str
    met: bool


def print_targets(rows: list[Target], out: Report) -> None:
    """The targets table (case | measured | target | met?)."""
    if not rows:
        return
    width = max(len(r.case) for r in rows)
    mwidth = max(len(r.measured) for r in rows)
    out(f"  {'case':<{width}} | {'measured':<{mwidth}} | target      | met?")
    for r in rows:
        out(f"  {r.case:<{width}} | {r.measured:<{mwidth}} | {r.target:<11} | {'yes' if r.met else 'NO'}")


def cpu_name() -> str:
    cpu = platform.processor() or "?"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return cpu


def versions() -> str:
    import numba

    return (f"Python {platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}, "
            f"numba {numba.__version__}")


def load_average() -> str:
    """The load average over 1, 5 and 15 minutes (on 2 cores, above 2 means others are waiting)."""
    return " / ".join(f"{x:.2f}" for x in os.getloadavg())


def commit() -> str:
    """The commit the code comes from, and whether the working tree differs from it."""
    try:
        head = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "--short", "HEAD"], capture_output=True,
                              text=True, check=True).stdout.strip()
        dirty = subprocess.run(["git", "-C", str(ROOT), "status", "--porcelain", "--untracked-files=no"],
                               capture_output=True, text=True, check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "unknown"
    return head + (" with local changes" if dirty else "")


class Report:
    """What the benchmark prints, kept to be written to :data:`LAST_RUN`."""

    def __init__(self) -> None:
        self.lines: list[str] = []

    def __call__(self, text: str = "") -> None:
        print(text, flush=True)
        self.lines.extend(text.split("\n"))

    def write(self, head: list[str]) -> None:
        text = "\n".join([*head, "", "```", *self.lines, "```", ""])
        tmp = LAST_RUN.with_name(f".{LAST_RUN.name}.{os.getpid()}.tmp")
        tmp.write_text(text)
        os.replace(tmp, LAST_RUN)


def print_table(rows: list[Row], out: Report) -> None:
    by_variant: dict[str, list[Row]] = {}
    for r in rows:
        by_variant.setdefault(r.variant, []).append(r)
    head = ("| variant | path | engine median ms | engine min ms | file-to-traces median ms | file / engine | steps "
            "| central err | absorbed err | accurate | BDF / this | LSODA / this |")
    out(head)
    out("|" + "---|" * 12)
    for variant, rs in by_variant.items():
        bdf = next(r for r in rs if r.path.startswith("baseline BDF"))
        ls = next((r for r in rs if r.path.startswith("baseline LSODA")), None)  # none for a star
        for r in rs:
            tot = f"{r.total.median * 1e3:.1f}" if r.total else ""
            per = f"{r.total.median / r.timing.median:.1f}" if r.total else ""
            ratio = f"{bdf.timing.median / r.timing.median:.1f}"
            ratio_l = f"{ls.timing.median / r.timing.median:.1f}" if ls else "n/a"
            if r.total:
                ratio += f" ({bdf.timing.median / r.total.median:.1f})"
                ratio_l += f" ({ls.timing.median / r.total.median:.1f})" if ls else ""
            out(f"| {variant} | {r.path} | {r.timing.median * 1e3:.2f} | {r.timing.best * 1e3:.2f} | {tot} | {per} | "
                  f"{r.steps} | {r.central_err:.1e} | {r.absorbed_err:.1e} | {'yes' if r.accurate else 'NO'} | "
                  f"{ratio} | {ratio_l} |")


# ---------------------------------------------------------------- targets
def _ratio(a: Row | None, b: Row | None) -> float | None:
    """a's median time over b's (None when either is missing)."""
    return a.timing.median / b.timing.median if a and b else None


def targets(rows: list[Row], ws: dict | None, fu: dict | None, pop: dict | None, mem: dict | None) -> list[Target]:
    """The targets of the runs made (a case whose runs were left out has no row). Add a row here
    for each new target: a :class:`Target` from the rows, the warm start, the first use or the
    population."""
    def get(variant, prefix):
        return next((r for r in rows if r.variant == variant and r.path.startswith(prefix)), None)

    out: list[Target] = []

    def speed(case, fast, slow, at_least, accurate=True):
        q = _ratio(slow, fast)
        if q is not None:
            out.append(Target(case, f"{q:.1f}x" + ("" if accurate and fast.accurate else " (NOT accurate)"),
                              f">= {at_least:g}x", q >= at_least and fast.accurate))

    v50 = "50 cells"
    speed("reference, 50 cells, default vs BDF", get(v50, "product default"), get(v50, "baseline BDF"), 200)
    speed("reference, 50 cells, RODAS4 vs BDF", get(v50, "product rodas"), get(v50, "baseline BDF"), 30)
    speed("reference, 50 cells, RODAS4 vs LSODA", get(v50, "product rodas"), get(v50, "baseline LSODA"), 6)
    speed("reference, 50 cells, exact vs BDF", get(v50, "product exact"), get(v50, "baseline BDF"), 100)
    for p in ("product rodas", "product exact"):
        g = _ratio(get("200 cells", p), get(v50, p))
        if g is not None:
            out.append(Target(f"{p[8:]}: 200 cells / 50 cells", f"{g:.1f}x", "<= 5x", g <= 5))
    speed(f"{STAR}, default vs BDF", get(STAR, "product default"), get(STAR, "baseline BDF"), 10)
    speed(f"{CELLS_800}, default vs LSODA", get(CELLS_800, "product default"), get(CELLS_800, "baseline LSODA"), 30)
    near, plain = get(NEAR_EVENT, "product default ("), get(NEAR_EVENT, "product default, grid only")
    g = _ratio(near, plain)
    if g is not None:
        out.append(Target("an output 0.36 s after a dose, 200 cells: default / without it", f"{g:.2f}x", "<= 1.5x",
                          g <= 1.5 and near.accurate))
    # the default's choice: within 1.3x of the fastest accurate product path of each case
    for variant in dict.fromkeys(r.variant for r in rows):
        dflt = get(variant, "product default (")
        paths = [r for r in rows if r.variant == variant and r.path.startswith("product") and r.accurate
                 and r is not dflt and "grid only" not in r.path]
        if dflt and paths:
            best = min(paths, key=lambda r: r.timing.median)
            q = dflt.timing.median / best.timing.median
            out.append(Target(f"{variant}: default ({dflt.path.split('(')[-1].rstrip(')')}) / fastest other path "
                              f"({best.path[8:]})", f"{q:.2f}x", "<= 1.3x", q <= 1.3 and dflt.accurate))
    dflt = get(v50, "product default")
    if dflt and dflt.total:
        ratio = dflt.total.median / dflt.timing.median
        out.append(Target("file to traces vs engine alone, 50 cells, default", f"{ratio:.1f}x", "<= 2x", ratio <= 2))
    sat = get("saturable", "product default")
    if sat:
        speed(f"saturable, 50 cells, default ({sat.path[16:].strip(' ()')}) vs BDF", sat,
              get("saturable", "baseline BDF"), 60)
    prod = [r for r in rows if r.path.startswith("product")]
    if prod:
        out.append(Target("every product path, every case run", f"{sum(r.accurate for r in prod)} of {len(prod)} "
                          "accurate", "all accurate", all(r.accurate for r in prod)))
    if ws:
        out.append(Target("barrierflow run in a new process", f"{ws['run_warm_s']:.2f} s", "<= 1.5 s",
                          ws["run_warm_s"] <= 1.5))
        out.append(Target("import barrierflow", f"{ws['import_s'] * 1e3:.0f} ms", "<= 500 ms", ws["import_s"] <= 0.5))
        first = max(ws["first_reference_s"], ws["first_saturable_s"])
        out.append(Target("first-ever compile (reference, saturable variant)", f"{ws['first_reference_s']:.1f} s, "
                          f"{ws['first_saturable_s']:.1f} s", "<= 15 s", first <= 15))
    if fu:
        out.append(Target("first result after set-up (barrierflow run of the demo, new process)",
                          f"{fu['prepared_run_s']:.2f} s", "< 2 s", fu["prepared_run_s"] < 2))
        if "dashboard_run_s" in fu:
            out.append(Target("first dashboard Run after set-up, click to curves", f"{fu['dashboard_run_s']:.2f} s",
                              "< 2 s", fu["dashboard_run_s"] < 2))
        out.append(Target("population kernels compile", f"{fu['prepare_population_s']:.1f} s", "< 10 s",
                          fu["prepare_population_s"] < 10))
    if pop:
        out.append(Target(f"{pop['n']:,} subjects, benchmark patch, {pop['threads']} threads",
                          f"{pop['best_s']:.2f} s (median {pop['median_s']:.2f} s)", "<= 0.8 s",
                          pop["best_s"] <= 0.8 and pop["n"] >= 1000))
    if mem:
        out.append(Target("memory per subject, metrics and bands only",
                          f"{mem['per_subject_mb']:.4f} MB ({mem['n']:,} subjects)", "<= 0.02 MB",
                          mem["per_subject_mb"] <= 0.02))
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="fewer repeats and variants (for a smoke run)")
    ap.add_argument("--population", type=int, default=1000, metavar="N", help="subjects in the population run")
    ap.add_argument("--only", default=None, metavar="LABEL",
                    help="run only the variant with this label (for example '50 cells')")
    ap.add_argument("--cold", action="store_true",
                    help="only the first use from a fresh clone of HEAD in a temporary folder: installation, "
                         "set-up (barrierflow prepare), first results of a run and of the dashboard (prints only)")
    ap.add_argument("--chromium", default="/usr/bin/chromium",
                    help="the browser for the dashboard's first Run (default: /usr/bin/chromium; skipped if absent)")
    args = ap.parse_args(argv)
    out = Report()
    started = datetime.datetime.now().astimezone()
    load_start = load_average()
    out(f"machine: {cpu_name()}, {os.cpu_count()} cores; {versions()}; commit {commit()}")
    out(f"load average at the start (1 / 5 / 15 min): {load_start}\n")
    if args.cold:
        with tempfile.TemporaryDirectory(prefix="barrierflow-cold-") as d:
            fu = first_use(Path(d), clone=True, chromium=args.chromium)
        report_first_use(fu, True, out)
        out(f"\nload average at the end (1 / 5 / 15 min): {load_average()}")
        return 0
    variants = [Variant("50 cells", 50), Variant("20 cells", 20), Variant("200 cells", 200),
                Variant("finite dose 0.1 mL", patch_volume_ml=0.1), Variant("saturable", saturable=True),
                Variant(CELLS_800, (267, 267, 266)), Variant(NEAR_EVENT, 200, extra_times=(24.0 + 1e-4,))]
    # stars: (label, barriers, cells per layer or the default grid, a one-way transfer, paths); the
    # small ones are the shapes where the dense exact paths (modes, expm) compete with RODAS4. The
    # exact path is not run on the star of 64: it would decompose the whole network (O(n^3),
    # gigabytes)
    stars = [(STAR, 64, None, False, ["default", "rodas", "bdf"]),
             ("star of 4, 5 cells a layer", 4, 5, False, ["default", "exact", "rodas", "bdf"]),
             ("star of 2, 5 cells a layer, a transfer", 2, 5, True, ["default", "exact", "rodas", "bdf"])]
    if args.only:
        variants = [v for v in variants if v.label == args.only]
        stars = [x for x in stars if x[0] == args.only]
    elif args.quick:
        variants = variants[:1] + variants[4:5]
        stars = []

    def wanted(section: str) -> bool:
        """Whether a section besides the variants runs (all of them, or the one --only names)."""
        return not args.only or args.only == section

    rows: list[Row] = []
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        for v in variants:
            paths = (["default", "split", "rodas", "bdf"] if v.saturable else ["default"] if v.extra_times
                     else ["default", "exact", "rodas", "bdf"])
            rows += run_variant(v, paths, args.quick, tmp)
        for label, nb, cells, transfer, paths in stars:
            rows += run_star(label, nb, paths, args.quick, tmp, cells, transfer)
        out()
        out("Times: 'engine' is simulate() (scenario object to Result); 'file to traces' is load + simulate +")
        out("to_csv (the CSV and its sidecar written to disk). Every runner runs once per round, in rotating")
        out("order, over several rounds; ratios are")
        out("baseline median / product median on the engine time (in brackets: on the whole file-to-traces")
        out("path). Errors are against the Radau reference on the same grid.\n")
        print_table(rows, out)
        out()
        parts = ws = fu = pop = mem = None
        if wanted("file to traces"):
            parts = file_to_traces_parts(tmp, 10 if args.quick else 40)
            out("file to traces, reference problem, default path, median ms of each part: load "
                f"{parts['load'] * 1e3:.2f} (a process's first file, each unit text read by pint once: "
                f"{parts['first_load'] * 1e3:.2f}), simulate {parts['simulate'] * 1e3:.2f}, CSV text "
                f"{parts['csv'] * 1e3:.2f}, what the sidecar shows (metrics, warnings, ledger) "
                f"{parts['content'] * 1e3:.2f}, sidecar text {parts['sidecar'] * 1e3:.2f}, writing both (flushed to "
                f"disk, renamed) {parts['write'] * 1e3:.2f}; to_csv as a whole (the CSV's flush to disk waited for in "
                f"another thread while the sidecar is made) {parts['to_csv'] * 1e3:.2f}")
            out()
        if wanted("warm start"):
            ws = warm_start(tmp, 3 if args.quick else 5)
        if wanted("first use"):
            first_dir = tmp / "first-use"
            first_dir.mkdir()
            fu = first_use(first_dir, clone=False, chromium=args.chromium)
        if wanted("population"):
            pop = population(args.population, 2 if args.quick else 3)
            mem = population_memory(2000 if args.quick else 10_000)

    if ws:
        out(f"\nwarm start (new processes): import barrierflow {ws['import_s'] * 1e3:.0f} ms; barrierflow run of "
            f"the reference problem {ws['run_warm_s']:.2f} s (median {ws['run_warm_median_s']:.2f} s)")
        out(f"first-ever compile (empty numba cache): barrierflow run, reference problem (exact path) "
            f"{ws['first_reference_s']:.1f} s, then {ws['second_reference_s']:.2f} s; saturable variant (the "
            f"default's path) {ws['first_saturable_s']:.1f} s, then {ws['second_saturable_s']:.2f} s")
    if fu:
        report_first_use(fu, False, out)
    if pop:
        out(f"population: {pop['n']} subjects (50 cells, {len(POPULATION_VARIED)} parameters log-normal, CV 30 %), "
            f"{pop['integrator']}, {pop['threads']} threads: {pop['best_s']:.2f} s (median {pop['median_s']:.2f} s), "
            f"{pop['failed']} failed; subject 0 vs a single run: {pop['check']:.1e}; the same on RODAS4: "
            f"{pop['rodas_best_s']:.2f} s, {pop['rodas_failed']} failed")
    if mem:
        out(f"population, metrics and bands only (run_population in a new process, chunks of {mem['chunk']}): "
            f"{mem['n']:,} subjects peak {mem['peak_mb']:.0f} MB, one subject {mem['one_mb']:.0f} MB: "
            f"{mem['per_subject_mb'] * 1e3:.2f} kB per subject ({mem['failed']} failed)")
    out("\ntargets table (measured in this run; ratios of medians):")
    print_targets(targets(rows, ws, fu, pop, mem), out)
    load_end = load_average()
    out(f"\nload average at the end (1 / 5 / 15 min): {load_end}")
    if args.quick or args.only:
        print(f"(a partial run: {LAST_RUN.name} keeps the last full run)")
        return 0
    minutes = (datetime.datetime.now().astimezone() - started).total_seconds() / 60
    out.write([
        "# The last full run of the reference benchmark",
        "",
        "Generated by `tests/benchmarks/run_benchmark.py` (`make bench`); the next full run replaces it. Absolute",
        "times depend on the machine and on its load (2 shared cores): compare ratios, and compare runs at a",
        "similar load average. How to read it: DEVELOPERS.md, \"Speed\".",
        "",
        f"- started: {started.isoformat(timespec='seconds')}, took {minutes:.0f} min",
        f"- commit: {commit()}",
        f"- machine: {cpu_name()}, {os.cpu_count()} cores",
        f"- load average (1 / 5 / 15 min): {load_start} at the start, {load_end} at the end",
        f"- versions: {versions()}",
        f"- population size: {args.population}",
    ])
    print(f"written to {LAST_RUN.relative_to(ROOT)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
