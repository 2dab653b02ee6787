"""Populations: many subjects of one network, solved in parallel in compiled code.

A population is a list of scenarios that share one structure (the same compartments, barriers,
grid, links and dosing schedule) and differ in parameter values: volumes, clearances, layer
thicknesses, diffusivities, partition coefficients, areas, flows, rates, dose sizes. Every
subject is compiled to flat arrays, the arrays are stacked, and blocks of subjects run on one
thread per core, each block in one call of a compiled kernel that releases the GIL and runs the
exact chain solution or the compiled RODAS4 integrator subject after subject; the Python
interpreter does nothing per subject. Every subject passes the single run's guard
(:func:`~barrierflow.engine.ledger.passes`, then the magnitude check,
:func:`~barrierflow.engine.ledger.population_magnitudes`, compiled over the subjects); a subject
that fails it is computed again alone through :func:`~barrierflow.engine.solve.solve`, as its
single run would be. One failed subject does not stop the others: it is reported in
:attr:`Population.status` (-1) with the reason in :attr:`Population.messages`, and its traces end
where it failed (NaN after; all NaN when its check failed and its own run was refused).

:func:`simulate_population` draws the subjects: each varied parameter is the scenario's value
times a log-normal factor exp(omega z), z standard normal, omega = sqrt(ln(1 + cv^2)), so that
the median is the scenario's value and the coefficient of variation is ``cv`` (the usual model
of between-subject variability in pharmacokinetics, for example Mould and Upton, CPT
Pharmacometrics Syst. Pharmacol. 2, 2013, e38). :func:`simulate_many` runs a list given by the
caller.

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review.
"""

from __future__ import annotations

import dataclasses
import math
import time as _time
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numba
import numpy as np
from numba import njit

from ..errors import ScenarioError, SolverError
from ..model import Scenario
from ..model.cohort import Diverging, refused, stacked
from ..model.paths import Param, parse_param, with_values
from .arrays import SHARED, ModelArrays, stack_arrays, subject, working_copy
from .calls import caller_of, entry, plain
from .compiled import CompiledModel, compile_scenario
from .exact import EXACT_BALANCE_LIMIT, ExactIntegrator, _shortest_time, exact_balance_findings
from .exact_chain import chain_order, chain_schedule
from .exported import empty_taps
from .grid import Grid, response_time
from .kernels import INNER, jacobian_size
from .ledger import (
    POPULATION_FOUND,
    describe_state,
    floor_candidates,
    judge,
    ledger_weights,
    magnitude_findings,
    magnitudes_failed,
    passes,
    population_magnitudes,
    relative_error_of,
)
from .rosenbrock import (
    _FAILURES,
    COEF,
    FLOOR_EXCESS,
    FLUX_ESTIMATE_LIMIT,
    FLUX_FINDING,
    OK,
    ST_STEPS,
    RosenbrockIntegrator,
    build_structure,
    flux_estimate_ratio,
    run_marks,
)
from .schedule import EventArrays, apply_events, build_schedule, closed_rows, encode_events, new_event_state
from .solve import _snap, solve

__all__ = ["Population", "sample_scenarios", "simulate_many", "simulate_population", "simulate_values", "take_rows"]


# ---------------------------------------------------------------- the varied parameters
def _varied(scenario: Scenario, key: str | Param) -> tuple[Param, float]:
    """The parameter a population varies, and its value in ``scenario``, or a ScenarioError naming it."""
    param = parse_param(key, scenario, what="population variation")
    label = repr(str(key)) if isinstance(key, str) else repr(param.text)
    if not param.numeric or param.kind == "count":
        raise ScenarioError.single("population variation", label,
                                   f"{param.label} is not a quantity; vary a rate, an amount, a volume or a "
                                   "property of a layer")
    if param.structural:
        raise ScenarioError.single("population variation", label,
                                   f"{param.label} shapes the run (the dosing or output times, the grid), which every "
                                   "subject of a population shares; vary a rate, an amount, a volume or a property "
                                   "of a layer")
    value = param.get(scenario)
    if value is None:
        raise ScenarioError.single("population variation", label,
                                   f"{param.label} is not set in the scenario, so there is nothing to vary")
    return param, value


def sample_scenarios(scenario: Scenario, variations: Mapping[str, float], n: int,
                     seed: int = 0) -> tuple[tuple[Scenario, ...], dict[str, np.ndarray]]:
    """Draw ``n`` subjects of ``scenario`` with log-normal between-subject variability.

    Parameters
    ----------
    scenario : Scenario
    variations : mapping of str (or ParamPath, Tied) to float
        Parameter path (:class:`barrierflow.model.paths.ParamPath`, in its dotted form or the form
        of the messages; a :class:`~barrierflow.model.paths.Tied` group varies its members by one
        factor) to coefficient of variation (0.3 for 30 %). Every quantity of
        :func:`barrierflow.model.paths.parameter_paths` with ``structural=False`` may vary.
    n : int
        Number of subjects.
    seed : int
        Seed of the random generator (numpy's PCG64), so that a population can be drawn again.

    Returns
    -------
    scenarios : tuple of Scenario
    factors : dict of str to ndarray (n,)
        The factor each parameter was multiplied by, per subject, under the key given.
    """
    params, values, factors = _draw(scenario, variations, n, seed)
    subjects = tuple(with_values(scenario, dict(zip(params, row, strict=True))) for row in values.tolist())
    return subjects, factors


def _draw(scenario: Scenario, variations: Mapping[str, float], n: int,
          seed: int) -> tuple[tuple[Param, ...], np.ndarray, dict[str, np.ndarray]]:
    """The varied parameters, each subject's values (n, len(params)) and factors of :func:`sample_scenarios`."""
    if not (isinstance(n, int) and not isinstance(n, bool) and n >= 1):
        raise ScenarioError.single("population size", n, "must be a whole number >= 1")
    rng = np.random.default_rng(seed)
    factors: dict[str, np.ndarray] = {}
    varied = []
    for path, cv in variations.items():
        if not (isinstance(cv, float | int) and not isinstance(cv, bool) and 0 <= cv < 10):
            raise ScenarioError.single(f"population variation {str(path)!r}", cv,
                                       "must be a coefficient of variation from 0 to 10 (0.3 for 30 %)")
        varied.append(_varied(scenario, path))
        omega = math.sqrt(math.log1p(float(cv) ** 2))
        factors[str(path)] = np.exp(omega * rng.standard_normal(n))
    values = np.empty((n, len(varied)))
    for k, ((_, value), col) in enumerate(zip(varied, factors.values(), strict=True)):
        values[:, k] = value * col
    return tuple(p for p, _ in varied), values, factors


