"""Steady state of layered barriers: resistances, permeability, flux, profile, lag and burst times.

Everything here is exact (closed forms), computed from the model alone; no simulation is run.

Conventions
-----------
Every phase carries a partition coefficient K relative to one reference phase, and the
*potential* u = C/K is continuous at every interface (scenario format, "Partitioning").
Inside layer i (thickness l_i, diffusivity D_i, partition K_i, first-order degradation k_i)
the steady potential obeys D_i u'' = k_i u and the flux is J = -D_i K_i u'.

Transfer matrices
-----------------
In the Laplace domain (variable p) the state (u, J) on the ``from`` face of a layer follows
from the state on its far face by the matrix ::

    [[cosh(s l),            sinh(s l) / (D K s)],
     [D K s sinh(s l),      cosh(s l)          ]],     s = sqrt((p + k) / D)

and a stack of layers by the product of its layers' matrices, in order (Crank, The Mathematics
of Diffusion, 2nd ed., 1975, ch. 12, composite media). With a held source u_0 = C_from/K_from
and a perfect sink, the outgoing flux is J_out = u_0 / B, with B the upper-right entry of the
product. At p = 0 this gives the steady state: without degradation B is the series resistance
R = sum L_i/(D_i K_i) and the profile is linear in each layer; with degradation the profile is
a sum of hyperbolic functions in each layer and only the fraction 1/D (lower-right entry) of
the entering flux leaves the far side (sech(L sqrt(k/D)) for one layer, Crank ch. 14).

Lag time. The cumulative amount permeated after a unit step of the source has the Laplace
transform Q(p) = u_0 / (p^2 B(p)); expanding B(p) = B(0) + B'(0) p + ... gives the late line
Q(t) ~ (u_0 / B(0)) (t - B'(0)/B(0)), so the lag time is B'(0)/B(0). Without degradation this is
::

    t_lag = (1/R) sum_i S_i [R_i^2/6 + R_i (R_<i + R_>i)/2 + R_<i R_>i],    S_i = K_i l_i,

where R_<i and R_>i are the resistances of the layers before and after layer i; for one layer
t_lag = L^2/(6D) (Crank 1975, eq. 4.24a). The same value is the integral form
t_lag = (1/R) integral K(x) r(x) (R - r(x)) dx with r(x) the resistance from the source face
to x, which the tests also check.

Burst time. A barrier pre-equilibrated with the source (u = u_0 in every layer) releases, besides
the steady line, the amount u_0 integral K(x) r(x)/R dx on the sink side (the share of the initial
content that leaves on that side). Its late line crosses the time axis at
t_burst = t_lag - sum_i S_i (R_<i + R_i/2); for one layer -L^2/(3D) (Crank 1975, ch. 4).
It is reported only for barriers without degradation.

All values are in the internal units: cm, h, mg, mL (concentration mg/mL, flux mg/(cm^2 h),
resistance h/cm, permeability cm/h).
"""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from ..caution import CAUTION
from ..model import Barrier, Layer, Scenario

__all__ = [
    "BarrierSteady",
    "LayerSteady",
    "SteadyProfile",
    "SteadyReport",
    "barrier_steady",
    "burst_time",
    "lag_time",
    "steady_state",
]

PROFILE_COLUMNS = ("barrier", "layer", "x [um]", "conc [mg/mL]")
"""Columns of the steady profile CSV (``barrierflow steady --profile``)."""

_SMALL_Z = 0.05  # below this, L sqrt(k/D) is handled by series (no cancellation)
_CM_PER_UM = 1e-4


# ----------------------------------------------------------------------------- typed results
@dataclass(frozen=True)
class SteadyProfile:
    """Steady concentration profile through a barrier.

    Every layer contributes its own points, from its ``from`` face to its far face, so each
    interface appears twice, once on each side, and the partition jump shows.

    Attributes
    ----------
    x : tuple of float, cm
        Distance from the ``from`` face of the barrier.
    conc : tuple of float, mg/mL
        Concentration in the layer at ``x``.
    layer : tuple of int
        Index of the layer (0-based) each point lies in.
    """

    x: tuple[float, ...]
    conc: tuple[float, ...]
    layer: tuple[int, ...]


