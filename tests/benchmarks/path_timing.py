"""What the path-choice sweeps (chain_sweep.py, saturable_sweep.py) share: the timing rounds of
each path, the default's ratio to the fastest path, and the closing summary of the 1.3x rule."""

from __future__ import annotations

import gc
import random
import time

from barrierflow.engine import solve

#: The rule the sweeps judge the default by: within 1.3x of the fastest path (issue 12).
LIMIT = 1.3


def min_times(scenario, paths: dict, names: list[str], out: dict, runs: int) -> None:
    """``runs`` rounds of ``solve`` on each path of ``names`` (shuffled per round, the collector off
    during a call); each one's fastest wall time (s) goes to ``out[name]["t"]``."""
    for r in range(runs):
        for name in random.Random(r).sample(names, len(names)):
            gc.disable()
            try:
                t0 = time.perf_counter()
                solve(scenario, paths[name])
                dt = time.perf_counter() - t0
            finally:
                gc.enable()
            out[name]["t"] = min(out[name]["t"], dt)


def judge(r: dict, own_key: dict[str, str]) -> tuple[float, float, str]:
    """The default's time over the fastest other path's, and the default's path timed as that
    path (the same rounds, without the noise of a third timing) unless it went to another path on
    the way (then its own time counts); ``own_key`` maps a path's name in the result to its key in
    ``r``. Returns (default / fastest, path / fastest, the path taken, '>' where it fell back)."""
    fast = min(r[k]["t"] for k in own_key.values())
    ratio = r["default"]["t"] / fast
    took = r["default"]["took"] + (">" if r["default"]["fell"] else "")
    own = own_key.get(r["default"]["took"]) if not r["default"]["fell"] else None
    return ratio, (r[own]["t"] / fast if own else ratio), took


def summary(worst: list[tuple[float, str]], fell: str) -> str:
    """The closing line: how many cases are above the rule, and the five largest."""
    worst.sort(reverse=True)
    above = [w for w in worst if w[0] > LIMIT]
    return (f"\n{len(above)} of {len(worst)} cases above {LIMIT}x (the default's path as timed on its own, or the "
            f"default's time where {fell}); largest: " + ", ".join(f"{r:.2f}x ({lab.strip()})" for r, lab in worst[:5]))
