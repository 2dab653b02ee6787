"""Atomic file writing: a file is either the old one or the complete new one, never half."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path


def atomic_write(path: str | os.PathLike[str], data: str | bytes, *, encoding: str = "utf-8") -> Path:
    """Write ``data`` to ``path`` atomically.

    The data goes to a temporary file in the same folder, is flushed to disk, then renamed over
    ``path`` (an atomic operation on POSIX and Windows). A crash or a full disk leaves the
    previous file untouched.

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
    target = Path(path)
    raw = data.encode(encoding) if isinstance(data, str) else data
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent or ".")
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
        os.replace(tmp, target)
    except BaseException as err:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        if isinstance(err, OSError) and err.filename != str(target):
            # the same kind of error, naming the file the user asked for
            raise type(err)(err.errno, err.strerror or str(err), str(target)) from None
        raise
    return target


def _umask() -> int:
    """The process's umask (read by setting it and putting it back)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask
