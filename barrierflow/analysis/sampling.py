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

A simulated run books what every aliquot took (the ``sample`` dose kind): :func:`samples` reads
the concentration of each aliquot from that booking, exactly, and :func:`corrected_curve`
applies the correction to them, as a lab applies it to its measured samples.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["SAMPLE_COLUMNS", "Samples", "corrected_curve", "cumulative_from_samples", "samples", "samples_csv"]


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


@dataclass(frozen=True)
class Samples:
    """The aliquots a run withdrew from one compartment.

    Attributes
    ----------
    compartment : str
    times : ndarray, h
        When each aliquot was taken.
    volumes : ndarray, mL
        The volume of each aliquot.
    concentrations : ndarray, mg/mL
        The concentration of each aliquot (the dissolved concentration just before it was taken).
    amounts : ndarray, mg
        What each aliquot took.
    compartment_volumes : ndarray, mL
        The compartment's volume just before each aliquot was taken.
    """

    compartment: str
    times: np.ndarray
    volumes: np.ndarray
    concentrations: np.ndarray
    amounts: np.ndarray
    compartment_volumes: np.ndarray


def samples(result: Any, cid: str) -> Samples:
    """The aliquots a run withdrew from compartment ``cid``, read from the engine's own booking.

    Parameters
    ----------
    result : Result
    cid : str
        The sampled compartment.

    Returns
    -------
    Samples
        Empty arrays when the regimen samples nothing from ``cid``.
    """
    tr = result.trajectory
    i = tr.model.comp_index[cid]
    picked = [k for k, e in enumerate(tr.events) if e.comp == i and e.kind in ("sample", "sample_keep")]
    if not picked:
        empty = np.zeros(0)
        return Samples(cid, empty, empty, empty, empty, empty)
    times = np.array([tr.events[k].time for k in picked], dtype=float)
    v = np.array([tr.events[k].value for k in picked], dtype=float)
    taken = np.asarray(tr.event_amounts, dtype=float)[picked]
    volume = float(tr.model.capacity[i])
    before = np.full(len(picked), volume)
    keep = np.array([tr.events[k].kind == "sample_keep" for k in picked])
    if keep.any():  # without replacement the volume shrinks by each aliquot
        before = volume - np.concatenate(([0.0], np.cumsum(np.where(keep, v, 0.0))[:-1]))
    return Samples(cid, times, v, taken / v, taken, before)


def corrected_curve(result: Any, barrier: str) -> tuple[np.ndarray, np.ndarray]:
    """The corrected cumulative amount per area at each sample of a barrier's ``to`` compartment.

    :func:`cumulative_from_samples` applied to the aliquots of the run (:func:`samples`). Where
    nothing else enters or leaves the receptor, it equals the run's true cumulative amount
    permeated at the sample times (``Result.permeated``).

    Parameters
    ----------
    result : Result
    barrier : str
        Barrier id; its ``to`` compartment is the sampled receptor.

    Returns
    -------
    times : ndarray, h
    corrected : ndarray, mg/cm^2
    """
    b = result.scenario.barrier(barrier)
    got = samples(result, b.to_id)
    if not len(got.times):
        return got.times, np.zeros(0)
    return got.times, cumulative_from_samples(got.concentrations, got.compartment_volumes, got.volumes, b.area)


SAMPLE_COLUMNS = ("time", "compartment", "aliquot", "concentration", "barrier", "corrected", "permeated")
"""The columns of :func:`samples_csv` (each header carries its unit)."""


def samples_csv(result: Any) -> str:
    """Every aliquot of a run as CSV text, with the corrected cumulative curve beside the truth.

    One row per sample, in the scenario's ``[output]`` units: its time, the compartment, the
    aliquot's volume (mL) and concentration, and, where the compartment is the ``to`` side of one
    barrier, that barrier, the corrected cumulative amount per area (:func:`corrected_curve`) and
    the cumulative amount the run says crossed (``permeated``) at the same time. ``barrier``,
    ``corrected`` and ``permeated`` are blank for a compartment that receives from no barrier or
    from several. ``barrierflow run --samples OUT.csv`` writes it.

    Parameters
    ----------
    result : Result

    Returns
    -------
    str
    """
    import csv
    import io

    from ..units import unit_factor

    sc = result.scenario
    u = sc.output_units
    mm = sc.substance.molar_mass
    ft, fc = unit_factor("time", u.time), unit_factor("concentration", u.concentration, mm)
    fq = unit_factor("amount", u.amount, mm) / unit_factor("area", u.area)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([f"time [{u.time}]", "compartment", "aliquot [mL]", f"concentration [{u.concentration}]", "barrier",
                f"corrected [{u.amount}/{u.area}]", f"permeated [{u.amount}/{u.area}]"])
    t_all = np.asarray(result.times, dtype=float)
    for cid in dict.fromkeys(d.target for d in sc.doses if d.kind == "sample"):
        got = samples(result, cid)
        feeding = [b for b in sc.barriers if b.to_id == cid]
        if len(feeding) == 1:
            bid = feeding[0].id
            _, q = corrected_curve(result, bid)
            rows = [int(np.argmin(np.abs(t_all - t))) for t in got.times]
            true = np.asarray(result.permeated(bid), dtype=float)[rows]
        else:
            bid, q, true = "", [None] * len(got.times), [None] * len(got.times)
        for k in range(len(got.times)):
            w.writerow([format(got.times[k] * ft, ".10g"), cid, format(got.volumes[k], ".10g"),
                        format(got.concentrations[k] * fc, ".10g"), bid,
                        "" if q[k] is None else format(q[k] * fq, ".10g"),
                        "" if true[k] is None else format(true[k] * fq, ".10g")])
    return buf.getvalue()
