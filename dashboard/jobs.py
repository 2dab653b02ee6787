"""Background work of the dashboard: Dash's background callbacks, run in threads, with the
computing done in a few worker processes.

Why not Dash's ``DiskcacheManager``: it forks the whole server process for every job, and a
fork taken while another server thread holds an SQLite connection or a lock can leave the
child (and the job store) waiting forever; under 10 to 20 concurrent sessions it did (runs
never answered, ``diskcache.Timeout`` in the jobs). Its job key is also a hash of the
callback's arguments, so identical requests from two pages shared one result.

Here:

- :class:`JobManager` is a Dash background-callback manager (the public base class
  ``dash.background_callback.managers.BaseBackgroundCallbackManager``). Each job runs in a
  thread of the server; its result is kept in memory under its own job id, which the page
  polls with, so two jobs never see each other's result even with identical arguments. A
  job counts as running until its result has been collected (so a result that lands between
  two polls is never taken for a cancelled job). ``dash.ctx`` is not set inside a job:
  callbacks that run in the background receive what they need as inputs and states.
- :class:`Workers` runs module-level functions (``dashboard.runs.execute``) in a small pool
  of worker processes started with the ``spawn`` method: clean interpreters that inherit no
  thread, lock or open file of the server. Compiled engine code thus never holds the server's
  interpreter lock, a cancelled run ends by stopping its worker (a fresh one takes its place),
  and a crash of a worker fails that run, not the server.
"""

from __future__ import annotations

import multiprocessing
import threading
import time
import traceback
import uuid
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

from dash.background_callback.managers import BaseBackgroundCallbackManager
from dash.exceptions import PreventUpdate

__all__ = ["Cancelled", "JobManager", "WorkerFailed", "Workers", "current_cancel"]

RESULT_TTL_S = 3600.0
"""Results nobody collects (a closed page) are forgotten after this long."""


class Cancelled(Exception):
    """The job was cancelled from the page."""


class WorkerFailed(RuntimeError):
    """A worker process ended without an answer (it crashed or was stopped)."""


_local = threading.local()


def current_cancel() -> threading.Event | None:
    """The cancel flag of the job running in this thread (None outside a job)."""
    return getattr(_local, "cancel", None)


# ============================================================================ worker processes
def _worker_loop(conn: Any) -> None:  # pragma: no cover - runs in the worker process
    """Answer calls sent over ``conn`` until it closes: ``(func, args, kwargs)`` ->
    ``("progress", fraction)`` messages, then ``("ok", result)`` or ``("error", exception, text)``."""
    last = [0.0]

    def progress(fraction: float) -> None:
        now = time.monotonic()
        if now - last[0] > 0.2 or fraction >= 1.0:
            last[0] = now
            conn.send(("progress", float(fraction)))

    while True:
        try:
            func, args, kwargs, wants_progress = conn.recv()
        except (EOFError, OSError):
            return
        try:
            if wants_progress:
                kwargs = dict(kwargs, progress=progress)
            result = func(*args, **kwargs)
        except BaseException as err:  # noqa: BLE001 - every failure goes back to the caller
            text = "".join(traceback.format_exception(err))
            try:
                conn.send(("error", err, text))
            except Exception:  # noqa: BLE001 - an exception that does not pickle goes back as text
                conn.send(("error", RuntimeError(f"{type(err).__name__}: {err}"), text))
        else:
            conn.send(("ok", result))


@dataclass
class _Worker:
    process: Any
    conn: Any


