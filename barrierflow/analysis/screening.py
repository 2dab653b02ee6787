"""A screening estimate of a stratum-corneum-like layer from log Kow and molar mass, when there are no data.

Potts and Guy (Predicting skin permeability, Pharm. Res. 9 (1992) 663-669) correlated the
permeability coefficient of human skin from water with the octanol/water partition coefficient
and the molar mass (MW, g/mol)::

    log10 kp [cm/s] = -6.3 + 0.71 log10 Kow - 0.0061 MW

and read it as the product of the two factors of Fick's law, kp = D K / L: a partition of the
lipid barrier that follows the octanol one, K = Kow^0.71, and a diffusivity that falls
exponentially with molecular size, D / L = 10^-6.3 x 10^(-0.0061 MW) cm/s. Here L is the layer's
own thickness, so that D K / L is the correlation's kp whatever thickness the scenario gives.

The correlation was fitted to Flynn's compilation of about 90 compounds (molar mass about 18 to
750 g/mol, log Kow about -3 to 6; these ranges and the fit's r^2 of about 0.67 are given from
memory of the paper) and carries an uncertainty of the order of a factor 3 to 5 for a single
compound. Every output of it is therefore flagged as a screening estimate, with the domain, and a
warning when the compound lies outside it. It is no substitute for data: fit the scenario to
measurements (:func:`barrierflow.studies.fit.fit`) as soon as there are any.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ..caution import CAUTION
from ..errors import ScenarioError
from ..model import Scenario
from ..model.paths import ParamPath, with_values

__all__ = ["DOMAIN", "SCREENING_FLAG", "ScreeningEstimate", "screen_layer", "screening_estimate"]

INTERCEPT, SLOPE_KOW, SLOPE_MW = -6.3, 0.71, -0.0061
"""Potts and Guy 1992: log10 kp [cm/s] = -6.3 + 0.71 log10 Kow - 0.0061 MW [g/mol]."""

DOMAIN = {"molar_mass_g_per_mol": (18.0, 750.0), "log_kow": (-3.0, 6.0)}
"""The correlation's domain of validity (the range of its data set; from memory of the paper)."""

SCREENING_FLAG = ("SCREENING ESTIMATE (Potts and Guy, Pharm. Res. 9 (1992) 663: log kp = -6.3 + 0.71 log Kow "
                  "- 0.0061 MW, kp in cm/s; K = Kow^0.71, D = L x 10^(-6.3 - 0.0061 MW) cm/s). Valid for molar "
                  "masses of about 18 to 750 g/mol and log Kow of about -3 to 6, from water, human skin; expect "
                  "errors of a factor 3 or more for one compound. Replace by fitted values when data exist.")
"""The text every output of the screening estimate carries."""


@dataclass(frozen=True)
class ScreeningEstimate:
    """Permeability, diffusivity and partition coefficient from the Potts and Guy correlation.

    Attributes
    ----------
    log_kow : float
    molar_mass : float, g/mol
    thickness : float, cm
        The layer's thickness L (the diffusion path).
    permeability : float, cm/h
        kp.
    diffusivity : float, cm^2/h
        D = L x 10^(-6.3 - 0.0061 MW) cm/s, in cm^2/h.
    partition : float
        K = Kow^0.71.
    warnings : tuple of str
        The compound outside the correlation's domain, when it is.
    """

    log_kow: float
    molar_mass: float
    thickness: float
    permeability: float
    diffusivity: float
    partition: float
    warnings: tuple[str, ...] = ()

    @property
    def in_domain(self) -> bool:
        """True when molar mass and log Kow lie in the correlation's domain."""
        return not self.warnings

    @property
    def flag(self) -> str:
        """The screening flag (:data:`SCREENING_FLAG`)."""
        return SCREENING_FLAG

    def as_dict(self) -> dict[str, object]:
        """For JSON: kp in cm/h and cm/s, D in cm^2/s and cm^2/h, K, the flag, the domain and any warning."""
        return {"screening_estimate": True, "source": "Potts and Guy, Pharm. Res. 9 (1992) 663",
                "log_kow": self.log_kow, "molar_mass_g_per_mol": self.molar_mass, "thickness_um": self.thickness * 1e4,
                "permeability_cm_per_h": self.permeability, "permeability_cm_per_s": self.permeability / 3600.0,
                "diffusivity_cm2_per_s": self.diffusivity / 3600.0, "diffusivity_cm2_per_h": self.diffusivity,
                "partition": self.partition, "domain": {k: list(v) for k, v in DOMAIN.items()},
                "in_domain": self.in_domain, "warnings": list(self.warnings), "flag": SCREENING_FLAG,
                "caution": CAUTION}

    def to_text(self) -> str:
        """A short report with the flag."""
        lines = [f"screening estimate for log Kow {self.log_kow:g}, molar mass {self.molar_mass:g} g/mol, layer "
                 f"{self.thickness * 1e4:.4g} um:",
                 f"  permeability kp  {self.permeability / 3600.0:.3g} cm/s ({self.permeability:.3g} cm/h)",
                 f"  diffusivity D    {self.diffusivity / 3600.0:.3g} cm^2/s",
                 f"  partition K      {self.partition:.3g}", "", SCREENING_FLAG]
        lines += [f"warning: {w}" for w in self.warnings]
        lines += ["", CAUTION]
        return "\n".join(lines)


