"""Spatial grids of the barrier layers (the method-of-lines discretisation), checked for accuracy.

A layer without ``cells`` gets cells whose widths grow geometrically from each face toward the
middle (fine where an interface makes the concentration jump and where an empty layer first takes
up the substance), up to a largest width. The grid is then checked against three exact properties
of the layer, and refined until each holds:

* its steady two-port (the fluxes in and out with its faces held: exact by
  :mod:`barrierflow.engine.twoport`; with degradation, Crank, The Mathematics of Diffusion, 2nd
  ed., 1975, ch. 14): the entering admittances (a, d) to :data:`GRID_TOLERANCE`, the transmitted
  one (b) to the tolerance or to 1e-9 of the entering one, whichever is looser (a deep degrading
  layer passes a flux that is e^(-L sqrt(k/D)) of what enters). A degrading layer thus gets
  cells that follow its reaction-diffusion length sqrt(D/k), not only its faces;
* its slowest time constant: the slowest mode with both faces held, D pi^2 / L^2 + k (Crank 1975,
  ch. 4), on which the late release of a layer and so every long regimen depends, to
  :data:`GRID_TOLERANCE`;
* its uptake at the time scale tau of the run's output step (:func:`response_time`): the entering
  admittance at the Laplace variable s = 1/tau, which is the steady one of the same layer
  degrading at k + s (the Laplace transform of D u'' - k u = du/dt; Crank 1975, ch. 2), to
  :data:`UPTAKE_TOLERANCE`. A thick, slow layer that takes up much of a small compartment's
  substance, but only to a depth sqrt(D tau) within an output step, thus gets face cells that
  resolve that depth (with the steady checks alone its face cells could be 30 times deeper than
  the substance had gone, and a compartment's concentration 1 % of its magnitude off).

Where the entering admittance is off the face cells are made finer; where the transmission or the
slowest mode is off, the largest width is made smaller; where the uptake is off, the cells within
four lengths sqrt(D tau) of each face. Without degradation the steady profile is linear and the
finite-volume fluxes are exact on any grid; the slowest mode and the uptake still set the grid.

The checks are free of scale: the admittances scale as D K / L and the slowest mode as D / L^2,
so the grid relative to the thickness depends only on q = L sqrt(k / D) (0 without degradation)
and p = L / sqrt(D tau) (0 without a time scale). p is rounded up to a step of 2^(1/4) (a
shorter time scale: a grid at least as fine), so that the grid is computed once per (q, p), for
a layer of unit thickness, diffusivity and partition (:meth:`Grid.relative`), and scaled by each
layer's thickness: layers of equal q and p, the subjects of a population among them, get the same
relative grid exactly.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from ..errors import ScenarioError
from ..model import Layer, Scenario
from ..model.cohort import decide
from .twoport import layer_pi

__all__ = ["DEFAULT_GRID", "GRID_TOLERANCE", "UPTAKE_TOLERANCE", "Grid", "response_time"]

GRID_TOLERANCE = 1e-3
"""Relative accuracy the default grid promises for each layer's steady fluxes and slowest mode."""

UPTAKE_TOLERANCE = 5e-3
"""Relative accuracy of each layer's uptake at the time scale of the output step (its entering
admittance at the Laplace variable 1/tau, :func:`response_time`)."""

_REFINE = 0.7          # factor on the face cell or the largest width per refinement
_MAX_ROUNDS = 60
_FAST_ZONE = 4.0     # reach of the fine cells near a face, in lengths sqrt(D tau)
_P_STEPS = 4         # p = L / sqrt(D tau) rounded up to a power of 2^(1/_P_STEPS)


