"""The command line: ``barrierflow check | run | steady | fit | design | screen | population | sweep |
sensitivity | serve | prepare``.

One entry point, :func:`main`, installed as the ``barrierflow`` console script. Every
sub-command is registered in one table, :data:`COMMANDS`: its name, its one-line help, the
function that adds its options and the function that carries it out.

Exit status (the command-line contract):

== =========================================================================================
0  done
2  the input was refused (bad scenario, bad option, unreadable file); the message names the
   file, the field and the value, and no traceback is printed
3  the numerical solution failed; the message says where and what to change
1  an internal error; the traceback is printed only with ``--debug``
== =========================================================================================

Results are research estimates, not for clinical dosing or regulatory decisions without
qualified review.
"""

from __future__ import annotations

import argparse
import os
import sys
import traceback
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import barrierflow
from barrierflow import ScenarioError, SolverError, UnitsError
from barrierflow.caution import CAUTION

__all__ = ["COMMANDS", "build_parser", "main"]

PROG = "barrierflow"

INTEGRATOR_NAMES = ("auto", "exact", "split", "rodas", "bdf", "radau", "lsoda")
"""The names of ``barrierflow.engine.INTEGRATORS`` (listed here so that --help needs no numba;
a test holds the two equal)."""

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_REFUSED = 2
EXIT_SOLVER = 3



# ---------------------------------------------------------------------------- option types
def _port(text: str) -> int:
    """A TCP port number, 1 to 65535 (an argparse type)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"got {text!r}; expected a whole number from 1 to 65535") from None
    if not 1 <= value <= 65535:
        raise argparse.ArgumentTypeError(f"got {value}; expected a whole number from 1 to 65535")
    return value


def _positive_number(text: str) -> float:
    """A finite number > 0 (an argparse type)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"got {text!r}; expected a number > 0") from None
    if not (value > 0 and value < float("inf")):
        raise argparse.ArgumentTypeError(f"got {text}; expected a number > 0")
    return value


