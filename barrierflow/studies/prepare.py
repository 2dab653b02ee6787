"""Compile every numerical kernel once, ahead of use, so that no run waits for the compiler.

barrierflow's kernels are compiled by numba the first time they run and kept in numba's cache
on disk; a later process loads them from there in a fraction of a second. Without a step that
compiles them ahead, the first user of a fresh installation waits for the compiler at the first
click: tens of seconds. :func:`prepare` is that step. ``barrierflow prepare`` runs it; ``make run``
and ``make test`` run it once after every change of the code, before serving the dashboard or
starting the test workers (two workers compiling the same kernels at once would each pay the
whole cost).

It runs small invented scenarios through every path a run can take: every integrator on
networks of each shape (a chain, several barriers around one compartment, transfers, a steady
barrier, saturable elimination, each kind of dose, the lab's protocol with evaporation and
samples), populations on the exact and the RODAS4 paths, a population study (its quantile
sketch), a local sensitivity analysis and a fit, and writes the traces CSV of a run. Each
kernel is compiled for the argument types those real calls give it, which are the types of
every other call. Then it lists any compiled function of the package that none of these calls
reached (:attr:`PrepareReport.cold`), so that a new kernel without a case here is noticed (a
test checks that the list is empty).

Where the cache lives is numba's choice: ``NUMBA_CACHE_DIR`` when set, else the ``__pycache__``
folder beside each source file when it can be written (a clone, an editable install), else a
folder of the user's cache (``~/.cache/numba`` on Linux, for a package installed where the user
cannot write). numba keys each entry by the source file's contents, the function's argument
types, the processor and numba's version, and compiles again whatever no longer matches.

The scenarios are invented for this purpose; their results are thrown away.
"""

from __future__ import annotations

import importlib
import pkgutil
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

__all__ = ["NOT_REACHED", "PrepareReport", "compiled_functions", "kernels_ready", "prepare"]

