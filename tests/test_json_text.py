"""The sidecar's JSON writer against Python's own ``json`` module.

Reference: Python's ``json.dumps(doc, indent=2, allow_nan=False)`` (RFC 8259, The JavaScript
Object Notation Data Interchange Format, 2017; texts escaped to ASCII as ``ensure_ascii`` does),
after naming the floats JSON has no number for (``"inf"``, ``"-inf"``, ``"nan"``), as the
sidecar always has. The writer must give the same text byte for byte.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

import barrierflow
from barrierflow.io.json_text import indented_json

ROOT = Path(__file__).resolve().parents[1]


def named(x):
    if isinstance(x, dict):
        return {k: named(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [named(v) for v in x]
    if isinstance(x, float | np.floating) and not math.isfinite(x):
        return "inf" if x > 0 else "-inf" if x < 0 else "nan"
    return x


def default(x):
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, np.ndarray):
        return x.tolist()
    return str(x)


def reference(doc) -> str:
    return json.dumps(named(doc), indent=2, default=default, allow_nan=False)


scalars = (st.none() | st.booleans() | st.integers(-(2**70), 2**70) | st.floats(allow_nan=True, allow_infinity=True)
           | st.text(max_size=12) | st.floats(width=32).map(np.float32) | st.integers(-(2**40), 2**40).map(np.int64)
           | st.booleans().map(np.bool_))
documents = st.recursive(scalars, lambda inner: st.lists(inner, max_size=4) | st.tuples(inner, inner)
                         | st.dictionaries(st.text(max_size=8), inner, max_size=4), max_leaves=30)


@settings(max_examples=400, derandomize=True, deadline=None)
@given(documents)
def test_any_plain_document_is_written_as_json_writes_it(doc):
    assert indented_json(doc, default=default) == reference(doc)


def test_content_it_leaves_to_json_is_written_by_json():
    doc = {"a": {1: 2.5, None: [1]}, "b": np.arange(3), "c": {"d": float("inf")}}
    assert indented_json(doc, default=default) == reference(doc)


def test_the_sidecar_of_every_example_scenario_is_the_text_json_writes():
    for path in sorted((ROOT / "scenarios").glob("*.toml")):
        result = barrierflow.simulate(barrierflow.load(path))
        doc = result.sidecar()
        text = result.sidecar_text()
        # (made a moment apart: the creation time may differ by a second)
        assert text == reference({**doc, "created": json.loads(text)["created"]}) + "\n", path.name