def _positive_int(text: str) -> int:
    """A whole number >= 1 (an argparse type)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"got {text!r}; expected a whole number >= 1") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"got {value}; expected a whole number >= 1")
    return value


# ---------------------------------------------------------------------------- check
def _add_check(p: argparse.ArgumentParser) -> None:
    p.add_argument("scenarios", nargs="+", metavar="SCENARIO.toml",
                   help="one or more scenario files to validate")


def _cmd_check(args: argparse.Namespace) -> int:
    """Validate each scenario file; print "ok" and a one-line summary, or every problem.

    Returns
    -------
    int
        0 when every file is valid, 2 when any was refused (the others are still checked).
    """
    status = EXIT_OK
    for path in args.scenarios:
        try:
            scenario = barrierflow.load(path)
        except (ScenarioError, UnitsError) as err:
            _report_refusal(err)
            status = EXIT_REFUSED
            continue
        print(f"ok: {path}: {scenario.summary()}")
    return status


# ---------------------------------------------------------------------------- run
def _add_run(p: argparse.ArgumentParser) -> None:
    p.add_argument("scenario", metavar="SCENARIO.toml", help="the scenario file to simulate")
    p.add_argument("-o", "--output", metavar="OUT.csv", default=None,
                   help="traces CSV to write, with its JSON sidecar OUT.json beside it "
                        "(default: the scenario's file name with .csv, in the current folder)")
    p.add_argument("--integrator", metavar="NAME", default=None,
                   help=f"time integrator, one of {', '.join(INTEGRATOR_NAMES)} (default: auto, the exact "
                        "solution for a linear network, the split path for a chain network with saturable "
                        "elimination in one compartment, and the compiled RODAS4 integrator otherwise)")
    p.add_argument("--cells", metavar="N", type=_positive_int, default=None,
                   help="grid cells per layer for layers that do not set 'cells' "
                        "(a whole number; default: the engine's grid, refined toward interfaces)")
    p.add_argument("--no-progress", action="store_true",
                   help="do not show the progress bar (default: shown on a terminal)")
    p.add_argument("--metrics", metavar="OUT.csv", default=None,
                   help="also write the metrics table (columns kind, id, metric, value, unit, note; values in the "
                        "scenario's [output] units, a number or blank, the reason for a blank or a flag in "
                        "note) to this CSV (default: not written)")
    p.add_argument("--threshold", metavar="CONC", default=None,
                   help="concentration with its unit, such as '0.5 mg/L', for the time above threshold of "
                        "every compartment (default: not computed)")
    p.add_argument("--samples", metavar="OUT.csv", default=None,
                   help="also write every sample the regimen took (time, compartment, aliquot in mL, its "
                        "concentration, and for a receptor the corrected cumulative amount per area beside the "
                        "amount permeated; the scenario's [output] units) to this CSV (default: not written)")


def _cmd_run(args: argparse.Namespace) -> int:
    """Simulate the scenario, write the traces CSV and sidecar, print the summary table."""

    from barrierflow.analysis import simulate
    from barrierflow.engine import Grid, integrator_from_name

    scenario = barrierflow.load(args.scenario)
    out = Path(args.output) if args.output else Path(Path(args.scenario).stem + ".csv")
    _check_output_path(out, "-o/--output", sidecar=True)
    if args.metrics:
        _check_output_path(Path(args.metrics), "--metrics")
    if args.samples:
        _check_output_path(Path(args.samples), "--samples")
    threshold = None
    if args.threshold is not None:
        from barrierflow.units import parse_quantity

        threshold = parse_quantity(args.threshold, "concentration", "--threshold", scenario.substance.molar_mass)
    integrator = integrator_from_name(args.integrator) if args.integrator else None
    grid = Grid(cells_per_layer=args.cells) if args.cells else None
    show_bar = not args.no_progress and sys.stderr.isatty()
    if show_bar:
        from tqdm import tqdm

        with tqdm(total=1000, desc="simulating", unit="‰", file=sys.stderr, leave=False) as bar:
            def progress(fraction: float) -> None:
                bar.update(int(fraction * 1000) - bar.n)

            result = simulate(scenario, integrator=integrator, grid=grid, progress=progress)
    else:
        result = simulate(scenario, integrator=integrator, grid=grid)
    # everything shown or written is made before the first file is written, so that a failure
    # leaves no output at all; the traces and their sidecar are then written as a pair
    summary = run_summary(result, threshold)
    metrics_csv = result.metrics(threshold=threshold).to_csv() if args.metrics else None
    samples_text = None
    if args.samples:
        from barrierflow.analysis.sampling import samples_csv

        samples_text = samples_csv(result)
    result.to_csv(out)
    print(summary)
    print(f"wrote {out} and {out.with_suffix('.json')}")
    from barrierflow.io import atomic_write

    if metrics_csv is not None:
        atomic_write(args.metrics, metrics_csv)
        print(f"wrote {args.metrics}")
    if samples_text is not None:
        atomic_write(args.samples, samples_text)
        print(f"wrote {args.samples}")
    print(CAUTION)
    return EXIT_OK


def _check_output_path(path, option: str, sidecar: bool = False) -> None:
    """Refuse an output file that cannot be written, before any computation.

    Raises
    ------
    ScenarioError
        When the folder does not exist or is not writable, or (for the traces) when the name
        ends in .json, which the sidecar would overwrite.
    """
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise ScenarioError.single(option, str(path), f"the folder {folder} does not exist")
    if not os.access(folder, os.W_OK):
        raise ScenarioError.single(option, str(path), f"the folder {folder} cannot be written")
    if sidecar and path.suffix.lower() == ".json":
        raise ScenarioError.single(option, str(path), "the traces need a name that does not end in .json, "
                                   "which the JSON sidecar beside them takes (such as out.csv)")


def run_summary(result, threshold: float | None = None) -> str:
    """The summary that ``barrierflow run`` prints, in the scenario's output units.

    The metrics table (per compartment Cmax, tmax, AUC and the rest; per barrier peak flux,
    total permeated, lag time, ...), the mass-balance error, the run statistics and every warning.

    Parameters
    ----------
    result : Result
    threshold : float or None, mg/mL
        Concentration for the time-above-threshold column.
    """
    mb = result.mass_balance
    st = result.stats
    lines = [f"scenario: {result.scenario.name}", "", result.metrics(threshold=threshold).to_text(), "",
             f"mass balance: relative error {mb.relative_error:.2e} (absolute {mb.absolute_error:.3g} mg)"
             + (f"; sampled {mb.sampled:.4g} mg" if mb.sampled else "") + (f"; lost to the air {mb.lost:.4g} mg"
                                                                            if mb.lost else ""),
             f"solver: {result.integrator}, {st.get('steps', 0)} steps, {st['wall_time_s']:.3g} s"]
    lines += [f"warning: {w}" for w in result.warnings()]
    return "\n".join(lines)


# ---------------------------------------------------------------------------- steady
def _add_steady(p: argparse.ArgumentParser) -> None:
    p.add_argument("scenario", metavar="SCENARIO.toml", help="the scenario file")
    p.add_argument("--json", action="store_true",
                   help="print the result as JSON (permeability in cm/h, steady flux in mg/(cm^2 h), "
                        "lag time in h, resistance per layer in h/cm) instead of a table "
                        "(default: a table)")
    p.add_argument("--profile", metavar="OUT.csv", default=None,
                   help="also write the steady concentration profile through the layers of every "
                        "barrier to this CSV (columns barrier, layer, x [um], conc [mg/mL]; each interface "
                        "appears twice, once on each side, so the partition jump shows; default: not written)")


def _cmd_steady(args: argparse.Namespace) -> int:
    """Steady state of every barrier between a held source and a perfect sink.

    Prints a table (or, with ``--json``, the object of the command-line contract: ``barriers``
    mapping each id to its permeability, steady flux, lag time, resistance per layer and more)
    and writes the profile CSV with ``--profile``.
    """
    import json

    from barrierflow.analysis.steady import steady_state
    from barrierflow.io import atomic_write

    scenario = barrierflow.load(args.scenario)
    report = steady_state(scenario)
    if args.profile:
        atomic_write(args.profile, report.profile_csv())
    if args.json:
        print(json.dumps(report.as_dict(), indent=2, allow_nan=False))
        return EXIT_OK
    print(report.to_text())
    if args.profile:
        print(f"\nwrote {args.profile}")
    print(CAUTION)
    return EXIT_OK


# ---------------------------------------------------------------------------- stage progress
class _StageBars:
    """A tqdm bar per stage of a study (``progress(stage, fraction)``), on stderr, when it is a terminal."""

    WORDS = {"fit": "fitting", "profile": "profile intervals", "replicates": "replicates one by one",
             "posterior": "posterior (MCMC)", "sensitivities": "sensitivities", "design": "choosing times"}

    def __init__(self, show: bool) -> None:
        self.show = show
        self.stage: str | None = None
        self.bar = None

    def __call__(self, stage: str, fraction: float) -> None:
        if not self.show:
            return
        from tqdm import tqdm

        if stage != self.stage:
            self.close()
            self.stage = stage
            self.bar = tqdm(total=1000, desc=self.WORDS.get(stage, stage), unit="‰", file=sys.stderr, leave=False)
        self.bar.update(max(0, int(fraction * 1000) - self.bar.n))

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None


# ---------------------------------------------------------------------------- fit
WEIGHT_NAMES = ("none", "1/y", "1/y^2", "replicate")
"""The weighting schemes of ``barrierflow fit`` (``barrierflow.studies.fit.WEIGHTS``; a test holds the two equal)."""


def _add_fit(p: argparse.ArgumentParser) -> None:
    p.add_argument("scenario", metavar="SCENARIO.toml", help="the scenario whose parameters are estimated")
    p.add_argument("data", metavar="DATA.csv",
                   help="the experiment data file: a 'time [unit]' column, then replicate columns named like the "
                        "traces, such as 'permeated:skin#1 [ug/cm^2]' or 'conc:receptor#2 [ug/mL]'")
    p.add_argument("--free", metavar="PATH[=LO:HI]", action="append", required=True,
                   help="a parameter to estimate, by its path (barrier.<id>.layer.<n>.<field>, compartment.<id>."
                        "<field>, ...), with optional bounds in the scenario file's unit or with their own unit "
                        "('barrier.skin.layer.1.partition=1:100'); paths joined by commas are one tied parameter; "
                        "repeat the option for each parameter (required; no default)")
    p.add_argument("-o", "--output", metavar="FITTED.toml", default=None,
                   help="the fitted scenario, ready to simulate other regimens (default: the scenario's file name "
                        "with '-fitted.toml', in the current folder)")
    p.add_argument("--json", metavar="REPORT.json", default=None,
                   help="also write the report as JSON (values in the units the scenario file used; default: not "
                        "written)")
    p.add_argument("--residuals", metavar="OBS.csv", default=None,
                   help="also write the observed-vs-predicted table, one row per measured value, in the data file's "
                        "units (default: not written)")
    p.add_argument("--weights", default="none", choices=WEIGHT_NAMES, metavar="SCHEME",
                   help="weighting of the residuals: none, 1/y, 1/y^2 (a constant relative error) or replicate (the "
                        "variance of the replicates at each time) (default: none)")
    p.add_argument("--start", default="time-lag", choices=("time-lag", "scenario"),
                   help="starting values: from the time-lag method on the data (default) or the scenario's values")
    p.add_argument("--no-profile", action="store_true",
                   help="skip the profile-likelihood intervals (default: computed)")
    p.add_argument("--no-replicates", action="store_true",
                   help="skip the fits of each replicate alone (default: done with two replicates or more)")
    p.add_argument("--mcmc", metavar="STEPS", type=_positive_int, default=None,
                   help="also sample the posterior by ensemble MCMC (emcee) for this many steps, with a posterior-"
                        "predictive band (default: not sampled; 2000 steps is a reasonable start)")
    p.add_argument("--walkers", metavar="N", type=_positive_int, default=None,
                   help="MCMC walkers (default: 4 per parameter, at least 8)")
    p.add_argument("--seed", metavar="S", type=int, default=0, help="seed of the MCMC draws (default: 0)")
    p.add_argument("--time-unit", metavar="UNIT", default=None,
                   help="unit of the data's time column when its header gives none, such as 'h' or 'min' (default: "
                        "none; a unit in the header always wins)")
    p.add_argument("--unit", metavar="UNIT", default=None,
                   help="unit of the data's value columns whose headers give none, such as 'ug/cm^2' (default: "
                        "none; a unit in the header always wins)")
    p.add_argument("--no-progress", action="store_true",
                   help="do not show the progress bars (default: shown on a terminal)")


def _cmd_fit(args: argparse.Namespace) -> int:
    """Estimate the freed parameters; print the report; write the fitted scenario (and the JSON and CSV asked)."""
    from barrierflow.io import load_experiment
    from barrierflow.studies.fit import fit

    scenario = barrierflow.load(args.scenario)
    out = Path(args.output) if args.output else Path(Path(args.scenario).stem + "-fitted.toml")
    _check_output_path(out, "-o/--output")
    for option, value in (("--json", args.json), ("--residuals", args.residuals)):
        if value:
            _check_output_path(Path(value), option)
    data = load_experiment(args.data, time_unit=args.time_unit, unit=args.unit,
                           molar_mass=scenario.substance.molar_mass)
    bars = _StageBars(not args.no_progress and sys.stderr.isatty())
    try:
        result = fit(scenario, data, args.free, weights=args.weights, start=args.start,
                     profile=not args.no_profile, replicates=not args.no_replicates, mcmc=args.mcmc or 0,
                     walkers=args.walkers, seed=args.seed, progress=bars)
    finally:
        bars.close()
    text = result.to_text()
    written = result.write(scenario=out, report=args.json, residuals=args.residuals)
    print(text)
    print("wrote " + ", ".join(str(p) for p in written))
    return EXIT_OK


# ---------------------------------------------------------------------------- design
def _fraction(text: str) -> float:
    """A relative error: '5%' or '0.05' (an argparse type)."""
    t = text.strip()
    try:
        value = float(t[:-1]) / 100.0 if t.endswith("%") else float(t)
    except ValueError:
        raise argparse.ArgumentTypeError(f"got {text!r}; expected a relative error such as 5% or 0.05") from None
    if not 0 < value < 10:
        raise argparse.ArgumentTypeError(f"got {text!r}; expected a relative error above 0, such as 5% or 0.05")
    return value


def _add_design(p: argparse.ArgumentParser) -> None:
    p.add_argument("scenario", metavar="SCENARIO.toml",
                   help="the scenario whose values are taken as the truth (a fitted scenario, or the best guess)")
    p.add_argument("--free", metavar="PATH", action="append", required=True,
                   help="a parameter the experiment is to estimate, by its path; paths joined by commas are one tied "
                        "parameter; repeat the option for each parameter (required; no default)")
    p.add_argument("--samples", metavar="N", type=_positive_int, default=8,
                   help="number of sampling times to propose (default: 8)")
    p.add_argument("--window", metavar="START:END", default=None,
                   help="where the times may lie, such as '0:24h' (default: 0 to the scenario's duration)")
    p.add_argument("--observe", metavar="QUANTITY:ID", default=None,
                   help="what is measured, named like a trace: 'permeated:<barrier>' or 'conc:<compartment>' "
                        "(default: the permeated amount of the scenario's one barrier)")
    p.add_argument("--schedule", metavar="TIMES", default=None,
                   help="your own sampling times, compared side by side, such as '0.5,1,2,4,8,24 h' (default: none)")
    p.add_argument("--noise", metavar="CV", type=_fraction, default=0.05,
                   help="relative error of one measurement, such as 5%% or 0.05 (default: 5%%)")
    p.add_argument("--noise-floor", metavar="VALUE", default=None,
                   help="absolute error floor with its unit, such as '0.05 ug/cm^2' (default: 1 %% of the largest "
                        "predicted value in the window, as the fit's 1/y^2 weights assume)")
    p.add_argument("--replicates", metavar="N", type=_positive_int, default=1,
                   help="cells sampled at every time (default: 1)")
    p.add_argument("--min-gap", metavar="TIME", default=None,
                   help="least time between two proposed samples, such as '30 min' (default: 0, the pure D-optimal "
                        "choice, which may gather samples in clusters)")
    p.add_argument("--json", metavar="REPORT.json", default=None,
                   help="also write the design as JSON (times in the scenario's output time unit; default: not "
                        "written)")
    p.add_argument("--no-progress", action="store_true",
                   help="do not show the progress bars (default: shown on a terminal)")


def _cmd_design(args: argparse.Namespace) -> int:
    """Propose D-optimal sampling times; print the expected CVs for them and for the user's schedule."""
    from barrierflow.model.experiment import OBSERVABLES
    from barrierflow.studies.design import design, read_times, read_window
    from barrierflow.units import parse_quantity

    scenario = barrierflow.load(args.scenario)
    if args.json:
        _check_output_path(Path(args.json), "--json")
    window = read_window(args.window) if args.window else None
    schedule = read_times(args.schedule) if args.schedule else None
    floor = None
    if args.noise_floor is not None:
        observable = args.observe or (f"permeated:{scenario.barriers[0].id}" if len(scenario.barriers) == 1 else "")
        quantity = observable.split(":")[0]
        if quantity not in OBSERVABLES:
            raise ScenarioError.single("--noise-floor", repr(args.noise_floor), "name what is measured with --observe "
                                       "first")
        floor = parse_quantity(args.noise_floor, OBSERVABLES[quantity].kind, "--noise-floor",
                               scenario.substance.molar_mass)
    gap = parse_quantity(args.min_gap, "time", "--min-gap") if args.min_gap else 0.0
    bars = _StageBars(not args.no_progress and sys.stderr.isatty())
    try:
        result = design(scenario, args.free, observable=args.observe, samples=args.samples, window=window,
                        schedule=schedule, noise=args.noise, floor=floor, replicates=args.replicates, min_gap=gap,
                        progress=bars)
    finally:
        bars.close()
    print(result.to_text())
    if args.json:
        from barrierflow.io import atomic_write

        atomic_write(args.json, result.to_json())
        print(f"wrote {args.json}")
    return EXIT_OK


