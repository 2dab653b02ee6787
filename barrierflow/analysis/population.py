"""Statistics of a population, by the rules of a single run.

:func:`population_exposure` gives each subject's Cmax, tmax and AUC in one compartment with the
rules of :mod:`barrierflow.analysis.metrics`: the AUC by the linear-up / log-down trapezoidal
rule, and at the row of an instantaneous dose the value just before it estimated from the rows
before (so the jump is not smeared over a segment). A subject's figures are therefore those of
the same scenario run alone (:func:`barrierflow.analysis.metrics.compute_metrics`).
:func:`percentile_bands` gives percentiles over the subjects at each output time.

The engine (:mod:`barrierflow.engine.population`) only runs the subjects; what is computed from
their traces lives here.

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from .metrics import auc, jump_times

if TYPE_CHECKING:
    from ..engine.population import Population

__all__ = ["PopulationExposure", "percentile_bands", "population_exposure", "subject_exposure"]


@dataclass(frozen=True, eq=False)
class PopulationExposure:
    """Exposure of each subject in one compartment.

    Attributes
    ----------
    id : str
        The compartment.
    cmax : ndarray (n_subjects,), mg/mL
        Highest concentration over the output times.
    tmax : ndarray (n_subjects,), h
        Output time of the highest concentration (the first, when it is reached more than once).
    auc : ndarray (n_subjects,), mg h/mL
        Area under the concentration curve over the run, linear-up / log-down; NaN for a
        subject whose run failed (its trace is incomplete).
    """

    id: str
    cmax: np.ndarray
    tmax: np.ndarray
    auc: np.ndarray


def subject_exposure(t: Sequence[float], c: np.ndarray,
                     jumps: Sequence[float] = ()) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Cmax, tmax and AUC of each row of ``c``, by the rules of a single run.

    Parameters
    ----------
    t : array (n_t,), h
        Increasing output times, shared by the rows.
    c : array (n_subjects, n_t), mg/mL
        One concentration trace per row; NaN after the time a subject's run failed.
    jumps : sequence of float, h
        Times of instantaneous events on this compartment, shared by the rows (see
        :func:`barrierflow.analysis.metrics.left_limits`).

    Returns
    -------
    cmax : ndarray (n_subjects,), mg/mL
        Over the rows' finite values.
    tmax : ndarray (n_subjects,), h
    auc : ndarray (n_subjects,), mg h/mL
        :func:`barrierflow.analysis.metrics.auc` of each row; NaN for a row holding NaN.

    Examples
    --------
    Two subjects of 10 exp(-k t), k = 0.5 and 0.25 1/h, sampled every 2 h to 48 h: the log-down
    rule is exact on an exponential decline, AUC = (10/k) (1 - exp(-48 k)):

    >>> import numpy as np
    >>> t = np.arange(0.0, 49.0, 2.0)
    >>> c = 10.0 * np.exp(-np.outer([0.5, 0.25], t))
    >>> np.round(subject_exposure(t, c)[2], 6)
    array([20.      , 39.999754])
    """
    t = np.asarray(t, dtype=float)
    c = np.atleast_2d(np.asarray(c, dtype=float))
    n = c.shape[0]
    cmax = np.full(n, np.nan)
    tmax = np.full(n, np.nan)
    area = np.full(n, np.nan)
    for i in range(n):
        row = c[i]
        finite = ~np.isnan(row)
        if not finite.any():
            continue
        k = int(np.argmax(np.where(finite, row, -np.inf)))
        cmax[i], tmax[i] = row[k], t[k]
        if finite.all():
            area[i] = auc(t, row, jumps)
    return cmax, tmax, area


def population_exposure(population: Population, cid: str) -> PopulationExposure:
    """Cmax, tmax and AUC of every subject in compartment ``cid`` (see :func:`subject_exposure`).

    The dose times come from :attr:`Population.scenario` (shared by the subjects).
    """
    jumps = jump_times(population.scenario, cid) if population.scenario is not None else ()
    cmax, tmax, area = subject_exposure(population.times, population.concentration(cid), jumps)
    return PopulationExposure(id=cid, cmax=cmax, tmax=tmax, auc=area)


def percentile_bands(values: np.ndarray, q: Sequence[float] = (5, 50, 95)) -> np.ndarray:
    """Percentiles over the subjects at each output time, ignoring NaN (failed subjects' ends).

    Parameters
    ----------
    values : array (n_subjects, n_t)
        A trace of every subject, for example ``population.concentration("central")``.
    q : sequence of float
        Percentiles from 0 to 100 (numpy's default linear interpolation between order statistics).

    Returns
    -------
    ndarray (len(q), n_t)
        In the unit of ``values``.
    """
    return np.nanpercentile(np.asarray(values, dtype=float), q, axis=0)
