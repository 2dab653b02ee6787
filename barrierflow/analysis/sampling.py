"""The sampling correction: cumulative amount permeated from receptor concentrations.

In a diffusion cell the receptor fluid is sampled at set times: an aliquot of volume v is
withdrawn for analysis and replaced by fresh medium, so that the receptor volume V stays
constant (the set-up that OECD Guideline 428, Skin Absorption: In Vitro Method, 2004, describes).
The concentration C_n measured in sample n then under-reports what has permeated, because
every earlier sample took substance out. The cumulative amount per area that has crossed the
barrier by sample n is::

    Q_n = (V C_n + v * sum_{i<n} C_i) / A

with A the exposed area. This formula is common practice in permeation labs (it is the mass
balance of a well-mixed receptor with replacement: what is in the receptor now plus what every
earlier sample removed); it is not taken from a single published source. With samples of
different volumes, ``v C_i`` becomes ``v_i C_i``. Without replacement the receptor volume
shrinks by each aliquot: pass the volume at each sample as ``receptor_volume`` (a sequence).

The concentrations are those *in the samples* (the receptor just before each withdrawal).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = ["cumulative_from_samples"]


def cumulative_from_samples(concentrations: Sequence[float] | np.ndarray,
                            receptor_volume: float | Sequence[float] | np.ndarray,
                            sample_volume: float | Sequence[float] | np.ndarray,
                            area: float) -> np.ndarray:
    """Cumulative amount per area permeated by each sample, corrected for earlier samples.

    Parameters
    ----------
    concentrations : array_like, mg/mL
        C_1 ... C_N, measured in the samples, in the order they were taken. A NaN (a sample not
        analysed) makes every later Q NaN too, since what it removed is unknown.
    receptor_volume : float or array_like, mL
        V, the receptor volume when each sample is drawn (one value when it is kept constant by
        replacement).
    sample_volume : float or array_like, mL
        v, the volume of each aliquot (one value when all are equal); 0 for a receptor that is
        not sampled (then Q_n = V C_n / A).
    area : float, cm^2
        A, the area of the barrier exposed to the receptor.

    Returns
    -------
    ndarray, mg/cm^2
        Q_1 ... Q_N.

    Raises
    ------
    ValueError
        For negative volumes, an area that is not > 0, or arrays of the wrong length.

    Examples
    --------
    Three samples of 0.5 mL from a 5 mL receptor under a 1 cm^2 membrane:

    >>> cumulative_from_samples([0.01, 0.03, 0.05], 5.0, 0.5, 1.0).round(6).tolist()
    [0.05, 0.155, 0.27]
    """
    c = np.asarray(concentrations, dtype=float)
    if c.ndim != 1:
        raise ValueError(f"concentrations: got an array of shape {c.shape}; expected one value per sample")
    n = len(c)
    vol = np.broadcast_to(np.asarray(receptor_volume, dtype=float), (n,)) if np.ndim(receptor_volume) == 0 \
        else np.asarray(receptor_volume, dtype=float)
    v = np.broadcast_to(np.asarray(sample_volume, dtype=float), (n,)) if np.ndim(sample_volume) == 0 \
        else np.asarray(sample_volume, dtype=float)
    for name, arr in (("receptor_volume", vol), ("sample_volume", v)):
        if arr.shape != (n,):
            raise ValueError(f"{name}: got {arr.shape[0] if arr.ndim else 1} values; expected one, or one per "
                             f"sample ({n})")
        if np.any(arr < 0) or not np.all(np.isfinite(arr)):
            raise ValueError(f"{name}: got {arr.tolist()}; volumes must be finite and >= 0 mL")
    if not (np.isfinite(area) and area > 0):
        raise ValueError(f"area: got {area}; must be > 0 cm^2")
    withdrawn = np.concatenate(([0.0], np.cumsum(v[:-1] * c[:-1]))) if n else np.zeros(0)
    return (vol * c + withdrawn) / area