# ---------------------------------------------------------------------------- screen
def _add_screen(p: argparse.ArgumentParser) -> None:
    p.add_argument("scenario", metavar="SCENARIO.toml",
                   help="the scenario; its [substance] needs log_kow and molar_mass")
    p.add_argument("--layer", metavar="PATH", default=None,
                   help="the stratum-corneum-like layer, such as 'barrier.skin.layer.1' (default: the first layer of "
                        "the scenario's one barrier)")
    p.add_argument("-o", "--output", metavar="SCREENED.toml", default=None,
                   help="write the scenario with the layer's diffusivity and partition set to the screening "
                        "estimate, flagged in its description (default: not written)")
    p.add_argument("--json", action="store_true",
                   help="print the estimate as JSON instead of a table (default: a table)")


def _cmd_screen(args: argparse.Namespace) -> int:
    """The Potts and Guy screening estimate of a layer's D and K from log Kow and molar mass, flagged as such."""
    import json

    from barrierflow.analysis.screening import screen_layer

    scenario = barrierflow.load(args.scenario)
    if args.output:
        _check_output_path(Path(args.output), "-o/--output")
    est, screened = screen_layer(scenario, args.layer)
    if args.output:
        barrierflow.save(screened, args.output)
    if args.json:
        print(json.dumps(est.as_dict(), indent=2, allow_nan=False))
    else:
        print(est.to_text())
        if args.output:
            print(f"wrote {args.output}")
    return EXIT_OK