@dataclass(frozen=True)
class LayerSteady:
    """Steady state of one layer.

    Attributes
    ----------
    name : str
    thickness : float, cm
    resistance : float, h/cm
        L/(D K).
    conc_in, conc_out : float, mg/mL
        Concentration inside the layer at its ``from`` face and at its far face.
    flux_in, flux_out : float, mg/(cm^2 h)
        Flux entering and leaving the layer (toward ``to``).
    content : float, mg/cm^2
        Amount held in the layer per area.
    """

    name: str
    thickness: float
    resistance: float
    conc_in: float
    conc_out: float
    flux_in: float
    flux_out: float
    content: float


@dataclass(frozen=True)
class BarrierSteady:
    """Steady state of one barrier between a held source and a held receiver.

    Attributes
    ----------
    barrier_id, from_id, to_id : str
    area : float, cm^2
    model : str
        ``"resolved"`` or ``"steady"`` (quasi-steady, no storage: lag and burst times are 0).
    c_from, c_to : float, mg/mL
        Concentrations held on the two sides (``c_to`` = 0: a perfect sink).
    k_from, k_to : float
        Partition coefficients of the two compartments.
    resistances : tuple of float, h/cm
        L/(D K) of each layer, in order.
    resistance : float, h/cm
        Their sum, R.
    permeability : float, cm/h
        Steady flux into ``to`` per concentration in ``from`` with a perfect sink;
        1/(K_from R) without degradation.
    steady_flux : float, mg/(cm^2 h)
        Steady flux into ``to``.
    uptake_flux : float, mg/(cm^2 h)
        Steady flux leaving ``from`` (larger than ``steady_flux`` when layers degrade).
    fraction_through : float
        ``steady_flux / uptake_flux`` with a perfect sink (1 without degradation).
    lag_time : float, h
        Time-axis intercept of the late cumulative line, initially empty barrier, held source,
        perfect sink.
    burst_time : float or None, h
        The same for a barrier pre-equilibrated with the source (negative); None with
        degradation.
    content : float, mg/cm^2
        Amount held in the layers at steady state, per area.
    layers : tuple of LayerSteady
    profile : SteadyProfile
    notes : tuple of str
        Remarks for the reader (a source that starts empty, for example).
    """

    barrier_id: str
    from_id: str
    to_id: str
    area: float
    model: str
    c_from: float
    k_from: float
    c_to: float
    k_to: float
    resistances: tuple[float, ...]
    resistance: float
    permeability: float
    steady_flux: float
    uptake_flux: float
    fraction_through: float
    lag_time: float
    burst_time: float | None
    content: float
    layers: tuple[LayerSteady, ...]
    profile: SteadyProfile
    notes: tuple[str, ...] = ()

    @property
    def degrades(self) -> bool:
        """True when any layer degrades the substance."""
        return self.fraction_through < 1.0

    def as_dict(self) -> dict[str, object]:
        """A JSON-able dict; every key names its unit (the keys of ``barrierflow steady --json``)."""
        return {
            "from": self.from_id,
            "to": self.to_id,
            "model": self.model,
            "area_cm2": self.area,
            "c_from_mg_per_mL": self.c_from,
            "c_to_mg_per_mL": self.c_to,
            "partition_from": self.k_from,
            "partition_to": self.k_to,
            "permeability_cm_per_h": self.permeability,
            "steady_flux_mg_per_cm2_per_h": self.steady_flux,
            "steady_rate_mg_per_h": self.steady_flux * self.area,
            "uptake_flux_mg_per_cm2_per_h": self.uptake_flux,
            "fraction_through": self.fraction_through,
            "lag_time_h": self.lag_time,
            "burst_time_h": self.burst_time,
            "resistance_h_per_cm": list(self.resistances),
            "total_resistance_h_per_cm": self.resistance,
            "steady_content_mg_per_cm2": self.content,
            "layers": [
                {
                    "name": ly.name,
                    "thickness_um": ly.thickness / _CM_PER_UM,
                    "resistance_h_per_cm": ly.resistance,
                    "conc_in_mg_per_mL": ly.conc_in,
                    "conc_out_mg_per_mL": ly.conc_out,
                    "flux_in_mg_per_cm2_per_h": ly.flux_in,
                    "flux_out_mg_per_cm2_per_h": ly.flux_out,
                    "content_mg_per_cm2": ly.content,
                }
                for ly in self.layers
            ],
            "notes": list(self.notes),
        }


