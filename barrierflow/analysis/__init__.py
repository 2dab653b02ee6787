"""Analysis of scenarios and results: simulation results, steady states, metrics, warnings."""

from .metrics import BarrierMetrics, CompartmentMetrics, Metrics, compute_metrics
from .population import PopulationExposure, percentile_bands, population_exposure
from .result import CAUTION, BarrierProfile, MassBalance, Result
from .sampling import cumulative_from_samples
from .simulate import simulate
from .steady import BarrierSteady, SteadyReport, barrier_steady, burst_time, lag_time, steady_state
from .warnings import find_warnings, scenario_warnings

__all__ = [
    "CAUTION",
    "BarrierMetrics",
    "BarrierProfile",
    "BarrierSteady",
    "CompartmentMetrics",
    "MassBalance",
    "Metrics",
    "PopulationExposure",
    "Result",
    "SteadyReport",
    "barrier_steady",
    "burst_time",
    "compute_metrics",
    "cumulative_from_samples",
    "find_warnings",
    "lag_time",
    "percentile_bands",
    "population_exposure",
    "scenario_warnings",
    "simulate",
    "steady_state",
]
