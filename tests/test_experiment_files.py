"""Experiment data files: the reader (barrierflow.io.experiment) and the sampling correction.

The file format is the project's extension contract (experiment data files): a time column and
replicate columns named like the traces CSV. Bad files are refused with the row and the column.
"""

from __future__ import annotations

import math
import pickle

import numpy as np
import pytest

from barrierflow.analysis.sampling import cumulative_from_samples
from barrierflow.errors import DataError, ScenarioError
from barrierflow.io import load_experiment, loads_experiment
from barrierflow.model.experiment import Experiment, Series

GOOD = """# invented data for a test
time [h],permeated:skin#1 [ug/cm^2],permeated:skin#2 [ug/cm^2],conc:receptor#1 [ug/mL]
0,0,0,0
2,0.41,,0.05
4,1.52,1.61,0.2

6,2.9,3.1,
"""


def refused(text: str, **kw) -> list[str]:
    with pytest.raises(DataError) as info:
        loads_experiment(text, name="cells.csv", **kw)
    return [str(p) for p in info.value.problems]


def test_a_good_file_reads_in_internal_units(tmp_path):
    path = tmp_path / "cells.csv"
    path.write_text(GOOD, encoding="utf-8")
    e = load_experiment(path)
    assert e.times == (0.0, 2.0, 4.0, 6.0)
    assert e.time_unit == "h" and e.source == str(path)
    assert [s.name for s in e.series] == ["permeated:skin#1", "permeated:skin#2", "conc:receptor#1"]
    assert e.observables == ("permeated:skin", "conc:receptor")
    assert e.replicates == ("1", "2")
    # ug/cm^2 -> mg/cm^2 and ug/mL -> mg/mL (1 ug = 1e-3 mg)
    assert e.series[0].values == pytest.approx((0.0, 0.41e-3, 1.52e-3, 2.9e-3))
    assert math.isnan(e.series[1].values[1]) and math.isnan(e.series[2].values[3])
    assert e.series[0].unit == "ug/cm^2" and e.series[2].kind == "concentration"
    assert e.n_observations == 10
    assert [s.name for s in e.replicate("2").series] == ["permeated:skin#2"]
    assert e.of("conc:receptor")[0].column == "conc:receptor#1 [ug/mL]"


def test_minutes_a_byte_order_mark_and_units_given_as_options():
    e = loads_experiment("\ufefftime [min],flux:skin#a [ug/(cm^2*h)]\n30,1\n90,2\n")
    assert e.times == (0.5, 1.5) and e.series[0].replicate == "a"
    assert e.series[0].values == pytest.approx((1e-3, 2e-3))
    e = loads_experiment("time,amount:receptor\n1,5\n", time_unit="d", unit="ug")
    assert e.times == (24.0,) and e.series[0].replicate == "1" and e.series[0].values == pytest.approx((5e-3,))
    # a unit in the header wins over the option
    assert loads_experiment("time [h],amount:r#1 [mg]\n1,5\n", time_unit="d", unit="ug").series[0].values == (5.0,)
    # molar units with the molar mass (250 g/mol: 1 umol = 0.25 mg)
    e = loads_experiment("time [h],conc:r#1 [umol/L]\n1,4\n", molar_mass=250.0)
    assert e.series[0].values == pytest.approx((1e-3,))


def test_non_monotone_times_name_the_row_and_column():
    got = refused("time [h],permeated:skin#1 [ug/cm^2]\n0,0\n4,1\n2,2\n4,3\n")
    assert got == ["cells.csv: row 4, column 'time [h]': got 2; times must increase down the file; row 3 has 4 h "
                   "(put replicates in columns, not in repeated rows)",
                   "cells.csv: row 5, column 'time [h]': got 4; times must increase down the file; row 3 has 4 h "
                   "(put replicates in columns, not in repeated rows)"]


def test_negative_and_non_numeric_values_name_the_row_and_column():
    got = refused("time [h],permeated:skin#1 [ug/cm^2],permeated:skin#2 [ug/cm^2]\n0,0,0\n1,-0.3,abc\n2,1;5,nan\n"
                  "3,\"1,5\",1\n-1,1,1\n,1,1\n")
    assert got[0] == ("cells.csv: row 3, column 'permeated:skin#1 [ug/cm^2]': got -0.3; must be a number >= 0 (a "
                      "measured amount or concentration is not negative; leave the cell blank for a value below the "
                      "limit of quantification or missing)")
    assert got[1] == "cells.csv: row 3, column 'permeated:skin#2 [ug/cm^2]': got 'abc'; must be a number"
    assert got[2] == "cells.csv: row 4, column 'permeated:skin#1 [ug/cm^2]': got '1;5'; must be a number"
    assert got[3] == ("cells.csv: row 4, column 'permeated:skin#2 [ug/cm^2]': got 'nan'; must be a number; leave the "
                      "cell blank for a missing value")
    assert got[4] == ("cells.csv: row 5, column 'permeated:skin#1 [ug/cm^2]': got '1,5'; must be a number; write '.' "
                      "as the decimal mark")
    assert got[5] == "cells.csv: row 6, column 'time [h]': got -1; must be a time >= 0"
    assert got[6] == "cells.csv: row 7, column 'time [h]': got a blank cell; every row needs its time"


