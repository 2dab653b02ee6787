"""Files: reading scenario files and writing files atomically.

This package is the only place that opens a scenario file. It returns validated models
(:class:`barrierflow.Scenario`); the engine, the analysis and the dashboard never parse text.
"""

from .atomic import atomic_write
from .scenario_files import load, loads, save

__all__ = ["atomic_write", "load", "loads", "save"]
