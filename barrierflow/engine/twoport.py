"""The steady state of layers as two-ports: the exact flux in and out of a layer or a stack.

A layer at steady state (D u'' = k u in the potential u = C/K, flux J = -D K u') is a reciprocal
two-port, written here as a pi network: a series conductance g between its faces and a shunt
conductance h at each face, to zero potential (what degradation takes). For thickness l,
diffusivity D, partition K and degradation rate k, with s = sqrt(k/D)::

    g = D K s / sinh(s l),   h = D K s tanh(s l / 2)        (without degradation g = D K / l, h = 0)

(from the steady transfer matrix of the layer, Crank, The Mathematics of Diffusion, 2nd ed.,
1975, ch. 14 for one layer). 1/sinh is taken as 2 e^(-sl) / (1 - e^(-2sl)), so no s l overflows.
Layers in series are joined by eliminating the potential at their interface (star-mesh
reduction), in which every term is a sum or product of positive numbers: no cancellation.
The engine uses the stack for quasi-steady barriers and the layer for checking the default grid.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from ..model import Layer

__all__ = ["layer_pi", "stack_two_port"]


def layer_pi(layer: Layer) -> tuple[float, float]:
    """(g, h) of one layer per unit area, cm/h: series conductance and the shunt at each face.

    A layer holding one value per subject (:mod:`barrierflow.model.cohort`) gives one (g, h)
    per subject, each computed as for its own layer (the same functions of ``math``).
    """
    dk = layer.diffusivity * layer.partition
    k = layer.degradation_rate
    if not isinstance(k, np.ndarray) and k <= 0:
        return dk / layer.thickness, 0.0
    if isinstance(k, np.ndarray) or isinstance(dk, np.ndarray) or isinstance(layer.thickness, np.ndarray):
        return _layer_pi_each(layer)
    s = math.sqrt(k / layer.diffusivity)
    x = s * layer.thickness
    if x < 1e-4:  # series to x^2: the relative truncation is below 1e-17
        return dk / layer.thickness * (1.0 - x * x / 6.0), dk / layer.thickness * (x * x / 2.0)
    return dk * s * 2.0 * math.exp(-x) / -math.expm1(-2.0 * x), dk * s * math.tanh(0.5 * x)


def _layer_pi_each(layer) -> tuple[np.ndarray, np.ndarray]:
    """:func:`layer_pi` of each subject of a layer holding one value per subject ((n, 1) arrays)."""
    n = next(np.shape(v)[0] for v in (layer.thickness, layer.diffusivity, layer.partition, layer.degradation_rate)
             if isinstance(v, np.ndarray))
    col = [np.broadcast_to(v, (n, 1))[:, 0].tolist() for v in (layer.thickness, layer.diffusivity, layer.partition,
                                                                layer.degradation_rate)]
    out = [layer_pi(_Plain(*vals)) for vals in zip(*col, strict=True)]
    return np.array([o[0] for o in out]).reshape(n, 1), np.array([o[1] for o in out]).reshape(n, 1)


class _Plain:
    """One subject's layer values, as :func:`layer_pi` reads them."""

    def __init__(self, thickness: float, diffusivity: float, partition: float, degradation_rate: float):
        self.thickness, self.diffusivity, self.partition = thickness, diffusivity, partition
        self.degradation_rate = degradation_rate


def stack_two_port(layers: Sequence[Layer]) -> tuple[float, float, float, float]:
    """Steady amount-rate coefficients (per area) of a stack of layers, degradation exact.

    Returns (a, b, c, d), cm/h, with J_in = a u_from - b u_to and J_out = c u_from - d u_to;
    b = c = g, a = g + h_from, d = g + h_to of the stack's pi network.
    """
    g = h1 = h2 = 0.0
    for i, layer in enumerate(layers):
        gl, hl = layer_pi(layer)
        if i == 0:
            g, h1, h2 = gl, hl, hl
            continue
        # the interface node joins (g, h2) of the stack so far to (gl, hl) of this layer
        tot = g + gl + h2 + hl
        shunt = h2 + hl
        g, h1, h2 = g * gl / tot, h1 + g * shunt / tot, hl + gl * shunt / tot
    return g + h1, g, g, g + h2