def test_unknown_units_and_quantities_name_the_column():
    got = refused("time [hours],permeated:skin#1 [ug/cm2],conc:r#1 [kg],speed:r#1 [m/s],flux:skin#1\n1,1,1,1,1\n")
    assert got == [
        "cells.csv: row 1, column 2 'permeated:skin#1 [ug/cm2]': got 'ug/cm2'; cannot read this unit (unknown unit "
        "'cm2'); an amount per area needs a unit such as 'ug/cm^2'",
        "cells.csv: row 1, column 3 'conc:r#1 [kg]': got 'kg'; a unit of another kind; a concentration (mass per "
        "volume) needs a unit such as 'mg/mL'",
        "cells.csv: row 1, column 4: got 'speed:r#1 [m/s]'; unknown quantity 'speed'; an experiment can observe conc, "
        "amount, permeated, flux",
        "cells.csv: row 1, column 5: got 'flux:skin#1'; needs a unit: write it in brackets, such as 'flux:skin#1 "
        "[ug/(cm^2*h)]' (or give the unit as an option)",
    ]
    assert refused("time [h],conc:r#1 [umol/L]\n1,1\n")[0].endswith(
        "a molar unit needs the substance's molar mass: give [substance] molar_mass in the scenario, or write the "
        "column in mass units, such as 'mg/mL'")
    assert refused("time [parsec],conc:r#1 [mg/L]\n1,1\n")[0].startswith(
        "cells.csv: row 1, column 1 'time [parsec]': got 'parsec'; a unit of another kind; a time needs a unit")


def test_header_and_layout_problems():
    assert refused("") == ["cells.csv: header: got no header row; the first row must name the columns, such as "
                           "'time [h],permeated:skin#1 [ug/cm^2]'"]
    assert refused("day [h],conc:r#1 [mg/L]\n1,1\n") == [
        "cells.csv: row 1, column 1: got 'day [h]'; the first column must be the time, such as 'time [h]'"]
    assert refused("time [h];conc:r#1 [mg/L]\n1;1\n")[0].endswith(
        "the columns seem separated by semicolons; save the file as comma-separated values (CSV) with '.' as the "
        "decimal mark")
    assert refused("time [h],conc:r#1 [mg/L],conc:r#1 [ug/L]\n1,1,1\n") == [
        "cells.csv: row 1, column 3: got 'conc:r#1 [ug/L]'; repeats column 2 (conc:r#1); give each replicate its own "
        "tag (#1, #2, ...)"]
    assert refused("time [h],conc:r#1 [mg/L]\n") == [
        "cells.csv: row 2: got no data rows; the header must be followed by at least one row of values"]
    assert refused("time [h],conc:r#1 [mg/L]\n1,2,3\n") == [
        "cells.csv: row 2: got 3 cells; the header names 2 columns; remove the extra cells or name their columns"]
    assert refused("time [h],conc:r#1 [mg/L]\n1,\n2,\n") == [
        "cells.csv: series: got only blank values; an experiment needs at least one measured value"]
    with pytest.raises(DataError, match="must be UTF-8 text"):
        loads_experiment("time [h],conc:r#1 [mg/L]\n1,1\n".encode("utf-16"))
    with pytest.raises(DataError, match="must be UTF-8 text"):
        loads_experiment(b"time [h],conc:r#1 [mg/L]\n1,\xff\n")


def test_many_problems_are_listed_then_counted():
    text = "time [h],conc:r#1 [mg/L]\n" + "".join(f"{i},x\n" for i in range(50))
    got = refused(text)
    assert len(got) == 31 and got[-1] == "cells.csv: got 20 more problems; not listed; mend the ones above first"


def test_a_data_error_is_a_scenario_error_and_travels():
    with pytest.raises(ScenarioError) as info:
        loads_experiment("time [h],conc:r#1 [mg/L]\n1,-1\n", name="x.csv")
    err = pickle.loads(pickle.dumps(info.value))
    assert type(err) is DataError and str(err) == str(info.value) and err.problems == info.value.problems