class Workers:
    """A small pool of worker processes (``spawn`` start method) for the dashboard's computing.

    Parameters
    ----------
    processes : int
        How many calls run at the same time (more wait for a free worker).
    """

    def __init__(self, processes: int = 2):
        self.size = max(1, int(processes))
        self._ctx = multiprocessing.get_context("spawn")
        self._idle: list[_Worker] = []
        self._started = 0
        self._lock = threading.Condition()

    def _start(self) -> _Worker:
        parent, child = self._ctx.Pipe(duplex=True)
        process = self._ctx.Process(target=_worker_loop, args=(child,), daemon=True, name="barrierflow-worker")
        process.start()
        child.close()
        return _Worker(process, parent)

    def _take(self) -> _Worker:
        with self._lock:
            while not self._idle and self._started >= self.size:
                self._lock.wait()
            if self._idle:
                return self._idle.pop()
            self._started += 1
        try:
            return self._start()
        except BaseException:
            with self._lock:
                self._started -= 1
                self._lock.notify()
            raise

    def _give_back(self, worker: _Worker | None) -> None:
        with self._lock:
            if worker is None:
                self._started -= 1
            else:
                self._idle.append(worker)
            self._lock.notify()

    @staticmethod
    def _stop(worker: _Worker) -> None:
        worker.conn.close()
        if worker.process.is_alive():
            worker.process.terminate()
        worker.process.join(timeout=5)
        if worker.process.is_alive():
            worker.process.kill()
            worker.process.join(timeout=5)

    def call(self, func: Callable[..., Any], *args: Any, progress: Callable[[float], None] | None = None,
             cancel: threading.Event | None = None, **kwargs: Any) -> Any:
        """``func(*args, **kwargs)`` in a worker process; its answer or its exception.

        ``func`` must be importable by name (a module-level function) and its arguments and
        result must pickle. With ``progress``, ``func`` is given a ``progress`` keyword (a
        function of the fraction done) whose calls are passed on. ``cancel`` (default: the
        current background job's flag) stops the worker when set; :class:`Cancelled` is raised.

        Raises
        ------
        Cancelled
        WorkerFailed
            When the worker process ended without an answer.
        """
        cancel = cancel if cancel is not None else current_cancel()
        worker = self._take()
        try:
            worker.conn.send((func, args, kwargs, progress is not None))
            while True:
                while not worker.conn.poll(0.05):
                    if cancel is not None and cancel.is_set():
                        raise Cancelled("cancelled")
                    if not worker.process.is_alive():
                        raise WorkerFailed(f"the worker process ended (exit code {worker.process.exitcode}) "
                                           "before it answered")
                try:
                    kind, *payload = worker.conn.recv()
                except (EOFError, OSError):
                    worker.process.join(timeout=5)
                    raise WorkerFailed(f"the worker process ended (exit code {worker.process.exitcode}) "
                                       "before it answered") from None
                if kind == "progress":
                    if progress is not None:
                        progress(payload[0])
                    continue
                result = payload[0]
                self._give_back(worker)
                worker = None
                if kind == "error":
                    raise result
                return result
        finally:
            if worker is not None:  # cancelled or broken: this worker is not reused
                self._stop(worker)
                self._give_back(None)

    def warm(self, func: Callable[..., Any], *args: Any, wait: bool = False) -> None:
        """Start every worker and call ``func(*args)`` in it, in the background (for example, to
        load the compiled engine before the first run); with ``wait``, return when all are done."""
        barrier = threading.Barrier(self.size)

        def one() -> None:
            try:
                self.call(func, *args)
                barrier.wait(timeout=120)  # hold the worker, so that the next thread starts another
            except Exception:  # noqa: BLE001 - warming is a courtesy; a real run reports its own failure
                pass
        threads = [threading.Thread(target=one, name="barrierflow-warm", daemon=True) for _ in range(self.size)]
        for t in threads:
            t.start()
        if wait:
            for t in threads:
                t.join()

    def close(self) -> None:
        """Stop the idle workers."""
        with self._lock:
            idle, self._idle = self._idle, []
            self._started -= len(idle)
        for worker in idle:
            self._stop(worker)


# ============================================================================ Dash's side
@dataclass
class _Job:
    id: str
    key: str
    cancel: threading.Event = field(default_factory=threading.Event)
    progress: list[Any] | None = None
    result: Any = BaseBackgroundCallbackManager.UNDEFINED
    done_at: float | None = None
    collected: bool = False