# ---------------------------------------------------------------------------- studies
def _add_variability(p: argparse.ArgumentParser) -> None:
    """The options that give parameters a distribution (population and sensitivity)."""
    p.add_argument("--vary", metavar="PATH=SPEC", action="append", default=[],
                   help="give a parameter a distribution, as a [[vary]] table does, such as "
                        "barrier.skin.layer.1.diffusivity=lognormal:cv=0.3 (lognormal with cv or gsd, normal with sd "
                        "or cv, uniform with low and high; truncate=LO..HI; paths joined by commas vary together); "
                        "repeatable; replaces the file's [[vary]] table on the same path (default: the file's "
                        "[[vary]] tables only)")
    p.add_argument("--correlate", metavar=("PATH", "PATH", "RANK"), nargs=3, action="append", default=[],
                   help="rank (Spearman) correlation between two varied parameters, through a Gaussian copula, such "
                        "as --correlate compartment.central.clearance compartment.central.volume 0.5; repeatable "
                        "(default: the file's [[correlation]] tables only)")


def _add_where(p: argparse.ArgumentParser) -> None:
    p.add_argument("--scheduler", metavar="ADDRESS", default=None,
                   help="run on a dask.distributed cluster whose scheduler listens at ADDRESS, such as "
                        "tcp://10.0.0.5:8786 (identical results; default: here, on every core)")
    p.add_argument("--no-progress", action="store_true",
                   help="do not show the progress bar (default: shown on a terminal)")