def screening_estimate(log_kow: float, molar_mass: float, thickness: float) -> ScreeningEstimate:
    """The Potts and Guy estimate for a compound and a layer.

    Parameters
    ----------
    log_kow : float
        log10 of the octanol/water partition coefficient.
    molar_mass : float, g/mol
    thickness : float, cm
        The layer's thickness.

    Returns
    -------
    ScreeningEstimate

    Raises
    ------
    ScenarioError
        For a molar mass or thickness that is not > 0, or values that are not finite.

    Examples
    --------
    log Kow 1, 200 g/mol: log kp = -6.3 + 0.71 - 1.22 = -6.81, kp = 1.55e-7 cm/s:

    >>> e = screening_estimate(1.0, 200.0, 15e-4)
    >>> round(math.log10(e.permeability / 3600.0), 6), round(e.partition, 4)
    (-6.81, 5.1286)
    """
    for name, value, positive in (("log_kow", log_kow, False), ("molar mass", molar_mass, True),
                                  ("thickness", thickness, True)):
        if not isinstance(value, float | int) or isinstance(value, bool) or not math.isfinite(value) or (
                positive and value <= 0):
            raise ScenarioError.single(f"screening {name}", repr(value), "must be a finite number"
                                       + (" > 0" if positive else ""))
    warnings = []
    lo, hi = DOMAIN["molar_mass_g_per_mol"]
    if not lo <= molar_mass <= hi:
        warnings.append(f"the molar mass {molar_mass:g} g/mol lies outside the correlation's data ({lo:g} to {hi:g} "
                        "g/mol): the estimate is an extrapolation")
    lo, hi = DOMAIN["log_kow"]
    if not lo <= log_kow <= hi:
        warnings.append(f"log Kow {log_kow:g} lies outside the correlation's data ({lo:g} to {hi:g}): the estimate "
                        "is an extrapolation")
    d_over_l = 10.0 ** (INTERCEPT + SLOPE_MW * molar_mass)           # cm/s
    k = 10.0 ** (SLOPE_KOW * log_kow)
    diffusivity = d_over_l * thickness * 3600.0                      # cm^2/h
    return ScreeningEstimate(float(log_kow), float(molar_mass), float(thickness), diffusivity * k / thickness,
                             diffusivity, k, tuple(warnings))


def screen_layer(scenario: Scenario, layer: str | ParamPath | None = None) -> tuple[ScreeningEstimate, Scenario]:
    """The screening estimate for a layer of ``scenario``, and the scenario with it set.

    Reads ``[substance] log_kow`` and ``molar_mass`` and the layer's thickness; sets the layer's
    diffusivity and partition; adds the screening flag to the scenario's description.

    Parameters
    ----------
    scenario : Scenario
    layer : str or ParamPath, optional
        ``"barrier.skin.layer.1"`` (a layer, or any field of it); default: the first layer of the
        scenario's one barrier.

    Raises
    ------
    ScenarioError
        When the substance lacks log_kow or molar_mass, or the layer cannot be found.
    """
    sub = scenario.substance
    missing = [k for k, v in (("log_kow", sub.log_kow), ("molar_mass", sub.molar_mass)) if v is None]
    if missing:
        raise ScenarioError.single("substance", ", ".join(missing) + " not given",
                                   "the screening estimate needs [substance] log_kow and molar_mass", scenario.source)
    if layer is None:
        if len(scenario.barriers) != 1:
            raise ScenarioError.single("--layer", "not given", "name the layer, such as 'barrier.skin.layer.1' "
                                       f"(barriers: {', '.join(b.id for b in scenario.barriers) or 'none'})")
        layer = f"barrier.{scenario.barriers[0].id}.layer.1"
    text = layer.text if isinstance(layer, ParamPath) else str(layer)
    parts = text.split(".")
    if len(parts) == 4:
        text = f"{text}.thickness"
    path = ParamPath.parse(text, scenario, what="--layer")
    if path.table != "barrier" or path.layer is None:
        raise ScenarioError.single("--layer", repr(str(layer)), "must name a barrier layer, such as "
                                   "'barrier.skin.layer.1'")
    head = f"barrier.{path.item}.layer.{path.layer}"
    thickness = ParamPath.parse(f"{head}.thickness").get(scenario)
    est = screening_estimate(sub.log_kow, sub.molar_mass, thickness)  # molar mass in mg/mmol = g/mol
    note = (f"{SCREENING_FLAG} Set on {head}: diffusivity {est.diffusivity / 3600.0:.3g} cm^2/s, partition "
            f"{est.partition:.3g}." + (" " + " ".join(est.warnings) if est.warnings else ""))
    description = f"{scenario.description.rstrip()}\n\n{note}" if scenario.description else note
    d = ParamPath.parse(f"{head}.diffusivity").from_unit(float(f"{est.diffusivity / 3600.0:.6g}"), "cm^2/s")
    new = with_values(scenario, {f"{head}.diffusivity": d, f"{head}.partition": float(f"{est.partition:.6g}"),
                                 "scenario.description": description})
    return est, new