@dataclass(frozen=True)
class Grid:
    """How a layer without ``cells`` is divided into finite-volume cells.

    A layer is cut into about ``cells_per_layer`` cells whose widths grow geometrically by
    ``stretch`` from each face toward the middle of the layer; with ``refine`` (the default) the
    grid is then refined until its steady fluxes and its slowest mode are within
    :data:`GRID_TOLERANCE` of the exact ones (see the module notes). ``stretch = 1`` gives equal
    cells. A layer with ``cells = n`` in the scenario always gets n equal cells, as the format says.

    Parameters
    ----------
    cells_per_layer : int
        Cells of a layer before refinement (default 24).
    stretch : float
        Ratio of neighbouring cell widths toward the middle of a layer, 1 to 2 (default 1.15).
    refine : bool
        Refine until the documented accuracy is met (default True).
    """

    cells_per_layer: int = 24
    stretch: float = 1.15
    refine: bool = True

    def __post_init__(self) -> None:
        if not isinstance(self.cells_per_layer, int) or not 2 <= self.cells_per_layer <= 100_000:
            raise ScenarioError.single("grid cells_per_layer", self.cells_per_layer,
                                       "must be a whole number from 2 to 100000")
        if not 1.0 <= self.stretch <= 2.0:
            raise ScenarioError.single("grid stretch", self.stretch, "must be between 1 and 2")

    def widths(self, layer: Layer, timescale: float = math.inf) -> np.ndarray:
        """Cell widths of ``layer``, cm, from its ``from`` face; they sum to the thickness.

        ``layer`` may also hold one value per subject (arrays of shape (n, 1), see
        :mod:`barrierflow.model.cohort`); the widths are then (n, cells), and subjects whose
        layers ask for different numbers of cells raise :class:`~barrierflow.model.cohort.Diverging`.
        ``timescale`` (h) is the run's :func:`response_time`, at which the layer's uptake is
        checked (infinite: the steady checks alone).
        """
        if layer.cells is not None:
            if not isinstance(layer.thickness, np.ndarray):  # one value: no broadcast (a few us a layer)
                return np.full(layer.cells, layer.thickness / layer.cells)
            return np.broadcast_to(layer.thickness / layer.cells, _shape(layer.thickness, layer.cells)).copy()
        return self.relative_to(layer, timescale) * layer.thickness

    def relative_to(self, layer: Layer, timescale: float = math.inf) -> np.ndarray:
        """Cell widths of a layer without ``cells`` relative to its thickness (summing to 1); one
        row per subject when the layer holds one value per subject."""
        k = layer.degradation_rate
        arrays = any(isinstance(x, np.ndarray) for x in (k, layer.thickness, layer.diffusivity))
        if not arrays:
            q = layer.thickness * math.sqrt(k / layer.diffusivity) if k > 0 else 0.0
            return self._relative_of(layer, float(q), _p_of(layer.thickness, layer.diffusivity, timescale))
        q = np.broadcast_to(layer.thickness * np.sqrt(np.maximum(k, 0.0) / layer.diffusivity),
                            np.broadcast(k, layer.thickness, layer.diffusivity).shape)
        p = np.broadcast_to(np.vectorize(lambda x, d: _p_of(x, d, timescale))(layer.thickness, layer.diffusivity),
                            q.shape)
        keys = list(zip(q.reshape(-1).tolist(), p.reshape(-1).tolist(), strict=True))
        rows = {x: self._relative_of(layer, *x) for x in dict.fromkeys(keys)}
        sizes = np.array([len(rows[x]) for x in keys])
        decide(sizes == sizes[0])
        return np.stack([rows[x] for x in keys])

    def _relative_of(self, layer: Layer, q: float, p: float = 0.0) -> np.ndarray:
        try:
            return self.relative(q, p)
        except _TooFine:
            raise ScenarioError.single(
                "barrier layer cells", f"a layer {_first(layer.thickness) * 1e4:.4g} um thick (D "
                f"{_first(layer.diffusivity) / 3600:.3g} cm^2/s, degradation {_first(layer.degradation_rate):.3g} 1/h)",
                "the default grid cannot reach its accuracy within 100000 cells; give the layer its own "
                "'cells'") from None

    def relative(self, q: float, p: float = 0.0) -> np.ndarray:
        """The relative cell widths (summing to 1) of a layer with L sqrt(k / D) = ``q`` (0 without
        degradation) and L / sqrt(D tau) = ``p`` (0 without a time scale; rounded up as the module
        notes say); computed once per value (a fresh copy each call)."""
        return _relative(self.cells_per_layer, self.stretch, self.refine, float(q), _rounded_p(p)).copy()


DEFAULT_GRID = Grid()
"""The default grid (``Grid()``), made once: a run without a grid of its own takes it (a grid holds
only its three settings; the widths it computed are kept per value by :func:`_relative` anyway)."""


def response_time(scenario: Scenario) -> float:
    """The time scale, h, at which the default grid of ``scenario``'s layers must take up substance.

    The spacing of the output times: the ``output_step``, the shortest gap between given
    ``output_times`` or the default step (a 500th of the run); never below a 10,000th of the run.
    A change that starts at a dose or at the start is thus right to the documented accuracy from
    one output step after it on.
    """
    if scenario.output_step is not None:
        step = scenario.output_step
    else:
        gaps = np.diff(np.asarray(scenario.output_grid(), dtype=np.float64))
        gaps = gaps[gaps > 0]
        step = float(gaps.min()) if len(gaps) else scenario.duration
    return max(min(step, scenario.duration), scenario.duration * 1e-4)


