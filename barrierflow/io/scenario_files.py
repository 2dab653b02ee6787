"""Reading and writing scenario TOML files."""

from __future__ import annotations

import os
import tomllib
from pathlib import Path

from ..errors import Problem, ScenarioError
from ..model import Scenario, from_document
from .atomic import atomic_write

__all__ = ["load", "loads", "save"]


def loads(text: str, file: str | None = None) -> Scenario:
    """Read a scenario from TOML text.

    Parameters
    ----------
    text : str
        The TOML document.
    file : str or None
        Name shown in error messages.

    Raises
    ------
    ScenarioError
        For a TOML syntax error (with its line) or any problem of the scenario.
    """
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise ScenarioError([Problem("TOML syntax", str(err), "a valid TOML document", file)]) from None
    return from_document(doc, file)


def load(path: str | os.PathLike[str]) -> Scenario:
    """Read and validate a scenario file.

    Parameters
    ----------
    path : path-like
        A ``.toml`` scenario file (see the scenario format in DEVELOPERS.md).

    Returns
    -------
    Scenario
        The validated model.

    Raises
    ------
    ScenarioError
        If the file cannot be read or any value is refused; every problem is listed, each
        naming the file, the field path, the value and what was expected.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ScenarioError([Problem("file", str(p), "no such file", p.name)]) from None
    except (OSError, UnicodeDecodeError) as err:
        raise ScenarioError([Problem("file", str(p), f"cannot be read ({err})", p.name)]) from None
    return loads(text, p.name)


def save(scenario: Scenario, path: str | os.PathLike[str]) -> Path:
    """Write ``scenario`` as TOML to ``path`` atomically; reading it back gives an equal model."""
    return atomic_write(path, scenario.to_toml())