#: Small invented scenarios, one per shape of network and kind of dose (grids of a few cells:
#: the compiled code depends on the types of the arrays, not on their sizes).
SCENARIOS: dict[str, str] = {
    "chain": """
[scenario]
name = "prepare: a patch through three layers into a two-compartment body (invented)"
duration = "3 d"
output_step = "1 h"
[[compartment]]
id = "patch"
volume = "1 mL"
initial_concentration = "10 mg/mL"
[[compartment]]
id = "central"
volume = "5 L"
clearance = "10 L/h"
[[compartment]]
id = "peripheral"
volume = "20 L"
[[barrier]]
id = "skin"
from = "patch"
to = "central"
area = "10 cm^2"
  [[barrier.layer]]
  thickness = "15 um"
  diffusivity = "1e-9 cm^2/s"
  partition = 10
  cells = 4
  [[barrier.layer]]
  thickness = "100 um"
  diffusivity = "1e-6 cm^2/s"
  cells = 4
  [[barrier.layer]]
  thickness = "1000 um"
  diffusivity = "1e-6 cm^2/s"
  cells = 4
[[exchange]]
from = "central"
to = "peripheral"
flow = "5 L/h"
[[dose]]
target = "patch"
kind = "replace"
concentration = "10 mg/mL"
at = "24 h"
every = "24 h"
[[dose]]
target = "patch"
kind = "remove"
at = "60 h"
""",
    "saturable": """
[scenario]
name = "prepare: saturable elimination behind a membrane (invented)"
duration = "2 d"
output_step = "1 h"
[[compartment]]
id = "donor"
volume = "1 mL"
initial_concentration = "10 mg/mL"
[[compartment]]
id = "central"
volume = "5 L"
clearance = "10 L/h"
vmax = "0.1 mg/h"
km = "2e-5 mg/mL"
[[barrier]]
id = "membrane"
from = "donor"
to = "central"
area = "10 cm^2"
  [[barrier.layer]]
  thickness = "50 um"
  diffusivity = "1e-8 cm^2/s"
  partition = 2
  cells = 5
[[dose]]
target = "donor"
kind = "bolus"
amount = "5 mg"
at = "24 h"
""",
    "star": """
[scenario]
name = "prepare: three barriers around one compartment, a steady one, held and infused doses (invented)"
duration = "2 d"
output_step = "2 h"
[[compartment]]
id = "hub"
volume = "1 L"
clearance = "1 L/h"
[[compartment]]
id = "a"
volume = "2 mL"
initial_concentration = "1 mg/mL"
[[compartment]]
id = "b"
volume = "2 mL"
[[compartment]]
id = "c"
held_concentration = "0 mg/mL"
[[barrier]]
id = "ab"
from = "a"
to = "hub"
area = "2 cm^2"
  [[barrier.layer]]
  thickness = "20 um"
  diffusivity = "1e-8 cm^2/s"
  cells = 3
  degradation_rate = "0.01 1/h"
[[barrier]]
id = "bb"
from = "b"
to = "hub"
area = "2 cm^2"
  [[barrier.layer]]
  thickness = "30 um"
  diffusivity = "2e-8 cm^2/s"
  cells = 3
  [[barrier.layer]]
  thickness = "100 um"
  diffusivity = "1e-6 cm^2/s"
[[barrier]]
id = "cb"
from = "hub"
to = "c"
area = "1 cm^2"
model = "steady"
  [[barrier.layer]]
  thickness = "10 um"
  diffusivity = "1e-9 cm^2/s"
[[dose]]
target = "hub"
kind = "bolus"
amount = "10 mg"
at = "1 h"
every = "12 h"
[[dose]]
target = "b"
kind = "infusion"
rate = "1 mg/h"
duration = "3 h"
at = "2 h"
[[dose]]
target = "a"
kind = "hold"
concentration = "2 mg/mL"
duration = "4 h"
at = "6 h"
""",
    "depot": """
[scenario]
name = "prepare: an oral depot absorbed at first order, a loading infusion (invented)"
duration = "2 d"
output_step = "1 h"
[[compartment]]
id = "gut"
volume = "250 mL"
[[compartment]]
id = "central"
volume = "20 L"
clearance = "1.5 L/h"
[[compartment]]
id = "tissue"
volume = "60 L"
partition = 3
[[transfer]]
from = "gut"
to = "central"
rate = "0.8 1/h"
[[exchange]]
from = "central"
to = "tissue"
flow = "30 L/h"
[[dose]]
target = "central"
kind = "infusion"
rate = "50 mg/h"
duration = "1 h"
at = "0 h"
[[dose]]
target = "gut"
kind = "bolus"
amount = "100 mg"
at = "12 h"
every = "12 h"
""",
    "lab": """
[scenario]
name = "prepare: a volatile vehicle, a sampled receptor and a wash-off (invented)"
duration = "12 h"
output_step = "30 min"
[substance]
molar_mass = "300 g/mol"
solubility = "10 mg/mL"
[[compartment]]
id = "vehicle"
volume = "10 uL/cm^2"
initial_concentration = "5 mg/mL"
evaporation_rate = "4 uL/(cm^2*h)"
residual_volume = "1 uL/cm^2"
loss_rate = "0.05 1/h"
[[compartment]]
id = "receptor"
volume = "5 mL"
[[barrier]]
id = "skin"
from = "vehicle"
to = "receptor"
area = "1.77 cm^2"
  [[barrier.layer]]
  thickness = "15 um"
  diffusivity = "5e-11 cm^2/s"
  partition = 2
  cells = 4
[[dose]]
target = "receptor"
kind = "sample"
volume = "0.5 mL"
replace = true
at = "2 h"
every = "2 h"
[[dose]]
target = "vehicle"
kind = "remove"
fraction = 0.95
ends_contact = true
at = "8 h"
""",
}

#: Measured values for the fit (invented, of the order of the chain scenario's permeated amount).
FIT_DATA = """time [h],permeated:skin [ug/cm^2]
0,0
12,1.5
24,4.0
48,9.5
72,15
"""


@dataclass(frozen=True)
class PrepareReport:
    """What :func:`prepare` did.

    Attributes
    ----------
    seconds : float, s
        Wall time of the whole preparation.
    steps : tuple of (str, float)
        Each step and its wall time, s.
    kernels : int
        Compiled functions of the package (each with at least one compiled form).
    cold : tuple of str
        Compiled functions that no step reached (``module.function``): empty when every
        kernel is ready.
    cache : str
        Where numba keeps the compiled code of the engine's kernels.
    """

    seconds: float
    steps: tuple[tuple[str, float], ...]
    kernels: int
    cold: tuple[str, ...]
    cache: str


