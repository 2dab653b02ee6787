"""Drawing subjects: the distributions of the ``[[vary]]`` tables, the Gaussian copula and the seeds.

:class:`Marginal` is one parameter's distribution with its numbers resolved against the
scenario (internal units): log-normal with median the scenario's value and
sigma = sqrt(ln(1 + cv^2)) (or ln gsd), so that its coefficient of variation is cv (the usual
model of between-subject variability, for example Mould and Upton, CPT Pharmacometrics Syst.
Pharmacol. 2, 2013, e38); normal with mean the scenario's value; uniform; each optionally
truncated. Every marginal is a monotone function of a standard normal score
(:meth:`Marginal.from_score`), and of a uniform number in (0, 1) (:meth:`Marginal.ppf`, the
quantile function, for the samples of :mod:`barrierflow.studies.sensitivity`).

:class:`Variability` holds the varied parameters of a scenario, their marginals and the
Cholesky factor of the copula's correlation matrix (r = 2 sin(pi rank / 6) for each
``[[correlation]]``; :func:`barrierflow.model.variability.copula_matrix`). Subject ``k``
(counted from 1) draws its scores from its own random stream, ``SeedSequence(seed,
spawn_key=(k,))`` (numpy's documented way of independent streams), so a subject is the same
whatever the number of subjects, chunks, workers or machines.

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr, ndtri

from ..errors import ScenarioError
from ..model import Correlation, Scenario, Variation
from ..model.paths import Param
from ..model.variability import _cholesky, copula_matrix

__all__ = ["Marginal", "Variability", "bare", "subject_rng", "with_variability"]


def subject_rng(seed: int, subject: int) -> np.random.Generator:
    """The random stream of subject ``subject`` (from 1) of a study seeded with ``seed``.

    ``numpy.random.SeedSequence(seed, spawn_key=(subject,))``, the ``subject``-th child of the
    study's seed sequence, into numpy's default bit generator (PCG64).
    """
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(subject,))))


def _truncated_score(z: np.ndarray, a: float, b: float) -> np.ndarray:
    """The standard normal score ``z`` carried into the normal truncated to [a, b] (inverse transform)."""
    if a >= 0.0:  # both bounds in the upper tail: work on the mirror image, where ndtr is accurate
        return -_truncated_score(-z, -b, -a)
    pa, pb = ndtr(a), ndtr(b)
    u = ndtr(z)
    return np.clip(ndtri(pa + u * (pb - pa)), a, b)


@dataclass(frozen=True)
class Marginal:
    """One parameter's distribution, numbers resolved (internal units).

    Parameters
    ----------
    distribution : {"lognormal", "normal", "uniform"}
    loc : float
        ln(median) of a log-normal; the mean of a normal; the low end of a uniform.
    scale : float
        sigma of ln x for a log-normal; the standard deviation of a normal; high - low of a uniform.
    lower, upper : float
        Truncation bounds (``-inf`` and ``inf`` without truncation).
    """

    distribution: str
    loc: float
    scale: float
    lower: float = -math.inf
    upper: float = math.inf

    @classmethod
    def from_variation(cls, v: Variation, value: float) -> Marginal:
        """The marginal of a ``[[vary]]`` table centred on ``value`` (the scenario's value of its path)."""
        lo, hi = v.truncate if v.truncate is not None else (-math.inf, math.inf)
        if v.distribution == "lognormal":
            sigma = math.log(v.gsd) if v.gsd is not None else math.sqrt(math.log1p(v.cv ** 2))
            return cls("lognormal", math.log(value), sigma, lo, hi)
        if v.distribution == "normal":
            sd = v.sd if v.sd is not None else v.cv * abs(value)
            return cls("normal", value, sd, lo, hi)
        return cls("uniform", v.low, v.high - v.low)

    def _bounds(self) -> tuple[float, float]:
        """The truncation bounds as standard scores (-inf, inf without truncation)."""
        lo, hi = self.lower, self.upper
        if self.distribution == "lognormal":
            a = (math.log(lo) - self.loc) / self.scale if lo > 0 else -math.inf
            b = (math.log(hi) - self.loc) / self.scale if hi < math.inf else math.inf
        else:
            a = (lo - self.loc) / self.scale if lo > -math.inf else -math.inf
            b = (hi - self.loc) / self.scale if hi < math.inf else math.inf
        return a, b

    @property
    def truncated(self) -> bool:
        """True when the distribution is truncated."""
        return self.distribution != "uniform" and (self.lower > -math.inf or self.upper < math.inf)

    def from_score(self, z: np.ndarray) -> np.ndarray:
        """The values whose normal scores are ``z`` (a monotone map; the copula draws ``z``)."""
        z = np.asarray(z, dtype=float)
        if self.distribution == "uniform":
            return self.loc + self.scale * ndtr(z)
        if self.truncated:
            z = _truncated_score(z, *self._bounds())
        if self.distribution == "lognormal":
            x = np.exp(self.loc + self.scale * z)
        else:
            x = self.loc + self.scale * z
        if self.truncated:  # rounding must not carry a value past a bound
            x = np.clip(x, self.lower, self.upper)
        return x

    def ppf(self, u: np.ndarray) -> np.ndarray:
        """The quantile function: values at probabilities ``u`` in (0, 1)."""
        u = np.asarray(u, dtype=float)
        if self.distribution == "uniform":
            return self.loc + self.scale * u
        return self.from_score(ndtri(u))

    def cdf(self, x: np.ndarray) -> np.ndarray:
        """The distribution function at ``x``."""
        x = np.asarray(x, dtype=float)
        if self.distribution == "uniform":
            return np.clip((x - self.loc) / self.scale, 0.0, 1.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            if self.distribution == "lognormal":
                z = np.where(x > 0, (np.log(np.where(x > 0, x, 1.0)) - self.loc) / self.scale, -np.inf)
            else:
                z = (x - self.loc) / self.scale
        if not self.truncated:
            return ndtr(z)
        a, b = self._bounds()
        pa, pb = ndtr(a), ndtr(b)
        return np.clip((ndtr(np.clip(z, a, b)) - pa) / (pb - pa), 0.0, 1.0)


@dataclass(frozen=True, eq=False)
class Variability:
    """The varied parameters of a scenario, ready to draw from.

    Build it with :meth:`from_scenario`. Pickles (a worker of a cluster may draw too).

    Attributes
    ----------
    params : tuple of Param
        In the order of the ``[[vary]]`` tables.
    variations : tuple of Variation
    marginals : tuple of Marginal
    centre : tuple of float
        The scenario's value of each parameter (internal units).
    chol : ndarray (d, d) or None
        Lower Cholesky factor of the copula's correlation matrix; None without correlations.
    """

    params: tuple[Param, ...]
    variations: tuple[Variation, ...]
    marginals: tuple[Marginal, ...]
    centre: tuple[float, ...]
    chol: np.ndarray | None = None

    @classmethod
    def from_scenario(cls, scenario: Scenario) -> Variability:
        """The ``[[vary]]`` and ``[[correlation]]`` tables of ``scenario``, resolved on its values.

        (The scenario has checked them when it was built.)
        """
        params = tuple(v.path for v in scenario.vary)
        centre = tuple(float(v.path.get(scenario)) for v in scenario.vary)
        marginals = tuple(Marginal.from_variation(v, c) for v, c in zip(scenario.vary, centre, strict=True))
        chol = None
        if scenario.correlations:
            low = _cholesky(copula_matrix(params, scenario.correlations))
            chol = np.array(low, dtype=float)
        return cls(params, tuple(scenario.vary), marginals, centre, chol)

    @property
    def size(self) -> int:
        """Number of varied parameters."""
        return len(self.params)

    def scores(self, seed: int, first: int, count: int) -> np.ndarray:
        """Correlated standard normal scores of subjects ``first`` to ``first + count - 1`` (from 1).

        Returns
        -------
        ndarray (count, d)
        """
        d = self.size
        e = np.empty((count, d))
        for i in range(count):
            e[i] = subject_rng(seed, first + i).standard_normal(d)
        return e @ self.chol.T if self.chol is not None else e

    def draw(self, seed: int, first: int, count: int) -> np.ndarray:
        """Parameter values of subjects ``first`` to ``first + count - 1`` (from 1), internal units.

        Returns
        -------
        ndarray (count, d)
            Column j is parameter ``params[j]``.
        """
        z = self.scores(seed, first, count)
        out = np.empty_like(z)
        for j, m in enumerate(self.marginals):
            out[:, j] = m.from_score(z[:, j])
        return out

    def from_unit(self, u: np.ndarray) -> np.ndarray:
        """Independent values from numbers in (0, 1), column by column (the quantile functions).

        For the quasi-random samples of a global sensitivity analysis, which assume independent
        parameters.
        """
        u = np.asarray(u, dtype=float)
        out = np.empty_like(u)
        for j, m in enumerate(self.marginals):
            out[:, j] = m.ppf(u[:, j])
        return out


def with_variability(scenario: Scenario, vary: Iterable[Variation | str] = (),
                     correlate: Iterable[Correlation | tuple[str, str, float]] = ()) -> Scenario:
    """The scenario with more ``[[vary]]`` and ``[[correlation]]`` tables (the command-line options).

    A variation on a path that the scenario already varies replaces the scenario's; the others
    are added after the scenario's own. The result is validated as a file would be.

    Parameters
    ----------
    scenario : Scenario
    vary : iterable of Variation or str
        A text is the command-line form ``PATH=SPEC`` (:meth:`Variation.parse`).
    correlate : iterable of Correlation or (path, path, rank)

    Raises
    ------
    ScenarioError
        For a variation or correlation that does not fit the scenario.
    """
    mm = scenario.substance.molar_mass
    given = [v if isinstance(v, Variation) else Variation.parse(v, mm) for v in vary]
    merged = list(scenario.vary)
    for v in given:
        same = next((i for i, old in enumerate(merged) if set(old.path.paths) & set(v.path.paths)), None)
        if same is None:
            merged.append(v)
        else:
            merged[same] = v
    corr = list(scenario.correlations)
    for c in correlate:
        if not isinstance(c, Correlation):
            try:
                a, b, rank = c
                c = Correlation((a, b), float(rank))
            except (TypeError, ValueError):
                raise ScenarioError.single("--correlate", repr(c), "PATH PATH RANK, such as "
                                           "compartment.central.clearance compartment.central.volume 0.5") from None
            except ScenarioError as err:
                raise err.within("--correlate") from None
        corr = [old for old in corr if set(old.between) != set(c.between)] + [c]
    if not given and len(corr) == len(scenario.correlations):
        return scenario
    return dataclasses.replace(scenario, vary=tuple(merged), correlations=tuple(corr))


def bare(scenario: Scenario) -> Scenario:
    """The scenario without its variability tables (what each subject is built from)."""
    if not scenario.vary and not scenario.correlations:
        return scenario
    return dataclasses.replace(scenario, vary=(), correlations=())
