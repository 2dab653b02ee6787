"""Atomic file writing: a file is either the old one or the complete new one, never half.

Every file is first written in full to a temporary file in the same folder, named
``.<name>.<pid>-<random>.tmp``, flushed to disk, and only then renamed over its destination (an
atomic operation on POSIX and Windows). A process killed while writing leaves at most such a
temporary file; the next write of the same destination removes the ones whose process has
ended (:func:`remove_stale_temporaries`).

Files that belong together (the traces CSV and its sidecar) are written by
:func:`atomic_write_together`: every temporary file is complete before the first rename, and the
renames follow in the order given, so the last file named is in place only when all the others
are.

What is promised, and how the waits for the disk are arranged:

- every temporary file is flushed to disk (one ``fsync`` per file) before the first rename, so
  after a crash or a power cut a destination is the old file or the complete new one;
- after the renames the folder is flushed once (``fsync`` of the folder: the renames survive a
  power cut once the call has returned);
- every file but the last is flushed to disk in another thread while the next one is made (a
  content given as a function is called then), written and flushed in the caller's thread, so
  that the waits for the disk overlap each other and the making of the next content; nothing
  is renamed before all are complete;
- the files being replaced are released off the caller's path (POSIX): freeing an old file's
  space waits for the disk on some file systems (those that discard freed blocks at once), and
  no promise depends on it, so the old files are opened before the renames and closed by a
  background thread while the folder is flushed; their space is freed when that thread (or, at
  the latest, the end of the process) closes them.

:func:`in_background` hands other work that lets the interpreter's lock go to a thread of the
same kind; :func:`stage` hands it a whole file: made, written to its temporary file and flushed
to disk there, then given to :func:`atomic_write_together` as that file's content. The traces
CSV is not made that way (:meth:`barrierflow.Result.to_csv` makes it in the caller's thread): a
thread that makes something in Python while the caller runs Python too waits for the
interpreter's lock at every hand-over (up to the 5 ms switch interval when the caller does not
block), which on two shared cores cost more than the overlap saved.
"""

from __future__ import annotations

import contextlib
import os
import queue
import re
import stat
import tempfile
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import TextIO, TypeAlias

Content: TypeAlias = "str | bytes | Callable[[], str | bytes] | Staged"

__all__ = ["Pending", "Staged", "atomic_stream", "atomic_write", "atomic_write_together", "in_background",
           "remove_stale_temporaries", "stage"]

STALE_AFTER_S = 24 * 3600.0
"""Age after which a temporary file is removed even if a process of its number is running (the
number may have been given to another process since)."""


def atomic_write(path: str | os.PathLike[str], data: str | bytes, *, encoding: str = "utf-8") -> Path:
    """Write ``data`` to ``path`` atomically.

    The data goes to a temporary file in the same folder, is flushed to disk, then renamed over
    ``path``. A crash or a full disk leaves the previous file untouched; stale temporary files
    of earlier, killed writes of the same path are removed first.

    Parameters
    ----------
    path : path-like
        Destination.
    data : str or bytes
        Text (encoded with ``encoding``) or bytes.

    Returns
    -------
    pathlib.Path
        The destination.
    """
    return atomic_write_together([(path, data)], encoding=encoding)[0]


