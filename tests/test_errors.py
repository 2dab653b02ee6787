"""Errors that travel: every exception type of barrierflow pickles and unpickles to an equal error.

A worker process (multiprocessing, concurrent.futures) or a Dask cluster sends an error back
pickled; it must arrive with its type, message and attributes (a ScenarioError's problems, a
SolverError's time, part and partial result). The types are found by walking the package, so a
new type is covered here without being listed.
"""

from __future__ import annotations

import importlib
import pickle
import pkgutil

import pytest

import barrierflow
from barrierflow.errors import BarrierflowError, Problem, ScenarioError, SolverError, UnitsError

# one example of each type's constructor arguments; a new type with its parent's signature is
# covered by its parent's example, a type with its own signature must add one here
EXAMPLES: dict[type, list[tuple[tuple, dict]]] = {
    BarrierflowError: [(("something went wrong",), {})],
    ScenarioError: [
        (([Problem("barrier 'skin' layer 1 thickness", "-15 um", "must be > 0", "patch.toml",
                   "barrier.skin.layer.1.thickness"),
           Problem("dose 2 at", "30 h", "must be within the run (duration 24 h)", "patch.toml", "dose.2.at")],), {}),
        (([],), {}),
    ],
    UnitsError: [(("5 kg", "a volume with its unit, such as '5 mL'", "compartment 'c' volume"), {}),
                 ((15,), {"expected": "a length", "field": ""})],
    SolverError: [(("the step size fell below its floor",), {"time": 12.5, "part": "skin",
                                                              "result": {"partial": [1.0, 2.0]}}),
                  (("failed",), {})],
}


def _all_error_types() -> list[type]:
    for mod in pkgutil.walk_packages(barrierflow.__path__, "barrierflow."):
        importlib.import_module(mod.name)
    out, todo = [], [BarrierflowError]
    while todo:
        cls = todo.pop()
        out.append(cls)
        todo.extend(cls.__subclasses__())
    return sorted(set(out), key=lambda c: c.__qualname__)


def _examples(cls: type) -> list[tuple[tuple, dict]]:
    for klass in cls.__mro__:
        if klass in EXAMPLES:
            return EXAMPLES[klass]
    raise AssertionError(f"{cls.__qualname__}: add an example of its constructor arguments to EXAMPLES")


def _same(a: BaseException, b: BaseException) -> None:
    assert type(a) is type(b)
    assert str(a) == str(b) and a.args == b.args
    assert vars(a) == vars(b)


@pytest.mark.parametrize("cls", _all_error_types(), ids=lambda c: c.__qualname__)
def test_every_error_type_pickles_to_an_equal_error(cls):
    for args, kwargs in _examples(cls):
        try:
            err = cls(*args, **kwargs)
        except TypeError as exc:
            raise AssertionError(f"{cls.__qualname__} does not take its parent's arguments; "
                                 f"add an example to EXAMPLES ({exc})") from None
        for protocol in range(2, pickle.HIGHEST_PROTOCOL + 1):
            back = pickle.loads(pickle.dumps(err, protocol))
            _same(back, err)
        # and it can be raised and caught as its own type after the journey
        with pytest.raises(cls):
            raise pickle.loads(pickle.dumps(err))


def test_the_journey_keeps_problems_and_solver_details():
    err = ScenarioError(EXAMPLES[ScenarioError][0][0][0]).within("", file="other.toml")
    back = pickle.loads(pickle.dumps(err))
    assert back.problems == err.problems and back.problems[1].path == "dose.2.at"
    assert str(back).splitlines()[0] == "other.toml: barrier 'skin' layer 1 thickness: got -15 um; must be > 0"
    solver = SolverError("failed", time=3.0, part="skin", result={"partial": True})
    back = pickle.loads(pickle.dumps(solver))
    assert (back.time, back.part, back.result) == (3.0, "skin", {"partial": True})
    units = UnitsError("5 kg", "a volume", "compartment 'c' volume")
    back = pickle.loads(pickle.dumps(units))
    assert back.problem == units.problem and (back.value, back.expected, back.field) == ("5 kg", "a volume",
                                                                                         "compartment 'c' volume")


class _LaterError(ScenarioError):
    """A type written later, with a constructor of its own (keyword-only arguments)."""

    def __init__(self, *, subject: int, problems: list[Problem]):
        self.subject = subject
        super().__init__(problems)


def test_a_new_type_with_its_own_constructor_travels_too():
    # the base class pickles attributes, not the constructor call
    err = _LaterError(subject=7, problems=[Problem("population subject 7", "x", "y")])
    back = pickle.loads(pickle.dumps(err))
    _same(back, err)
    assert back.subject == 7


def test_a_real_refusal_travels_through_a_worker_process():
    # the way a process pool sends an error back: pickled in the worker, raised again here
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(1) as pool:
        future = pool.submit(barrierflow.loads, '[scenario]\nduration = "-1 h"\n[[compartment]]\nid = "c"\n'
                                                'volume = "1 mL"\n', "bad.toml")
        with pytest.raises(ScenarioError) as info:
            future.result()
    assert str(info.value) == "bad.toml: scenario duration: got -1 h; must be a time > 0 such as '7 d'"
    assert info.value.problems[0].path == "scenario.duration"