@dataclass(frozen=True)
class SteadyReport:
    """Steady state of every barrier of a scenario (see :func:`steady_state`).

    Attributes
    ----------
    scenario_name : str
    barriers : tuple of BarrierSteady
        In the order of the scenario.
    """

    scenario_name: str
    barriers: tuple[BarrierSteady, ...]

    def barrier(self, bid: str) -> BarrierSteady:
        """The steady state of barrier ``bid``."""
        for b in self.barriers:
            if b.barrier_id == bid:
                return b
        raise KeyError(f"no barrier {bid!r}; known: {', '.join(b.barrier_id for b in self.barriers)}")

    def as_dict(self) -> dict[str, object]:
        """JSON-able dict with the key ``barriers`` mapping each id to :meth:`BarrierSteady.as_dict`."""
        return {
            "scenario": self.scenario_name,
            "barriers": {b.barrier_id: b.as_dict() for b in self.barriers},
            "assumptions": (
                "held source at the 'from' compartment's starting (or held) concentration, "
                "perfect sink on the 'to' side; lag time for an initially empty barrier"
            ),
            "caution": CAUTION,
        }

    def to_text(self) -> str:
        """A printed report (what ``barrierflow steady`` shows without ``--json``)."""
        if not self.barriers:
            return f"scenario: {self.scenario_name}\nno barriers: nothing to report"
        lines = [f"scenario: {self.scenario_name}",
                 "each barrier alone: held source at the 'from' compartment's starting concentration, "
                 "perfect sink on the 'to' side"]
        for b in self.barriers:
            lines += ["", f"barrier '{b.barrier_id}' ({b.from_id} -> {b.to_id}, area {b.area:.4g} cm^2, "
                          f"source {b.c_from:.4g} mg/mL, model {b.model})"]
            items = [
                ("permeability", f"{b.permeability:.4g} cm/h"),
                ("steady flux", f"{b.steady_flux:.4g} mg/(cm^2*h)  ({b.steady_flux * b.area:.4g} mg/h over the area)"),
                ("lag time", f"{b.lag_time:.4g} h"),
                ("burst time", "-" if b.burst_time is None else f"{b.burst_time:.4g} h"),
                ("total resistance", f"{b.resistance:.4g} h/cm"),
                ("steady content", f"{b.content:.4g} mg/cm^2"),
            ]
            if b.degrades:
                items.insert(2, ("fraction through", f"{b.fraction_through:.4g} (the rest degrades in the layers)"))
            width = max(len(k) for k, _ in items)
            lines += [f"  {k.ljust(width)}  {v}" for k, v in items]
            rows = [("layer", "name", "thickness [um]", "resistance [h/cm]", "share", "C in [mg/mL]",
                     "C out [mg/mL]")]
            for i, ly in enumerate(b.layers, start=1):
                share = ly.resistance / b.resistance if b.resistance > 0 else float("nan")
                rows.append((str(i), ly.name or "-", f"{ly.thickness / _CM_PER_UM:.4g}", f"{ly.resistance:.4g}",
                             f"{share:.1%}", f"{ly.conc_in:.4g}", f"{ly.conc_out:.4g}"))
            widths = [max(len(r[k]) for r in rows) for k in range(len(rows[0]))]
            for r in rows:
                cells = [v.ljust(w) if k < 2 else v.rjust(w) for k, (v, w) in enumerate(zip(r, widths, strict=True))]
                lines.append("  " + "  ".join(cells).rstrip())
            lines += [f"  note: {n}" for n in b.notes]
        return "\n".join(lines)

    def profile_rows(self) -> list[tuple[str, int, float, float]]:
        """Rows ``(barrier, layer, x [um], conc [mg/mL])``; layers numbered from 1."""
        rows = []
        for b in self.barriers:
            p = b.profile
            for x, c, i in zip(p.x, p.conc, p.layer, strict=True):
                rows.append((b.barrier_id, i + 1, x / _CM_PER_UM, c))
        return rows

    def profile_csv(self) -> str:
        """The profile as CSV text with the columns of :data:`PROFILE_COLUMNS`."""
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(PROFILE_COLUMNS)
        for bid, layer, x, c in self.profile_rows():
            w.writerow((bid, layer, format(float(x), ".12g"), format(float(c), ".12g")))
        return buf.getvalue()




# ----------------------------------------------------------------------------- layer algebra
@dataclass(frozen=True)
class _Terms:
    """One layer's transfer matrix at p = 0 and its p-derivative, both divided by exp(sigma)."""

    m: np.ndarray       # 2x2
    dm: np.ndarray      # 2x2, d/dp
    sigma: float        # log of the scale taken out
    z: float            # L sqrt(k/D)


def _terms(layer: Layer) -> _Terms:
    length, d, k_part, k = layer.thickness, layer.diffusivity, layer.partition, layer.degradation_rate
    r = length / (d * k_part)
    t = length * length / d
    z = length * math.sqrt(k / d) if k > 0 else 0.0
    if z < _SMALL_Z:
        z2 = z * z
        shz = 1.0 + z2 / 6.0 + z2 * z2 / 120.0            # sinh z / z
        chz = 1.0 + z2 / 2.0 + z2 * z2 / 24.0             # cosh z
        q = 1.0 / 3.0 + z2 / 30.0 + z2 * z2 / 840.0       # (z cosh z - sinh z) / z^3
        m = np.array([[chz, r * shz], [z2 * shz / r, chz]])
        dm = np.array([[0.5 * t * shz, 0.5 * r * t * q], [0.5 * t / r * (shz + chz), 0.5 * t * shz]])
        return _Terms(m, dm, 0.0, z)
    th = math.tanh(z)
    m = np.array([[1.0, r * th / z], [z * th / r, 1.0]])
    a1 = 0.5 * t * th / z
    dm = np.array([[a1, 0.5 * r * t * (z - th) / z**3], [0.5 * t / r * (th / z + 1.0), a1]])
    sigma = z + math.log1p(math.exp(-2.0 * z)) - math.log(2.0)
    return _Terms(m, dm, sigma, z)


def _product(layers: Sequence[Layer]) -> tuple[np.ndarray, np.ndarray, float]:
    """Scaled product of the layers' matrices, its p-derivative, and the total log scale."""
    p = np.eye(2)
    dp = np.zeros((2, 2))
    sigma = 0.0
    for layer in layers:
        tm = _terms(layer)
        p, dp = p @ tm.m, dp @ tm.m + p @ tm.dm
        sigma += tm.sigma
    return p, dp, sigma


def lag_time(layers: Sequence[Layer]) -> float:
    """Lag time of a stack of layers, initially empty, between a held source and a perfect sink.

    The time-axis intercept of the late line of cumulative permeation, B'(0)/B(0) from the
    product of the layers' Laplace-domain transfer matrices (see the module notes); with first-
    order degradation in a layer it is the intercept of the degraded steady line.

    Parameters
    ----------
    layers : sequence of Layer
        In order from the source side.

    Returns
    -------
    float, h
        L^2/(6D) for one layer without degradation.

    Examples
    --------
    >>> round(lag_time([Layer(thickness=0.01, diffusivity=1e-4)]), 12)   # 1e-4/(6e-4) h
    0.166666666667
    """
    p, dp, _ = _product(layers)
    return float(dp[0, 1] / p[0, 1])


