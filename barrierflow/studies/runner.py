"""Where a study runs: chunks of subjects, on all local cores or on a dask.distributed cluster.

Every study (a population, a sweep, a sensitivity analysis) is a table of subjects: the base
scenario and, for each subject, the values of a few parameters. The table is cut into chunks
(:class:`ChunkTask`: the first subject's number and the values of each), and each chunk is
simulated by :func:`run_chunk`, a pure function of its task:

- the values are checked by the model's rules for all subjects at once (a value the model
  refuses makes that subject fail, with the model's message), and the subjects are compiled
  together, from the values, and simulated by the engine's population runner, in parallel
  compiled threads (:func:`simulate_subjects`, the one place that calls the engine for a study);
- the traces of the subjects that finished go into the compact histograms of a quantile sketch
  (:mod:`barrierflow.analysis.sketch`), and each subject's metrics are computed by the rules of a
  single run (:func:`barrierflow.analysis.population.population_metrics`).

:func:`run_tasks` runs the chunks here, one after the other (each uses every core), or, given
``scheduler`` (the address of a dask.distributed scheduler, or a ``distributed.Client``), on
the cluster, with at most a few chunks in flight per worker thread, and gives the outcomes back
in the order of the tasks. Since a chunk's outcome depends only on its task, and the sketches
merge exactly (whole-number counts), a study gives bit-identical results whatever the chunk size
and wherever it runs, on machines of one kind (a different processor may round the last bit of a
floating-point operation differently).

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review.
"""

from __future__ import annotations

import threading
import time
import uuid
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from ..analysis.population import MetricTable, metric_layout, population_columns, population_metrics
from ..analysis.sketch import ACCURACY, BINS, Counts, count_values
from ..engine.grid import Grid
from ..engine.integrators import integrator_from_name
from ..engine.population import Population, simulate_values, take_rows
from ..errors import BarrierflowError, ScenarioError
from ..model import Scenario
from ..model.cohort import refused, stacked
from ..model.paths import Param, with_values
from ..units import unit_factor

__all__ = ["ChunkOutcome", "ChunkTask", "Evaluation", "chunk_size_for", "evaluate", "run_chunk", "run_tasks",
           "Subjects", "simulate_subjects", "solver_accuracy"]

CHUNK_BYTES = 48e6
"""Target size of a chunk's traces in memory (the chunk size is chosen from it)."""

CONNECT_TIMEOUT = "10s"
"""How long to wait for a dask.distributed scheduler to answer."""

_ENGINE = threading.Lock()
"""One engine call at a time per process: each call already uses every core (a thread per core,
:func:`barrierflow.engine.population.simulate_values`), so calls side by side would only take
turns on the cores and hold more subjects' traces in memory at once."""


@dataclass(frozen=True, eq=False)
class ChunkTask:
    """A chunk of subjects to simulate: everything a worker needs (it pickles).

    Parameters
    ----------
    base : Scenario
        The scenario every subject starts from (without its variability tables).
    params : tuple of Param
        The parameters set per subject.
    first : int
        Number of the first subject (from 1).
    values : ndarray (count, len(params))
        The parameters' values for each subject, internal units.
    traces : bool
        Also count the traces into sketch histograms (a population; sweeps and sensitivity need
        only the metrics).
    accuracy, bins
        Of the sketch (:mod:`barrierflow.analysis.sketch`).
    integrator : str or None
        ``"exact"`` or ``"rodas"`` (default: the engine's choice).
    """

    base: Scenario
    params: tuple[Param, ...]
    first: int
    values: np.ndarray
    traces: bool = True
    accuracy: float = ACCURACY
    bins: int = BINS
    integrator: str | None = None

    @property
    def count(self) -> int:
        """Number of subjects."""
        return len(self.values)


@dataclass(frozen=True, eq=False)
class ChunkOutcome:
    """What a worker sends back for a chunk: small whatever the number of output times.

    Attributes
    ----------
    first, count : int
        The subjects (numbers from 1).
    ok : ndarray of bool (count,)
        True when the subject's run finished.
    messages : tuple of str
        For each subject, ``""`` or why it failed.
    metrics : MetricTable
        Every metric of every subject (NaN for a failed one).
    metric_counts : Counts
        The metrics of the subjects that finished, as sketch histograms.
    trace_names : tuple of str
        Headers of the trace columns (the traces CSV's, without the time).
    trace_counts : tuple of Counts
        One histogram per trace column (over the output times), for the subjects that finished.
    times : ndarray
        Output times, in the ``[output]`` time unit.
    time_header : str
    wall_time : float, s
    """

    first: int
    count: int
    ok: np.ndarray
    messages: tuple[str, ...]
    metrics: MetricTable
    metric_counts: Counts
    trace_names: tuple[str, ...]
    trace_counts: tuple[Counts, ...]
    times: np.ndarray
    time_header: str
    wall_time: float


