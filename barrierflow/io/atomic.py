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
"""

from __future__ import annotations

import contextlib
import os
import re
import tempfile
import time
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import TextIO

__all__ = ["atomic_stream", "atomic_write", "atomic_write_together", "remove_stale_temporaries"]

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


def atomic_write_together(files: Sequence[tuple[str | os.PathLike[str], str | bytes]], *,
                          encoding: str = "utf-8") -> list[Path]:
    """Write several files so that each is complete, renaming them into place in the given order.

    Every file is written to its temporary file and flushed to disk before the first rename; if
    anything fails before then, no destination has changed. Put last the file that vouches for
    the others (the sidecar that records the hash of the traces): when it is in place, the
    others are too.

    Parameters
    ----------
    files : sequence of (path-like, str or bytes)
        Destinations and their contents, in the order of renaming.

    Returns
    -------
    list of pathlib.Path
        The destinations.
    """
    targets = [Path(p) for p, _ in files]
    for target in targets:
        remove_stale_temporaries(target)
    temps: list[str] = []
    current = targets[0] if targets else Path(".")
    try:
        for target, (_, data) in zip(targets, files, strict=True):
            current = target
            raw = data.encode(encoding) if isinstance(data, str) else data
            temps.append(_write_temporary(target, raw))
        for i, target in enumerate(targets):
            current = target
            os.replace(temps[i], target)
            temps[i] = ""
        for folder in {t.parent for t in targets}:
            _sync_folder(folder)
    except BaseException as err:
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
    return targets


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


def _write_temporary(target: Path, raw: bytes) -> str:
    """Write ``raw`` to a new temporary file beside ``target``, flushed to disk; return its path."""
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.{os.getpid()}-", suffix=".tmp",
                                   dir=target.parent or ".")
    except OSError as err:  # name the file the user asked for, not the temporary one
        raise type(err)(err.errno, err.strerror or str(err), str(target)) from None
    try:
        # mkstemp makes the file private (0600); give it the mode a new file normally gets
        # (the user's umask), or the mode of the file it replaces
        try:
            mode = os.stat(target).st_mode & 0o7777
        except FileNotFoundError:
            mode = 0o666 & ~_umask()
        os.chmod(tmp, mode)
        with os.fdopen(fd, "wb") as fh:
            fh.write(raw)
            fh.flush()
            os.fsync(fh.fileno())
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return tmp


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
    target = Path(target)
    folder = target.parent if str(target.parent) else Path(".")
    pattern = re.compile(re.escape(f".{target.name}.") + r"(\d+)-[A-Za-z0-9_]+\.tmp\Z")
    removed = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    now = time.time()
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


def _umask() -> int:
    """The process's umask (read by setting it and putting it back)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask
