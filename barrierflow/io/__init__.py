"""Files: reading scenario files and writing files atomically.

This package is the only place that opens a scenario file or an experiment data file. It returns
validated models (:class:`barrierflow.Scenario`, :class:`barrierflow.model.experiment.Experiment`);
the engine, the analysis, the studies and the dashboard never parse text.
"""

from .atomic import (
    Pending,
    Staged,
    atomic_stream,
    atomic_write,
    atomic_write_together,
    in_background,
    remove_stale_temporaries,
    stage,
)
from .experiment import load_experiment, loads_experiment
from .scenario_files import load, loads, read_toml, save
from .traces import sidecar_path, traces_digest, traces_match, write_traces

__all__ = [
    "Pending",
    "Staged",
    "atomic_stream",
    "atomic_write",
    "atomic_write_together",
    "in_background",
    "load",
    "load_experiment",
    "loads",
    "loads_experiment",
    "read_toml",
    "remove_stale_temporaries",
    "save",
    "sidecar_path",
    "stage",
    "traces_digest",
    "traces_match",
    "write_traces",
]
