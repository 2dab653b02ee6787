"""JSON text indented by two spaces, as ``json.dumps(doc, indent=2)`` writes it, but faster.

With an indent, Python's ``json`` module encodes in pure Python, value by value through a
generic encoder (about 0.2 ms for the 13 kB sidecar of the reference problem, more than the
sidecar's own content takes to gather). The sidecar's content is plain: dicts with text keys,
lists, texts, numbers, truth values and numpy scalars. :func:`indented_json` writes such content
directly, with the same pieces the ``json`` module uses (its compiled text quoting,
``float.__repr__``, ``int.__repr__``), so the text is the same byte for byte; anything else
(a key that is not a text, an object of another type) is handed to ``json.dumps`` itself.
"""

from __future__ import annotations

import json
import math
from json.encoder import encode_basestring_ascii
from typing import Any

import numpy as np

__all__ = ["indented_json"]


class _Other(Exception):
    """Content this writer leaves to ``json.dumps``."""


def indented_json(doc: Any, *, default: Any = None) -> str:
    """``json.dumps(doc, indent=2, allow_nan=False, default=default)``, with non-finite floats named.

    A float (or numpy float) that is not finite is written as the text ``"inf"``, ``"-inf"`` or
    ``"nan"`` (JSON has no such numbers); a numpy scalar as its Python value.

    Parameters
    ----------
    doc : dict, list or scalar
        The content.
    default : callable, optional
        As ``json.dumps``'s: what an object of another type is written as (then the whole
        document is written by ``json.dumps``).

    Returns
    -------
    str
        The text (no final line break).
    """
    out: list[str] = []
    try:
        _write(doc, "\n", out)
    except _Other:
        return json.dumps(_named(doc), indent=2, default=default, allow_nan=False)
    return "".join(out)


def _write(x: Any, nl: str, out: list[str]) -> None:  # noqa: C901 - one branch per JSON type
    """Append the text of ``x`` to ``out``; ``nl`` is a line break and the current indent."""
    if isinstance(x, str):
        out.append(encode_basestring_ascii(x))
    elif x is None:
        out.append("null")
    elif x is True:
        out.append("true")
    elif x is False:
        out.append("false")
    elif isinstance(x, int):
        out.append(int.__repr__(x))
    elif isinstance(x, float):
        out.append(float.__repr__(x) if math.isfinite(x) else encode_basestring_ascii(_name(x)))
    elif isinstance(x, dict):
        if not x:
            out.append("{}")
            return
        inner = nl + "  "
        sep = "{" + inner
        for k, v in x.items():
            if not isinstance(k, str):
                raise _Other
            out.append(sep)
            out.append(encode_basestring_ascii(k))
            out.append(": ")
            _write(v, inner, out)
            sep = "," + inner
        out.append(nl + "}")
    elif isinstance(x, list | tuple):
        if not x:
            out.append("[]")
            return
        inner = nl + "  "
        sep = "[" + inner
        for v in x:
            out.append(sep)
            _write(v, inner, out)
            sep = "," + inner
        out.append(nl + "]")
    elif isinstance(x, np.bool_ | np.integer | np.floating):
        _write(x.item(), nl, out)
    else:
        raise _Other


def _name(x: float) -> str:
    return "inf" if x > 0 else "-inf" if x < 0 else "nan"


def _named(x: Any) -> Any:
    """Non-finite floats replaced by their names, recursively (for ``json.dumps``)."""
    if isinstance(x, dict):
        return {k: _named(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [_named(v) for v in x]
    if isinstance(x, float | np.floating) and not math.isfinite(x):
        return _name(float(x))
    return x
