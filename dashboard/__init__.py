"""The barrierflow dashboard: build a barrier network, dose it, run it, compare runs, export.

Start it with ``barrierflow serve [SCENARIO.toml]`` (or ``make run``), or from Python::

    from dashboard import create_app
    create_app("scenarios/daily_patch.toml").run(host="127.0.0.1", port=8050)

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review; local regulations and licensed practice take precedence.
"""

from .app import CAUTION, create_app

__all__ = ["CAUTION", "create_app"]
