"""The view settings a page keeps across reloads (with the scenario and the runs, see
:mod:`dashboard.sessions`): which element is selected, which runs are ticked, the units, the
scales, the open tab.

:data:`SETTINGS` lists each setting once: the component id (its ``value`` is the setting) and
its default. Panels build their controls with :func:`get`, so a page rebuilt after a reload
shows the settings it had. A panel that adds a control adds it here.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from . import ids

__all__ = ["SETTINGS", "clean", "get"]

SETTINGS: dict[str, Any] = {
    ids.SELECT: None,
    ids.RESULT_TABS: "conc",
    ids.TIME_UNIT: "h",
    ids.CONC_QUANTITY: "concentration",
    ids.CONC_UNIT: None,  # None: the scenario's [output] unit
    ids.AMOUNT_UNIT: None,
    ids.CONC_SCALE: "auto",
    ids.CONC_SPLIT: "side",
    ids.COMPARTMENT_PICK: [],
    ids.BARRIER_PICK: [],
    ids.PROFILE_BARRIER: None,
    ids.PROFILE_STEADY: ["on"],
    ids.RUN_PICK: [],
    ids.REFERENCE: None,
    ids.IMAGE_FORMAT: "png",
}
"""Component id -> default of its ``value``."""


def get(view: Mapping[str, Any] | None, cid: str) -> Any:
    """The saved value of a setting, or its default."""
    if view and cid in view and view[cid] is not None:
        return view[cid]
    return SETTINGS[cid]


def clean(values: Mapping[str, Any]) -> dict[str, Any]:
    """Only the known settings, with JSON values (strings, numbers, lists of strings, None)."""
    out = {}
    for cid in SETTINGS:
        v = values.get(cid)
        if v is None or isinstance(v, (str, int, float, bool)) or (
                isinstance(v, list) and all(isinstance(x, str) for x in v)):
            out[cid] = v
    return out
