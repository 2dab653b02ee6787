"""Numbers of a table as CSV rows, written as Python's ``format(x, ".12g")`` writes them, but compiled.

The traces CSV writes every value with 12 significant digits in Python's general format
(``format(x, ".12g")``, the same as ``"%.12g" % x``) and leaves a cell empty where the value is
not a number (NaN, such as the amount of a held compartment without a volume). Formatting
20,000 values one by one in Python takes about 2 ms, more than the simulation of the reference
problem; this module writes them in compiled code, 4-5x faster, to the same bytes.

How a value is written (the rules of Python's general format, precision p):

1. the value is rounded to p significant digits, m x 10^(e - p + 1) with 10^(p-1) <= m < 10^p;
2. with -4 <= e < p it is written in fixed notation, else as d.ddd e+XX (at least two exponent
   digits); trailing zeros of the digits are dropped, and the point when nothing follows it.

Step 1 is where speed and exactness meet. The digits come from ``s = |x| * 10^(p-1-e)``
computed in floating point with exact powers of ten (10^0 ... 10^22 are exact doubles; larger
scalings take several steps of 10^22). Each step rounds once, so the computed s is within
(steps + 1) x 2^-53 x s of the exact product (IEEE 754 multiplication and division are
correctly rounded). When the fraction of s is closer to one half than that bound, the rounding
direction cannot be told from the computed s; such a value, and any value outside
1e-300 ... 1e300 (subnormal or close to overflow) or infinite, is written by Python's own
``format`` instead (Python rounds the exact binary value, half to even: David M. Gay,
"Correctly Rounded Binary-Decimal and Decimal-Binary Conversions", AT&T Numerical Analysis
Manuscript 90-10, 1990, which CPython's dtoa.c implements). The tests compare the two on
hundreds of thousands of values across the whole range, on ties and on powers of ten.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = ["csv_row_bytes", "csv_rows"]

_LOG10_2 = 0.30102999566398120


def csv_rows(data: np.ndarray, digits: int = 12) -> str:
    """The rows of a 2-D table as CSV text: cells joined by ``,``, each row ended by ``\\n``.

    Parameters
    ----------
    data : ndarray of float, shape (rows, columns)
        The values (any units; they are written as they are).
    digits : int
        Significant digits (1 to 17): each cell reads ``format(x, f".{digits}g")``.

    Returns
    -------
    str
        The text; a NaN cell is empty, an infinite one reads ``inf`` or ``-inf``.

    Examples
    --------
    >>> csv_rows(np.array([[0.0, 1 / 3], [float("nan"), 2.5e-7]]))
    '0,0.333333333333\\n,2.5e-07\\n'
    """
    return csv_row_bytes(data, digits).decode("ascii")


def csv_row_bytes(data: np.ndarray, digits: int = 12) -> bytes:
    """:func:`csv_rows` as the bytes of the text (ASCII), without a text object in between.

    The compiled writer runs without the interpreter's lock (``nogil``), so another thread may
    make something else meanwhile (:meth:`barrierflow.Result.to_csv` computes the sidecar's
    metrics while the traces are formatted).
    """
    if not 1 <= int(digits) <= 17:
        raise ValueError(f"digits: got {digits}; a whole number from 1 to 17")
    table = np.ascontiguousarray(data, dtype=np.float64)
    if table.ndim != 2:
        raise ValueError(f"data: got an array of {table.ndim} dimensions; a table of rows and columns (2)")
    rows, cols = table.shape
    if rows == 0 or cols == 0:
        return b"\n" * rows if cols == 0 else b""
    # at most 24 bytes a cell ("-1.2345678901234567e-308") and its separator
    out = np.empty(rows * cols * 25, dtype=np.uint8)
    left = np.empty(rows * cols, dtype=np.int64)
    at = np.empty(rows * cols, dtype=np.int64)
    n, n_left = _write_rows(table, int(digits), out, left, at)
    text = out[:n].tobytes()
    if not n_left:
        return text
    # the few values the compiled writer leaves to Python, put in where their cells are
    flat = table.ravel()
    pieces = []
    prev = 0
    for k in range(n_left):
        pos = int(at[k])
        pieces.append(text[prev:pos])
        pieces.append(format(float(flat[left[k]]), f".{digits}g").encode("ascii"))
        prev = pos
    pieces.append(text[prev:])
    return b"".join(pieces)


@njit(cache=True, nogil=True, error_model="numpy", no_cfunc_wrapper=True, boundscheck=False)
def _write_rows(data, digits, out, left, at):  # pragma: no cover - compiled (tested through csv_rows)
    """Write ``data`` row by row into ``out``; return (bytes written, cells left to Python).

    A cell left to Python is written empty; ``left[k]`` is its flat index and ``at[k]`` the
    byte position where its text belongs.
    """
    rows, cols = data.shape
    bits = data.view(np.int64)  # (data is C-contiguous: csv_rows makes it so)
    pow10 = np.empty(23)
    p = 1.0
    for i in range(23):
        pow10[i] = p
        p *= 10.0
    ten = np.uint64(10)
    c48 = np.uint64(48)  # "0" (unsigned: a digit never passes through a float)
    lo = np.uint64(1)
    for _ in range(digits - 1):
        lo *= ten
    hi = lo * ten
    f_lo = float(lo)
    f_hi = float(hi)
    n = 0
    n_left = 0
    for i in range(rows):
        for j in range(cols):
            x = data[i, j]
            if x != x:  # NaN: an empty cell
                pass
            elif x == 0.0:
                if np.signbit(x):
                    out[n] = 45  # "-0", as Python writes a negative zero
                    n += 1
                out[n] = 48
                n += 1
            else:
                ax = abs(x)
                exact = False
                r = np.uint64(0)
                e = 0
                if 1e-300 <= ax <= 1e300:
                    # the binary exponent from the bits (ax is normal here), then the decimal one, or one less
                    e = int(math.floor((((bits[i, j] >> 52) & 0x7FF) - 1023) * _LOG10_2))
                    for _attempt in range(3):
                        k = digits - 1 - e
                        s = ax
                        steps = 0
                        while k > 22:
                            s *= 1e22
                            k -= 22
                            steps += 1
                        while k < -22:
                            s /= 1e22
                            k += 22
                            steps += 1
                        if k > 0:
                            s *= pow10[k]
                            steps += 1
                        elif k < 0:
                            s /= pow10[-k]
                            steps += 1
                        whole = math.floor(s)
                        if whole < f_lo:
                            e -= 1
                            continue
                        if whole >= f_hi:
                            e += 1
                            continue
                        frac = s - whole
                        if abs(frac - 0.5) <= s * 2.3e-16 * (steps + 1):
                            break  # too close to a tie to tell from the computed value
                        r = np.uint64(whole)
                        if frac > 0.5:
                            r += np.uint64(1)
                            if r == hi:
                                r = lo
                                e += 1
                        exact = True
                        break
                if not exact:
                    left[n_left] = i * cols + j
                    at[n_left] = n
                    n_left += 1
                else:
                    if x < 0:
                        out[n] = 45
                        n += 1
                    nd = digits
                    while r % ten == 0:
                        r //= ten
                        nd -= 1
                    # the nd digits of r are written in place, last first
                    if -4 <= e < digits:  # fixed notation
                        if e >= nd - 1:  # a whole number: the digits, then zeros
                            q = n + nd - 1
                            while q >= n:
                                out[q] = c48 + r % ten
                                r //= ten
                                q -= 1
                            n += nd
                            for _ in range(e + 1 - nd):
                                out[n] = 48
                                n += 1
                        elif e >= 0:  # e + 1 digits, the point, the others
                            q = n + nd
                            while q > n + e + 1:
                                out[q] = c48 + r % ten
                                r //= ten
                                q -= 1
                            out[q] = 46
                            q -= 1
                            while q >= n:
                                out[q] = c48 + r % ten
                                r //= ten
                                q -= 1
                            n += nd + 1
                        else:  # 0.000ddd
                            out[n] = 48
                            out[n + 1] = 46
                            n += 2
                            for _ in range(-e - 1):
                                out[n] = 48
                                n += 1
                            q = n + nd - 1
                            while q >= n:
                                out[q] = c48 + r % ten
                                r //= ten
                                q -= 1
                            n += nd
                    else:  # scientific notation
                        if nd > 1:  # d.ddd
                            q = n + nd
                            while q > n + 1:
                                out[q] = c48 + r % ten
                                r //= ten
                                q -= 1
                            out[n + 1] = 46
                            out[n] = c48 + r
                            n += nd + 1
                        else:
                            out[n] = c48 + r
                            n += 1
                        out[n] = 101
                        out[n + 1] = 45 if e < 0 else 43
                        n += 2
                        ae = -e if e < 0 else e
                        if ae >= 100:
                            out[n] = 48 + ae // 100
                            n += 1
                        out[n] = 48 + (ae // 10) % 10
                        out[n + 1] = 48 + ae % 10
                        n += 2
            out[n] = 44 if j < cols - 1 else 10
            n += 1
    return n, n_left