def _progress_bar(args: argparse.Namespace, total: int, what: str):
    """A tqdm progress bar on stderr (None when not on a terminal or with --no-progress) and its update."""
    if args.no_progress or not sys.stderr.isatty():
        return None, None
    from tqdm import tqdm

    bar = tqdm(total=total, desc=what, unit=" runs", file=sys.stderr, leave=False)

    def update(done: int, of: int) -> None:
        if bar.total != of:
            bar.total = of
        bar.update(done - bar.n)

    return bar, update


def _nonnegative_int(text: str) -> int:
    """A whole number >= 0 (an argparse type)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"got {text!r}; expected a whole number >= 0") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"got {value}; expected a whole number >= 0")
    return value


def _add_population(p: argparse.ArgumentParser) -> None:
    p.add_argument("scenario", metavar="SCENARIO.toml", help="the scenario file, with its [[vary]] tables")
    p.add_argument("-n", metavar="N", type=_positive_int, required=True,
                   help="number of subjects (required; no default)")
    p.add_argument("--seed", metavar="S", type=_nonnegative_int, default=0,
                   help="seed of the draws; subject k is the same subject for a given seed whatever the number of "
                        "subjects, chunks or machines (default: 0)")
    _add_variability(p)
    p.add_argument("-o", "--output", metavar="BANDS.csv", default=None,
                   help="percentile bands of every trace at every output time (default: the scenario's file name "
                        "with -bands.csv, in the current folder)")
    p.add_argument("--subjects", metavar="SUBJECTS.csv", default=None,
                   help="every subject's parameter values (in the file's units), metrics, notes (why a metric "
                        "is blank) and status (default: the scenario's file name with -subjects.csv, in the "
                        "current folder)")
    p.add_argument("--percentiles", metavar="Q", type=float, nargs="+", default=[5.0, 50.0, 95.0],
                   help="percentiles of the bands and the metrics, from 0 to 100 (default: 5 50 95)")
    p.add_argument("--integrator", metavar="NAME", default=None,
                   help="auto, exact or rodas (default: auto, the exact solution for a linear chain network and "
                        "the compiled RODAS4 integrator otherwise)")
    p.add_argument("--chunk", metavar="N", type=_positive_int, default=None,
                   help="subjects per chunk (default: chosen from the size of the traces; the results do not "
                        "depend on it)")
    _add_where(p)


def _cmd_population(args: argparse.Namespace) -> int:
    """Simulate N subjects; write the bands and the subjects CSV; print the summary."""
    from barrierflow.studies import run_population

    scenario = barrierflow.load(args.scenario)
    stem = Path(args.scenario).stem
    bands_path = Path(args.output) if args.output else Path(f"{stem}-bands.csv")
    subjects_path = Path(args.subjects) if args.subjects else Path(f"{stem}-subjects.csv")
    _check_output_path(bands_path, "-o/--output")
    _check_output_path(subjects_path, "--subjects")
    if bands_path.resolve() == subjects_path.resolve():
        raise ScenarioError.single("--subjects", str(subjects_path), "must differ from the bands file (-o)")
    bar, update = _progress_bar(args, args.n, "population")
    try:
        result = run_population(scenario, args.n, args.seed, vary=args.vary, correlate=args.correlate,
                                percentiles=args.percentiles, subjects_csv=subjects_path, scheduler=args.scheduler,
                                chunk=args.chunk, integrator=args.integrator, progress=update)
    finally:
        if bar is not None:
            bar.close()
    result.to_csv(bands_path)
    print(result.summary())
    print(f"wrote {bands_path} and {subjects_path}")
    print(CAUTION)
    return EXIT_OK


def _add_sweep(p: argparse.ArgumentParser) -> None:
    p.add_argument("scenario", metavar="SCENARIO.toml", help="the scenario file")
    p.add_argument("--over", metavar="PATH=LO..HI", action="append", required=True,
                   help="a parameter and its range, with units, such as 'compartment.central.clearance=5 L/h..40 L/h'; "
                        "once or twice (a grid over two parameters); required, no default")
    p.add_argument("--steps", metavar="N", type=_positive_int, nargs="+", default=[11],
                   help="points per parameter, both ends included: one number for every parameter or one each "
                        "(default: 11)")
    p.add_argument("--spacing", metavar="linear|log", nargs="+", default=["linear"],
                   help="equal steps (linear) or equal ratios (log), one for every parameter or one each "
                        "(default: linear)")
    p.add_argument("-o", "--output", metavar="SWEEP.csv", default=None,
                   help="every metric at every point (default: the scenario's file name with -sweep.csv, in the "
                        "current folder)")
    p.add_argument("--metric", metavar="NAME", action="append", default=None,
                   help="a metric to print, such as auc:central (repeatable; default: Cmax and AUC of each "
                        "compartment, permeated amount and lag time of each barrier; the CSV has them all)")
    _add_where(p)


def _cmd_sweep(args: argparse.Namespace) -> int:
    """Simulate every point of the grid; write the CSV; print a table."""
    from barrierflow.studies import run_sweep

    scenario = barrierflow.load(args.scenario)
    out = Path(args.output) if args.output else Path(f"{Path(args.scenario).stem}-sweep.csv")
    _check_output_path(out, "-o/--output")
    total = 1
    for k in range(len(args.over)):
        total *= args.steps[k] if len(args.steps) > k else args.steps[0]
    bar, update = _progress_bar(args, total, "sweep")
    try:
        result = run_sweep(scenario, args.over, steps=args.steps, spacing=args.spacing, scheduler=args.scheduler,
                           progress=update)
    finally:
        if bar is not None:
            bar.close()
    text = result.summary(args.metric)
    result.to_csv(out)
    print(text)
    print(f"wrote {out}")
    print(CAUTION)
    return EXIT_OK


SENSITIVITY_METHODS = ("local", "sobol", "morris")
"""The methods of ``barrierflow sensitivity`` (``barrierflow.studies.sensitivity.METHODS``; a test holds them equal)."""


def _add_sensitivity(p: argparse.ArgumentParser) -> None:
    p.add_argument("scenario", metavar="SCENARIO.toml", help="the scenario file (with [[vary]] tables for the "
                                                             "global methods)")
    p.add_argument("--method", choices=SENSITIVITY_METHODS, default="local",
                   help="local: d ln(metric) / d ln(parameter) at the scenario's values; sobol: first-order and "
                        "total Sobol indices over the [[vary]] distributions, with bootstrap intervals; morris: "
                        "Morris screening over them (default: local)")
    p.add_argument("-n", metavar="N", type=_positive_int, default=None,
                   help="sobol: base samples, a power of 2 (n (d + 2) runs; default 1024); morris: trajectories "
                        "(r (d + 1) runs; default 20); not used by local")
    p.add_argument("--seed", metavar="S", type=_nonnegative_int, default=0,
                   help="seed of the sampling and the bootstrap (default: 0)")
    _add_variability(p)
    p.add_argument("--param", metavar="PATH", action="append", default=None,
                   help="local: a parameter to differentiate by, repeatable (default: every quantity of the network "
                        "and the doses that is > 0 and does not shape the run)")
    p.add_argument("--metric", metavar="NAME", action="append", default=None,
                   help="a metric, such as auc:central or lag_time:skin, repeatable (default: Cmax and AUC of each "
                        "compartment, permeated amount, peak flux and lag time of each barrier)")
    p.add_argument("--levels", metavar="P", type=_positive_int, default=4,
                   help="morris: levels of the grid, even (default: 4)")
    p.add_argument("-o", "--output", metavar="OUT.csv", default=None,
                   help="the indices, one row per parameter and metric (default: the scenario's file name with "
                        "-sensitivity.csv, in the current folder)")
    _add_where(p)


def _cmd_sensitivity(args: argparse.Namespace) -> int:
    """Local or global sensitivity; write the CSV; print the table."""
    from barrierflow.studies import local_sensitivity, morris_screening, sobol_indices, with_variability

    scenario = barrierflow.load(args.scenario)
    out = Path(args.output) if args.output else Path(f"{Path(args.scenario).stem}-sensitivity.csv")
    _check_output_path(out, "-o/--output")
    if args.method == "local":
        for option, value in (("-n", args.n), ("--vary", args.vary), ("--correlate", args.correlate)):
            if value:
                raise ScenarioError.single(option, str(value), "the local method differentiates at the scenario's "
                                           "values; choose its parameters with --param")
    elif args.param:
        raise ScenarioError.single("--param", " ".join(args.param), f"the {args.method} method varies the parameters "
                                   "of the [[vary]] tables and --vary options")
    bar, update = _progress_bar(args, 1, "sensitivity")
    try:
        if args.method == "local":
            result = local_sensitivity(scenario, args.param, args.metric, scheduler=args.scheduler, progress=update)
        elif args.method == "sobol":
            result = sobol_indices(with_variability(scenario, args.vary, args.correlate), args.n or 1024, args.metric,
                                   seed=args.seed, scheduler=args.scheduler, progress=update)
        else:
            result = morris_screening(with_variability(scenario, args.vary, args.correlate), args.n or 20,
                                      args.metric, levels=args.levels, seed=args.seed, scheduler=args.scheduler,
                                      progress=update)
    finally:
        if bar is not None:
            bar.close()
    result.to_csv(out)
    print(result.summary())
    print(f"wrote {out}")
    print(CAUTION)
    return EXIT_OK


# ---------------------------------------------------------------------------- serve
def _add_serve(p: argparse.ArgumentParser) -> None:
    p.add_argument("scenario", metavar="SCENARIO.toml", nargs="?", default=None,
                   help="scenario file to open in the dashboard (default: none, start empty)")
    p.add_argument("--host", default="127.0.0.1",
                   help="address to listen on (default: 127.0.0.1, this machine only)")
    p.add_argument("--port", type=_port, default=8050,
                   help="TCP port to listen on, 1 to 65535 (default: 8050)")
    p.add_argument("--max-upload", metavar="MB", type=_positive_number, default=5.0,
                   help="largest file the dashboard accepts for upload, in MB (default: 5)")
    p.add_argument("--allow-host", metavar="NAME", action="append", default=[],
                   help="another host name the browser may use to reach the dashboard (repeatable; "
                        "default: only the names of the bound address, a guard against DNS rebinding; "
                        "with --host 0.0.0.0 every name is accepted unless some are given here)")
    p.add_argument("--no-prepare", action="store_true",
                   help="start at once, even when the numerical kernels are not all compiled yet (default: "
                        "compile them first, as 'barrierflow prepare' does, so that the first Run does not wait)")


def _cmd_serve(args: argparse.Namespace) -> int:
    """Start the dashboard, with the scenario opened if one is named.

    The app is served by waitress (threads); ``--debug`` serves it with Flask's development
    server instead. The dashboard package sits above the CLI in the import layers, so it is
    imported here with :func:`importlib.import_module`, never by a module-level import. A
    scenario file that cannot be loaded is refused (status 2) before the server starts.
    """
    import importlib

    scenario = None
    if args.scenario is not None:
        try:
            scenario = barrierflow.load(args.scenario)
        except (ScenarioError, UnitsError) as err:
            _report_refusal(err)
            return EXIT_REFUSED
    try:
        dashboard = importlib.import_module("dashboard")
        server = importlib.import_module("dashboard.server")
    except ImportError as err:
        print(f"barrierflow serve: the dashboard needs its extras ({err}); install them with "
              "pip install 'barrierflow[dashboard]'", file=sys.stderr)
        return EXIT_INTERNAL
    if not args.no_prepare:
        from barrierflow.studies.prepare import kernels_ready

        if not kernels_ready():
            prepare_kernels()
    app = dashboard.create_app(scenario, max_upload=int(args.max_upload * 1024 * 1024), warm=True)
    opened = f" with {args.scenario}" if args.scenario else ""
    shown = f"[{args.host}]" if ":" in args.host else args.host
    print(f"barrierflow dashboard{opened}: open http://{shown}:{args.port}/ in a browser (Ctrl+C stops it)")
    if server.allowed_hosts(args.host, args.port, args.allow_host) is None:
        print(f"note: bound to {args.host}, so every Host name is accepted (no DNS-rebinding guard); "
              "name the ones to accept with --allow-host", file=sys.stderr)
    print(CAUTION)
    import signal

    # a plain 'kill' (SIGTERM) ends the server as Ctrl+C does, so the run archive is cleaned up
    signal.signal(signal.SIGTERM, lambda signum, frame: sys.exit(EXIT_OK))
    server.serve(app, args.host, args.port, debug=bool(getattr(args, "debug", False)),
                 allow_hosts=args.allow_host)
    return EXIT_OK


# ---------------------------------------------------------------------------- prepare
def _add_prepare(p: argparse.ArgumentParser) -> None:
    p.add_argument("--if-needed", action="store_true",
                   help="do nothing when every kernel is already compiled and kept in numba's cache "
                        "(default: run every path once, which loads them from the cache in a second or two)")


def _cmd_prepare(args: argparse.Namespace) -> int:
    """Compile every numerical kernel once, so that the first run does not wait for the compiler."""
    from barrierflow.studies.prepare import kernels_ready

    if args.if_needed and kernels_ready():
        print("barrierflow prepare: every numerical kernel is compiled and in the cache")
        return EXIT_OK
    prepare_kernels()
    return EXIT_OK


def prepare_kernels() -> None:
    """Run :func:`barrierflow.studies.prepare.prepare`, telling the user what happens and where the
    compiled code is kept."""
    from barrierflow.studies.prepare import prepare

    print("barrierflow prepare: compiling the numerical kernels once, so that no run waits for the compiler "
          "(a minute or two the first time; afterwards they load from the cache in a second or two)", flush=True)
    report = prepare(say=lambda text: print(f"  {text}", flush=True))
    print(f"ready: {report.kernels} compiled kernels in {report.seconds:.0f} s; cache: "
          f"{report.cache or 'none (numba caching is off)'}", flush=True)
    if report.cold:
        print(f"note: no run of the preparation reached {', '.join(report.cold)}; they compile on first use",
              flush=True)


# ---------------------------------------------------------------------------- the table
@dataclass(frozen=True)
class Command:
    """One sub-command: its help line, how it adds its options and what it does."""

    help: str
    add_arguments: Callable[[argparse.ArgumentParser], None]
    handler: Callable[[argparse.Namespace], int]


COMMANDS: dict[str, Command] = {
    "run": Command("simulate a scenario; write the traces CSV and its JSON sidecar; print a summary",
                   _add_run, lambda a: _cmd_run(a)),
    "check": Command("validate scenario files only; print 'ok' and a one-line summary, or the errors",
                     _add_check, lambda a: _cmd_check(a)),
    "steady": Command("steady state of every barrier: permeability, steady flux, resistance per layer, "
                      "lag time, profile", _add_steady, lambda a: _cmd_steady(a)),
    "fit": Command("estimate parameters (diffusivity, partition, ...) from replicate permeation data, with "
                   "intervals; write the fitted scenario", _add_fit, lambda a: _cmd_fit(a)),
    "design": Command("propose sampling times that estimate the freed parameters best (D-optimal); expected CVs "
                      "for them and for your own schedule", _add_design, lambda a: _cmd_design(a)),
    "screen": Command("screening estimate of a skin-like layer's diffusivity and partition from log Kow and molar "
                      "mass (Potts and Guy 1992), flagged as such", _add_screen, lambda a: _cmd_screen(a)),
    "population": Command("simulate N subjects drawn from the [[vary]] tables; write percentile bands and every "
                          "subject's values and metrics; print their distribution", _add_population,
                          lambda a: _cmd_population(a)),
    "sweep": Command("simulate a grid over one or two parameters (linear or log steps); write every metric at every "
                     "point", _add_sweep, lambda a: _cmd_sweep(a)),
    "sensitivity": Command("rank the parameters that drive each metric: local coefficients d ln(metric) / "
                           "d ln(parameter), Sobol indices or Morris screening over the [[vary]] distributions",
                           _add_sensitivity, lambda a: _cmd_sensitivity(a)),
    "serve": Command("start the dashboard in a web browser, with the scenario opened if one is named",
                     _add_serve, lambda a: _cmd_serve(a)),
    "prepare": Command("compile every numerical kernel once (kept in numba's cache), so that no run waits for "
                       "the compiler; 'make run' and 'make test' do this after every change", _add_prepare,
                       lambda a: _cmd_prepare(a)),
}
"""Every sub-command, by name. (The lambdas look the functions up when called, so a
function replaced in this module takes effect.)"""

_EPILOG = f"""exit status: 0 done; 2 input refused (bad scenario, bad option, unreadable file);
3 the numerical solution failed; 1 internal error (traceback with --debug).

