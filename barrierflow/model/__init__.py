"""The validated, immutable model: compartments, barriers, links, doses and the scenario."""

from .components import (
    DOSE_KINDS,
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
from .scenario import MAX_EVENTS, MAX_TOTAL_CELLS, Scenario

__all__ = [
    "DOSE_KINDS",
    "MAX_EVENTS",
    "MAX_TOTAL_CELLS",
    "Barrier",
    "Compartment",
    "Dose",
    "Exchange",
    "Layer",
    "OutputUnits",
    "Scenario",
    "Substance",
    "Transfer",
    "from_document",
    "to_document",
    "to_toml",
]
