"""A time limit for code that must never hang (shared by the reliability tests).

Imported as ``from limits import time_limit`` (pytest puts tests/ on the import path); not a
conftest.py, whose name tests/browser/conftest.py already takes.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Iterator
from contextlib import contextmanager


class TimeLimitExceeded(Exception):
    """Raised inside the code under test when it runs past its time limit."""


@contextmanager
def time_limit(seconds: float) -> Iterator[None]:
    """Interrupt the block with TimeLimitExceeded after ``seconds`` (POSIX, main thread).

    A Python-level loop is interrupted; a single long call into C code is interrupted only when
    it returns, which is why the cases that once hung in C also run in a subprocess with a timeout.
    """
    if not hasattr(signal, "setitimer") or threading.current_thread() is not threading.main_thread():
        yield
        return

    def expire(signum, frame):
        raise TimeLimitExceeded(f"still running after {seconds} s")

    previous = signal.signal(signal.SIGALRM, expire)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)