def simulate_subjects(base: Scenario, params: Sequence[Param], values: np.ndarray, *,
                      integrator: str | None = None) -> tuple[Population | None, Sequence[Scenario | None], list[str]]:
    """Simulate the subjects given by parameter values: the one call of the engine for a study.

    The values are checked by the model's rules for every subject at once
    (:func:`barrierflow.model.cohort.refused`); the subjects it accepts are compiled together and
    run in the engine's compiled population kernels
    (:func:`barrierflow.engine.population.simulate_values`), without a scenario per subject.

    Parameters
    ----------
    base : Scenario
    params : sequence of Param
    values : ndarray (n, len(params))
        Internal units.
    integrator : str or None
        ``"exact"`` or ``"rodas"``; None: the engine's choice.

    Returns
    -------
    population : Population or None
        The subjects the model accepts, in order (None when it accepts none).
    scenarios : sequence of Scenario or None
        Each subject's scenario (None where the model refused its values), built when first read.
    messages : list of str
        ``""`` for a subject that finished, else why it failed (refused values or a failed run).
    """
    params = tuple(params)
    values = np.asarray(values, dtype=float).reshape(len(values), len(params))
    n = len(values)
    bad = refused(base, params, values)
    messages = [f"the model refused its values: {bad[i]}" if i in bad else "" for i in range(n)]
    scenarios = Subjects(base, params, values, frozenset(bad))
    built = np.array([i for i in range(n) if i not in bad], dtype=np.int64)
    if not len(built):
        return None, scenarios, messages
    engine = integrator_from_name(integrator) if integrator else None
    with _ENGINE:
        try:
            pop = simulate_values(base, params, values[built], integrator=engine)
        except BarrierflowError as err:
            # the population runner refused the set as a whole: run each subject alone, so
            # that only the subjects at fault fail
            rows = [_alone(base, params, values[i:i + 1], engine, err) for i in built.tolist()]
            try:
                pop = take_rows(rows)
            except ScenarioError as none_ran:
                # no subject ran alone either: the set's own error (the model's rule), naming the
                # scenario's file as every refusal of an input does
                raise (err if isinstance(err, ScenarioError) else none_ran).within(file=base.source) from None
    for k, i in enumerate(built.tolist()):
        if pop.status[k] != 0:
            messages[i] = pop.messages[k]
    return pop, scenarios, messages


class Subjects(Sequence):
    """Each subject's scenario (None for one the model refused), built from its values when first read."""

    def __init__(self, base: Scenario, params: tuple[Param, ...], values: np.ndarray, refused: frozenset[int]):
        self._base, self._params, self._values, self._refused = base, params, values, refused
        self._made: dict[int, Scenario] = {}

    def __len__(self) -> int:
        return len(self._values)

    def __getitem__(self, i):
        if isinstance(i, slice):
            return [self[k] for k in range(*i.indices(len(self)))]
        i = range(len(self))[i]
        if i in self._refused:
            return None
        if i not in self._made:
            self._made[i] = with_values(self._base, dict(zip(self._params, self._values[i].tolist(), strict=True)))
        return self._made[i]

    @property
    def built(self) -> np.ndarray:
        """The subjects the model accepts (the rows of the population), in order."""
        return np.array([i for i in range(len(self)) if i not in self._refused], dtype=np.int64)

    def accepted(self) -> Subjects:
        """The subjects the model accepts, in order (as the population's rows)."""
        return Subjects(self._base, self._params, self._values[self.built], frozenset())

    def stacked(self, rows: Sequence[int]) -> Scenario:
        """The scenario of the subjects ``rows`` (none refused) with a value per subject
        (:func:`barrierflow.model.cohort.stacked`), without building a scenario per subject."""
        rows = np.asarray(rows, dtype=np.int64)
        if any(int(i) in self._refused for i in rows):
            raise ValueError("stacked: a refused subject has no values the model accepts")
        return stacked(self._base, self._params, self._values[rows])


_GRID = Grid()