def _p_of(thickness: float, diffusivity: float, timescale: float) -> float:
    """L / sqrt(D tau), 0 for an infinite time scale."""
    if not timescale < math.inf:
        return 0.0
    return float(thickness) / math.sqrt(float(diffusivity) * timescale)


def _rounded_p(p: float) -> float:
    """``p`` rounded up to a power of 2^(1/_P_STEPS) (0 stays 0)."""
    if not p > 0:
        return 0.0
    return 2.0 ** (math.ceil(_P_STEPS * math.log2(p) - 1e-9) / _P_STEPS)


def _graded(length: float, h0: float, ratio: float, cap: float, near_cap: float, zone: float,
            fast_cap: float = math.inf, fast_zone: float = 0.0) -> np.ndarray:
    """Widths growing by ``ratio`` from ``h0`` at each face, at most ``fast_cap`` within
    ``fast_zone`` of a face (and growing by ``ratio`` from there on), at most ``near_cap`` within
    ``zone`` and ``cap`` beyond, mirrored, summing to ``length``."""
    half: list[float] = []
    total = 0.0
    h = h0
    while total < 0.5 * length:
        w = min(h, cap if total >= zone else near_cap)
        if total < fast_zone:
            w = min(w, fast_cap)
        half.append(w)
        total += w
        h = w * ratio if total < fast_zone + w else h * ratio
        if len(half) > 100_000:
            break
    w = np.array(half)
    w *= 0.5 * length / w.sum()
    return np.concatenate([w, w[::-1]])


def _shape(value, cells: int) -> tuple[int, ...]:
    return (value.shape[0], cells) if isinstance(value, np.ndarray) else (cells,)


def _first(x) -> float:
    return float(np.asarray(x).reshape(-1)[0])


class _TooFine(Exception):
    pass


