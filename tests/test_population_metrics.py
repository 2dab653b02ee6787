"""The metrics of a population, computed for all subjects at once, against each subject alone.

:func:`barrierflow.analysis.population.population_metrics` measures a chunk of subjects in one
call of :func:`barrierflow.analysis.metrics.compute_metrics` on their traces with a subject axis
and their stacked scenario. The reference of every check here is the single-run path: the same
subject's traces (one row, 1-D) with its own scenario (``with_values``), measured as a run of
its own, whose rules the metric tests check against published worked values
(tests/test_metrics.py, tests/test_metric_rules.py). Every metric and every note must agree,
on every shipped scenario that a population runs, with every free value varied.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest

import barrierflow as bf
from barrierflow.analysis.metrics import compute_metrics
from barrierflow.analysis.population import metric_layout, population_metrics
from barrierflow.errors import ScenarioError
from barrierflow.model.cohort import Diverging
from barrierflow.model.paths import parameter_paths, parse_param, with_values
from barrierflow.studies.runner import ChunkTask, evaluate, run_chunk, simulate_subjects

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"
ALL = sorted(p.name for p in SCENARIOS.glob("*.toml"))
TRACES = ("concentration", "flux", "permeated", "content", "dosed", "amount")


class _Run:
    """Rows of a population's traces as a run: one subject (1-D traces, as a single run's) or
    several (a subject axis), with the scenario given."""

    def __init__(self, pop, rows, scenario):
        self.times, self.scenario, self._pop, self._rows = pop.times, scenario, pop, rows

    def __getattr__(self, what):
        if what not in TRACES:
            raise AttributeError(what)
        return lambda ident: getattr(self._pop, what)(ident)[self._rows]

    def dose_parts(self, cid):
        return tuple(p[self._rows] for p in self._pop.dose_parts(cid))


def _free_params(scenario):
    return [p for p in parameter_paths(scenario, structural=False) if p.numeric and p.kind != "count"
            and p.get(scenario)]


def _draws(scenario, params, n, seed, spread):
    rng = np.random.default_rng(seed)
    base = np.array([p.get(scenario) for p in params], dtype=float)
    return base * np.exp(spread * rng.standard_normal((n, len(params))))


def _same(got, want):
    """Equal values (NaN and None as blanks), and the same notes."""
    assert len(got) == len(want)
    for g, w in zip(got, want, strict=True):
        assert g[:3] == w[:3] and g[4:] == w[4:], (g, w)
        a, b = g[3], w[3]
        if a is None or b is None:
            assert a is None and b is None, (g, w)
        else:
            assert a == b or math.isclose(a, b, rel_tol=1e-12, abs_tol=0.0), (g, w)


def _population_runs(s, params):
    """Whether populations run this scenario at all (the compiled paths refuse some models)."""
    try:
        simulate_subjects(s, params[:1], np.array([[params[0].get(s)]]))
    except ScenarioError as err:
        return str(err)
    return ""


def _check(s, params, values):
    """Every subject that finished: the all-at-once metrics (values and notes) against its own."""
    refused = _population_runs(s, params)
    if refused:
        pytest.skip(refused)
    pop, subjects, messages = simulate_subjects(s, params, values)
    if pop is None or not (pop.status == 0).any():
        pytest.skip("no subject of this draw runs")
    accepted = subjects.accepted()
    table = population_metrics(pop, accepted)
    rows = np.flatnonzero(pop.status == 0)
    try:
        blocks = [(rows, compute_metrics(_Run(pop, rows, accepted.stacked(rows))))]
    except Diverging as split:   # measured in parts, as population_metrics does
        blocks = [(part, compute_metrics(_Run(pop, part, accepted.stacked(part))))
                  for part in (rows[split.mask], rows[~split.mask])]
    checked = 0
    for part, block in blocks:
        for k, i in enumerate(part.tolist()):
            alone = compute_metrics(_Run(pop, i, accepted[i]))         # a single run's path
            want = alone.to_rows()
            _same(block.subject(k).to_rows(), want)
            expect = [np.nan if v is None else float(v) for *_, v, _, _ in want]
            np.testing.assert_allclose(table.values[i], expect, rtol=1e-12, atol=0.0, equal_nan=True)
            assert table.names == tuple(f"{m}:{ident}" for _, ident, m, *_ in want)
            checked += 1
    assert np.isnan(table.values[pop.status != 0]).all()
    return checked, pop


@pytest.mark.parametrize("name", ALL)
def test_all_at_once_equals_each_subject_alone(name):
    # every value a population may vary, varied at once (30 % spread)
    s = bf.load(SCENARIOS / name)
    params = _free_params(s)
    checked, _ = _check(s, params, _draws(s, params, 8, seed=5, spread=0.3))
    assert checked >= 1


@pytest.mark.parametrize("name, seed", [("daily_patch.toml", 1), ("eye_drops.toml", 2),
                                        ("membrane_washoff.toml", 3), ("oral_depot.toml", 4)])
def test_random_populations_that_take_every_branch(name, seed):
    # a wide spread (a factor of about 3 either way) sends subjects down different branches of
    # the rules (a formulation exhausted or not, a steady line or a transient peak, a terminal
    # phase found or not): each subject still gets exactly its own metrics and notes
    s = bf.load(SCENARIOS / name)
    params = _free_params(s)
    checked, pop = _check(s, params, _draws(s, params, 24, seed=seed, spread=1.0))
    assert checked >= 12


def test_subjects_on_whom_a_rule_decides_differently_are_measured_in_parts():
    # a fresh patch of blank vehicle (a replace at zero) takes the formulation off; for the other
    # subjects the replace is a new application: the terminal-phase rule decides differently
    # (Diverging), so the subjects are measured in parts, each still getting its own metrics
    s = bf.load(SCENARIOS / "daily_patch.toml")
    params = [parse_param("dose.1.concentration", s), parse_param("compartment.central.clearance", s)]
    values = np.array([[20.0, 20000.0], [0.0, 25000.0], [15.0, 15000.0], [0.0, 20000.0]])
    pop, subjects, _ = simulate_subjects(s, params, values)
    with pytest.raises(Diverging):
        compute_metrics(_Run(pop, np.arange(4), subjects.accepted().stacked(np.arange(4))))
    checked, _ = _check(s, params, values)
    assert checked == 4


def _empty_patch_subjects():
    """The demo patch with its reservoir empty at the start for subjects 2 and 4 (their first
    patch comes at 24 h): their runs have one dosing interval fewer than those of 1 and 3."""
    s = dataclasses.replace(bf.load(SCENARIOS / "daily_patch.toml"), output_step=2.0)
    params = (parse_param("compartment.patch.initial_concentration", s), parse_param("compartment.central.clearance",
                                                                                     s))
    values = np.array([[20.0, 20000.0], [0.0, 25000.0], [10.0, 15000.0], [0.0, 20000.0]])
    return s, params, values


def test_subjects_with_different_numbers_of_dosing_intervals_share_one_set_of_columns():
    # one column set for the whole population (the union: the 7 intervals of a loaded start);
    # each subject's values are those of its own single run (barrierflow.simulate of with_values,
    # whose metric rules tests/test_metrics.py checks against published worked values), blank
    # (NaN) in the columns its own run does not have
    s, params, values = _empty_patch_subjects()
    pop, subjects, messages = simulate_subjects(s, params, values)
    assert messages == [""] * 4
    layout = metric_layout(s, params)
    table = population_metrics(pop, subjects.accepted(), layout=layout)
    assert table.names == layout[0] == population_metrics(pop, subjects.accepted()).names
    assert "auc_interval_7:central" in table.names
    widths = set()
    for i, row in enumerate(values.tolist()):
        alone = bf.simulate(with_values(s, dict(zip(params, row, strict=True)))).metrics().to_rows()
        own = {f"{m}:{ident}": v for _, ident, m, v, *_ in alone}
        widths.add(sum(name.startswith("auc_interval_") for name in own))
        for name, got in zip(table.names, table.values[i], strict=True):
            want = own.get(name)
            if want is None:
                assert math.isnan(got), (i, name)
            else:
                assert got == pytest.approx(float(want), rel=1e-9, abs=1e-12), (i, name)
    assert widths == {6 * 3, 7 * 3}  # three compartments, 6 and 7 intervals


def test_the_columns_do_not_depend_on_how_the_subjects_are_chunked():
    # every chunk has the columns of metric_layout whichever subjects it holds (loaded, empty,
    # or all refused): the chunks join in any chunking, bit for bit
    s, params, values = _empty_patch_subjects()
    whole = evaluate(s, params, values, chunk=4)
    for size in (1, 2, 3):
        part = evaluate(s, params, values, chunk=size)
        assert part.metrics.names == whole.metrics.names and part.metrics.units == whole.metrics.units
        assert np.array_equal(part.metrics.values, whole.metrics.values, equal_nan=True)
    refused_chunk = run_chunk(ChunkTask(s, params, 1, np.array([[0.0, -1.0]]), traces=False))
    empty_chunk = run_chunk(ChunkTask(s, params, 1, values[1:2], traces=False))
    loaded_chunk = run_chunk(ChunkTask(s, params, 1, values[:1], traces=False))
    assert not refused_chunk.ok.any() and np.isnan(refused_chunk.metrics.values).all()
    assert refused_chunk.metrics.names == empty_chunk.metrics.names == loaded_chunk.metrics.names == \
        whole.metrics.names
