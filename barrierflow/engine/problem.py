"""The right-hand side and Jacobian of one dosing interval, as callables for integrators."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:  # scipy.sparse is imported when a Jacobian is first built (it is slow to import)
    import scipy.sparse as sp

from .arrays import ModelArrays
from .compiled import CompiledModel
from .kernels import jacobian_coo, jacobian_size, rates

__all__ = ["IntervalProblem", "IntervalSettings"]


@dataclass(frozen=True, eq=False)
class IntervalSettings:
    """What stays constant between two events.

    Attributes
    ----------
    infusion : ndarray, mg/h
        Infusion rate into each compartment.
    clamp : ndarray of bool
        Compartments whose concentration is held (held compartments and running hold doses).
    """

    infusion: np.ndarray
    clamp: np.ndarray


class IntervalProblem:
    """``f(t, y)`` and its sparse Jacobian for one interval, with evaluation counters.

    The integrator's states are ``enter(y)`` and a state ``w`` at local time t is
    ``leave(w, t)``: here both the identity (a subclass may integrate other variables, as
    :class:`~barrierflow.engine.vehicle.VehicleProblem` does).

    Parameters
    ----------
    model : CompiledModel
    settings : IntervalSettings
    arrays : ModelArrays, optional
        The model's numbers in this interval (the run's volumes and links, as the events left
        them); default ``model.arrays``.
    """

    def __init__(self, model: CompiledModel, settings: IntervalSettings, arrays: ModelArrays | None = None):
        self.model = model
        self.settings = settings
        self.arrays = model.arrays if arrays is None else arrays
        self.n = model.n_state
        self._arrays = tuple(self.arrays)  # a plain tuple: the cheaper call (see engine.arrays)
        self._scratch = np.empty(model.n_dyn)
        size = jacobian_size(model)
        self._rows = np.zeros(size, dtype=np.int64)
        self._cols = np.zeros(size, dtype=np.int64)
        self._vals = np.zeros(size)
        self._jac_cache: sp.csc_matrix | None = None
        self.nfev = 0
        self.njev = 0

    def enter(self, y: np.ndarray) -> np.ndarray:
        """The integrator's state for the state ``y`` at the interval's start (here ``y`` itself)."""
        return y

    def leave(self, w: np.ndarray, t: float) -> np.ndarray:
        """The state for the integrator's state ``w`` at local time ``t`` (here ``w`` itself)."""
        return w

    def fun(self, t: float, y: np.ndarray) -> np.ndarray:
        """dy/dt at state ``y`` (the problem is autonomous within an interval)."""
        self.nfev += 1
        out = np.empty(self.n)
        rates(y, out, self._arrays, self.settings.infusion, self.settings.clamp, self._scratch)
        return out

    def jac(self, t: float, y: np.ndarray) -> sp.csc_matrix:
        """Sparse Jacobian d(dy/dt)/dy at ``y`` (computed once for a linear model)."""
        if self._jac_cache is not None:
            return self._jac_cache
        self.njev += 1
        k = jacobian_coo(y, self._rows, self._cols, self._vals, self._arrays, self.settings.clamp)
        import scipy.sparse as sp

        mat = sp.csc_matrix((self._vals[:k].copy(), (self._rows[:k].copy(), self._cols[:k].copy())),
                            shape=(self.n, self.n))
        if self.model.is_linear:
            self._jac_cache = mat
        return mat

    def jac_dense(self, t: float, y: np.ndarray) -> np.ndarray:
        """Dense Jacobian (for integrators that need one)."""
        return self.jac(t, y).toarray()
