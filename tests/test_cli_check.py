"""The command line's shared behaviour: ``check``, ``--version``, ``--help`` everywhere and the
exit statuses of the cli contract (0 done, 2 refused, 3 solver failed, 1 internal error).

``run``, ``steady`` and ``serve`` have their own test files; here only their options are
checked against the contract (names, defaults).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

import barrierflow
from barrierflow import SolverError, cli

ROOT = Path(__file__).resolve().parent.parent
SCENARIOS = sorted((ROOT / "scenarios").glob("*.toml"))
DAILY = ROOT / "scenarios" / "daily_patch.toml"


def run_cli(capsys, *argv: str) -> tuple[int, str, str]:
    code = cli.main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def bad_file(tmp_path: Path, name: str = "bad.toml") -> Path:
    text = DAILY.read_text(encoding="utf-8")
    text = text.replace('thickness = "15 um"', 'thickness = "-15 um"').replace('volume = "15 L"', "volume = 15")
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


# ----------------------------------------------------------------------------- check
@pytest.mark.parametrize("path", SCENARIOS, ids=[p.name for p in SCENARIOS])
def test_check_accepts_every_demo_file(capsys, path):
    code, out, err = run_cli(capsys, "check", str(path))
    assert code == 0 and err == ""
    (line,) = out.splitlines()
    assert line == f"ok: {path}: {barrierflow.load(path).summary()}"


def test_check_prints_ok_and_a_one_line_summary(capsys):
    code, out, _ = run_cli(capsys, "check", str(DAILY))
    assert code == 0
    assert out == (f"ok: {DAILY}: 3 compartments, 1 barrier (2 layers), 1 exchange, 0 transfers, "
                   "1 dose, duration 168 h\n")


def test_check_refuses_with_every_problem_and_no_traceback(capsys, tmp_path):
    code, out, err = run_cli(capsys, "check", str(bad_file(tmp_path)))
    assert code == 2 and out == ""
    assert err.splitlines() == [
        "bad.toml: compartment 'central' volume: got 15; a bare number is not accepted here; "
        "expected a volume with its unit, such as '5 mL'",
        "bad.toml: barrier 'skin' layer 1 thickness: got -15 um; must be > 0",
        "2 problems; the scenario was refused",
    ]
    assert "Traceback" not in err


def test_check_of_a_missing_file(capsys, tmp_path):
    code, out, err = run_cli(capsys, "check", str(tmp_path / "absent.toml"))
    assert code == 2 and out == ""
    assert err.startswith("absent.toml: file: got ") and err.rstrip().endswith("; no such file")


def test_check_of_a_toml_syntax_error(capsys, tmp_path):
    path = tmp_path / "broken.toml"
    path.write_text('[scenario]\nduration = "1 d\n', encoding="utf-8")
    code, _, err = run_cli(capsys, "check", str(path))
    assert code == 2 and err.startswith("broken.toml: TOML syntax: got ") and "line 2" in err


def test_check_of_several_files_checks_them_all(capsys, tmp_path):
    code, out, err = run_cli(capsys, "check", str(bad_file(tmp_path)), str(DAILY))
    assert code == 2
    assert out.startswith(f"ok: {DAILY}: ")
    assert "bad.toml: barrier 'skin' layer 1 thickness" in err


def test_check_reports_disconnected_parts(capsys, tmp_path):
    text = DAILY.read_text(encoding="utf-8") + '\n[[compartment]]\nid = "spare"\nvolume = "1 mL"\n'
    path = tmp_path / "parts.toml"
    path.write_text(text, encoding="utf-8")
    code, out, _ = run_cli(capsys, "check", str(path))
    assert code == 0 and out.startswith("ok: ")
    assert out.rstrip().endswith("note: the network has 2 disconnected parts: {central, patch, peripheral}; {spare}")


# ----------------------------------------------------------------------------- version and help
def test_version(capsys):
    code, out, _ = run_cli(capsys, "--version")
    assert code == 0 and out == f"barrierflow {barrierflow.__version__}\n"


@pytest.mark.parametrize("command", [[], *([name] for name in cli.COMMANDS)])
def test_help_on_every_command(capsys, command):
    code, out, _ = run_cli(capsys, *command, "--help")
    assert code == 0
    assert out.startswith("usage: barrierflow")
    assert "--debug" in out and "exit status" in out
    assert "research estimates" in out.lower()


def test_top_level_help_lists_every_command(capsys):
    _, out, _ = run_cli(capsys, "--help")
    for name in ("run", "check", "steady", "serve"):
        assert f"\n    {name} " in out


def test_every_option_says_its_default(capsys):
    # cli contract: --help "describes every option with its unit and default"
    for name in cli.COMMANDS:
        parser = cli.build_parser()
        sub = parser._subparsers._group_actions[0].choices[name]
        for action in sub._actions:
            if action.option_strings and action.dest != "help":
                assert "default" in (action.help or ""), f"{name} {action.option_strings}"


def test_options_of_the_contract_exist_with_their_defaults():
    p = cli.build_parser()
    a = p.parse_args(["run", "x.toml", "-o", "out.csv"])
    assert (a.command, a.scenario, a.output) == ("run", "x.toml", "out.csv")
    a = p.parse_args(["steady", "x.toml", "--json", "--profile", "p.csv"])
    assert (a.json, a.profile) == (True, "p.csv")
    a = p.parse_args(["serve"])
    assert (a.scenario, a.host, a.port) == (None, "127.0.0.1", 8050)
    a = p.parse_args(["serve", "x.toml", "--host", "0.0.0.0", "--port", "9000"])
    assert (a.scenario, a.host, a.port) == ("x.toml", "0.0.0.0", 9000)


# ----------------------------------------------------------------------------- exit statuses
@pytest.mark.parametrize("argv", [
    ["frobnicate"], [], ["check"], ["check", "--colour", "x.toml"], ["serve", "--port", "99999"],
    ["serve", "--port", "http"], ["run", "x.toml", "--cells", "0"],
])
def test_a_bad_option_exits_2_without_traceback(capsys, argv):
    code, _, err = run_cli(capsys, *argv)
    assert code == 2
    assert "usage: barrierflow" in err and "Traceback" not in err


def test_solver_failure_exits_3(capsys, monkeypatch):
    def fail(args):
        raise SolverError("the step size fell below 1e-12 h; refine the grid of barrier 'skin'",
                          time=12.5, part="skin")

    monkeypatch.setattr(cli, "_cmd_check", fail)
    code, _, err = run_cli(capsys, "check", str(DAILY))
    assert code == 3
    # the time is added; the part is not repeated, as the message already names it
    assert err == ("the numerical solution failed (at t = 12.5 h): the step size fell below "
                   "1e-12 h; refine the grid of barrier 'skin'\n")


def test_internal_error_exits_1_with_a_traceback_only_with_debug(capsys, monkeypatch):
    def boom(args):
        raise ZeroDivisionError("division by zero")

    monkeypatch.setattr(cli, "_cmd_check", boom)
    code, _, err = run_cli(capsys, "check", str(DAILY))
    assert code == 1
    assert "Traceback" not in err
    assert err == "internal error: ZeroDivisionError: division by zero (run with --debug for the traceback)\n"
    for argv in (["--debug", "check", str(DAILY)], ["check", "--debug", str(DAILY)]):
        code, _, err = run_cli(capsys, *argv)
        assert code == 1 and "Traceback (most recent call last)" in err and "ZeroDivisionError" in err


def test_unwritable_file_is_refused_input(capsys, monkeypatch, tmp_path):
    def cannot_write(args):
        raise PermissionError(13, "Permission denied", str(tmp_path / "out.csv"))

    monkeypatch.setattr(cli, "_cmd_check", cannot_write)
    code, _, err = run_cli(capsys, "check", str(DAILY))
    assert code == 2
    assert err == f"{tmp_path / 'out.csv'}: cannot be read or written (Permission denied)\n"


def test_refusal_raised_inside_a_command_exits_2(capsys, monkeypatch):
    def refuse(args):
        barrierflow.loads('[scenario]\nduration = "-1 h"\n[[compartment]]\nid = "a"\nvolume = "1 mL"\n', "x.toml")

    monkeypatch.setattr(cli, "_cmd_check", refuse)
    code, _, err = run_cli(capsys, "check", str(DAILY))
    assert (code, err) == (2, "x.toml: scenario duration: got -1 h; must be a time > 0 such as '7 d'\n")


# ----------------------------------------------------------------------------- the installed command
def _script() -> str:
    path = Path(sys.executable).parent / ("barrierflow.exe" if os.name == "nt" else "barrierflow")
    if not path.exists():
        pytest.skip("the barrierflow console script is not installed in this environment")
    return str(path)


def test_installed_console_script(tmp_path):
    done = subprocess.run([_script(), "check", str(DAILY)], capture_output=True, text=True, timeout=60)
    assert done.returncode == 0 and done.stdout.startswith("ok: ")
    done = subprocess.run([_script(), "check", str(bad_file(tmp_path))], capture_output=True, text=True,
                          timeout=60)
    assert done.returncode == 2 and "Traceback" not in done.stderr
    assert "bad.toml: barrier 'skin' layer 1 thickness: got -15 um; must be > 0" in done.stderr


def test_python_dash_m():
    done = subprocess.run([sys.executable, "-m", "barrierflow", "--version"], capture_output=True, text=True,
                          timeout=60)
    assert (done.returncode, done.stdout) == (0, f"barrierflow {barrierflow.__version__}\n")
