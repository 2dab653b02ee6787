"""The validated, immutable model: compartments, barriers, links, doses and the scenario."""

from ._fields import PLAUSIBLE
from .components import (
    DOSE_KINDS,
    DOSE_OPTIONS,
    Barrier,
    Compartment,
    Dose,
    Exchange,
    Layer,
    OutputUnits,
    Substance,
    Transfer,
)
from .document import from_document, to_document, to_toml
from .experiment import OBSERVABLES, Experiment, Series
from .paths import Param, ParamPath, Tied, parameter_paths, parse_param, with_values
from .scenario import MAX_COMPARTMENTS, MAX_EVENTS, MAX_TOTAL_CELLS, Scenario
from .variability import Correlation, Variation

__all__ = [
    "DOSE_KINDS",
    "DOSE_OPTIONS",
    "MAX_COMPARTMENTS",
    "MAX_EVENTS",
    "MAX_TOTAL_CELLS",
    "OBSERVABLES",
    "PLAUSIBLE",
    "Barrier",
    "Compartment",
    "Correlation",
    "Dose",
    "Exchange",
    "Experiment",
    "Layer",
    "OutputUnits",
    "Param",
    "ParamPath",
    "Scenario",
    "Series",
    "Substance",
    "Tied",
    "Transfer",
    "Variation",
    "from_document",
    "parameter_paths",
    "parse_param",
    "to_document",
    "to_toml",
    "with_values",
]