# ---------------------------------------------------------------- the result
@dataclass(frozen=True, eq=False)
class Population:
    """Traces of many subjects, looked up by compartment and barrier id.

    Arrays have one row per subject and one column per output time, in internal units (h, mg,
    mL, cm). A failed subject (``status`` -1) holds NaN after the time it failed.

    Attributes
    ----------
    times : ndarray (n_t,), h
    comp_ids, barrier_ids : tuple of str
    factors : dict of str to ndarray (n_subjects,)
        The parameter factors of each subject (empty for :func:`simulate_many`).
    status : ndarray of int (n_subjects,)
        0 when the subject's run finished and passed the guard (on its own run when the
        population's failed it: its message says so), -1 when it failed.
    messages : tuple of str
        Per subject, what happened: "the run finished", or why it was computed again alone and
        with what, or why it failed.
    steps : ndarray of int (n_subjects,)
        Integration steps per subject.
    integrator : str
    wall_time : float, s
    scenario : Scenario or None
        The first subject: every subject shares its structure and dosing times, which the
        statistics of :mod:`barrierflow.analysis.population` need (the times of the doses).

    Exposure statistics (Cmax, tmax, AUC, percentile bands) are computed in the analysis layer,
    by the rules of a single run: :func:`barrierflow.analysis.population.population_exposure`.
    """

    times: np.ndarray
    comp_ids: tuple[str, ...]
    barrier_ids: tuple[str, ...]
    factors: dict
    status: np.ndarray
    messages: tuple[str, ...]
    steps: np.ndarray
    integrator: str
    wall_time: float
    _conc: np.ndarray = field(repr=False)      # (n_sub, n_t, n_comp) mg/mL
    _quad: np.ndarray = field(repr=False)      # (n_sub, n_t, n_quad) mg (layout of CompiledModel)
    _flux: np.ndarray = field(repr=False)      # (n_sub, n_t, n_bar) mg/(cm^2 h)
    _area: np.ndarray = field(repr=False)      # (n_sub, n_bar) cm^2
    _volume: np.ndarray = field(repr=False)    # (n_sub, n_comp) mL (NaN without volume)
    _dosed: np.ndarray = field(repr=False)     # (n_sub, n_t, n_comp) mg dosed by events (cumulative)
    _removed: np.ndarray = field(repr=False)   # (n_sub, n_t, n_comp) mg removed by events (cumulative)
    _content: np.ndarray = field(repr=False)   # (n_sub, n_t, n_bar) mg in each barrier's cells
    _n_comp: int = 0
    _n_bar: int = 0
    scenario: Scenario | None = field(default=None, repr=False)
    _solubility: np.ndarray | None = field(default=None, repr=False)  # (n_comp,) mg/mL, inf: no limit

    @property
    def n_subjects(self) -> int:
        """Number of subjects."""
        return len(self.status)

    def _c(self, cid: str) -> int:
        try:
            return self.comp_ids.index(cid)
        except ValueError:
            raise KeyError(f"no compartment {cid!r}; known: {', '.join(self.comp_ids)}") from None

    def _b(self, bid: str) -> int:
        try:
            return self.barrier_ids.index(bid)
        except ValueError:
            raise KeyError(f"no barrier {bid!r}; known: {', '.join(self.barrier_ids)}") from None

    def _limit(self, i: int) -> float:
        return float(self._solubility[i]) if self._solubility is not None else np.inf

    def concentration(self, cid: str) -> np.ndarray:
        """Concentration in ``cid``, mg/mL, (n_subjects, n_t), clipped at 0 (the dissolved part of a
        held, saturated reservoir)."""
        i = self._c(cid)
        return np.maximum(np.minimum(self._conc[:, :, i], self._limit(i)), 0.0)

    def amount(self, cid: str) -> np.ndarray:
        """Amount in ``cid``, dissolved and solid, mg (NaN for a held compartment without volume)."""
        i = self._c(cid)
        return np.maximum(self._conc[:, :, i], 0.0) * self._volume[:, i][:, None]

    def volume(self, cid: str) -> np.ndarray:
        """Volume of ``cid``, mL (populations run only models whose volumes stay)."""
        i = self._c(cid)
        return np.broadcast_to(self._volume[:, i][:, None], self._conc.shape[:2]).copy()

    def solid(self, cid: str) -> np.ndarray:
        """Undissolved amount in ``cid``, mg (a held reservoir above the solubility)."""
        i = self._c(cid)
        return np.nan_to_num(np.maximum(self._conc[:, :, i] - self._limit(i), 0.0) * self._volume[:, i][:, None])

    def sampled(self, cid: str) -> np.ndarray:
        """Cumulative amount withdrawn from ``cid`` by samples, mg."""
        nc, nb = self._n_comp, self._n_bar
        return self._quad[:, :, 4 * nc + 2 * nb + self._c(cid)].copy()

    def lost(self, cid: str) -> np.ndarray:
        """Cumulative amount lost from ``cid`` to the air, mg."""
        nc, nb = self._n_comp, self._n_bar
        return self._quad[:, :, 3 * nc + 2 * nb + self._c(cid)].copy()

    def eliminated(self, cid: str) -> np.ndarray:
        """Cumulative amount eliminated from ``cid``, mg."""
        return self._quad[:, :, self._c(cid)].copy()

    def permeated(self, bid: str) -> np.ndarray:
        """Cumulative amount per area that entered the ``to`` compartment through ``bid``, mg/cm^2."""
        b = self._b(bid)
        return self._quad[:, :, self._n_comp + self._n_bar + b] / self._area[:, b][:, None]

    def flux(self, bid: str) -> np.ndarray:
        """Flux per area from ``bid`` into its ``to`` compartment, mg/(cm^2 h)."""
        return self._flux[:, :, self._b(bid)].copy()

    def content(self, bid: str) -> np.ndarray:
        """Amount held inside the layers of ``bid``, mg (0 for a steady barrier)."""
        return self._content[:, :, self._b(bid)].copy()

    def degraded(self, bid: str) -> np.ndarray:
        """Cumulative amount degraded inside ``bid``, mg."""
        return self._quad[:, :, self._n_comp + self._b(bid)].copy()

    def removed(self, cid: str) -> np.ndarray:
        """Cumulative amount taken out of ``cid`` by replace and remove doses, mg."""
        return self._removed[:, :, self._c(cid)].copy()

    def dose_parts(self, cid: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """What entered ``cid`` by events, infusions and hold supplies, cumulative, mg (as
        :meth:`barrierflow.analysis.Result.dose_parts`)."""
        i = self._c(cid)
        nc, nb = self._n_comp, self._n_bar
        return (self._dosed[:, :, i].copy(), self._quad[:, :, nc + 2 * nb + nc + i].copy(),
                self._quad[:, :, nc + 2 * nb + i].copy())

    def dosed(self, cid: str) -> np.ndarray:
        """Cumulative amount dosed into ``cid``, mg: boluses, infusions, refills and holds (as
        :meth:`barrierflow.analysis.Result.dosed`)."""
        i = self._c(cid)
        nc, nb = self._n_comp, self._n_bar
        return self._dosed[:, :, i] + self._quad[:, :, nc + 2 * nb + nc + i] + self._quad[:, :, nc + 2 * nb + i]


# ---------------------------------------------------------------- the compiled population run
# The kernel runs the subjects ``lo`` to ``hi - 1`` one after the other, writing only their own
# rows of the outputs; :func:`_in_blocks` hands fixed blocks of subjects to a few Python threads,
# each calling the kernel without the GIL (``nogil``). The kernel is serial code around the single
# run's own compiled loop (``chain_schedule`` when ``exact``, else ``run_marks``; one kernel for
# both paths, so one compiled form of it), which it calls through the loop's
# address (``loop``, calls.entry, built by _entries from subject 0 as the kernel builds each
# subject's arguments): the very code a single run executes, compiled once for both, so the
# kernel's first compile is that of its own body (linked in, as a direct call would, the run
# loop's tree was optimised and emitted again inside the kernel: seconds; a ``prange`` loop
# around it took tens). The per-subject copy of the kept columns and the check (_keep_rows) is
# called the same way (``finish``).
# ``stack`` is the subjects' ModelArrays stacked (arrays.stack_arrays) and ``work`` the runs' own
# copy of what events change (arrays.working_copy); ``ev`` the shared events with ``ev_values``
# (n_sub, n_ev) each subject's own values.
@njit(nogil=True, cache=True, error_model="numpy", no_cfunc_wrapper=True)
def _run_population(lo, hi, loop, finish, exact, order, cut, sargs, coef, n_w, rtol, atol_rel, max_steps, hold, marks,
                    times, ev, ev_values, stack, work, n_jac, keep, n_out, w, bar_lo, bar_hi, out, out_dosed,
                    out_removed, content, low, rel, status, fail_k, stats, outs, ferr, qerr):
    n = stack.y0.shape[1]
    n_t = times.shape[0]
    n_int = marks.shape[0] - 1
    for i in range(lo, hi):
        base = subject(stack, i)
        m = subject(work, i)
        evi = EventArrays(ev.time, ev.kind, ev.comp, ev_values[i])
        nc = m.n_comp
        states = np.empty((n_t, n))
        if not exact:
            for r in range(n_t):
                for j in range(n):
                    states[r, j] = np.nan
        evd = np.zeros((n_t, nc))
        evr = np.zeros((n_t, nc))
        y = base.y0.copy()
        s = new_event_state(base, ev.time.shape[0])
        st = np.zeros(6, dtype=np.int64)
        # the first interval and ``full`` of the types the single run gives them (an int64, a bool):
        # a literal 0 or True would call for a second compiled form of the loop
        if exact:
            status[i] = _call_chain_schedule(loop, marks, times, plain(evi), plain(base), plain(s), order, cut, n_jac,
                                             y, states, evd, evr, st, np.bool_(True), empty_taps(n))
        else:
            ptr = np.zeros(2, dtype=np.int64)
            atol = atol_rel * base.scale
            code, k = _call_run_marks(loop, np.int64(0), n_int, marks, times, evi, m, base, s, sargs, coef, n_w,
                                      n_jac, rtol, atol, max_steps, hold, y, ptr, states, evd, evr, st,
                                      np.bool_(True), empty_taps(n), outs, ferr[i], qerr[i])
            status[i] = code
            fail_k[i] = k
        for j in range(6):
            stats[i, j] = st[j]
        _call_keep_rows(finish, states, evd, evr, keep, n_out, w, bar_lo, bar_hi, base, out[i], out_dosed[i],
                        out_removed[i], content[i], low, rel, i)


@njit(**INNER)
def _keep_rows(states, evd, evr, keep, n_out, w, bar_lo, bar_hi, m, out, out_dosed, out_removed, content, low, rel, i):
    """Copy the kept columns of one subject, with what its check needs: the lowest concentration
    relative to its state's scale (into ``low[i]``) and the relative error of its ledger (into
    ``rel[i]``, :func:`~barrierflow.engine.ledger.relative_error_of`); and the amount in each
    barrier's cells (states ``bar_lo[b]`` to ``bar_hi[b] - 1``), negative concentrations counted
    as 0 (``content``, as :meth:`barrierflow.analysis.Result.content`)."""
    nc = m.n_comp
    nd = m.n_dyn
    cap = m.capacity
    scale = m.scale
    lo = 0.0
    n_t = states.shape[0]
    cells = np.empty(n_t)
    for r in range(n_t):
        row = states[r]
        dst = out[r]
        for j in range(keep.shape[0]):
            dst[j] = row[keep[j]]
        for p in range(nc):
            out_dosed[r, p] = evd[r, p]
            out_removed[r, p] = evr[r, p]
            v = row[p]
            if v < 0.0:  # only a negative value can lower the lowest (which starts at 0)
                z = v / scale[p]
                if z < lo:
                    lo = z
        acc = 0.0
        for b in range(bar_lo.shape[0]):
            amount, pos, neg = _cell_sums(row, cap, bar_lo[b], bar_hi[b])
            acc += amount
            content[r, b] = pos
            if neg < 0.0:  # a negative cell: find the lowest scaled value
                for j in range(bar_lo[b], bar_hi[b]):
                    z = row[j] / scale[j]
                    if z < lo:
                        lo = z
        cells[r] = acc
    low[i] = lo
    rel[i] = relative_error_of(out[:, :nc], cells, out[:, nc + n_out:], out_dosed, out_removed, cap, m.has_volume,
                               m.y0, nd, w)


@njit(**INNER, fastmath={"reassoc", "nsz"})
def _cell_sums(row, cap, lo, hi):
    """Over the cell states ``lo`` to ``hi - 1`` of one output row: the amount (concentration times
    capacity), the amount of the positive concentrations, and that of the negative ones (0 when
    none is negative). The sums may be reordered, so that the loop runs in vector lanes; a NaN
    keeps its meaning in the amount and adds nothing to the other two."""
    amount = 0.0
    pos = 0.0
    neg = 0.0
    for j in range(lo, hi):
        v = row[j]
        a = v * cap[j]
        amount += a
        pos += a if v > 0.0 else 0.0
        neg += a if v < 0.0 else 0.0
    return amount, pos, neg


_call_run_marks = caller_of(run_marks)
_call_chain_schedule = caller_of(chain_schedule)
_call_keep_rows = caller_of(_keep_rows)


def _entries(batch: _Batch, work: ModelArrays, order, cut: float, n_jac: int, struct, integ,
             kept: tuple) -> tuple[tuple[int, int], tuple[int, int]]:
    """The entries (:func:`~barrierflow.engine.calls.entry`) of what a kernel calls per subject:
    the run loop (``chain_schedule`` with ``order``, else ``run_marks``) and :func:`_keep_rows`
    (``kept``: its arguments after the subject's model, the outputs whole); their arguments built
    for subject 0 as :func:`_run_population` builds them for each."""
    ev, n = batch.ev, batch.model.n_state
    base = _subject_arrays(batch.arrays, 0)
    m = _subject_arrays(work, 0)
    evi = EventArrays(ev.time, ev.kind, ev.comp, batch.ev_values[0])
    s = new_event_state(base, ev.time.shape[0])
    states = np.empty((1, n))
    evd = np.zeros((1, m.n_comp))
    evr = np.zeros((1, m.n_comp))
    st = np.zeros(6, dtype=np.int64)
    y = base.y0.copy()
    keep, n_out, w, bar_lo, bar_hi, out, out_dosed, out_removed, content, low, rel = kept
    finish = entry(_keep_rows, states, evd, evr, keep, n_out, w, bar_lo, bar_hi, base, out[0], out_dosed[0],
                   out_removed[0], content[0], low, rel, np.int64(0))
    if order is not None:
        return entry(chain_schedule, batch.marks, batch.times, tuple(evi), tuple(base), tuple(s), order, cut, n_jac,
                     y, states, evd, evr, st, np.bool_(True), empty_taps(n)), finish
    return entry(run_marks, np.int64(0), np.int64(len(batch.marks) - 1), batch.marks, batch.times, evi, m, base, s,
                 struct.args(), COEF, struct.n_w, n_jac, float(integ.rtol), float(integ.atol) * base.scale,
                 integ.max_steps, float(integ.hold), y, np.zeros(2, dtype=np.int64), states, evd, evr, st,
                 np.bool_(True), empty_taps(n), np.zeros(0, dtype=np.int64), np.zeros(0),
                 np.zeros(0)), finish


def _shared_grid(scenarios: Sequence[Scenario], grid: Grid) -> dict[tuple[int, int], np.ndarray]:
    """One grid per default-gridded layer for every subject (their structure must agree).

    The default grid of a layer depends on its values (a degrading layer follows its
    reaction-diffusion length), so subjects may ask for different grids. Each such layer takes
    the union of the cell faces (relative to the thickness) of the subjects' own grids, which is
    at least as fine as each of them; subjects whose grids agree add nothing.
    """
    out: dict[tuple[int, int], np.ndarray] = {}
    first = scenarios[0]
    for bi, b in enumerate(first.barriers):
        if b.model == "steady":
            continue
        for li, layer in enumerate(b.layers):
            if layer.cells is not None:
                continue
            faces: set[float] = set()
            seen: set[tuple[float, ...]] = set()
            for s in scenarios:
                if bi >= len(s.barriers) or li >= len(s.barriers[bi].layers):
                    continue
                lay = s.barriers[bi].layers[li]
                w = grid.widths(lay, response_time(s)) / lay.thickness
                key = tuple(np.round(w, 12))
                if key in seen:
                    continue
                seen.add(key)
                faces.update(np.round(np.cumsum(w)[:-1], 12).tolist())
            edges = np.array([0.0, *sorted(faces), 1.0])
            out[(bi, li)] = np.diff(edges)
    return out


def _subject_arrays(arrays: ModelArrays, i: int) -> ModelArrays:
    """Subject ``i`` of stacked arrays, in Python (as the compiled :func:`~.arrays.subject`)."""
    return ModelArrays(*(v[i] if isinstance(v, np.ndarray) and name not in SHARED else v
                         for name, v in zip(ModelArrays._fields, arrays, strict=True)))


def _apply_at_end_kept(batch: _Batch, keep: np.ndarray, status: np.ndarray, out: np.ndarray,
                       out_dosed: np.ndarray, out_removed: np.ndarray) -> None:
    """Apply each finished subject's events at the very end of the run to its last row (its
    after-state), as a single run does (the rules of every path,
    :func:`~barrierflow.engine.schedule.apply_events`); the events touch only kept states
    (compartments and cumulative amounts)."""
    ev = batch.ev
    first = int(np.searchsorted(ev.time, batch.duration, side="left"))
    if first == len(ev.time) or not out.shape[1]:
        return
    n_state = batch.model.n_state
    for i in np.flatnonzero(status == OK).tolist():
        m = _subject_arrays(batch.arrays, i)
        at_end = EventArrays(ev.time[first:], ev.kind[first:], ev.comp[first:], batch.ev_values[i, first:].copy())
        y = np.zeros(n_state)
        y[keep] = out[i, -1]
        s = new_event_state(m, len(at_end.time))
        s.dosed[:], s.removed[:] = out_dosed[i, -1], out_removed[i, -1]
        apply_events(np.inf, 0, at_end, working_copy(m), m, y, s)
        out[i, -1] = y[keep]
        out_dosed[i, -1], out_removed[i, -1] = s.dosed, s.removed


def _same_structure(models: Sequence[CompiledModel], schedules, grids_times) -> None:
    first = models[0]
    ints = ("link_p", "link_q", "link_loss", "link_track", "loss_to", "mm_state", "tr_from", "tr_to", "held")
    for k, m in enumerate(models[1:], start=2):
        same = (m.n_state == first.n_state and m.comp_ids == first.comp_ids and m.barrier_ids == first.barrier_ids
                and all(np.array_equal(getattr(m, a), getattr(first, a)) for a in ints)
                and [(e.time, e.kind, e.comp) for e in schedules[k - 1]] == [(e.time, e.kind, e.comp)
                                                                             for e in schedules[0]]
                and np.array_equal(grids_times[k - 1], grids_times[0])
                and all(np.array_equal(getattr(m.arrays, a), getattr(first.arrays, a)) for a in SHARED)
                and np.array_equal(m.loss_rate != 0, first.loss_rate != 0))
        if not same:
            raise ScenarioError.single(f"population subject {k}", "a different structure",
                                       "every subject must have the structure of subject 1 (the same compartments, "
                                       "barriers, cells, links, dosing times and output times); only values may differ")


@dataclass(frozen=True, eq=False)
class _Batch:
    """Subjects of one structure ready for the compiled run.

    ``model`` gives the structure (any subject's model, or the stacked one); ``arrays`` every
    subject's values (:func:`~.arrays.stack_arrays`, one row per subject in the value fields);
    ``ev`` the events every subject shares, ``ev_values`` (n, n_ev) each subject's values of them;
    ``scenario_of(i)`` subject i's own scenario (built only for a subject computed again alone).
    """

    model: CompiledModel
    arrays: ModelArrays
    ev: EventArrays
    ev_values: np.ndarray
    schedule: list
    marks: np.ndarray
    times: np.ndarray
    duration: float
    first: Scenario
    scenario_of: Callable[[int], Scenario]

    @property
    def n(self) -> int:
        return self.ev_values.shape[0]


def _check_model(m0: CompiledModel, integrator) -> np.ndarray | None:
    """The chain order of the exact path (None: RODAS4), or a ScenarioError when no compiled path runs it."""
    if m0.vehicle_terms:
        raise ScenarioError.single(
            "population", "a volume that changes with time, or undissolved solid",
            "populations run on the compiled paths, which do not run evaporation, solubility limits or samples "
            "without replacement; simulate the subjects one by one with barrierflow.simulate")
    order = chain_order(m0) if not isinstance(integrator, RosenbrockIntegrator) else None
    if order is None and isinstance(integrator, ExactIntegrator):
        raise ScenarioError.single("population integrator", "'exact'",
                                   "needs a linear chain network (no transfers, no saturable elimination, at most "
                                   "two neighbours per state); use the compiled RODAS4 integrator")
    return order


def _check_integrator(integrator) -> None:
    if integrator is not None and not isinstance(integrator, RosenbrockIntegrator | ExactIntegrator):
        raise ScenarioError.single("population integrator", getattr(integrator, "name", repr(integrator)),
                                   "populations run on the compiled paths: ExactIntegrator or RosenbrockIntegrator "
                                   "(default: exact for a linear chain network, RODAS4 otherwise)")


def _output_times(scenario: Scenario, marks: np.ndarray) -> np.ndarray:
    return _snap(np.array(scenario.output_grid(), dtype=float), marks, 1e-9 * max(scenario.duration, 1.0), merge=True)


def simulate_many(scenarios: Sequence[Scenario], *, integrator: RosenbrockIntegrator | ExactIntegrator | None = None,
                  grid: Grid | None = None, threads: int | None = None,
                  factors: Mapping[str, np.ndarray] | None = None) -> Population:
    """Simulate subjects that share one structure, in parallel compiled threads.

    Each subject is compiled on its own (subjects given as values of a few parameters of one
    scenario are faster with :func:`simulate_values`, which compiles them together).

    Parameters
    ----------
    scenarios : sequence of Scenario
        The subjects; all must have the structure of the first (only values may differ).
    integrator : ExactIntegrator or RosenbrockIntegrator, optional
        Default: the exact solution when the network is a linear chain (see
        :mod:`barrierflow.engine.exact_chain`), the compiled RODAS4 integrator otherwise.
    grid : Grid, optional
        Default grid of layers without ``cells``.
    threads : int, optional
        Number of threads (default: numba's, one per core).
    factors : mapping, optional
        Parameter factors to record in the result.

    Returns
    -------
    Population

    Raises
    ------
    ScenarioError
        If the subjects do not share one structure.
    """
    start = _time.perf_counter()
    if not scenarios:
        raise ScenarioError.single("population", "no subjects", "give at least one scenario")
    _check_integrator(integrator)
    grid = grid or Grid()
    shared = _shared_grid(scenarios, grid)
    models = [compile_scenario(s, grid, shared) for s in scenarios]
    order = _check_model(models[0], integrator)
    schedules = [build_schedule(s, m.comp_index) for s, m in zip(scenarios, models, strict=True)]
    s0 = scenarios[0]
    marks = np.array(sorted({e.time for e in schedules[0]} | {0.0, s0.duration}), dtype=np.float64)
    times_all = [_output_times(s, marks) for s in scenarios]
    _same_structure(models, schedules, times_all)
    ev_v = np.array([[e.value for e in sch] for sch in schedules], dtype=np.float64).reshape(len(models), -1)
    batch = _Batch(models[0], stack_arrays([m.arrays for m in models]), encode_events(schedules[0]), ev_v,
                   schedules[0], marks, times_all[0], s0.duration, s0, scenarios.__getitem__)
    return _run(batch, order, integrator, grid, threads, factors, start)


def simulate_values(scenario: Scenario, params: Sequence[Param], values: np.ndarray, *,
                    integrator: RosenbrockIntegrator | ExactIntegrator | None = None, grid: Grid | None = None,
                    threads: int | None = None, factors: Mapping[str, np.ndarray] | None = None) -> Population:
    """Simulate the subjects given by the values of a few parameters of one scenario, compiled together.

    The scenario is compiled once with one value per subject in each varied field
    (:func:`barrierflow.model.cohort.stacked`): the compiled arrays of every subject come out of
    one pass of numpy's element-wise arithmetic, equal to those of the subject's own scenario,
    without building it. Where a value decides the structure differently between subjects (the
    cells of a degrading layer, a clearance of zero or not), the subjects are split there and each
    part runs on its own structure. Subject i's scenario is built only if its run has to be
    computed again alone (a failed check).

    Parameters
    ----------
    scenario : Scenario
        What every subject shares.
    params : sequence of Param
        The varied parameters (not structural).
    values : ndarray (n, len(params))
        Each subject's values, internal units; values the model accepts (check them first with
        :func:`barrierflow.model.cohort.refused`).
    integrator, grid, threads, factors
        As for :func:`simulate_many`.

    Returns
    -------
    Population
    """
    start = _time.perf_counter()
    _check_integrator(integrator)
    values = np.asarray(values, dtype=np.float64).reshape(len(values), len(params))
    if not len(values):
        raise ScenarioError.single("population", "no subjects", "give at least one subject")
    grid = grid or Grid()
    params = tuple(params)
    try:
        batch, order = _values_batch(scenario, params, values, grid, integrator)
    except Diverging as split:
        parts = [np.flatnonzero(split.mask), np.flatnonzero(~split.mask)]
        pops = [simulate_values(scenario, params, values[rows], integrator=integrator, grid=grid, threads=threads)
                for rows in parts]
        taken = [None] * len(values)
        for pop, rows in zip(pops, parts, strict=True):
            for j, i in enumerate(rows.tolist()):
                taken[i] = (pop, j)
        return take_rows(taken, factors=factors, wall_time=_time.perf_counter() - start)
    return _run(batch, order, integrator, grid, threads, factors, start)


def _values_batch(scenario: Scenario, params: tuple[Param, ...], values: np.ndarray, grid: Grid,
                  integrator) -> tuple[_Batch, np.ndarray | None]:
    """The subjects' batch and the chain order of the exact path (see :func:`_check_model`)."""
    view = stacked(scenario, params, values)
    model = compile_scenario(view, grid)
    # a model no compiled path runs is refused before its events are built: the rules of those
    # events (the time a vehicle dries) take one value, not one per subject
    order = _check_model(model, integrator)
    n = len(values)
    schedule = build_schedule(view, model.comp_index)
    ev = encode_events([dataclasses.replace(e, value=0.0) if isinstance(e.value, np.ndarray) else e for e in schedule])
    ev_v = np.empty((n, len(schedule)))
    for k, e in enumerate(schedule):
        ev_v[:, k] = np.asarray(e.value, dtype=np.float64).reshape(-1)
    marks = np.array(sorted({e.time for e in schedule} | {0.0, scenario.duration}), dtype=np.float64)

    def scenario_of(i: int) -> Scenario:
        return with_values(scenario, dict(zip(params, values[i].tolist(), strict=True)))

    return _Batch(model, model.arrays, ev, ev_v, schedule, marks, _output_times(scenario, marks), scenario.duration,
                  scenario_of(0) if params else scenario, scenario_of), order


def take_rows(rows: Sequence[tuple[Population | None, int | str]], *, factors: Mapping[str, np.ndarray] | None = None,
              wall_time: float = 0.0) -> Population:
    """One population of rows taken from others (of one structure): ``(population, row)``, or
    ``(None, why)`` for a subject the engine refused (a failed row of NaN with that message).

    Raises
    ------
    ScenarioError
        If no row has a population.
    """
    good = next((p for p, _ in rows if p is not None), None)
    if good is None:
        raise ScenarioError.single("population", "every subject", f"the engine refused them: {rows[0][1]}")

    def stack(name: str) -> np.ndarray:
        ref = getattr(good, name)[:1]
        return np.concatenate([getattr(p, name)[j:j + 1] if p is not None else np.full_like(ref, np.nan)
                               for p, j in rows])

    status = np.array([p.status[j] if p is not None else -1 for p, j in rows])
    messages = tuple(p.messages[j] if p is not None else f"the engine refused it: {j}" for p, j in rows)
    steps = np.array([p.steps[j] if p is not None else 0 for p, j in rows])
    return dataclasses.replace(
        good, status=status, messages=messages, steps=steps, factors=dict(factors or {}), wall_time=wall_time,
        _conc=stack("_conc"), _quad=stack("_quad"), _flux=stack("_flux"), _area=stack("_area"),
        _volume=stack("_volume"), _dosed=stack("_dosed"), _removed=stack("_removed"), _content=stack("_content"))


BLOCKS = 64
"""About how many blocks a population is cut into (blocks of at most :data:`BLOCK_MAX` subjects):
enough for the threads to share the work evenly when subjects differ in cost."""

BLOCK_MAX = 16
"""Most subjects in one call of a population kernel (a call costs tens of microseconds of Python)."""


def _in_blocks(kernel: Callable[..., None], n_sub: int, threads: int | None, *args) -> None:
    """Run ``kernel(lo, hi, *args)`` over every subject, in blocks, on ``threads`` threads.

    The blocks depend on the number of subjects only, and each subject is computed on its own
    within a block, so a subject's result does not depend on the number of threads. The
    threads are plain Python threads (one per core by default: numba's thread count, which
    ``NUMBA_NUM_THREADS`` sets); the kernels release the GIL, so they run at the same time. A
    failure in a kernel is raised here after every block has ended.
    """
    size = min(BLOCK_MAX, max(1, -(-n_sub // BLOCKS)))
    blocks = [(lo, min(lo + size, n_sub)) for lo in range(0, n_sub, size)]
    n_threads = numba.get_num_threads() if threads is None else max(1, int(threads))
    n_threads = min(n_threads, numba.config.NUMBA_NUM_THREADS, len(blocks))
    if n_threads == 1:
        for lo, hi in blocks:
            kernel(lo, hi, *args)
        return
    with ThreadPoolExecutor(max_workers=n_threads, thread_name_prefix="barrierflow-population") as pool:
        done = [pool.submit(kernel, lo, hi, *args) for lo, hi in blocks]
    for future in done:
        future.result()


def _run(batch: _Batch, order, integrator, grid: Grid, threads: int | None, factors, start: float) -> Population:
    """Run a batch in the compiled kernels, check every subject, compute failed ones again alone."""
    m0 = batch.model
    arrays = batch.arrays
    work = working_copy(arrays)  # the runs change these (a closed face); ``arrays`` keeps the originals
    marks, times, ev, ev_v = batch.marks, batch.times, batch.ev, batch.ev_values
    integ = integrator if isinstance(integrator, RosenbrockIntegrator) else RosenbrockIntegrator()
    nc, nd, n = m0.n_comp, m0.n_dyn, m0.n_state
    out_cells = [int(m0.link_p[g.out_link]) for g in m0.grids]
    # the other face cells, which the guard's magnitude check judges as in a single run
    # (exported.taps_of keeps both states of each face link)
    faces = {int(m0.link_p[j]) for g in m0.grids for j in (g.in_link, g.out_link)}
    faces |= {int(m0.link_q[j]) for g in m0.grids for j in (g.in_link, g.out_link)}
    face_cells = out_cells + sorted(k for k in faces if nc <= k < nd and k not in out_cells)
    keep = np.array(list(range(nc)) + face_cells + list(range(nd, n)), dtype=np.int64)
    n_sub, n_t = batch.n, len(times)
    out = np.empty((n_sub, n_t, len(keep)))
    out_dosed = np.zeros((n_sub, n_t, nc))
    out_removed = np.zeros((n_sub, n_t, nc))
    bar_lo = np.array([g.start for g in m0.grids], dtype=np.int64)  # each barrier's cell states
    bar_hi = np.array([g.stop for g in m0.grids], dtype=np.int64)
    content = np.zeros((n_sub, n_t, m0.n_bar))
    low = np.zeros(n_sub)
    rel = np.zeros(n_sub)
    n_out = len(face_cells)
    w = ledger_weights(m0)
    status = np.zeros(n_sub, dtype=np.int64)
    fail_k = np.zeros(n_sub, dtype=np.int64)
    stats = np.zeros((n_sub, 6), dtype=np.int64)
    n_jac = jacobian_size(m0)
    kept = (keep, n_out, w, bar_lo, bar_hi, out, out_dosed, out_removed, content, low, rel)
    # one kernel for both paths (one compiled form): the exact path's runs take the RODAS4 path's
    # arguments too (unused), the RODAS4 path's an empty chain order
    struct = build_structure(m0)
    if order is not None:
        name = "exact (population)"
        cut = -60.0 / _shortest_time(times, marks)
    else:
        name = f"{integ.name} (population)"
        cut = 0.0
    loop, finish = _entries(batch, work, order, cut, n_jac, struct, integ, kept)
    outs = np.array([g.out_link for g in m0.grids], dtype=np.int64)
    # a RODAS4 subject's error estimates, as a single run's (rosenbrock.run_marks): each flux's
    # largest and each cumulative amount's sum over the accepted steps
    ferr = np.zeros((n_sub, len(outs) if order is None else 0))
    qerr = np.zeros((n_sub, n - nd if order is None else 0))
    _in_blocks(_run_population, n_sub, threads, loop, finish, np.bool_(order is not None),
               order if order is not None else np.zeros(0, dtype=np.int64), cut, struct.args(), COEF, struct.n_w,
               float(integ.rtol), float(integ.atol), integ.max_steps, float(integ.hold), marks, times, ev, ev_v,
               arrays, work, n_jac, keep, n_out, w, bar_lo, bar_hi, out, out_dosed, out_removed, content, low, rel,
               status, fail_k, stats, outs if order is None else np.zeros(0, dtype=np.int64), ferr, qerr)
    _apply_at_end_kept(batch, keep, status, out, out_dosed, out_removed)
    # the guard of every run (barrierflow.engine.ledger.verdict), for every subject (its ledger
    # computed in the kernel), then its magnitudes against their scales (ledger.check_magnitudes,
    # compiled over the subjects in blocks)
    cap = arrays.capacity
    finite = np.isfinite(out).all(axis=(1, 2))
    good = (status == OK) & passes(rel, low, finite)
    # an exact subject's ledger closed to rounding (exact.EXACT_BALANCE_LIMIT), else computed again
    # on its own (the chain path on rational rows, or the robust integrator)
    exact_off = good & ~(rel <= EXACT_BALANCE_LIMIT) if order is not None else np.zeros(n_sub, dtype=bool)
    good &= ~exact_off
    found = np.zeros((n_sub, POPULATION_FOUND))
    bstop = np.array([max(g.start, min(g.stop, nd)) for g in m0.grids], dtype=np.int64)
    pos = np.full(n, -1, dtype=np.int64)  # each state's kept column (the derived pass reads the face cells')
    pos[keep] = np.arange(len(keep))
    _in_blocks(population_magnitudes, n_sub, threads, out, content, out_dosed, out_removed, keep, bar_lo, bstop,
               cap, arrays.has_volume, arrays.scale, arrays.y0, nc, nd, m0.q_elim, m0.q_perm, m0.q_lost,
               m0.q_sampled, -1.0 if order is not None else float(integ.atol), np.where(good, OK, -1), outs, pos,
               m0.link_p, m0.link_q, arrays.link_c, arrays.link_d, arrays.inv_partition, float(batch.duration), found)
    small = good & magnitudes_failed(found)
    good &= ~small
    # RODAS4's own rules of a single run (RosenbrockIntegrator.run): a cumulative amount below the
    # magnitude floor whose summed estimates exceed FLOOR_EXCESS times its promise, a flux whose
    # estimate exceeds FLUX_ESTIMATE_LIMIT times its promise; such a subject is computed again alone
    estimated = _estimate_findings(m0, arrays, keep, out, found, good, ferr, qerr, float(integ.atol),
                                   float(batch.duration)) if order is None else {}
    for i in estimated:
        good[i] = False
    messages = ["the run finished"] * n_sub
    st = np.where(good, 0, -1)
    for i in np.flatnonzero(~good).tolist():
        if small[i]:
            note = f"the {name} result failed its check ({'; '.join(magnitude_findings(m0, keep, found[i]))})"
        elif i in estimated:
            note = f"the {name} result failed its check ({estimated[i]})"
        elif exact_off[i]:
            note = f"the {name} result failed its check ({'; '.join(exact_balance_findings(float(rel[i])))})"
        elif status[i] == OK:
            note = f"the {name} result failed its check ({'; '.join(judge(float(rel[i]), float(low[i]), finite[i]))})"
        elif order is not None:
            note = "the exact path does not apply to this subject (its modes are too ill-conditioned)"
        else:
            k = int(fail_k[i])
            note = (f"the solution failed between {marks[k]:.6g} h and {marks[k + 1]:.6g} h "
                    f"(dosing interval {k + 1}): {_FAILURES.get(int(status[i]), 'unknown failure')}")
        # computed again on its own, through the guarded single run (robust integrator on failure)
        try:
            tr = solve(batch.scenario_of(i), integ if isinstance(integrator, RosenbrockIntegrator) else None, grid)
        except SolverError as err:
            out[i] = np.nan
            content[i] = np.nan
            messages[i] = f"{note}; computed again on its own it failed too: {err}"
            continue
        out[i] = np.stack([tr.column(int(j)) for j in keep], axis=1)  # from its rows (no full states)
        out_dosed[i] = tr.event_dosed
        out_removed[i] = tr.event_removed
        content[i] = tr.rows.clipped  # each cell counted at 0 where negative, as in a single run
        stats[i, ST_STEPS] = tr.stats.get("steps", 0)
        st[i] = 0
        messages[i] = f"{note}; computed again on its own with {tr.integrator}"
    # flux into the 'to' compartment of each barrier: c u_p - d u_q over the out link, per area
    # (none while a remove that ends contact has closed the face)
    closed = closed_rows(batch.schedule, times, nc)
    area = arrays.area
    flux = np.empty((n_sub, n_t, m0.n_bar))
    col = {int(s): j for j, s in enumerate(keep)}
    inv_k = arrays.inv_partition
    faces = set(m0.face_link.tolist())
    for b, g in enumerate(m0.grids):
        j = g.out_link
        p, q = int(m0.link_p[j]), int(m0.link_q[j])
        c = arrays.link_c[:, j][:, None]
        d = arrays.link_d[:, j][:, None]
        up = out[:, :, col[p]] * inv_k[:, p][:, None]
        uq = out[:, :, col[q]] * inv_k[:, q][:, None]
        flux[:, :, b] = (c * up - d * uq) / area[:, b][:, None]
        for end in (p, q):
            if end < nc and j in faces:
                flux[:, closed[:, end], b] = 0.0
    volume = np.where(arrays.has_volume, cap[:, :nc], np.nan)
    return Population(
        times=times, comp_ids=m0.comp_ids, barrier_ids=m0.barrier_ids, factors=dict(factors or {}), status=st,
        messages=tuple(messages), steps=stats[:, ST_STEPS].copy(), integrator=name,
        wall_time=_time.perf_counter() - start, _conc=out[:, :, :nc], _quad=out[:, :, nc + n_out:],
        _flux=flux, _area=area, _volume=volume, _dosed=out_dosed, _removed=out_removed, _content=content,
        _n_comp=nc, _n_bar=m0.n_bar, scenario=batch.first, _solubility=arrays.solubility[0].copy())


def _estimate_findings(m0: CompiledModel, arrays: ModelArrays, keep: np.ndarray, out: np.ndarray, found: np.ndarray,
                       good: np.ndarray, ferr: np.ndarray, qerr: np.ndarray, atol: float,
                       duration: float) -> dict[int, str]:
    """The subjects (of those ``good``) that RODAS4's own rules would have run again or refused as
    single runs (:meth:`~barrierflow.engine.rosenbrock.RosenbrockIntegrator.run`), with why: a
    cumulative amount below the magnitude floor whose error estimates, summed over the accepted
    steps (``qerr``, mg), exceed :data:`~barrierflow.engine.rosenbrock.FLOOR_EXCESS` times its
    promise (:func:`~barrierflow.engine.ledger.floor_candidates`), a barrier's flux whose largest
    error estimate (``ferr``, mg/h) exceeds :data:`~barrierflow.engine.rosenbrock.FLUX_ESTIMATE_LIMIT`
    times its promise (:func:`~barrierflow.engine.rosenbrock.flux_estimate_ratio`). ``found[:, 7]``
    is each subject's largest amount (:func:`~barrierflow.engine.ledger.population_magnitudes`),
    ``out`` the kept columns (the cumulative amounts last). Vectorised over the subjects: a few
    numpy passes over the kept rows."""
    n_sub = out.shape[0]
    if not n_sub or not out.shape[1] or not good.any():
        return {}
    nd = m0.n_dyn
    nq = m0.n_state - nd
    big = found[:, 7:8]
    why: dict[int, str] = {}
    with np.errstate(invalid="ignore"):
        if nq:
            peak = np.abs(out[:, :, len(keep) - nq:]).max(axis=1)
            cand, ratio = floor_candidates(peak, atol * arrays.scale[:, nd:], big, qerr)
            over = np.where(cand & (ratio > FLOOR_EXCESS), ratio, 0.0)
            for i in np.flatnonzero(good & (over.max(axis=1) > 0.0)).tolist():
                q = int(over[i].argmax())
                why[i] = (f"{int((over[i] > 0).sum())} cumulative amounts below the magnitude floor whose error "
                          f"estimates summed to more than {FLOOR_EXCESS:g} times their promise (worst: "
                          f"{describe_state(m0, nd + q)}, {over[i, q]:.3g} times)")
        if len(m0.grids) and ferr.shape[1]:
            col = {int(s): j for j, s in enumerate(keep)}
            peak = np.empty((n_sub, len(m0.grids)))
            inv_k = arrays.inv_partition
            for b, g in enumerate(m0.grids):
                j = g.out_link
                p, q = int(m0.link_p[j]), int(m0.link_q[j])
                fp = (arrays.link_c[:, j] * inv_k[:, p])[:, None]
                fq = (arrays.link_d[:, j] * inv_k[:, q])[:, None]
                peak[:, b] = np.abs(fp * out[:, :, col[p]] - fq * out[:, :, col[q]]).max(axis=1)
            ratio = flux_estimate_ratio(ferr, peak, big, duration)
            for i in np.flatnonzero(good & (ratio.max(axis=1) > FLUX_ESTIMATE_LIMIT)).tolist():
                b = int(ratio[i].argmax())
                why.setdefault(i, f"the flux of barrier '{m0.barrier_ids[b]}' {FLUX_FINDING}, applied to it, was "
                                  f"{ratio[i, b]:.3g} times the accuracy promised on its peak")
    return why


def simulate_population(scenario: Scenario, variations: Mapping[str, float], n: int, seed: int = 0, *,
                        integrator: RosenbrockIntegrator | ExactIntegrator | None = None,
                        grid: Grid | None = None, threads: int | None = None) -> Population:
    """Draw ``n`` subjects of ``scenario`` (see :func:`sample_scenarios`) and simulate them in parallel.

    Parameters
    ----------
    scenario : Scenario
    variations : mapping of str (or ParamPath, Tied) to float
        Parameter path to coefficient of variation, for example
        ``{"barrier.skin.layer.1.diffusivity": 0.3, "compartment.central.clearance": 0.3}``
        (see :func:`sample_scenarios`).
    n : int
        Number of subjects.
    seed : int
        Seed of the random draws.
    integrator, grid, threads
        As for :func:`simulate_many`.

    Returns
    -------
    Population

    Examples
    --------
    >>> import barrierflow as bf                                        # doctest: +SKIP
    >>> s = bf.load("scenarios/benchmark_patch.toml")                   # doctest: +SKIP
    >>> pop = bf.simulate_population(s, {"compartment.central.clearance": 0.3}, n=100)  # doctest: +SKIP
    >>> pop.percentiles("central").shape                                # doctest: +SKIP
    (3, 1009)
    """
    params, values, factors = _draw(scenario, variations, n, seed)
    bad = refused(scenario, params, values)
    if bad:  # the model's own error for the first subject it refuses
        with_values(scenario, dict(zip(params, values[min(bad)].tolist(), strict=True)))
    return simulate_values(scenario, params, values, integrator=integrator, grid=grid, threads=threads,
                           factors=factors)

