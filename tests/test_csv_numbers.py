"""The compiled CSV number writer against Python's own float formatting.

Reference: Python's ``format(x, ".12g")`` (the format specification mini-language, general
format: the value rounded to p significant digits, fixed notation when -4 <= exponent < p,
else scientific; trailing zeros removed). CPython rounds the exact binary value correctly,
half to even (D. M. Gay, "Correctly Rounded Binary-Decimal and Decimal-Binary Conversions",
AT&T Numerical Analysis Manuscript 90-10, 1990, implemented in CPython's Python/dtoa.c).
"""

from __future__ import annotations

import numpy as np
import pytest

from barrierflow.io.csv_numbers import csv_rows


def reference(data: np.ndarray, digits: int = 12) -> str:
    return "".join(",".join("" if np.isnan(x) else format(float(x), f".{digits}g") for x in row) + "\n"
                   for row in data)


def _wide(rng: np.random.Generator, n: int) -> np.ndarray:
    """Values spread over the whole double range, both signs."""
    exponent = rng.uniform(-320, 310, n)
    x = rng.uniform(1, 10, n) * 10.0 ** np.clip(exponent, -307, 307)
    return x * rng.choice([-1.0, 1.0], n)


def test_values_over_the_whole_range_read_as_python_writes_them():
    rng = np.random.default_rng(1)
    data = _wide(rng, 120_000).reshape(-1, 8)
    assert csv_rows(data) == reference(data)


@pytest.mark.parametrize("digits", [1, 6, 10, 15, 17])
def test_other_precisions(digits):
    rng = np.random.default_rng(digits)
    data = _wide(rng, 8_000).reshape(-1, 4)
    assert csv_rows(data, digits) == reference(data, digits)


def test_ties_integers_and_dyadic_fractions():
    # exactly representable values whose 13th digit is a 5 followed by zeros: half to even
    rng = np.random.default_rng(2)
    ints = rng.integers(0, 10**14, 40_000).astype(float).reshape(-1, 4)
    assert csv_rows(ints) == reference(ints)
    dyadic = (rng.integers(0, 2**20, 40_000) / 2.0 ** rng.integers(0, 30, 40_000)).reshape(-1, 4)
    assert csv_rows(dyadic) == reference(dyadic)
    ties = np.array([[0.5, 1.5, 2.5, 123456789012.5, 1234567890125.0, 1234567890135.0]])
    assert csv_rows(ties) == reference(ties)


def test_edges_of_the_format():
    special = [0.0, -0.0, 1e-4, 9.99999999999e-5, 9.999999999995e-5, 0.0001, 1e12, 999999999999.5,
               999999999999.4, 1e16, 1e-5, 1e22, 1e23, 5e-324, 1e-310, np.inf, -np.inf, np.nan, 1 / 3, 2 / 3,
               0.1, 0.2 + 0.1, 100.0, 1e11, 1e13, 99999999999.99, 0.000123, 1.7976931348623157e308,
               -2.2250738585072014e-308, 1e300, 1e-300, 9.9999999999995e299]
    data = np.array(special).reshape(-1, 4)
    assert csv_rows(data) == reference(data)
    # powers of ten and their neighbours, where the exponent changes
    p = 10.0 ** np.arange(-30, 30)
    near = np.column_stack([p, np.nextafter(p, 0), np.nextafter(p, np.inf), p * (1 - 5e-13), p * (1 + 5e-13)])
    assert csv_rows(near) == reference(near)


def test_nan_cells_are_empty_and_shapes():
    data = np.array([[np.nan, 1.0, np.nan], [2.0, np.nan, np.nan]])
    assert csv_rows(data) == ",1,\n2,,\n"
    assert csv_rows(np.zeros((0, 3))) == ""
    assert csv_rows(np.zeros((2, 1))) == "0\n0\n"
    with pytest.raises(ValueError, match="digits"):
        csv_rows(data, 0)