def _alone(base: Scenario, params: tuple[Param, ...], row: np.ndarray, engine,
           first_error: BarrierflowError) -> tuple[Population | None, int | str]:
    try:
        return simulate_values(base, params, row, integrator=engine), 0
    except BarrierflowError:
        return None, _one_line(first_error)


def _one_line(err: BaseException) -> str:
    return " / ".join(str(err).splitlines())


def run_chunk(task: ChunkTask) -> ChunkOutcome:
    """Simulate one chunk and reduce it to its outcome (see the module docstring). Picklable, pure."""
    start = time.perf_counter()
    pop, scenarios, messages = simulate_subjects(task.base, task.params, task.values, integrator=task.integrator)
    n = task.count
    ok = np.array([m == "" for m in messages], dtype=bool)
    built = scenarios.built
    first_ok = scenarios[int(built[0])] if len(built) else task.base
    # the same columns in every chunk, whichever subjects it holds (the header of SUBJECTS.csv,
    # the sketches of the metrics and the chunks joined in order rely on it)
    layout = metric_layout(task.base, task.params)
    if pop is not None:
        table = population_metrics(pop, scenarios.accepted(), layout=layout)
        values = np.full((n, len(table.names)), np.nan)
        values[built] = table.values
        notes = np.full(n, "", dtype=object)
        notes[built] = table.notes
        metrics = MetricTable(table.names, table.units, values, notes)
    else:
        metrics = MetricTable(*layout, np.full((n, len(layout[0])), np.nan), np.full(n, "", dtype=object))
    metrics.values[~ok] = np.nan
    metrics.notes[~ok] = ""  # (a failed subject's status says why)
    metric_counts = count_values(metrics.values[ok], task.accuracy, task.bins)
    names: list[str] = []
    counts: list[Counts] = []
    columns = population_columns(pop, first_ok) if pop is not None else None
    if columns is not None:
        times, time_header = columns[0][1], columns[0][0]
    else:
        unit = first_ok.output_units.time
        times = np.asarray(first_ok.output_grid(), dtype=float) * unit_factor("time", unit)
        time_header = f"time [{unit}]"
    if task.traces and columns is not None:
        built_ok = ok[built]
        for header, block in columns[1:]:
            names.append(header)
            counts.append(count_values(block[built_ok], task.accuracy, task.bins))
    return ChunkOutcome(task.first, n, ok, tuple(messages), metrics, metric_counts, tuple(names), tuple(counts),
                        np.asarray(times), time_header, time.perf_counter() - start)


