"""Numerical failure is reported, not hidden: SolverError by default, a partial result on request."""

from __future__ import annotations

import numpy as np
import pytest

import barrierflow as bf
from barrierflow import Compartment, Dose, Scenario, SolverError
from barrierflow.engine import ScipyIntegrator


class FailingAfter(ScipyIntegrator):
    """A real BDF integrator that fails in the second dosing interval (to exercise the reporting)."""

    def integrate(self, problem, y0, t_end, t_out, stats):
        if stats.intervals >= 1:
            raise SolverError("step size collapsed (injected)", time=0.5)
        return super().integrate(problem, y0, t_end, t_out, stats)


def scenario():
    return Scenario(name="failure (invented)", duration=10.0, output_step=0.5,
                    compartments=(Compartment("plasma", volume=1000.0, clearance=100.0),),
                    doses=(Dose("plasma", "bolus", at=0.0, amount=10.0, every=4.0),))


def test_failure_raises_with_where_and_what():
    with pytest.raises(SolverError) as info:
        bf.simulate(scenario(), integrator=FailingAfter(), fallback=False)
    msg = str(info.value)
    assert "t = 4.5 h" in msg and "dosing interval 2" in msg and "compartment 'plasma'" in msg
    assert "Try a tighter tolerance" in msg
    assert info.value.time == pytest.approx(4.5)


def test_failure_can_return_the_partial_result():
    r = bf.simulate(scenario(), integrator=FailingAfter(), raise_on_failure=False, fallback=False)
    assert r.status == -1
    assert r.times[-1] < 4.0 and len(r.times) == 8
    assert "failed" in r.message


def test_a_failed_integrator_is_replaced_by_the_robust_one():
    # the guard: the failed BDF run is computed again on RODAS4 at rtol 1e-8, and says so
    r = bf.simulate(scenario(), integrator=FailingAfter())
    assert r.status == 0 and r.integrator == "rodas4" and r.stats["fallbacks"] == 1
    assert "failed" in r.message and "computed again with rodas4" in r.message
    # one-compartment bolus, C = (D/V) e^(-CL t / V) summed over the doses (Gibaldi and Perrier,
    # Pharmacokinetics, 2nd ed., 1982, ch. 1 and 3)
    t = r.times
    doses = np.arange(0.0, 10.0, 4.0)
    expected = sum(np.where(t >= d, 10.0 / 1000.0 * np.exp(-0.1 * (t - d)), 0.0) for d in doses)
    assert np.allclose(r.concentration("plasma"), expected, rtol=1e-7, atol=1e-12)


def test_bad_integrator_option_is_refused():
    with pytest.raises(bf.ScenarioError, match="integrator rtol: got 2; must be a number between 0 and 1"):
        ScipyIntegrator(rtol=2)
    with pytest.raises(bf.ScenarioError, match="integrator: got 'euler'"):
        from barrierflow.engine import integrator_from_name
        integrator_from_name("euler")