def atomic_write_together(files: Sequence[tuple[str | os.PathLike[str], Content]], *,
                          encoding: str = "utf-8") -> list[Path]:
    """Write several files so that each is complete, renaming them into place in the given order.

    Every file is written to its temporary file and flushed to disk before the first rename; if
    anything fails before then, no destination has changed. Put last the file that vouches for
    the others (the sidecar that records the hash of the traces): when it is in place, the
    others are too. After the renames each folder is flushed to disk once.

    Every file but the last is flushed to disk in another thread while the next is made,
    written and flushed, so that the flushes overlap. A content may be given as a function (no
    arguments, returning the text or bytes): it is called when the files before it are written,
    while the last of them is being flushed to disk, so that making it and waiting for the disk
    overlap too. If it fails, no destination has changed either.

    Parameters
    ----------
    files : sequence of (path-like, str, bytes or a function returning one)
        Destinations and their contents, in the order of renaming.

    Returns
    -------
    list of pathlib.Path
        The destinations.
    """
    targets = [Path(p) for p, _ in files]
    staged = [data for _, data in files if isinstance(data, Staged)]
    for target, (_, data) in zip(targets, files, strict=True):
        if isinstance(data, Staged) and data.target != target:
            for s in staged:
                s.discard()
            raise ValueError(f"{target}: got a file staged for {data.target}; a file staged for this destination")
    tidied = {t for s in staged for t in s.tidied}
    _remove_stale([t for t in targets if t not in tidied])
    temps: list[str] = []
    replaced: list[int] = []
    flushing: list[_Flush | Staged] = []  # files being flushed to disk in other threads
    current = targets[0] if targets else Path(".")
    try:
        for i, (target, (_, data)) in enumerate(zip(targets, files, strict=True)):
            if isinstance(data, Staged):  # written and flushed in the other thread (temporary named when done)
                temps.append("")
                flushing.append(data)
                continue
            if callable(data):
                data = data()  # (while the file before it is flushed)
            current = target
            raw = data.encode(encoding) if isinstance(data, str) else data
            tmp, fd = _create_temporary(target)
            temps.append(tmp)
            owned = False
            try:
                _write_all(fd, raw)
                if i + 1 < len(files):  # flushed in the other thread while the next is made and written
                    flushing.append(_Flush(fd, target))
                    owned = True
                else:
                    os.fsync(fd)
            finally:
                if not owned:
                    os.close(fd)
        while flushing:  # every file complete on disk before the first rename
            current = flushing[0].target
            done = flushing.pop(0)
            if isinstance(done, Staged):
                temps[targets.index(done.target)] = done.finish()
            else:
                done.finish()
        if os.name == "posix":
            replaced = _open_existing(targets)
        for i, target in enumerate(targets):
            current = target
            os.replace(temps[i], target)
            temps[i] = ""
        # the replaced files are released while this thread waits for the folder's flush (so the
        # releasing thread rarely needs the interpreter's lock while this one runs)
        _release(replaced)
        replaced = []
        for folder in dict.fromkeys(t.parent for t in targets):
            _sync_folder(folder)
    except BaseException as err:
        for flush in flushing:
            if isinstance(flush, Staged):
                flush.discard()
            else:
                flush.finish(quiet=True)
        for tmp in temps:
            if tmp:
                try:
                    os.unlink(tmp)
                except FileNotFoundError:
                    pass
        if isinstance(err, OSError) and err.filename != str(current):
            # the same kind of error, naming the file the user asked for
            raise type(err)(err.errno, err.strerror or str(err), str(current)) from None
        raise
    finally:
        if replaced:
            _release(replaced)
    return targets


class _Worker:
    """A thread of this process that makes blocking calls (a flush to disk, the closing of a
    replaced file) for the caller, started when first needed (again in a forked child).

    A thread started for each call would cost its start, which on a busy machine takes
    milliseconds; this one waits for work instead.
    """

    def __init__(self, name: str) -> None:
        self.name = name
        self.jobs: queue.SimpleQueue[_Job] = queue.SimpleQueue()
        self.pid = 0
        self.lock = threading.Lock()

    def submit(self, job: _Job) -> bool:
        """Hand ``job`` over; False when no thread can be had (the caller then does it)."""
        with self.lock:
            if self.pid != os.getpid():
                jobs: queue.SimpleQueue[_Job] = queue.SimpleQueue()
                try:
                    threading.Thread(target=_serve, args=(jobs,), name=self.name, daemon=True).start()
                except RuntimeError:  # the interpreter is ending
                    return False
                self.jobs, self.pid = jobs, os.getpid()
        self.jobs.put(job)
        return True


class _Job:
    """One call for a :class:`_Worker`; ``started`` (optional) is set just before the call."""

    __slots__ = ("call", "args", "started", "done", "error")

    def __init__(self, call: Callable[..., object], *args: object, started: bool = False) -> None:
        self.call, self.args = call, args
        self.started = threading.Event() if started else None
        self.done = threading.Event()
        self.error: BaseException | None = None