def chunk_size_for(scenario: Scenario, n: int, traces: bool = True) -> int:
    """A chunk size that keeps a chunk's traces near :data:`CHUNK_BYTES` (8 to 2,000 subjects)."""
    n_t = len(scenario.output_grid())
    cols = 6 * len(scenario.compartments) + 4 * len(scenario.barriers) + 8
    per_subject = n_t * cols * 8 * (3 if traces else 2)
    size = int(CHUNK_BYTES // max(per_subject, 1))
    return max(8, min(2000, size, n))


# ---------------------------------------------------------------- running the chunks
def run_tasks(tasks: Iterable[ChunkTask], *, scheduler: object | None = None,
              progress: Callable[[int], None] | None = None) -> Iterator[ChunkOutcome]:
    """Run the chunks, here or on a dask.distributed cluster, giving the outcomes in task order.

    Parameters
    ----------
    tasks : iterable of ChunkTask
        Made lazily if a generator: only the chunks in flight are held.
    scheduler : str or distributed.Client, optional
        The address of a dask.distributed scheduler (``tcp://10.0.0.5:8786``) or a client; None
        runs here, one chunk after another (each on every core).
    progress : callable, optional
        Called with the number of subjects of each chunk as it is done.

    Yields
    ------
    ChunkOutcome
    """
    if scheduler is None:
        for task in tasks:
            out = run_chunk(task)
            if progress is not None:
                progress(out.count)
            yield out
        return
    yield from _run_on_cluster(tasks, scheduler, progress)


def _client(scheduler: object):
    try:
        from distributed import Client
    except ImportError:
        raise ScenarioError.single("--scheduler", repr(scheduler),
                                   "running on a cluster needs dask.distributed; install it with "
                                   "pip install 'barrierflow[cluster]'") from None
    if isinstance(scheduler, Client):
        return scheduler, False
    if not isinstance(scheduler, str) or not scheduler.strip():
        raise ScenarioError.single("--scheduler", repr(scheduler), "the address of a dask.distributed scheduler, "
                                   "such as tcp://10.0.0.5:8786")
    try:
        return Client(scheduler.strip(), timeout=CONNECT_TIMEOUT, set_as_default=False), True
    except (OSError, TimeoutError) as err:
        raise ScenarioError.single("--scheduler", repr(scheduler), f"no dask.distributed scheduler answered there "
                                   f"({err}); start one with 'dask scheduler' and workers with 'dask worker "
                                   "ADDRESS'") from None


def _run_on_cluster(tasks: Iterable[ChunkTask], scheduler: object,
                    progress: Callable[[int], None] | None) -> Iterator[ChunkOutcome]:
    from distributed import as_completed

    client, own = _client(scheduler)
    try:
        threads = max(1, sum(client.nthreads().values()))
        window = 2 * threads
        tag = uuid.uuid4().hex[:12]
        finished = as_completed(loop=client.loop)
        index: dict[str, int] = {}
        done: dict[int, ChunkOutcome] = {}
        it = iter(tasks)
        submitted = 0
        nxt = 0
        in_flight = 0
        exhausted = False
        while True:
            while not exhausted and in_flight + len(done) < window:
                task = next(it, None)
                if task is None:
                    exhausted = True
                    break
                key = f"barrierflow-chunk-{tag}-{submitted}"
                index[key] = submitted
                finished.add(client.submit(run_chunk, task, key=key, pure=False))
                submitted += 1
                in_flight += 1
            if nxt in done:
                yield done.pop(nxt)
                nxt += 1
                continue
            if in_flight == 0:
                return
            fut = next(finished)
            in_flight -= 1
            out = fut.result()  # an exception on the worker is raised here
            if progress is not None:
                progress(out.count)
            done[index.pop(fut.key)] = out
    finally:
        if own:
            client.close()


# ---------------------------------------------------------------- metrics of given points
@dataclass(frozen=True, eq=False)
class Evaluation:
    """The metrics of given subjects (a sweep's grid, a sensitivity design).

    Attributes
    ----------
    metrics : MetricTable
        One row per subject, in the ``[output]`` units; NaN for a failed subject.
    ok : ndarray of bool
    messages : tuple of str
        ``""`` or why the subject failed.
    """

    metrics: MetricTable
    ok: np.ndarray
    messages: tuple[str, ...]


def evaluate(base: Scenario, params: Sequence[Param], values: np.ndarray, *, scheduler: object | None = None,
             progress: Callable[[int, int], None] | None = None, integrator: str | None = None,
             chunk: int | None = None) -> Evaluation:
    """Every metric of each subject given by its parameter values (rows of ``values``, internal units).

    The subjects run in chunks, here or on a cluster (:func:`run_tasks`), without traces.
    """
    values = np.asarray(values, dtype=float)
    n = len(values)
    size = chunk or chunk_size_for(base, n, traces=False)
    tasks = (ChunkTask(base, tuple(params), first + 1, values[first:first + size], traces=False,
                       integrator=integrator) for first in range(0, n, size))
    rows: list[np.ndarray] = []
    ok: list[np.ndarray] = []
    messages: list[str] = []
    names: tuple[str, ...] = ()
    units: tuple[str, ...] = ()
    done = 0
    for out in run_tasks(tasks, scheduler=scheduler):
        names, units = out.metrics.names, out.metrics.units
        rows.append(out.metrics.values)
        ok.append(out.ok)
        messages.extend(out.messages)
        done += out.count
        if progress is not None:
            progress(done, n)
    return Evaluation(MetricTable(names, units, np.concatenate(rows) if rows else np.zeros((0, 0))),
                      np.concatenate(ok) if ok else np.zeros(0, dtype=bool), tuple(messages))


def solver_accuracy(base: Scenario, integrator: str | None = None) -> float:
    """The relative accuracy of a subject's metrics on the path the engine takes (for difference steps).

    RODAS4: its relative tolerance; the exact paths: 1e-10 (their round-off, with a margin).
    """
    from ..engine.compiled import compile_scenario
    from ..engine.exact_chain import chain_order
    from ..engine.rosenbrock import RosenbrockIntegrator

    rodas = RosenbrockIntegrator().rtol
    if integrator == "rodas":
        return rodas
    try:
        exact = chain_order(compile_scenario(base, _GRID)) is not None
    except BarrierflowError:
        exact = False
    return 1e-10 if exact else rodas
