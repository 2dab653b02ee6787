"""Spatial grids of the barrier layers (the method-of-lines discretisation)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import ScenarioError
from ..model import Layer

__all__ = ["Grid"]


@dataclass(frozen=True)
class Grid:
    """How a layer without ``cells`` is divided into finite-volume cells.

    A layer is cut into ``cells_per_layer`` cells whose widths grow geometrically by
    ``stretch`` from each face toward the middle of the layer, so that the steep gradients next
    to interfaces (where partitioning makes the concentration jump, and where an empty layer
    first takes up the substance) are resolved finely. ``stretch = 1`` gives equal cells.
    A layer with ``cells = n`` in the scenario always gets n equal cells, as the format says.

    Parameters
    ----------
    cells_per_layer : int
        Default number of cells in a layer (default 24).
    stretch : float
        Ratio of neighbouring cell widths toward the middle of a layer, 1 to 2 (default 1.15).
    """

    cells_per_layer: int = 24
    stretch: float = 1.15

    def __post_init__(self) -> None:
        if not isinstance(self.cells_per_layer, int) or not 2 <= self.cells_per_layer <= 100_000:
            raise ScenarioError.single("grid cells_per_layer", self.cells_per_layer,
                                       "must be a whole number from 2 to 100000")
        if not 1.0 <= self.stretch <= 2.0:
            raise ScenarioError.single("grid stretch", self.stretch, "must be between 1 and 2")

    def widths(self, layer: Layer) -> np.ndarray:
        """Cell widths of ``layer``, cm, from its ``from`` face; they sum to the thickness."""
        if layer.cells is not None:
            return np.full(layer.cells, layer.thickness / layer.cells)
        n = self.cells_per_layer
        half = np.arange((n + 1) // 2)
        w_half = self.stretch ** half
        w = np.concatenate([w_half, w_half[: n // 2][::-1]])
        return w / w.sum() * layer.thickness
