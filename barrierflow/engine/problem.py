"""The right-hand side and Jacobian of one dosing interval, as callables for integrators."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:  # scipy.sparse is imported when a Jacobian is first built (it is slow to import)
    import scipy.sparse as sp

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

    Parameters
    ----------
    model : CompiledModel
    settings : IntervalSettings
    """

    def __init__(self, model: CompiledModel, settings: IntervalSettings):
        self.model = model
        self.settings = settings
        m = model
        self.n = m.n_state
        self._args = (m.n_comp, m.n_dyn, m.capacity, m.inv_partition, m.link_p, m.link_q, m.link_a, m.link_b,
                      m.link_c, m.link_d, m.link_loss, m.link_track, m.loss_rate, m.loss_to, m.mm_state,
                      m.mm_vmax, m.mm_km, m.tr_from, m.tr_to, m.tr_rate)
        size = jacobian_size(len(m.link_p), m.n_dyn, len(m.mm_state), len(m.tr_from))
        self._rows = np.zeros(size, dtype=np.int64)
        self._cols = np.zeros(size, dtype=np.int64)
        self._vals = np.zeros(size)
        self._jac_cache: sp.csc_matrix | None = None
        self.nfev = 0
        self.njev = 0

    def fun(self, t: float, y: np.ndarray) -> np.ndarray:
        """dy/dt at state ``y`` (the problem is autonomous within an interval)."""
        self.nfev += 1
        out = np.empty(self.n)
        rates(y, out, *self._args, self.settings.infusion, self.settings.clamp, self.model.q_supply,
              self.model.q_infused)
        return out

    def jac(self, t: float, y: np.ndarray) -> sp.csc_matrix:
        """Sparse Jacobian d(dy/dt)/dy at ``y`` (computed once for a linear model)."""
        if self._jac_cache is not None:
            return self._jac_cache
        self.njev += 1
        k = jacobian_coo(y, self._rows, self._cols, self._vals, *self._args,
                         self.settings.clamp, self.model.q_supply)
        import scipy.sparse as sp

        mat = sp.csc_matrix((self._vals[:k].copy(), (self._rows[:k].copy(), self._cols[:k].copy())),
                            shape=(self.n, self.n))
        if self.model.is_linear:
            self._jac_cache = mat
        return mat

    def jac_dense(self, t: float, y: np.ndarray) -> np.ndarray:
        """Dense Jacobian (for integrators that need one)."""
        return self.jac(t, y).toarray()
