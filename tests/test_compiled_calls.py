"""A compiled kernel calling another through its address (barrierflow.engine.calls).

The population kernels call the single run's compiled loop this way. These checks hold the call
to what a direct call gives (the same numbers, bit for bit, and the callee's own errors), and
hold that an entry of a compiled form for other argument types is refused instead of called
(calling code of another layout would read the arguments wrongly). Common practice of numba's
own calling convention; no outside source gives values for it.
"""

from __future__ import annotations

from typing import NamedTuple

import numba
import numpy as np
import pytest
from numba import njit

from barrierflow.engine.calls import caller_of, entry, plain


@njit(error_model="numpy")
def _weighted(a, w, pair):
    total = 0.0
    for j in range(a.shape[0]):
        total += a[j] * w
    if total < 0.0:
        raise ValueError("a negative total")
    return total / 3.0, pair[0] + np.int64(1)


_call_weighted = caller_of(_weighted)


@njit(error_model="numpy")
def _three_times(ent, a, w):
    out = np.empty(3)
    for i in range(3):
        total, k = _call_weighted(ent, a, w, (np.int64(i), 0.5))
        out[i] = total + k
    return out


def test_a_call_through_the_address_gives_what_a_direct_call_gives():
    a = np.random.default_rng(1).random(7)
    ent = entry(_weighted, a, 1.7, (np.int64(0), 0.5))
    got = _three_times(ent, a, 1.7)
    direct = np.array([sum(_weighted(a, 1.7, (np.int64(i), 0.5))) for i in range(3)])
    assert np.array_equal(got, direct)


def test_the_callees_error_reaches_the_caller():
    a = -np.ones(4)
    with pytest.raises(ValueError, match="a negative total"):
        _three_times(entry(_weighted, a, 1.0, (np.int64(0), 0.5)), a, 1.0)


def test_an_entry_for_other_argument_types_is_refused():
    a = np.ones(4)
    # the same callee compiled for a float counter: another layout of the arguments
    other = entry(_weighted, a, 1.0, (0.0, 0.5))
    with pytest.raises(RuntimeError, match="other argument types"):
        _three_times(other, a, 1.0)
    address, key = entry(_weighted, a, 1.0, (np.int64(0), 0.5))
    with pytest.raises(RuntimeError, match="other argument types"):
        _three_times((address, key ^ 1), a, 1.0)


class _Pair(NamedTuple):
    count: int
    values: np.ndarray


@njit
def _as_plain(pair):
    return plain(pair)


def test_plain_gives_the_values_of_a_named_tuple_as_a_plain_tuple():
    pair = _Pair(3, np.arange(4.0))
    got = _as_plain(pair)
    assert type(got) is tuple and got[0] == 3 and np.array_equal(got[1], pair.values)
    assert numba.typeof(got) == numba.typeof(tuple(pair))
