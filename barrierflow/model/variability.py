"""Variability of a scenario: the ``[[vary]]`` and ``[[correlation]]`` tables.

A :class:`Variation` puts a distribution on one parameter path (or a tied group of paths, which
then vary together by one draw)::

    [[vary]]
    path = "barrier.skin.layer.1.diffusivity"
    distribution = "lognormal"     # lognormal (cv or gsd), normal (sd or cv), uniform (low, high)
    cv = 0.3                       # the median is the scenario's value
    # truncate = ["1e-10 cm^2/s", "1e-8 cm^2/s"]

The scenario's value of the path is the centre of the distribution: the median (and geometric
mean) of a log-normal, the mean of a normal. A log-normal is given by its coefficient of
variation ``cv`` or its geometric standard deviation ``gsd`` (sigma = ln gsd, and
cv^2 = exp(sigma^2) - 1); a normal by its standard deviation ``sd`` (a quantity with the
path's unit) or ``cv`` (sd = cv times the value); a uniform by ``low`` and ``high``.
``truncate = [lo, hi]`` keeps the distribution inside an interval (an open side is written
``inf`` or ``-inf``).

A :class:`Correlation` gives two varied parameters a rank (Spearman) correlation, realised by
a Gaussian copula::

    [[correlation]]
    between = ["barrier.skin.layer.1.diffusivity", "barrier.skin.layer.1.partition"]
    rank = -0.4

The same on the command line: ``--vary PATH=SPEC`` (:meth:`Variation.parse`) and
``--correlate PATH PATH RANK``.

These classes only describe and check the variability; drawing values from it is the job of
:mod:`barrierflow.studies.distributions`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, ClassVar

from ..errors import Problem, ScenarioError, UnitsError
from ..units import KINDS, format_quantity, parse_quantity
from ._fields import FieldSpec, finite, suggest
from .paths import Param, ParamPath, Tied, parse_param

if TYPE_CHECKING:
    from .scenario import Scenario

__all__ = ["DISTRIBUTIONS", "Correlation", "Variation", "copula_matrix", "variability_problems"]

DISTRIBUTIONS: dict[str, tuple[str, ...]] = {
    "lognormal": ("cv", "gsd"),
    "normal": ("sd", "cv"),
    "uniform": ("low", "high"),
}
"""Each distribution and the keys that give its spread (one of cv/gsd, one of sd/cv, both low and high)."""

MAX_CV = 10.0
"""Largest coefficient of variation accepted (1000 %)."""

TAIL_REFUSED = 1e-6
"""An untruncated normal that puts more than this probability outside the range the model accepts
is refused (1 subject in a million would fail); truncate it or use a log-normal."""

_SPREAD_KEYS = ("cv", "gsd", "sd", "low", "high")


def _phi(z: float) -> float:
    """Standard normal distribution function."""
    return 0.5 * math.erfc(-z / math.sqrt(2.0))


@dataclass(frozen=True)
class Variation:
    """A distribution on one parameter path (a ``[[vary]]`` table).

    Parameters
    ----------
    path : ParamPath, Tied or str
        The parameter (a text is read with :func:`barrierflow.model.paths.parse_param`; a tied
        group varies its members by one draw). It must be a quantity that does not shape the run
        (not a count, a dose time or the duration).
    distribution : {"lognormal", "normal", "uniform"}
    cv : float or None
        Coefficient of variation (0.3 for 30 %): of the log-normal (cv^2 = exp(sigma^2) - 1) or
        of the normal (sd = cv times the scenario's value).
    gsd : float or None
        Geometric standard deviation of a log-normal (> 1; sigma = ln gsd).
    sd : float or None, internal unit of the path
        Standard deviation of a normal.
    low, high : float or None, internal unit of the path
        Bounds of a uniform.
    truncate : (float, float) or None, internal unit of the path
        Keep the draws inside [lo, hi] (``-inf`` / ``inf`` for an open side).

    Raises
    ------
    ScenarioError
        Listing every problem: an unknown distribution, a spread missing, given twice or out of
        range, a path that cannot vary.
    """

    path: Param
    distribution: str
    cv: float | None = None
    gsd: float | None = None
    sd: float | None = None
    low: float | None = None
    high: float | None = None
    truncate: tuple[float, float] | None = None

    KEYS: ClassVar[tuple[str, ...]] = ("path", "distribution", "cv", "gsd", "sd", "low", "high", "truncate")
    """The keys of a ``[[vary]]`` table, in the order they are written."""

    def __post_init__(self) -> None:
        problems: list[Problem] = []
        if isinstance(self.path, str):
            object.__setattr__(self, "path", parse_param(self.path, what="path"))
        if self.truncate is not None and not isinstance(self.truncate, tuple):
            object.__setattr__(self, "truncate", tuple(self.truncate))
        p = self.path
        if not isinstance(p, ParamPath | Tied):
            raise ScenarioError.single("path", repr(p), "a parameter path such as 'barrier.skin.layer.1.diffusivity'",
                                       path="path")
        if not p.numeric or p.kind == "count":
            problems.append(Problem("path", repr(p.text), f"{p.label} is not a quantity; vary a rate, an amount, "
                                    "a volume or a property of a layer", path="path"))
        elif p.structural:
            problems.append(Problem("path", repr(p.text), f"{p.label} shapes the run (the dosing or output times, "
                                    "the grid), which every subject shares; vary a rate, an amount, a volume or a "
                                    "property of a layer", path="path"))
        dist = self.distribution
        if dist not in DISTRIBUTIONS:
            problems.append(Problem("distribution", repr(dist), suggest(str(dist), list(DISTRIBUTIONS))
                                    .replace("known keys here", "one of"), path="distribution"))
            raise ScenarioError(problems)
        given = [k for k in _SPREAD_KEYS if getattr(self, k) is not None]
        allowed = DISTRIBUTIONS[dist]
        for k in given:
            if k not in allowed:
                problems.append(Problem(k, self._show(k), f"a {dist} distribution takes {_either(dist)}, not {k}",
                                        path=k))
        spread = [k for k in given if k in allowed]
        if dist == "uniform":
            missing = [k for k in allowed if k not in spread]
            for k in missing:
                problems.append(Problem(k, "nothing", "a uniform distribution needs both low and high", path=k))
        elif not spread:
            problems.append(Problem(allowed[0], "nothing", f"a {dist} distribution needs {_either(dist)}",
                                    path=allowed[0]))
        elif len(spread) > 1:
            problems.append(Problem(spread[1], self._show(spread[1]),
                                    f"give one of {' and '.join(spread)}, not both", path=spread[1]))
        for k in ("cv", "gsd", "sd", "low", "high"):
            v = getattr(self, k)
            if v is None:
                continue
            if not finite(v):
                problems.append(Problem(k, str(v), "must be a finite number", path=k))
            elif k == "cv" and not 0 < v <= MAX_CV:
                problems.append(Problem(k, self._show(k), f"a coefficient of variation from 0 to {MAX_CV:g} "
                                        "(0.3 for 30 %); must be > 0", path=k))
            elif k == "gsd" and not 1 < v <= 100:
                problems.append(Problem(k, self._show(k), "a geometric standard deviation is > 1 (1.3 for a "
                                        "spread of about 26 %) and at most 100", path=k))
            elif k == "sd" and v <= 0:
                problems.append(Problem(k, self._show(k), "must be > 0", path=k))
        if (dist == "uniform" and finite(self.low) and finite(self.high) and self.low >= self.high):
            problems.append(Problem("high", self._show("high"), f"must be above low ({self._show('low')})",
                                    path="high"))
        if dist == "uniform" and finite(self.low) and p.bound is not None:
            if (p.bound == "> 0" and self.low <= 0) or (p.bound == ">= 0" and self.low < 0):
                problems.append(Problem("low", self._show("low"),
                                        f"{p.label} must be {p.bound}, so the uniform must start {p.bound}",
                                        path="low"))
        if self.truncate is not None:
            tr = self.truncate
            if len(tr) != 2 or not all(isinstance(x, int | float) and not isinstance(x, bool) and not math.isnan(x)
                                       for x in tr):
                problems.append(Problem("truncate", str(tr), "two bounds [lo, hi] (inf or -inf for an open side)",
                                        path="truncate"))
            elif tr[0] >= tr[1]:
                problems.append(Problem("truncate", self._show("truncate"), "the lower bound must be below the upper",
                                        path="truncate"))
            elif dist == "uniform":
                problems.append(Problem("truncate", self._show("truncate"),
                                        "a uniform is already bounded by low and high; leave truncate out",
                                        path="truncate"))
            elif dist == "lognormal" and tr[1] <= 0:
                problems.append(Problem("truncate", self._show("truncate"),
                                        "a log-normal takes only values > 0; the upper bound must be > 0",
                                        path="truncate"))
            elif dist == "normal" and p.bound is not None and tr[0] < 0:
                problems.append(Problem("truncate", self._show("truncate"),
                                        f"{p.label} must be {p.bound}; the lower bound must be >= 0", path="truncate"))
        if problems:
            raise ScenarioError(problems)

    # ------------------------------------------------------------------ text
    def _show(self, key: str) -> str:
        """A value of this table as the messages and the file show it (with the path's unit)."""
        v = getattr(self, key)
        if key == "truncate":
            return "[" + ", ".join(_quantity_text(x, self.path) for x in v) + "]"
        if key in ("cv", "gsd"):
            return format(v, "g") if finite(v) else str(v)
        return _quantity_text(v, self.path)

    @property
    def label(self) -> str:
        """``"lognormal cv 0.3"``: the distribution in a few words."""
        spread = ", ".join(f"{k} {self._show(k)}" for k in _SPREAD_KEYS if getattr(self, k) is not None)
        out = f"{self.distribution} {spread}"
        if self.truncate is not None:
            out += f", truncated to {self._show('truncate')}"
        return out

    # ------------------------------------------------------------------ reading
    @classmethod
    def from_mapping(cls, raw: Mapping[str, Any], molar_mass: float | None = None) -> Variation:
        """Build from a ``[[vary]]`` table (quantities as unit strings), reporting every problem at once.

        ``sd``, ``low``, ``high`` and the bounds of ``truncate`` are quantities of the path's kind
        (``"2e-10 cm^2/s"``), or bare numbers for a dimensionless path (a partition coefficient).
        """
        problems: list[Problem] = []
        for key in raw:
            if key not in cls.KEYS:
                problems.append(Problem(str(key), "an unknown key", suggest(str(key), list(cls.KEYS)), path=str(key)))
        path_text = raw.get("path")
        param: Param | None = None
        if path_text is None:
            problems.append(Problem("path", "nothing", "this key is required, such as "
                                    "path = \"barrier.skin.layer.1.diffusivity\"", path="path"))
        elif not isinstance(path_text, str):
            problems.append(Problem("path", repr(path_text), "a parameter path in quotes", path="path"))
        else:
            try:
                param = parse_param(path_text, what="path")
            except ScenarioError as err:
                problems.extend(err.problems)
        dist = raw.get("distribution")
        if dist is None:
            problems.append(Problem("distribution", "nothing", "this key is required: lognormal, normal or uniform",
                                    path="distribution"))
        elif not isinstance(dist, str):
            problems.append(Problem("distribution", repr(dist), "lognormal, normal or uniform, in quotes",
                                    path="distribution"))
        values: dict[str, Any] = {}
        for key in ("cv", "gsd"):
            if key in raw:
                v = raw[key]
                if isinstance(v, bool) or not isinstance(v, int | float):
                    problems.append(Problem(key, _quoted(v), "a bare number such as 0.3 (no unit, no quotes)",
                                            path=key))
                else:
                    values[key] = float(v)
        for key in ("sd", "low", "high"):
            if key in raw and param is not None:
                try:
                    values[key] = _read_value(raw[key], param, key, molar_mass)
                except UnitsError as err:
                    problems.append(Problem(key, err.value, err.expected, path=key))
        if "truncate" in raw and param is not None:
            tr = raw["truncate"]
            if not isinstance(tr, list | tuple) or len(tr) != 2:
                problems.append(Problem("truncate", str(tr), "two bounds [lo, hi] with units (inf or -inf for an "
                                        "open side)", path="truncate"))
            else:
                try:
                    values["truncate"] = tuple(_read_value(x, param, f"truncate[{j}]", molar_mass, open_side=True)
                                               for j, x in enumerate(tr))
                except UnitsError as err:
                    problems.append(Problem(err.field, err.value, err.expected, path="truncate"))
        if problems or param is None or not isinstance(dist, str):
            raise ScenarioError(problems)
        return cls(path=param, distribution=dist, **values)

    @classmethod
    def parse(cls, text: str, molar_mass: float | None = None) -> Variation:
        """Read the command-line form ``PATH=DIST[:KEY=VALUE,...]``.

        ``barrier.skin.layer.1.diffusivity=lognormal:cv=0.3`` is the table ``path = "..."``,
        ``distribution = "lognormal"``, ``cv = 0.3``. ``truncate=LO..HI`` gives the two bounds
        (either may be left empty for an open side): ``normal:cv=0.3,truncate=0 cm^2/s..``.

        Raises
        ------
        ScenarioError
            Naming the option (``--vary``), the text and what was expected.
        """
        head = f"--vary {text!r}"
        path, eq, spec = str(text).partition("=")
        if not eq or not path.strip() or not spec.strip():
            raise ScenarioError.single("--vary", repr(text), "PATH=DISTRIBUTION:KEY=VALUE, such as "
                                       "barrier.skin.layer.1.diffusivity=lognormal:cv=0.3")
        dist, _, rest = spec.partition(":")
        raw: dict[str, Any] = {"path": path.strip(), "distribution": dist.strip()}
        for item in filter(None, (s.strip() for s in rest.split(","))) if rest.strip() else ():
            key, eq, value = item.partition("=")
            key, value = key.strip(), value.strip()
            if not eq or not key:
                raise ScenarioError.single(head, repr(item), "KEY=VALUE, such as cv=0.3 or sd=2e-10 cm^2/s")
            if key == "truncate":
                lo, dots, hi = value.partition("..")
                if not dots:
                    raise ScenarioError.single(f"{head} truncate", repr(value),
                                               "LO..HI, such as 1e-10 cm^2/s..1e-8 cm^2/s (a side may be empty)")
                raw[key] = [lo.strip() or -math.inf, hi.strip() or math.inf]
            elif key in ("cv", "gsd"):
                raw[key] = _number_or_text(value)
            else:
                raw[key] = value
        # a bare number is the value itself for a dimensionless path
        try:
            param = parse_param(raw["path"], what="--vary path")
        except ScenarioError as err:
            raise ScenarioError([Problem("--vary", p.value, p.expected) for p in err.problems]) from None
        if param.kind not in KINDS:
            for key in ("sd", "low", "high"):
                if key in raw:
                    raw[key] = _number_or_text(raw[key])
            if "truncate" in raw:
                raw["truncate"] = [_number_or_text(x) if isinstance(x, str) else x for x in raw["truncate"]]
        try:
            return cls.from_mapping(raw, molar_mass)
        except ScenarioError as err:
            raise err.within(head) from None

    # ------------------------------------------------------------------ writing
    def to_table(self) -> dict[str, Any]:
        """The ``[[vary]]`` table (quantities as unit strings that read back to the same floats)."""
        out: dict[str, Any] = {"path": self.path.text, "distribution": self.distribution}
        for key in _SPREAD_KEYS:
            v = getattr(self, key)
            if v is None:
                continue
            out[key] = float(v) if key in ("cv", "gsd") else _write_value(v, self.path)
        if self.truncate is not None:
            out["truncate"] = [_write_value(x, self.path) for x in self.truncate]
        return out

    def to_option(self) -> str:
        """The command-line form (:meth:`parse` reads it back to an equal variation)."""
        parts = []
        for key in _SPREAD_KEYS:
            v = getattr(self, key)
            if v is not None:
                parts.append(f"{key}={repr(float(v)) if key in ('cv', 'gsd') else _write_value(v, self.path)}")
        if self.truncate is not None:
            lo, hi = (("" if math.isinf(x) else str(_write_value(x, self.path))) for x in self.truncate)
            parts.append(f"truncate={lo}..{hi}")
        return f"{self.path.text}={self.distribution}" + (":" + ",".join(parts) if parts else "")


@dataclass(frozen=True)
class Correlation:
    """A rank correlation between two varied parameters (a ``[[correlation]]`` table).

    Realised through a Gaussian copula: the normal scores of the two parameters get the Pearson
    correlation r = 2 sin(pi rank / 6), which gives the normal pair the Spearman rank
    correlation ``rank`` (Kruskal, Ordinal measures of association, J. Am. Stat. Assoc. 53,
    1958, 814-861, eq. for the bivariate normal); every marginal is a monotone function of its
    score, so the parameters keep that rank correlation.

    Parameters
    ----------
    between : (Param, Param) or (str, str)
        Two varied parameters (each the path of a ``[[vary]]`` table).
    rank : float
        Spearman's rank correlation, between -1 and 1 (exclusive).
    """

    between: tuple[Param, Param]
    rank: float

    KEYS: ClassVar[tuple[str, ...]] = ("between", "rank")

    def __post_init__(self) -> None:
        pair = tuple(parse_param(p, what="between") if isinstance(p, str) else p for p in self.between)
        object.__setattr__(self, "between", pair)
        problems: list[Problem] = []
        if len(pair) != 2 or not all(isinstance(p, ParamPath | Tied) for p in pair):
            problems.append(Problem("between", str(self.between), "two parameter paths", path="between"))
        elif pair[0] == pair[1]:
            problems.append(Problem("between", f"[{pair[0].text!r}, {pair[1].text!r}]", "two different parameters",
                                    path="between"))
        if isinstance(self.rank, bool) or not finite(self.rank) or not -1 < self.rank < 1:
            problems.append(Problem("rank", str(self.rank), "a rank correlation between -1 and 1 (exclusive), "
                                    "such as -0.4", path="rank"))
        if problems:
            raise ScenarioError(problems)

    @classmethod
    def from_mapping(cls, raw: Mapping[str, Any]) -> Correlation:
        """Build from a ``[[correlation]]`` table."""
        problems: list[Problem] = []
        for key in raw:
            if key not in cls.KEYS:
                problems.append(Problem(str(key), "an unknown key", suggest(str(key), list(cls.KEYS)), path=str(key)))
        between = raw.get("between")
        pair: list[Param] = []
        if not isinstance(between, list) or len(between) != 2 or not all(isinstance(x, str) for x in between):
            problems.append(Problem("between", "nothing" if between is None else str(between),
                                    "two parameter paths in quotes, such as [\"barrier.skin.layer.1.diffusivity\", "
                                    "\"barrier.skin.layer.1.partition\"]", path="between"))
        else:
            for x in between:
                try:
                    pair.append(parse_param(x, what="between"))
                except ScenarioError as err:
                    problems.extend(err.problems)
        rank = raw.get("rank")
        if rank is None:
            problems.append(Problem("rank", "nothing", "this key is required, such as rank = -0.4", path="rank"))
        elif isinstance(rank, bool) or not isinstance(rank, int | float):
            problems.append(Problem("rank", _quoted(rank), "a bare number between -1 and 1", path="rank"))
        if problems:
            raise ScenarioError(problems)
        return cls(between=(pair[0], pair[1]), rank=float(rank))

    def to_table(self) -> dict[str, Any]:
        """The ``[[correlation]]`` table."""
        return {"between": [p.text for p in self.between], "rank": float(self.rank)}


# ---------------------------------------------------------------------- checks against a scenario
def variability_problems(scenario: Scenario) -> list[Problem]:
    """Every problem of the scenario's ``[[vary]]`` and ``[[correlation]]`` tables against its values.

    Each path must exist and hold a value (tied members one value); a log-normal needs a value
    > 0; an untruncated normal must not reach outside the range the model accepts (more than
    :data:`TAIL_REFUSED` of its probability); a truncation must keep some of the distribution; a
    path may vary once; a correlation names two varied parameters, once, and all together must
    form a valid (positive definite) correlation matrix.
    """
    out: list[Problem] = []
    seen: dict[ParamPath, int] = {}
    for n, v in enumerate(scenario.vary, start=1):
        head, at = f"vary {n}", f"vary.{n}"
        p = v.path
        try:
            for member in p.paths:
                ParamPath.parse(member.text, scenario, what="path")
            value = p.get(scenario)
        except ScenarioError as err:
            out.extend(err.within(head, at=at).problems)
            continue
        for member in p.paths:
            if member in seen:
                out.append(Problem(f"{head} path", repr(p.text), f"{member.text} is varied already by vary "
                                   f"{seen[member]}; vary each path once (tie paths with a comma)", path=f"{at}.path"))
            seen.setdefault(member, n)
        if value is None:
            out.append(Problem(f"{head} path", repr(p.text), f"{p.label} is not set in the scenario, so there is "
                               "nothing to vary; give it a value first", path=f"{at}.path"))
            continue
        msg = _centre_problem(v, float(value), scenario)
        if msg is not None:
            out.append(Problem(f"{head} {msg[0]}", msg[1], msg[2], path=f"{at}.{msg[0]}"))
    varied = {v.path: n for n, v in enumerate(scenario.vary, start=1)}
    pairs: dict[frozenset, int] = {}
    for n, c in enumerate(scenario.correlations, start=1):
        head, at = f"correlation {n}", f"correlation.{n}"
        missing = [p for p in c.between if p not in varied]
        if missing:
            known = ", ".join(v.path.text for v in scenario.vary) or "none"
            out.append(Problem(f"{head} between", repr(missing[0].text),
                               f"names no varied parameter (a [[vary]] path; varied: {known})", path=f"{at}.between"))
            continue
        key = frozenset(c.between)
        if key in pairs:
            out.append(Problem(f"{head} between", f"[{c.between[0].text!r}, {c.between[1].text!r}]",
                               f"this pair is correlated already by correlation {pairs[key]}", path=f"{at}.between"))
        pairs.setdefault(key, n)
    if not out and scenario.correlations:
        params = [v.path for v in scenario.vary]
        matrix = copula_matrix(params, scenario.correlations)
        if _cholesky(matrix) is None:
            out.append(Problem("correlation", ", ".join(f"{c.rank:g}" for c in scenario.correlations),
                               "these rank correlations cannot hold together (their matrix is not positive "
                               "definite); weaken some of them", path="correlation"))
    return out


def copula_matrix(params: Sequence[Param], correlations: Sequence[Correlation]) -> list[list[float]]:
    """The Pearson correlation matrix of the normal scores: r = 2 sin(pi rank / 6) for each pair.

    Parameters
    ----------
    params : sequence of Param
        The varied parameters, in order.
    correlations : sequence of Correlation

    Returns
    -------
    list of list of float
        Symmetric, 1 on the diagonal, 0 for pairs without a correlation.
    """
    index = {p: i for i, p in enumerate(params)}
    d = len(params)
    m = [[1.0 if i == j else 0.0 for j in range(d)] for i in range(d)]
    for c in correlations:
        i, j = index[c.between[0]], index[c.between[1]]
        r = 2.0 * math.sin(math.pi * c.rank / 6.0)
        m[i][j] = m[j][i] = r
    return m


def _cholesky(m: list[list[float]]) -> list[list[float]] | None:
    """Lower Cholesky factor of a small symmetric matrix, or None when it is not positive definite."""
    d = len(m)
    low = [[0.0] * d for _ in range(d)]
    for i in range(d):
        for j in range(i + 1):
            s = m[i][j] - sum(low[i][k] * low[j][k] for k in range(j))
            if i == j:
                if s <= 1e-12:
                    return None
                low[i][i] = math.sqrt(s)
            else:
                low[i][j] = s / low[j][j]
    return low


def _centre_problem(v: Variation, value: float, scenario: Scenario) -> tuple[str, str, str] | None:
    """(key, value, expected) when the distribution does not fit the scenario's value, else None."""
    p = v.path
    shown = _quantity_text(value, p)
    if v.distribution == "lognormal" and value <= 0:
        return "path", shown, f"a log-normal is centred on the scenario's value of {p.label}, which must be > 0"
    if v.distribution != "normal":
        return None
    if v.cv is not None and value == 0:
        return "cv", f"{v.cv:g}", f"{p.label} is 0 in the scenario, so a cv gives no spread; give sd instead"
    sd = v.sd if v.sd is not None else v.cv * abs(value)
    lo, hi = v.truncate if v.truncate is not None else (-math.inf, math.inf)
    a, b = (lo - value) / sd, (hi - value) / sd
    mass = _phi(b) - _phi(a) if a < 0 else _phi(-a) - _phi(-b)
    if mass < 1e-12:
        return "truncate", v._show("truncate"), (f"keeps almost nothing of a normal around {shown} with sd "
                                                 f"{_quantity_text(sd, p)}; widen the bounds")
    if p.bound is not None:
        floor = max(lo, 0.0)
        below = (_phi((floor - value) / sd) - _phi(a)) / mass if floor > lo else 0.0
        if below > TAIL_REFUSED:
            form = f'"0 {p.file_unit(scenario)}"' if p.kind in KINDS else "0"
            return ("truncate" if v.truncate is not None else ("sd" if v.sd is not None else "cv"),
                    v._show("truncate" if v.truncate is not None else ("sd" if v.sd is not None else "cv")),
                    f"a normal around {shown} gives {p.label} a value below its range ({p.bound}) in about "
                    f"1 subject of {max(1, round(1 / below)):,}; truncate it (truncate = [{form}, inf]) or use "
                    "a log-normal")
    return None


# ---------------------------------------------------------------------- values with the path's unit
def _quoted(raw: Any) -> str:
    return f'"{raw}"' if isinstance(raw, str) else str(raw)


def _either(dist: str) -> str:
    keys = DISTRIBUTIONS[dist]
    return " and ".join(keys) if dist == "uniform" else " or ".join(keys)


def _number_or_text(text: Any) -> Any:
    if not isinstance(text, str):
        return text
    try:
        return float(text)
    except ValueError:
        return text


def _read_value(raw: Any, param: Param, key: str, molar_mass: float | None, *, open_side: bool = False) -> float:
    """A quantity of the path's kind from a file value (a unit string, or a bare number for a dimensionless path)."""
    if open_side and isinstance(raw, float) and math.isinf(raw):
        return raw
    kind = param.kind
    if kind in KINDS:
        return parse_quantity(raw, kind, key, molar_mass)
    if isinstance(raw, bool) or not isinstance(raw, int | float):
        raise UnitsError(_quoted(raw), "a bare number (this parameter has no unit)", key)
    if not finite(raw):
        raise UnitsError(str(raw), "must be a finite number", key)
    return float(raw)


def _write_value(value: float, param: Param) -> Any:
    if math.isinf(value):
        return value
    spec: FieldSpec = param.spec
    if param.kind in KINDS:
        return format_quantity(value, param.kind, spec.unit)
    return float(value)


def _quantity_text(value: float, param: Param) -> str:
    if not finite(value):
        return str(value)
    if param.kind in KINDS:
        return format_quantity(value, param.kind, param.spec.unit)
    return format(value, "g")