{CAUTION}"""


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``barrierflow`` command, with every sub-command of :data:`COMMANDS`."""
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                        help="print the traceback of an internal error (default: off)")
    parser = argparse.ArgumentParser(
        prog=PROG,
        description="Transport of a substance through layered tissue barriers (skin, mucosa, cornea, "
                    "membranes) into compartments and the body, under a dosing regimen.",
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"{PROG} {barrierflow.__version__}")
    parser.add_argument("--debug", action="store_true", default=False,
                        help="print the traceback of an internal error (default: off)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name, cmd in COMMANDS.items():
        p = sub.add_parser(name, help=cmd.help, description=cmd.help[0].upper() + cmd.help[1:] + ".",
                           epilog=_EPILOG, parents=[common],
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        cmd.add_arguments(p)
        p.set_defaults(handler=cmd.handler)
    return parser


# ---------------------------------------------------------------------------- errors
def _report_refusal(err: ScenarioError | UnitsError) -> None:
    """Print a refused input's problems on stderr, one a line, in the pattern
    ``<file>: <field path>: got <value>; <what was expected>``."""
    if isinstance(err, ScenarioError):
        lines = [str(p) for p in err.problems] or [str(err)]
    else:
        lines = [str(err)]
    for line in lines:
        print(line, file=sys.stderr)
    if len(lines) > 1:
        print(f"{len(lines)} problems; the scenario was refused", file=sys.stderr)


def _report_solver_failure(err: SolverError) -> None:
    """Print a numerical failure once: where (time, part) unless the message already says it."""
    text = str(err)
    where = []
    if err.time is not None and "t = " not in text:
        where.append(f"at t = {err.time:.6g} h")
    if err.part and err.part not in text:
        where.append(f"near {err.part if chr(39) in err.part else repr(err.part)}")
    if not where and text.startswith("the solution failed"):
        print(text, file=sys.stderr)
        return
    head = "the numerical solution failed" + (f" ({', '.join(where)})" if where else "")
    print(f"{head}: {text}", file=sys.stderr)


def _exit_code(code: object) -> int:
    """The exit status that a :class:`SystemExit` from argparse carries."""
    if code is None:
        return EXIT_OK
    if isinstance(code, int):
        return code
    print(code, file=sys.stderr)
    return EXIT_REFUSED


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``barrierflow`` command.

    Parameters
    ----------
    argv : sequence of str, optional
        The arguments after the program name (default: ``sys.argv[1:]``).

    Returns
    -------
    int
        The exit status: 0 done, 2 input refused, 3 the solution failed, 1 internal error.
    """
    parser = build_parser()
    try:
        args = parser.parse_args(None if argv is None else list(argv))
    except SystemExit as exc:  # --help and --version (0), or a bad option (2)
        return _exit_code(exc.code)
    debug = bool(getattr(args, "debug", False))
    try:
        return int(args.handler(args) or 0)
    except (ScenarioError, UnitsError) as err:
        if debug:
            traceback.print_exc()
        _report_refusal(err)
        return EXIT_REFUSED
    except SolverError as err:
        if debug:
            traceback.print_exc()
        _report_solver_failure(err)
        return EXIT_SOLVER
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # the reader of our output went away (`barrierflow check ... | head`): stop quietly
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_INTERNAL
    except OSError as err:
        if debug:
            traceback.print_exc()
        if err.filename is None:
            print(f"internal error: {type(err).__name__}: {err} (run with --debug for the traceback)",
                  file=sys.stderr)
            return EXIT_INTERNAL
        # a file named on the command line cannot be read or written: refused input
        print(f"{err.filename}: cannot be read or written ({err.strerror or err})", file=sys.stderr)
        return EXIT_REFUSED
    except Exception as err:  # the last line of defence: exit 1, no traceback unless --debug
        if debug:
            traceback.print_exc()
        else:
            print(f"internal error: {type(err).__name__}: {err} (run with --debug for the traceback)",
                  file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