class JobManager(BaseBackgroundCallbackManager):
    """Dash background callbacks run in threads of the server, their results kept in memory.

    Parameters
    ----------
    threads : int
        Most jobs running at once (more wait). Jobs mostly wait for :class:`Workers`.
    """

    def __init__(self, threads: int = 16):
        self._jobs: dict[str, _Job] = {}
        self._by_key: dict[str, str] = {}
        self._lock = threading.Lock()
        self._pool = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="barrierflow-job")
        self._secret: bytes | None = None
        super().__init__(cache_by=None)

    # ---------------------------------------------------------------- jobs
    def make_job_fn(self, fn: Callable[..., Any], progress: bool, key: str | None = None) -> Callable[..., None]:
        def job_fn(job: _Job, args: Any) -> None:
            def set_progress(value: Any) -> None:
                job.progress = list(value) if isinstance(value, (list, tuple)) else [value]

            _local.cancel = job.cancel
            try:
                extra = [set_progress] if progress else []
                if isinstance(args, dict):
                    result = fn(*extra, **args)
                elif isinstance(args, (list, tuple)):
                    result = fn(*extra, *args)
                else:
                    result = fn(*extra, args)
            except PreventUpdate:
                result = {"_dash_no_update": "_dash_no_update"}
            except Cancelled:
                result = self.UNDEFINED
            except Exception as err:  # noqa: BLE001 - Dash shows it as the callback's error
                result = {"background_callback_error": {"msg": str(err), "tb": traceback.format_exc()}}
            finally:
                _local.cancel = None
            with self._lock:
                job.result = result
                job.done_at = time.monotonic()
        return job_fn

    def call_job_fn(self, key: str, job_fn: Callable[..., None], args: Any, context: Any) -> str:
        job = _Job(id=uuid.uuid4().hex, key=key)
        with self._lock:
            self._prune()
            self._jobs[job.id] = job
            self._by_key[key] = job.id
        self._pool.submit(job_fn, job, args)
        return job.id

    def _prune(self) -> None:
        now = time.monotonic()
        for jid, job in list(self._jobs.items()):
            if job.done_at is not None and now - job.done_at > RESULT_TTL_S:
                del self._jobs[jid]
                if self._by_key.get(job.key) == jid:
                    del self._by_key[job.key]

    def _job(self, key: str | None, job: Any = None) -> _Job | None:
        if job is not None:
            return self._jobs.get(str(job))
        jid = self._by_key.get(key or "")
        return self._jobs.get(jid) if jid else None

    def terminate_job(self, job: Any) -> None:
        with self._lock:
            found = self._job(None, job)
            if found is not None:
                found.cancel.set()
                found.collected = True

    def terminate_unhealthy_job(self, job: Any) -> bool:
        return False

    def job_running(self, job: Any) -> bool:
        with self._lock:
            found = self._job(None, job)
            return found is not None and not found.collected and not found.cancel.is_set()

    def get_progress(self, key: str) -> Any:
        with self._lock:
            found = self._job(key)
            if found is None or found.progress is None:
                return None
            value, found.progress = found.progress, None
            return value

    def result_ready(self, key: str) -> bool:
        with self._lock:
            found = self._job(key)
            return found is not None and found.result is not self.UNDEFINED

    def get_result(self, key: str, job: Any) -> Any:
        with self._lock:
            found = self._job(key, job)
            if found is None or found.result is self.UNDEFINED:
                if found is not None and found.done_at is not None:  # cancelled: nothing will come
                    found.collected = True
                return self.UNDEFINED
            found.collected = True
            return found.result

    def get_updated_props(self, key: str) -> dict[str, Any]:
        return {}

    def clear_cache_entry(self, key: str) -> None:
        with self._lock:
            jid = self._by_key.pop(key, None)
            if jid:
                self._jobs.pop(jid, None)

    def get_or_create_signing_secret(self, generate: Callable[[], bytes]) -> bytes:
        with self._lock:
            if self._secret is None:
                self._secret = generate()
            return self._secret
