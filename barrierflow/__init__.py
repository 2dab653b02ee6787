"""barrierflow: transport through layered tissue barriers into compartments and the body.

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review; local regulations and licensed practice take precedence.

The public API::

    import barrierflow
    scenario = barrierflow.load("scenarios/patch.toml")
    result = barrierflow.simulate(scenario)
    result.to_csv("patch.csv")
    fitted = barrierflow.fit(scenario, "cells.csv", ["barrier.skin.layer.1.diffusivity"])

``simulate`` and the engine are imported on first use, so ``import barrierflow`` stays fast.
"""

from __future__ import annotations

from typing import Any

from .errors import BarrierflowError, DataError, Problem, ScenarioError, SolverError, UnitsError
from .io import load, load_experiment, loads, loads_experiment, save
from .model import (
    Barrier,
    Compartment,
    Dose,
    Exchange,
    Experiment,
    Layer,
    OutputUnits,
    ParamPath,
    Scenario,
    Substance,
    Tied,
    Transfer,
    parameter_paths,
    with_values,
)

__version__ = "0.1.0"

_LAZY = {
    # name -> module that defines it, or "module:attribute" (imported on first access: the
    # engine imports numba)
    "simulate": "barrierflow.analysis",
    "Result": "barrierflow.analysis",
    "steady_state": "barrierflow.analysis.steady",
    "metrics": "barrierflow.analysis.metrics:compute_metrics",
    "simulate_population": "barrierflow.engine.population",
    "simulate_many": "barrierflow.engine.population",
    "cumulative_from_samples": "barrierflow.analysis.sampling",
    "time_lag": "barrierflow.analysis.timelag",
    "fit": "barrierflow.studies.fit",
    "FitResult": "barrierflow.studies.fit",
    "design": "barrierflow.studies.design",
    "DesignResult": "barrierflow.studies.design",
    "screening_estimate": "barrierflow.analysis.screening",
    "run_population": "barrierflow.studies.population",
    "PopulationResult": "barrierflow.studies.population",
    "run_sweep": "barrierflow.studies.sweep",
    "local_sensitivity": "barrierflow.studies.sensitivity",
    "sobol_indices": "barrierflow.studies.sensitivity",
    "morris_screening": "barrierflow.studies.sensitivity",
}

__all__ = [
    "Barrier",
    "BarrierflowError",
    "Compartment",
    "DataError",
    "DesignResult",
    "Dose",
    "Exchange",
    "Experiment",
    "FitResult",
    "Layer",
    "OutputUnits",
    "ParamPath",
    "PopulationResult",
    "Problem",
    "Result",
    "Scenario",
    "ScenarioError",
    "SolverError",
    "Substance",
    "Tied",
    "Transfer",
    "UnitsError",
    "__version__",
    "cumulative_from_samples",
    "design",
    "fit",
    "load",
    "load_experiment",
    "loads",
    "loads_experiment",
    "local_sensitivity",
    "metrics",
    "morris_screening",
    "parameter_paths",
    "run_population",
    "run_sweep",
    "save",
    "screening_estimate",
    "simulate",
    "simulate_many",
    "simulate_population",
    "sobol_indices",
    "steady_state",
    "time_lag",
    "with_values",
]


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        import importlib

        module, _, attr = _LAZY[name].partition(":")
        value = getattr(importlib.import_module(module), attr or name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'barrierflow' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)
