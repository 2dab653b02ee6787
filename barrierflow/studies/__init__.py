"""Studies: what is done with many runs of one scenario (fitting to data, designing experiments,
populations, sweeps, sensitivity analyses).

Each study is a function taking a :class:`~barrierflow.Scenario` and parameter paths
(:mod:`barrierflow.model.paths`) and returning a frozen result with its own reports. Studies sit
above the analysis layer and below the command line and the dashboard::

    dashboard, cli -> studies -> analysis -> engine -> io -> model -> units, errors

Fitting to a lab's data and planning its next experiment:

=========================================  ====================================================
:func:`fit`                                estimate parameters from replicate data (time-lag
                                           start, weighted least squares, Jacobian and profile
                                           intervals, per-replicate fits, emcee posterior)
:func:`design`                             D-optimal sampling times and the expected CV of each
                                           parameter, beside the user's own schedule
=========================================  ====================================================

The studies on many subjects run here on every core or, given the address of a dask.distributed
scheduler, on a cluster, with bit-identical results (:mod:`barrierflow.studies.runner`):

=========================================  ====================================================
:func:`run_population`                     N subjects drawn from the ``[[vary]]`` tables:
                                           percentile bands of every trace, the distribution of
                                           every metric, every subject's values and metrics
:func:`run_sweep`                          a grid over one or two parameters: metrics per point
:func:`local_sensitivity`                  d ln(metric) / d ln(parameter) at the scenario's values
:func:`sobol_indices`, :func:`morris_screening`
                                           global sensitivity over the ``[[vary]]`` distributions
                                           (SALib: Saltelli sampling with Sobol indices and
                                           bootstrap intervals; Morris elementary effects)
=========================================  ====================================================

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review.
"""

from .design import DesignResult, design
from .distributions import Marginal, Variability, subject_rng, with_variability
from .fit import FitResult, fit
from .population import DEFAULT_PERCENTILES, Failure, PopulationResult, SubjectTable, run_population
from .sensitivity import SensitivityResult, local_sensitivity, morris_screening, sobol_indices, sobol_of_function
from .sweep import Axis, SweepResult, run_sweep

__all__ = [
    "DEFAULT_PERCENTILES",
    "Axis",
    "DesignResult",
    "Failure",
    "FitResult",
    "Marginal",
    "PopulationResult",
    "SensitivityResult",
    "SubjectTable",
    "SweepResult",
    "Variability",
    "design",
    "fit",
    "local_sensitivity",
    "morris_screening",
    "run_population",
    "run_sweep",
    "sobol_indices",
    "sobol_of_function",
    "subject_rng",
    "with_variability",
]
