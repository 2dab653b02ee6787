"""Reading and writing scenario TOML files."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import tomli

from ..errors import BarrierflowError, Problem, ScenarioError
from ..model import Scenario, from_document
from .atomic import atomic_write

__all__ = ["load", "loads", "read_toml", "save"]


def read_toml(text: str, file: str | None = None) -> dict[str, Any]:
    """Parse TOML text into a document (nested dicts), refusing anything that is not TOML.

    A leading UTF-8 byte-order mark (which some editors write) is ignored.

    Parameters
    ----------
    text : str
        The TOML document.
    file : str or None
        Name shown in error messages.

    Raises
    ------
    ScenarioError
        For a TOML syntax error (with its line), values nested too deeply for the parser, or
        anything else the parser cannot take; never another exception.
    """
    if not isinstance(text, str):
        raise ScenarioError([Problem("file", type(text).__name__, "TOML text (str)", file)])
    if text.startswith("\ufeff"):
        text = text[1:]
    try:
        # tomli: the parser the standard library's tomllib was taken from, in a compiled build (about
        # 3x faster on a scenario file); it refuses values nested over 400 levels (RecursionError)
        return tomli.loads(text)
    except tomli.TOMLDecodeError as err:
        raise ScenarioError([Problem("TOML syntax", str(err), "a valid TOML document", file)]) from None
    except RecursionError:
        raise ScenarioError([Problem("TOML syntax", "arrays or inline tables nested hundreds of levels deep",
                                     "a scenario file (its values are nested a few levels at most)", file)]) from None
    except Exception as err:  # the parser failed in a way it does not document: still a refusal
        raise ScenarioError([Problem("TOML syntax", f"text the TOML parser cannot read ({type(err).__name__}: "
                                     f"{err})", "a valid TOML document", file)]) from None


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
        For a TOML syntax error (with its line) or any problem of the scenario. Nothing else
        escapes: a failure of the reader itself is reported as a ScenarioError too (naming it an
        internal fault, so that it can be reported).
    """
    doc = read_toml(text, file)
    try:
        return from_document(doc, file)
    except BarrierflowError:
        raise
    except RecursionError:
        raise ScenarioError([Problem("file", "values nested too deeply to read",
                                     "a scenario file (its values are nested a few levels at most)", file)]) from None
    except Exception as err:
        raise ScenarioError([Problem("file", f"a file the reader failed on ({type(err).__name__}: {err})",
                                     f"{READER_FAULT}; please report it with the file", file)]) from err


READER_FAULT = "an internal fault of the scenario reader"
"""Words that mark a refusal caused by a fault of the reader rather than by the file (the
fuzzing tests look for them)."""


def load(path: str | os.PathLike[str]) -> Scenario:
    """Read and validate a scenario file.

    Parameters
    ----------
    path : path-like
        A ``.toml`` scenario file (see the scenario format in DEVELOPERS.md), UTF-8 text.

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
        raw = p.read_bytes()
    except FileNotFoundError:
        raise ScenarioError([Problem("file", str(p), "no such file", p.name)]) from None
    except OSError as err:
        raise ScenarioError([Problem("file", str(p), f"cannot be read ({err.strerror or err})", p.name)]) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        hint = ("it is UTF-16 text; save it as UTF-8" if raw[:2] in (b"\xff\xfe", b"\xfe\xff")
                else "save it as UTF-8 text")
        raise ScenarioError([Problem("file", f"a byte that is not UTF-8 at position {err.start}",
                                     f"a scenario file is UTF-8 text ({hint})", p.name)]) from None
    return loads(text, p.name)


def save(scenario: Scenario, path: str | os.PathLike[str]) -> Path:
    """Write ``scenario`` as TOML to ``path`` atomically; reading it back gives an equal model."""
    return atomic_write(path, scenario.to_toml())