def burst_time(layers: Sequence[Layer]) -> float:
    """Burst time of a stack of layers pre-equilibrated with a held source, perfect sink.

    The time-axis intercept of the late cumulative line when every layer starts in equilibrium
    with the source (u = C/K equal to the source's everywhere); negative.

    Parameters
    ----------
    layers : sequence of Layer
        In order from the source side; none may degrade.

    Returns
    -------
    float, h
        -L^2/(3D) for one layer (Crank 1975, ch. 4).

    Raises
    ------
    ValueError
        If a layer degrades the substance (the burst time is not defined here then).

    Examples
    --------
    >>> round(burst_time([Layer(thickness=0.01, diffusivity=1e-4)]), 12)
    -0.333333333333
    """
    if any(layer.degradation_rate > 0 for layer in layers):
        raise ValueError("burst_time is defined here only for layers without degradation")
    res = [layer.resistance for layer in layers]
    before = 0.0
    release = 0.0
    for layer, r in zip(layers, res, strict=True):
        release += layer.partition * layer.thickness * (before + 0.5 * r)
        before += r
    return lag_time(layers) - release


def _sinh_ratio(a: np.ndarray, b: float) -> np.ndarray:
    """sinh(a)/sinh(b) for 0 <= a <= b, without overflow."""
    return np.exp(a - b) * np.expm1(-2.0 * a) / math.expm1(-2.0 * b)


def _one_sided(layers: Sequence[Layer], u0: float) -> tuple[np.ndarray, np.ndarray]:
    """Potentials and fluxes at the n+1 faces for source potential u0 and a perfect sink."""
    n = len(layers)
    terms = [_terms(layer) for layer in layers]
    v = np.zeros((n + 1, 2))
    v[n] = (0.0, 1.0)
    for i in range(n - 1, -1, -1):
        v[i] = terms[i].m @ v[i + 1]
    sig_before = np.concatenate(([0.0], np.cumsum([t.sigma for t in terms])))[:n + 1]
    scale = (u0 / v[0, 0]) * np.exp(-sig_before)
    w = v * scale[:, None]
    return w[:, 0], w[:, 1]


def _faces(layers: Sequence[Layer], u_from: float, u_to: float) -> tuple[np.ndarray, np.ndarray]:
    u, j = _one_sided(layers, u_from)
    if u_to != 0.0:
        u2, j2 = _one_sided(list(reversed(layers)), u_to)
        u = u + u2[::-1]
        j = j - j2[::-1]
    return u, j