def _serve(jobs: queue.SimpleQueue[_Job]) -> None:
    while True:
        job = jobs.get()
        if job.started is not None:
            job.started.set()
        try:
            job.call(*job.args)
        except BaseException as err:  # handed to whoever waits for the job
            job.error = err
        job.done.set()


_FLUSHER = _Worker("barrierflow-flush")
_RELEASER = _Worker("barrierflow-release")
_MAKER = _Worker("barrierflow-make")


class Pending:
    """A call made in another thread of this process (:func:`in_background`); :meth:`result`
    waits for it and gives what it returned, or raises what it raised."""

    def __init__(self, call: Callable[..., object], *args: object) -> None:
        self._value: object = None
        self._job = _Job(self._keep, call, args)
        if not _MAKER.submit(self._job):  # no thread can be had: made here
            try:
                self._job.call(*self._job.args)
            except BaseException as err:  # raised by result(), as from the thread
                self._job.error = err
            self._job.done.set()

    def _keep(self, call: Callable[..., object], args: tuple[object, ...]) -> None:
        self._value = call(*args)

    def result(self) -> object:
        self._job.done.wait()
        if self._job.error is not None:
            raise self._job.error
        return self._value


def in_background(call: Callable[..., object], *args: object) -> Pending:
    """Start ``call(*args)`` in another thread of this process (one that waits for such work).

    Worth it for work that lets the interpreter's lock go (compiled code without it, hashing,
    waits for the disk), so that the caller makes something else meanwhile: the traces CSV is
    formatted and hashed that way while the sidecar's metrics are computed. Calls run one at a
    time, in the order given.
    """
    return Pending(call, *args)


class Staged:
    """A file made, written to its temporary file and flushed to disk in another thread
    (:func:`stage`), to be renamed into place by :func:`atomic_write_together` (give it as the
    file's content) or removed by :meth:`discard`.

    Attributes
    ----------
    target : pathlib.Path
        The destination.
    tidied : tuple of pathlib.Path
        The destinations whose stale temporary files the other thread removed first.
    """

    def __init__(self, target: str | os.PathLike[str], make: Callable[..., tuple[str | bytes, object]],
                 args: tuple[object, ...], tidy: Sequence[str | os.PathLike[str]], encoding: str) -> None:
        self.target = Path(target)
        self.tidied = tuple(dict.fromkeys([self.target, *(Path(p) for p in tidy)]))
        self._tmp = ""
        self._value: object = None
        self._failed: BaseException | None = None
        self._made = threading.Event()
        self._taken = False
        self._job = _Job(self._run, make, args, encoding)
        if not _MAKER.submit(self._job):  # no thread can be had: done here
            _serve_one(self._job)

    def _run(self, make: Callable[..., tuple[str | bytes, object]], args: tuple[object, ...], encoding: str) -> None:
        try:
            data, self._value = make(*args)
        except BaseException as err:
            self._failed = err
            raise
        finally:
            self._made.set()
        raw = data.encode(encoding) if isinstance(data, str) else data
        _remove_stale(self.tidied)
        tmp, fd = _create_temporary(self.target)
        self._tmp = tmp
        try:
            _write_all(fd, raw)
            os.fsync(fd)
        finally:
            os.close(fd)

    def value(self) -> object:
        """What ``make`` gave besides the content, once made (the file may still be being written);
        raises what making it raised."""
        self._made.wait()
        if self._failed is not None:
            raise self._failed
        return self._value

    def finish(self) -> str:
        """Wait until the file is complete on disk; its temporary file (the caller renames or removes
        it); raises what failed."""
        self._job.done.wait()
        self._taken = True
        if self._job.error is not None:
            self._unlink()
            raise self._job.error
        return self._tmp

    def discard(self) -> None:
        """Wait for the other thread and remove the temporary file (nothing is renamed)."""
        self._job.done.wait()
        if not self._taken:
            self._unlink()
        self._taken = True

    def _unlink(self) -> None:
        if self._tmp:
            try:
                os.unlink(self._tmp)
            except FileNotFoundError:
                pass
            self._tmp = ""