def test_the_model_checks_an_experiment_built_in_python():
    s = Series("permeated", "skin", "1", (0.0, 1.0), "mg/cm^2")
    assert Experiment((0.0, 1.0), (s,)).n_observations == 2
    with pytest.raises(DataError) as info:
        Experiment((1.0, 0.5, 2.0), (s, s, Series("permeated", "skin", "2", (-1.0, 1.0, 1.0), "mg/cm^2")))
    got = [str(p) for p in info.value.problems]
    assert "time 2: got 0.5 h; times must increase; the time before is 1 h" in got
    assert "series 'permeated:skin#1': got permeated:skin#1; appears twice; give each replicate its own tag " \
           "(#1, #2, ...)" in got
    assert "series 'permeated:skin#1': got 2 values; needs one per time (3)" in got
    assert "series 'permeated:skin#2' at time 1: got -1.0; must be a number >= 0 (NaN for a missing value)" in got


# ----------------------------------------------------------------------------- the sampling correction
def test_sampling_correction_worked_example():
    # Q_n = (V C_n + v sum_{i<n} C_i) / A (common practice; the set-up of OECD Guideline 428, 2004):
    # V = 5 mL, v = 0.5 mL, A = 1 cm^2, C = 0.01, 0.03, 0.05 mg/mL ->
    # Q1 = 0.05, Q2 = 0.15 + 0.005 = 0.155, Q3 = 0.25 + 0.5 * 0.04 = 0.27 mg/cm^2 (worked by hand)
    q = cumulative_from_samples([0.01, 0.03, 0.05], 5.0, 0.5, 1.0)
    np.testing.assert_allclose(q, [0.05, 0.155, 0.27], rtol=1e-15)
    # no sampling: Q = V C / A
    np.testing.assert_allclose(cumulative_from_samples([0.01, 0.03], 5.0, 0.0, 2.0), [0.025, 0.075])
    # a missing sample makes the later values unknown
    q = cumulative_from_samples([0.01, np.nan, 0.05], 5.0, 0.5, 1.0)
    assert q[0] == pytest.approx(0.05) and np.isnan(q[1]) and np.isnan(q[2])


def test_sampling_correction_recovers_what_permeated():
    # Mass balance of a well-mixed receptor (common practice): what permeated by sample n, M_n, is
    # what the receptor holds, V C_n, plus what the earlier samples removed; with replacement the
    # receptor holds M_n - sum_{i<n} v_i C_i. Build the concentrations from a known M_n and check
    # that the correction gives M_n / A back, with unequal aliquots and without replacement.
    rng = np.random.default_rng(3)
    m = np.cumsum(rng.uniform(0.01, 0.2, 12))   # mg, increasing
    area, vol, v = 1.77, 7.0, rng.uniform(0.2, 0.6, 12)
    c, taken = np.empty(12), 0.0
    for n in range(12):                           # with replacement: the volume stays
        c[n] = (m[n] - taken) / vol
        taken += v[n] * c[n]
    np.testing.assert_allclose(cumulative_from_samples(c, vol, v, area), m / area, rtol=1e-13)
    volumes, c, taken = vol - np.concatenate(([0.0], np.cumsum(v[:-1]))), np.empty(12), 0.0
    for n in range(12):                           # without replacement: the volume shrinks
        c[n] = (m[n] - taken) / volumes[n]
        taken += v[n] * c[n]
    np.testing.assert_allclose(cumulative_from_samples(c, volumes, v, area), m / area, rtol=1e-13)


def test_sampling_correction_refuses_bad_arguments():
    with pytest.raises(ValueError, match="area: got 0.0; must be > 0 cm"):
        cumulative_from_samples([0.1], 5.0, 0.5, 0.0)
    with pytest.raises(ValueError, match="sample_volume: got 2 values; expected one, or one per sample"):
        cumulative_from_samples([0.1, 0.2, 0.3], 5.0, [0.5, 0.5], 1.0)
    with pytest.raises(ValueError, match="receptor_volume: got"):
        cumulative_from_samples([0.1], -5.0, 0.5, 1.0)


def test_every_data_file_of_the_project_reads_and_says_it_is_invented():
    from pathlib import Path

    files = sorted((Path(__file__).resolve().parents[1] / "data").glob("*.csv"))
    assert files
    for path in files:
        first = path.read_text(encoding="utf-8").splitlines()[0]
        assert first.startswith("#") and "invented" in first.lower(), path.name
        assert load_experiment(path).n_observations > 0
