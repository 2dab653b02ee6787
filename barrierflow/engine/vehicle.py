"""What a vehicle does to a dose: volumes that change with time and undissolved solid.

Three processes make a model leave the linear, time-invariant form of the other paths
(:attr:`~barrierflow.engine.compiled.CompiledModel.vehicle_terms`):

- **Evaporation.** A volatile vehicle's volume shrinks at a constant rate E (mL/h) down to its
  residual volume: V(t) = V_start - E t within a dosing interval (the schedule puts a ``dry``
  event where the residue is reached, so the volume is linear in every interval). The solute
  stays: its amount changes only by transport. An evaporating compartment is integrated on its
  *amount* (mg) within the interval, so that the sum of amounts that the ledger checks is a
  linear invariant with constant weights, which the implicit integrators keep to the accuracy of
  their Newton iterations; its concentration is the amount over V(t).
- **Solubility.** Where a compartment may exceed the solubility S times its partition K
  (:func:`~barrierflow.engine.compiled.limited_compartments`), its state is the total
  concentration (dissolved and solid, per volume) and only the dissolved part, min(C, S K),
  drives transport, losses and samples; the solid redissolves as the solution is depleted.
- **Samples without replacement.** A sample takes its aliquot and the volume shrinks by it
  (at the event, so the volume is constant within each interval).

Between events f(t, y) is built from the one rate kernel of every path
(:func:`~barrierflow.engine.kernels.rates`) with the interval's volumes and the dissolved
concentrations; the Jacobian is that of the kernel with the chain rule of both maps (1/V for an
evaporating compartment's amount, 0 or 1 for the dissolved part). The model is smooth between
events except where a compartment starts or stops holding solid; the scipy integrators' error
control handles that kink. Only the scipy integrators run these models (:class:`VehicleProblem`
is an :class:`~barrierflow.engine.problem.IntervalProblem`); the compiled paths refuse them.
"""

from __future__ import annotations

import numpy as np

from .arrays import ModelArrays
from .compiled import CompiledModel
from .kernels import jacobian_coo, rates
from .problem import IntervalProblem, IntervalSettings

__all__ = ["VehicleProblem", "dissolved"]


def dissolved(model: CompiledModel, conc: np.ndarray) -> np.ndarray:
    """The dissolved concentration of each compartment, mg/mL, from total concentrations
    ``conc`` (..., n_comp): ``min(C, S K)`` where a solubility limit applies, ``C`` elsewhere."""
    return np.minimum(conc, model.solubility)


class VehicleProblem(IntervalProblem):
    """``f(t, y)`` and its Jacobian for one interval of a model with vehicle terms.

    The integrator sees internal states (:meth:`enter`, :meth:`leave`): an evaporating
    compartment's amount in place of its concentration.

    Parameters
    ----------
    model : CompiledModel
    settings : IntervalSettings
    evaporation : ndarray (n_comp,), mL/h
        The rate at which each compartment's volume shrinks in this interval (0: constant).
    arrays : ModelArrays, optional
        This interval's link coefficients and volumes at its start (``capacity``); default
        ``model.arrays``.
    """

    def __init__(self, model: CompiledModel, settings: IntervalSettings, evaporation: np.ndarray,
                 arrays: ModelArrays | None = None):
        super().__init__(model, settings, arrays)
        a = self.arrays
        self.evap = np.flatnonzero(evaporation > 0)
        self.rate = evaporation[self.evap]
        self.v0 = a.capacity[self.evap].copy()
        self.limited = np.flatnonzero(np.isfinite(a.solubility))
        self.sol = a.solubility[self.limited]
        # the volumes of the moment go into a copy of the arrays (capacity and its reciprocal)
        self._cap = a.capacity.copy()
        self._icap = a.inv_capacity.copy()
        self._arrays = tuple(a._replace(capacity=self._cap, inv_capacity=self._icap))

    def volume(self, t: float) -> np.ndarray:
        """The volumes of the evaporating compartments at local time ``t``, mL."""
        return self.v0 - self.rate * t

    def enter(self, y: np.ndarray) -> np.ndarray:
        """Internal state of ``y`` at the interval's start: amounts for evaporating compartments."""
        w = y.copy()
        w[self.evap] = y[self.evap] * self.v0
        return w

    def leave(self, w: np.ndarray, t: float) -> np.ndarray:
        """The state (concentrations) of internal state ``w`` at local time ``t``."""
        y = w.copy()
        y[self.evap] = w[self.evap] / self.volume(t)
        return y

    def _prepare(self, t: float, w: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        cap = self._cap
        vol = self.volume(t)
        cap[self.evap] = vol
        self._icap[self.evap] = 1.0 / vol
        y = w.copy()
        y[self.evap] = w[self.evap] / vol
        y[self.limited] = np.minimum(y[self.limited], self.sol)
        return y, cap, vol

    def fun(self, t: float, w: np.ndarray) -> np.ndarray:
        """d(internal state)/dt at local time ``t``."""
        self.nfev += 1
        y, cap, vol = self._prepare(t, w)
        out = np.empty(self.n)
        rates(y, out, self._arrays, self.settings.infusion, self.settings.clamp, self._scratch)
        out[self.evap] *= vol  # amount rates of the evaporating compartments
        return out

    def jac(self, t: float, w: np.ndarray):
        """Sparse Jacobian of :meth:`fun` at ``(t, w)`` (computed at every call: it changes)."""
        import scipy.sparse as sp

        self.njev += 1
        y, cap, vol = self._prepare(t, w)
        k = jacobian_coo(y, self._rows, self._cols, self._vals, self._arrays, self.settings.clamp)
        rows, cols, vals = self._rows[:k].copy(), self._cols[:k].copy(), self._vals[:k].copy()
        col_factor = np.ones(self.n)
        col_factor[self.evap] = 1.0 / vol
        raw = w.copy()
        raw[self.evap] = w[self.evap] / vol
        col_factor[self.limited[raw[self.limited] > self.sol]] = 0.0  # solid present: dissolved part fixed
        row_factor = np.ones(self.n)
        free_evap = self.evap[~self.settings.clamp[self.evap]]
        row_factor[free_evap] = vol[~self.settings.clamp[self.evap]]
        vals *= col_factor[cols] * row_factor[rows]
        return sp.csc_matrix((vals, (rows, cols)), shape=(self.n, self.n))

    def jac_dense(self, t: float, w: np.ndarray) -> np.ndarray:
        """Dense Jacobian (for integrators that need one)."""
        return self.jac(t, w).toarray()