@functools.lru_cache(maxsize=4096)
def _relative(n: int, stretch: float, refine: bool, q: float, p: float = 0.0) -> np.ndarray:
    """The relative grid of :meth:`Grid.relative` (kept: callers get copies); ``p`` rounded."""
    half = np.arange((n + 1) // 2)
    w_half = stretch ** half
    w = np.concatenate([w_half, w_half[: n // 2][::-1]])
    w = w / w.sum()
    if refine:
        # the unit layer: L = D = 1, so tau = 1 / p^2
        w = _refined(Layer(1.0, 1.0, 1.0, degradation_rate=q * q), w, stretch, 1.0 / (p * p) if p > 0 else math.inf)
    w.setflags(write=False)
    return w


def _refined(layer: Layer, base: np.ndarray, ratio: float, timescale: float = math.inf) -> np.ndarray:
    """``base``, or the coarsest graded grid of ``layer`` that meets the module's checks.

    The entering admittance depends on the cells within a few reaction-diffusion lengths
    sqrt(D/k) of a face: when it is off, the face cell and the largest width in that zone (12
    lengths, where the steady profile falls to e^-12) shrink; when the transmission or the
    slowest mode is off, the largest width anywhere shrinks. With a finite ``timescale`` tau the
    admittance at the Laplace variable 1/tau is checked too (against the steady one of the layer
    degrading at k + 1/tau); when it is off, the largest width within four lengths
    sqrt(D / (k + 1/tau)) of a face (how far the substance goes within tau) shrinks, and the
    cells grow by ``ratio`` from there on. Raises _TooFine when 100000 cells do not reach the
    accuracy.
    """
    length, dif, kp, k = layer.thickness, layer.diffusivity, layer.partition, layer.degradation_rate
    g, h = layer_pi(layer)
    a_exact = g + h
    lam_exact = dif * math.pi ** 2 / length ** 2 + k
    k_fast = k + 1.0 / timescale if timescale > 0 else math.inf
    fast = math.isfinite(k_fast) and k_fast > k
    reach = math.sqrt(dif / k) if k > 0 else math.inf  # the reaction-diffusion length, cm
    zone = min(12.0 * reach, 0.5 * length)
    w = base
    h0, cap = float(base[0]), float(base.max())
    near = min(cap, reach)
    fast_zone, fast_cap, a_fast = 0.0, math.inf, 0.0
    if fast:
        gf, hf = layer_pi(Layer(length, dif, kp, degradation_rate=k_fast))
        a_fast = gf + hf
        fast_reach = math.sqrt(dif / k_fast)  # how far the substance goes within tau, cm
        fast_zone, fast_cap = min(_FAST_ZONE * fast_reach, 0.5 * length), fast_reach
    for _ in range(_MAX_ROUNDS):
        a, b, lam = _layer_check(w, dif, kp, k)
        face_ok = abs(a - a_exact) <= GRID_TOLERANCE * a_exact
        pass_ok = abs(b - g) <= max(GRID_TOLERANCE * g, 1e-9 * a_exact)
        mode_ok = abs(lam - lam_exact) <= GRID_TOLERANCE * lam_exact
        fast_ok = not fast or abs(_layer_check(w, dif, kp, k_fast)[0] - a_fast) <= UPTAKE_TOLERANCE * a_fast
        if face_ok and pass_ok and mode_ok and fast_ok:
            return w
        if not face_ok:
            h0 *= _REFINE
            near *= _REFINE
        if not fast_ok:
            fast_cap *= _REFINE
        if not (pass_ok and mode_ok):
            cap *= _REFINE
        near = min(near, cap)
        h0 = min(h0, near, fast_cap)
        w = _graded(length, h0, ratio, cap, near, zone, fast_cap, fast_zone)
        if len(w) > 100_000:
            break
    raise _TooFine


@njit(cache=True, error_model="numpy", no_cfunc_wrapper=True)
def _layer_check(w, dif, kp, k):
    """The discrete layer (per unit area): its entering admittance a and transmission b with the
    faces held at potentials 1 and 0, and its slowest mode with both faces held, 1/h."""
    n = w.shape[0]
    dk = dif * kp
    g = np.empty(n + 1)
    g[0] = 2.0 * dk / w[0]
    g[n] = 2.0 * dk / w[n - 1]
    for i in range(1, n):
        g[i] = dk / (0.5 * w[i - 1] + 0.5 * w[i])
    # steady state: (g_i + g_i+1 + k K w_i) u_i - g_i u_i-1 - g_i+1 u_i+1 = g_0 [i = 0]
    diag = np.empty(n)
    for i in range(n):
        diag[i] = g[i] + g[i + 1] + k * kp * w[i]
    # Thomas (the matrix is symmetric and diagonally dominant)
    c = np.empty(n)
    r = np.zeros(n)
    r[0] = g[0]
    piv = diag[0]
    c[0] = -g[1] / piv
    r[0] = r[0] / piv
    for i in range(1, n):
        piv = diag[i] + g[i] * c[i - 1]
        c[i] = -g[i + 1] / piv if i + 1 < n else 0.0
        r[i] = (r[i] + g[i] * r[i - 1]) / piv
    u = np.empty(n)
    u[n - 1] = r[n - 1]
    for i in range(n - 2, -1, -1):
        u[i] = r[i] - c[i] * u[i + 1]
    a = g[0] * (1.0 - u[0])
    b = g[n] * u[n - 1]
    # slowest mode of M^-1 S (S the matrix above, M = K w): inverse iteration on the symmetric
    # form, with the Rayleigh quotient as a sum of squares (no cancellation)
    x = np.empty(n)
    for i in range(n):
        x[i] = math.sqrt(kp * w[i]) * math.sin(math.pi * (i + 0.5) / n)
    lam = 0.0
    for _it in range(30):
        # solve (M^-1/2 S M^-1/2) y = x: S z = M^1/2 x, y = M^1/2 z
        rr = np.empty(n)
        for i in range(n):
            rr[i] = math.sqrt(kp * w[i]) * x[i]
        piv = diag[0]
        c[0] = -g[1] / piv
        rr[0] = rr[0] / piv
        for i in range(1, n):
            piv = diag[i] + g[i] * c[i - 1]
            c[i] = -g[i + 1] / piv if i + 1 < n else 0.0
            rr[i] = (rr[i] + g[i] * rr[i - 1]) / piv
        z = np.empty(n)
        z[n - 1] = rr[n - 1]
        for i in range(n - 2, -1, -1):
            z[i] = rr[i] - c[i] * z[i + 1]
        nrm = 0.0
        for i in range(n):
            x[i] = math.sqrt(kp * w[i]) * z[i]
            nrm += x[i] * x[i]
        nrm = math.sqrt(nrm)
        for i in range(n):
            x[i] /= nrm
        # Rayleigh quotient of S on z = M^-1/2 x: sum of g (du)^2 + g0 u0^2 + gn un^2 + k K w u^2
        acc = 0.0
        for i in range(n):
            ui = x[i] / math.sqrt(kp * w[i])
            acc += k * kp * w[i] * ui * ui
            if i == 0:
                acc += g[0] * ui * ui
            if i == n - 1:
                acc += g[n] * ui * ui
            if i + 1 < n:
                du = ui - x[i + 1] / math.sqrt(kp * w[i + 1])
                acc += g[i + 1] * du * du
        if abs(acc - lam) <= 1e-13 * acc:
            lam = acc
            break
        lam = acc
    return a, b, lam
