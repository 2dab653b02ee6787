"""Analysis of scenarios and results: simulation results, steady states, metrics, warnings."""

from .result import CAUTION, BarrierProfile, MassBalance, Result
from .simulate import simulate

__all__ = ["CAUTION", "BarrierProfile", "MassBalance", "Result", "simulate"]
