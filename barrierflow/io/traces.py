"""The traces CSV and its JSON sidecar, written as a pair that a reader can always check.

The sidecar records the SHA-256 of the CSV's bytes (key ``traces``). Both files are written
complete to temporary files first, then renamed into place, the CSV first and the sidecar last
(:func:`barrierflow.io.atomic_write_together`). So:

- a sidecar in place always describes a CSV that was completely in place before it;
- a run killed between the two renames leaves the new CSV beside the old sidecar, and the hash
  tells them apart (:func:`traces_match` is False);
- a run killed earlier changes neither file; its temporary files are removed by the next write.
"""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Callable
from pathlib import Path

from .atomic import Staged, atomic_write_together

__all__ = ["sidecar_path", "traces_digest", "traces_match", "write_traces"]


def sidecar_path(csv_path: str | os.PathLike[str]) -> Path:
    """The sidecar of a traces CSV: the same name with ``.json``."""
    return Path(csv_path).with_suffix(".json")


def traces_digest(csv_text: str | bytes) -> dict[str, object]:
    """What the sidecar records of the CSV: ``{"sha256": hex digest of the UTF-8 bytes, "bytes": size}``."""
    raw = csv_text.encode("utf-8") if isinstance(csv_text, str) else csv_text
    return {"sha256": hashlib.sha256(raw).hexdigest(), "bytes": len(raw)}


def write_traces(csv_path: str | os.PathLike[str], csv_text: str | bytes | Staged,
                 sidecar_text: str | Callable[[], str]) -> Path:
    """Write the traces CSV and its sidecar (which must record ``traces_digest(csv_text)``).

    Nothing is replaced until both are complete on disk; then the CSV is renamed into place,
    then the sidecar, and the folder is flushed. ``sidecar_text`` may be a function that makes
    the text: it is called while another thread waits for the CSV's temporary file to be flushed
    to disk (:func:`~barrierflow.io.atomic_write_together`). ``csv_text`` may also be a file
    staged for the same path (:func:`barrierflow.io.stage`; written and flushed in another thread
    meanwhile).

    Returns
    -------
    pathlib.Path
        The CSV path.
    """
    path = Path(csv_path)
    atomic_write_together([(path, csv_text), (sidecar_path(path), sidecar_text)])
    return path


def traces_match(csv_path: str | os.PathLike[str]) -> bool:
    """True when the CSV and the sidecar beside it belong together (the recorded hash is the CSV's).

    False when either file is missing or unreadable, when the sidecar records no hash (written
    before barrierflow recorded one), or when the CSV is not the one the sidecar describes (a
    run stopped between writing the two).
    """
    path = Path(csv_path)
    try:
        side = json.loads(sidecar_path(path).read_text(encoding="utf-8"))
        raw = path.read_bytes()
    except (OSError, ValueError):
        return False
    recorded = side.get("traces") if isinstance(side, dict) else None
    return isinstance(recorded, dict) and recorded.get("sha256") == traces_digest(raw)["sha256"]