def barrier_steady(
    barrier: Barrier,
    c_from: float,
    k_from: float,
    c_to: float = 0.0,
    k_to: float = 1.0,
    *,
    points_per_layer: int = 21,
) -> BarrierSteady:
    """Steady state of one barrier between two held concentrations.

    Parameters
    ----------
    barrier : Barrier
    c_from : float, mg/mL
        Concentration held on the ``from`` side.
    k_from : float
        Partition coefficient of the ``from`` compartment.
    c_to : float, mg/mL
        Concentration held on the ``to`` side (default 0: a perfect sink).
    k_to : float
        Partition coefficient of the ``to`` compartment.
    points_per_layer : int
        Points of the profile in each layer, both faces included (>= 2).

    Returns
    -------
    BarrierSteady

    Examples
    --------
    One membrane, K = 10 relative to the donor solution: J = D K C / L (Crank 1975, eq. 4.4
    with the partition coefficient).

    >>> b = Barrier("m", "donor", "receptor", 1.0, (Layer(0.01, 1e-4, partition=10.0),))
    >>> s = barrier_steady(b, c_from=2.0, k_from=1.0)
    >>> round(s.steady_flux, 12), round(s.lag_time, 12)
    (0.2, 0.166666666667)
    """
    if points_per_layer < 2:
        raise ValueError(f"points_per_layer: got {points_per_layer}; must be >= 2")
    layers = barrier.layers
    u_from, u_to = c_from / k_from, c_to / k_to
    u, j = _faces(layers, u_from, u_to)
    res = barrier.resistances
    xs: list[float] = []
    cs: list[float] = []
    idx: list[int] = []
    layer_rows = []
    x0 = 0.0
    for i, layer in enumerate(layers):
        length, kp = layer.thickness, layer.partition
        xi = np.linspace(0.0, length, points_per_layer)
        z = _terms(layer).z
        if z == 0.0:
            ui = u[i] + (u[i + 1] - u[i]) * xi / length
            content = kp * length * 0.5 * (u[i] + u[i + 1])
        else:
            mz = z / length
            ui = u[i] * _sinh_ratio(mz * (length - xi), z) + u[i + 1] * _sinh_ratio(mz * xi, z)
            content = kp * (u[i] + u[i + 1]) * math.tanh(0.5 * z) / mz
        ci = kp * ui
        ci[0], ci[-1] = kp * u[i], kp * u[i + 1]
        xs.extend((x0 + xi).tolist())
        cs.extend(ci.tolist())
        idx.extend([i] * points_per_layer)
        layer_rows.append(LayerSteady(layer.name, length, res[i], float(kp * u[i]), float(kp * u[i + 1]),
                                      float(j[i]), float(j[i + 1]), float(content)))
        x0 += length
    xs[-1] = barrier.thickness
    # fraction through, lag and burst: held source and perfect sink
    p, _, sigma = _product(layers)
    fraction = math.exp(-sigma) / p[1, 1]
    steady_model = barrier.model == "steady"
    lag = 0.0 if steady_model else lag_time(layers)
    degrades = any(layer.degradation_rate > 0 for layer in layers)
    burst: float | None
    if degrades:
        burst = 0.0 if steady_model else None
    else:
        burst = 0.0 if steady_model else burst_time(layers)
    notes = []
    if c_from == 0.0:
        notes.append(f"compartment '{barrier.from_id}' starts empty, so the steady flux is 0; "
                     "the permeability still applies to any later concentration")
    if steady_model:
        notes.append("quasi-steady barrier (model = 'steady'): no storage, lag and burst times are 0")
    if degrades and not steady_model:
        notes.append("a layer degrades the substance: the profile is not linear, and the burst time "
                     "is not reported")
    return BarrierSteady(
        barrier_id=barrier.id,
        from_id=barrier.from_id,
        to_id=barrier.to_id,
        area=barrier.area,
        model=barrier.model,
        c_from=float(c_from),
        k_from=float(k_from),
        c_to=float(c_to),
        k_to=float(k_to),
        resistances=tuple(res),
        resistance=barrier.resistance,
        permeability=float(math.exp(-sigma) / (k_from * p[0, 1])),
        steady_flux=float(j[-1]),
        uptake_flux=float(j[0]),
        fraction_through=float(fraction),
        lag_time=float(lag),
        burst_time=None if burst is None else float(burst),
        content=float(sum(ly.content for ly in layer_rows)),
        layers=tuple(layer_rows),
        profile=SteadyProfile(tuple(xs), tuple(cs), tuple(idx)),
        notes=tuple(notes),
    )


def steady_state(scenario: Scenario, *, points_per_layer: int = 21) -> SteadyReport:
    """Steady state of every barrier of a scenario.

    Each barrier is taken alone, between a held source at its ``from`` compartment's starting
    concentration (the held one for a held compartment) and a perfect sink on the ``to`` side,
    as ``barrierflow steady`` reports it.

    Parameters
    ----------
    scenario : Scenario
    points_per_layer : int
        Points of each layer's profile, both faces included.

    Returns
    -------
    SteadyReport
    """
    out = []
    for b in scenario.barriers:
        src = scenario.compartment(b.from_id)
        dst = scenario.compartment(b.to_id)
        s = barrier_steady(b, src.starting_concentration, src.partition, 0.0, dst.partition,
                           points_per_layer=points_per_layer)
        if src.starting_concentration == 0.0:
            held = [(i, d.concentration) for i, d in enumerate(scenario.doses, start=1)
                    if d.target == b.from_id and d.concentration]
            if held:
                i, conc = max(held, key=lambda x: x[1])
                note = (f"at the {conc:.4g} mg/mL that dose {i} gives '{b.from_id}', the steady flux would be "
                        f"{s.permeability * conc:.4g} mg/(cm^2*h)")
                s = replace(s, notes=s.notes + (note,))
        out.append(s)
    return SteadyReport(scenario.name, tuple(out))
