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
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent or ".")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(raw)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return target