def prepare(say: Callable[[str], None] | None = None) -> PrepareReport:
    """Compile (or load from numba's cache) every kernel of barrierflow by running it once.

    When the source of any compiled function changed since the last preparation (or the cache
    holds code of unknown origin), numba's cached code of every barrierflow kernel is dropped
    first: numba checks each cached function against its own file only, so a kernel that calls
    (inlines) a changed kernel of another file would otherwise be loaded as it was compiled
    before the change.

    Parameters
    ----------
    say : callable, optional
        Called with a line of text before each step (``print`` for a terminal).

    Returns
    -------
    PrepareReport
    """
    say = say or (lambda _text: None)
    start = time.perf_counter()
    steps: list[tuple[str, float]] = []

    def step(text: str, work: Callable[[], None]) -> None:
        say(text)
        t0 = time.perf_counter()
        work()
        steps.append((text, time.perf_counter() - t0))

    found = _dispatchers()
    stamp = _stamp_file(found)
    current = sources_fingerprint()
    if stamp is not None and _read(stamp) != current:
        # a cache of another version of the source, or of unknown origin (no record): drop it
        if any(_in_cache(d) for d in found.values()):
            say("the kernels' source changed since the last preparation: their cached code is dropped")
        for dispatcher in found.values():
            _flush(dispatcher)
    step("single runs on every path (exact solutions, RODAS4, the scipy integrators)", _single_runs)
    step("populations on the exact and RODAS4 paths", _populations)
    step("a population study, a sensitivity analysis and a fit", _studies)
    kernels = compiled_functions()
    cold = tuple(sorted(name for name, ready in kernels.items() if not ready and name not in NOT_REACHED))
    if stamp is not None and not cold:
        _write(stamp, current)
    return PrepareReport(time.perf_counter() - start, tuple(steps), len(kernels), cold,
                         str(stamp.parent) if stamp is not None else "")


def _scenarios():
    from ..io import loads

    return {name: loads(text, f"prepare:{name}") for name, text in SCENARIOS.items()}


def _single_runs() -> None:
    from ..analysis import simulate
    from ..engine import INTEGRATORS, ExactIntegrator, integrator_from_name
    from ..errors import BarrierflowError

    # every named integrator, and each of the exact path's methods, on every network that takes it
    integrators = [integrator_from_name(name) for name in INTEGRATORS]
    integrators += [ExactIntegrator(method=method) for method in EXACT_METHODS]
    for scenario in _scenarios().values():
        for integrator in integrators:
            try:
                result = simulate(scenario, integrator=integrator)
            except BarrierflowError:
                continue  # a path that refuses this network (an exact path, a nonlinear one)
            result.csv_text()
            result.metrics()
            for bid in result.barrier_ids[:1]:
                result.profile(bid, 0.0)  # the full states, computed again on request
    # the scales from what a run reached where events removed amounts (ledger.observed_scale),
    # which only a run the guard computes again reaches
    from ..engine.ledger import observed_scale

    for scenario in _scenarios().values():
        tr = simulate(scenario).trajectory
        if tr.event_removed.size and tr.event_removed[-1].any():
            observed_scale(tr.model, tr.states, tr.initial_amount, tr.event_dosed, tr.event_removed)
            break


EXACT_METHODS = ("chain", "modes", "expm")
"""The methods of :class:`~barrierflow.engine.ExactIntegrator` (``"auto"`` picks among them)."""


def _populations() -> None:
    from ..engine import integrator_from_name, simulate_many, simulate_population
    from ..errors import BarrierflowError

    scenarios = _scenarios()
    varied = {"chain": {"barrier.skin.layer.1.diffusivity": 0.3, "compartment.central.clearance": 0.3},
              "saturable": {"barrier.membrane.layer.1.diffusivity": 0.3, "compartment.central.vmax": 0.3},
              "star": {"barrier.ab.layer.1.diffusivity": 0.3, "compartment.hub.clearance": 0.3}}
    for name, variations in varied.items():
        for integrator in (None, "exact", "rodas"):
            try:
                simulate_population(scenarios[name], variations, 3, seed=1,
                                    integrator=integrator and integrator_from_name(integrator))
            except BarrierflowError:
                continue
    simulate_many([scenarios["chain"], scenarios["chain"]])


def _studies() -> None:
    from ..io import loads_experiment
    from . import fit, local_sensitivity, run_population

    scenarios = _scenarios()
    chain = scenarios["chain"]
    for integrator in (None, "rodas"):
        run_population(chain, 8, seed=1, vary=["compartment.central.clearance=lognormal:cv=0.3"],
                       integrator=integrator)
    local_sensitivity(chain, ["compartment.central.clearance", "barrier.skin.layer.1.diffusivity"])
    local_sensitivity(scenarios["saturable"], ["compartment.central.vmax"])
    data = loads_experiment(FIT_DATA, name="prepare:fit")
    fit(chain, data, ["barrier.skin.layer.1.diffusivity"], profile=False, replicates=False)


# ---------------------------------------------------------------- what is compiled, and where
_PACKAGES = ("barrierflow.io", "barrierflow.engine", "barrierflow.analysis", "barrierflow.studies")

NOT_REACHED: dict[str, str] = {
    "barrierflow.engine.exact._tri_factor": "the modes path keeps no tridiagonal factors today (_Modes.tri is "
                                            "always None)",
    "barrierflow.engine.exact._tri_solve": "as _tri_factor",
}
"""Compiled functions that no path of the engine calls today, and why (a test holds this list to
what :func:`prepare` leaves cold: a function that comes into use needs a case in :func:`prepare`)."""

STAMP_NAME = "barrierflow-kernels.sha256"
"""The file, beside the cached code of the engine's rate kernel, that records the
:func:`sources_fingerprint` of the last complete preparation."""


def compiled_functions() -> dict[str, bool]:
    """Every numba-compiled function of the package, by ``module.function``: True when ready.

    Ready: compiled in this process, or compiled before and kept in numba's cache for the
    current source. (A function that numba inlines into its callers, ``inline="always"``, is
    never compiled alone and is not listed; a function compiled only inside a caller that this
    process loaded from the cache shows as ready through the cache.) Imports every module of the
    packages that hold compiled code.
    """
    return {name: bool(d.signatures) or _in_cache(d) for name, d in _dispatchers().items()}


def kernels_ready() -> bool:
    """True when every kernel that :func:`prepare` reaches is compiled or in the cache, and the
    cache was prepared from the current source (see :func:`prepare`).

    About a second (it imports the modules that hold compiled code); :func:`prepare` itself, on
    a full cache, takes one or two.
    """
    found = _dispatchers()
    stamp = _stamp_file(found)
    if stamp is None or _read(stamp) != sources_fingerprint():
        return False
    return all(bool(d.signatures) or _in_cache(d) for name, d in found.items() if name not in NOT_REACHED)


def sources_fingerprint() -> str:
    """SHA-256 over the source files of the package that define compiled functions (their paths
    and contents) and numba's version."""
    import hashlib

    import numba

    root = Path(__file__).resolve().parents[1]
    digest = hashlib.sha256(numba.__version__.encode())
    for path in sorted(root.rglob("*.py")):
        data = path.read_bytes()
        if b"njit" in data:
            digest.update(path.relative_to(root).as_posix().encode() + b"\0" + data)
    return digest.hexdigest()


def _dispatchers() -> dict[str, object]:
    """The numba dispatchers of the package by ``module.function``, but those inlined into their
    callers (never compiled alone)."""
    from numba.core.registry import CPUDispatcher

    found: dict[str, object] = {}
    for package_name in _PACKAGES:
        package = importlib.import_module(package_name)
        names = [package_name] + [f"{package_name}.{m.name}" for m in pkgutil.iter_modules(package.__path__)]
        for module_name in names:
            module = importlib.import_module(module_name)
            for attr, value in vars(module).items():
                if (isinstance(value, CPUDispatcher) and value.py_func.__module__ == module_name
                        and value.targetoptions.get("inline") != "always"):
                    found[f"{module_name}.{attr}"] = value
    return found


def _in_cache(dispatcher) -> bool:
    """True when numba's cache holds a compiled form of ``dispatcher`` for its current source."""
    try:
        return bool(dispatcher._cache._cache_file._load_index())
    except Exception:  # noqa: BLE001 - no cache (caching off), or numba's private layout changed
        return False


def _flush(dispatcher) -> None:
    """Drop every cached compiled form of ``dispatcher`` (numba's FunctionCache.flush)."""
    try:
        dispatcher._cache.flush()
    except Exception:  # noqa: BLE001 - no cache (caching off)
        pass


def _stamp_file(found: dict[str, object]) -> Path | None:
    """Where the fingerprint of the prepared sources is kept: beside the cached code of the engine's
    rate kernel (None when numba keeps no cache)."""
    dispatcher = found.get("barrierflow.engine.kernels.rates_kernel") or next(iter(found.values()), None)
    folder = getattr(getattr(dispatcher, "_cache", None), "_cache_path", None)
    return Path(folder) / STAMP_NAME if folder else None


def _read(path: Path) -> str:
    try:
        return path.read_text(encoding="ascii").strip()
    except (OSError, ValueError):
        return ""


def _write(path: Path, text: str) -> None:
    from ..io import atomic_write

    try:
        atomic_write(path, text + "\n")
    except OSError:
        pass  # a cache folder that cannot be written: the next preparation checks again