def stage(target: str | os.PathLike[str], make: Callable[..., tuple[str | bytes, object]], *args: object,
          tidy: Sequence[str | os.PathLike[str]] = (), encoding: str = "utf-8") -> Staged:
    """Make a file's content and write it to a temporary file beside ``target``, flushed to disk,
    in another thread (the one of :func:`in_background`), while the caller does something else.

    ``make(*args)`` returns ``(content, value)``: the text or bytes of the file, and anything the
    caller needs from the making (:meth:`Staged.value` gives it as soon as it is made, before the
    file is on disk). Stale temporary files of ``target`` and of ``tidy`` (other destinations of
    the same write) are removed first. Hand the result to :func:`atomic_write_together` as the
    file's content: the file is renamed into place with the others, after all are complete on
    disk; or call :meth:`Staged.discard` when the write is given up (a failure before it).
    """
    return Staged(target, make, args, tidy, encoding)


def _serve_one(job: _Job) -> None:
    try:
        job.call(*job.args)
    except BaseException as err:  # handed to whoever waits for the job
        job.error = err
    job.done.set()


def _after_fork() -> None:
    # a forked child has none of the parent's threads, and a lock held by one of them at the
    # fork would stay held: the child starts its own workers, with new locks
    for worker in (_FLUSHER, _RELEASER, _MAKER):
        worker.lock = threading.Lock()
        worker.pid = 0


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_after_fork)


class _Flush:
    """``os.fsync`` of a written temporary file in the flushing thread, begun before this returns;
    :meth:`finish` waits for it, closes the file and raises what the flush raised."""

    def __init__(self, fd: int, target: Path) -> None:
        self.fd, self.target = fd, target
        self.job = _Job(os.fsync, fd, started=True)
        if _FLUSHER.submit(self.job):
            # let the thread begin the flush now (one call that waits for the disk without the
            # interpreter's lock), rather than when this thread next lets the lock go
            self.job.started.wait()  # type: ignore[union-attr]
        else:
            try:
                os.fsync(fd)
            except BaseException as err:
                self.job.error = err
            self.job.done.set()

    def finish(self, quiet: bool = False) -> None:
        self.job.done.wait()
        os.close(self.fd)
        if self.job.error is not None and not quiet:
            raise self.job.error


@contextlib.contextmanager
def atomic_stream(path: str | os.PathLike[str], *, encoding: str = "utf-8") -> Iterator[TextIO]:
    """Write a text file piece by piece, atomically: ``with atomic_stream(p) as fh: fh.write(...)``.

    For a file too large to hold in memory first (the rows of 100,000 subjects). The text goes to
    a temporary file beside ``path``; when the ``with`` block ends without an exception the file
    is flushed to disk and renamed over ``path``; otherwise it is removed and ``path`` is left as
    it was.
    """
    target = Path(path)
    remove_stale_temporaries(target)
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.{os.getpid()}-", suffix=".tmp",
                                   dir=target.parent or ".")
    except OSError as err:
        raise type(err)(err.errno, err.strerror or str(err), str(target)) from None
    try:
        try:
            mode = os.stat(target).st_mode & 0o7777
        except FileNotFoundError:
            mode = 0o666 & ~_umask()
        os.chmod(tmp, mode)
        with os.fdopen(fd, "w", encoding=encoding, newline="") as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
        tmp = ""
        _sync_folder(target.parent)
    finally:
        if tmp:
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass


def _create_temporary(target: Path) -> tuple[str, int]:
    """A new temporary file beside ``target``, with the mode the destination will have: (path, descriptor)."""
    folder = str(target.parent) or "."
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0) | getattr(os, "O_CLOEXEC", 0)
    while True:
        tmp = os.path.join(folder, f".{target.name}.{os.getpid()}-{os.urandom(6).hex()}.tmp")
        try:
            fd = os.open(tmp, flags, 0o600)  # private until it has the mode below
            break
        except FileExistsError:
            continue
        except OSError as err:  # name the file the user asked for, not the temporary one
            raise type(err)(err.errno, err.strerror or str(err), str(target)) from None
    try:
        # the mode of the file it replaces, or the mode a new file normally gets (the umask)
        try:
            mode = os.stat(target).st_mode & 0o7777
        except FileNotFoundError:
            mode = 0o666 & ~_umask()
        os.chmod(fd if os.chmod in os.supports_fd else tmp, mode)
    except BaseException:
        os.close(fd)
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return tmp, fd


def _write_all(fd: int, raw: bytes) -> None:
    view = memoryview(raw)
    while view:
        view = view[os.write(fd, view):]


def remove_stale_temporaries(target: str | os.PathLike[str]) -> list[Path]:
    """Remove temporary files that killed writes of ``target`` left behind.

    A temporary file ``.<name>.<pid>-<random>.tmp`` is stale when no process with that number
    runs any more, or when it is older than :data:`STALE_AFTER_S`. Files of a write still in
    progress (this process, or another live one) are left alone.

    Returns
    -------
    list of pathlib.Path
        The files removed.
    """
    return _remove_stale([Path(target)])


def _remove_stale(targets: Sequence[Path]) -> list[Path]:
    """:func:`remove_stale_temporaries` of several destinations, each folder read once."""
    removed: list[Path] = []
    by_folder: dict[Path, list[str]] = {}
    for target in targets:
        folder = target.parent if str(target.parent) else Path(".")
        by_folder.setdefault(folder, []).append(re.escape(f".{target.name}."))
    now = time.time()
    for folder, names in by_folder.items():
        pattern = re.compile(f"(?:{'|'.join(names)})" + r"(\d+)-[A-Za-z0-9_]+\.tmp\Z")
        try:
            entries = list(os.scandir(folder))
        except OSError:
            continue
        for entry in entries:
            m = pattern.match(entry.name)
            if m is None:
                continue
            pid = int(m.group(1))
            try:
                age = now - entry.stat(follow_symlinks=False).st_mtime
            except OSError:
                continue
            if pid == os.getpid() or (age < STALE_AFTER_S and (os.name == "nt" or _running(pid))):
                # (Windows: os.kill would end the process, so only the age tells there)
                continue
            try:
                os.unlink(entry.path)
                removed.append(Path(entry.path))
            except OSError:
                pass
    return removed


def _running(pid: int) -> bool:
    """True when a process with this number exists (on this machine)."""
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OSError):
        return True  # it exists (another user's), or it cannot be told: keep its files
    return True


def _sync_folder(folder: Path) -> None:
    """Flush a folder's entries to disk, so that renames survive a power cut (POSIX only)."""
    try:
        fd = os.open(folder if str(folder) else ".", os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _open_existing(targets: Sequence[Path]) -> list[int]:
    """Descriptors of the destinations that exist (regular files), so that the renames do not free them."""
    fds = []
    for target in targets:
        try:
            fd = os.open(target, os.O_RDONLY | getattr(os, "O_CLOEXEC", 0) | getattr(os, "O_NONBLOCK", 0))
        except OSError:
            continue
        try:
            regular = stat.S_ISREG(os.fstat(fd).st_mode)
        except OSError:
            regular = False
        if regular:
            fds.append(fd)
        else:
            os.close(fd)
    return fds


def _release(fds: list[int]) -> None:
    """Close the descriptors of replaced files in the releasing thread (freeing their space there),
    all in one job: each job handed over wakes that thread, which on a busy machine can cost the
    caller its turn on the processor."""
    if fds and not _RELEASER.submit(_Job(_close_all, tuple(fds))):
        _close_all(tuple(fds))


def _close_all(fds: tuple[int, ...]) -> None:
    """Close every descriptor, even when closing one fails (the first failure is raised after)."""
    failed: OSError | None = None
    for fd in fds:
        try:
            os.close(fd)
        except OSError as err:
            failed = failed or err
    if failed is not None:
        raise failed


def _umask() -> int:
    """The process's umask (read by setting it and putting it back)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask
