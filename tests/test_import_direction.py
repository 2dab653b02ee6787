"""Imports point one way: dashboard and cli -> analysis -> engine -> io -> model -> units/errors.

The same rule is checked by ``lint-imports`` (the import-linter contracts in pyproject.toml,
run by ``make test``); this test reads the layers from those contracts, so the two cannot
drift apart, and it checks direct imports, including those inside functions.
"""

from __future__ import annotations

import ast
import fnmatch
import subprocess
import sys
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = ROOT / "barrierflow"


def _contracts() -> list[dict]:
    with open(ROOT / "pyproject.toml", "rb") as fh:
        return tomllib.load(fh)["tool"]["importlinter"]["contracts"]


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _imports(source: str, module: str, is_package: bool = False) -> list[tuple[int, str]]:
    """(line, absolute module name) of every import in ``source``, relative ones resolved."""
    package = module if is_package else module.rpartition(".")[0]
    out = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            out += [(node.lineno, alias.name) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            out.append((node.lineno, target))
            # "from . import engine" imports a module too
            out += [(node.lineno, f"{target}.{alias.name}") for alias in node.names]
    return out


def _sources() -> list[tuple[str, str, bool]]:
    """(file, module, is_package) of every module of the library."""
    return [(str(p.relative_to(ROOT)), _module_name(p), p.name == "__init__.py") for p in sorted(PACKAGE.rglob("*.py"))]


def _violations(modules: list[tuple[str, str, bool, str]]) -> list[str]:
    """Imports against the layers among ``(file, module, is_package, source)``."""
    (layered,) = [c for c in _contracts() if c["type"] == "layers"]
    layers, ignore = layered["layers"], layered.get("ignore_imports", [])
    wrong = []
    for file, importer, is_package, source in modules:
        mine = _layer(importer, layers)
        if mine is None:
            continue
        for line, imported in _imports(source, importer, is_package):
            theirs = _layer(imported, layers)
            if theirs is not None and theirs < mine and not _ignored(importer, imported, ignore):
                wrong.append(f"{file}:{line}: {importer} imports {imported}")
    return wrong


def _layer(module: str, layers: list[str]) -> int | None:
    best = None
    for i, layer in enumerate(layers):
        if module == layer or module.startswith(layer + "."):
            if best is None or len(layer) > len(layers[best]):
                best = i
    return best


def _ignored(importer: str, imported: str, patterns: list[str]) -> bool:
    for pattern in patterns:
        src, _, dst = (s.strip() for s in pattern.partition("->"))
        if fnmatch.fnmatch(importer, src.replace("**", "*")) and fnmatch.fnmatch(imported, dst.replace("**", "*")):
            return True
    return False


def test_layers_point_one_way():
    (layered,) = [c for c in _contracts() if c["type"] == "layers"]
    layers = layered["layers"]
    assert layers[:2] == ["dashboard", "barrierflow.cli"]
    assert layers[-3:] == ["barrierflow.units", "barrierflow.errors", "barrierflow.caution"]
    modules = [(f, m, pkg, (ROOT / f).read_text(encoding="utf-8")) for f, m, pkg in _sources()]
    wrong = _violations(modules)
    assert not wrong, "imports against the layers:\n" + "\n".join(wrong)


def test_the_checker_sees_a_violation():
    # the check can fail: a model module that imports the engine or the analysis is caught
    source = "from ..engine import solve\n\n\ndef f():\n    import barrierflow.analysis\n"
    wrong = _violations([("model/x.py", "barrierflow.model.x", False, source)])
    assert wrong == ["model/x.py:1: barrierflow.model.x imports barrierflow.engine",
                     "model/x.py:1: barrierflow.model.x imports barrierflow.engine.solve",
                     "model/x.py:5: barrierflow.model.x imports barrierflow.analysis"]
    assert _violations([("cli.py", "barrierflow.cli", False, "from .model import Scenario\n")]) == []


def test_the_library_never_imports_the_dashboard():
    (forbidden,) = [c for c in _contracts() if c["type"] == "forbidden"]
    banned = forbidden["forbidden_modules"]
    assert {"dashboard", "dash", "plotly"} <= set(banned)
    wrong = []
    for file, module, is_package in _sources():
        for line, imported in _imports((ROOT / file).read_text(encoding="utf-8"), module, is_package):
            if any(imported == b or imported.startswith(b + ".") for b in banned):
                wrong.append(f"{file}:{line}: imports {imported}")
    assert not wrong, "\n".join(wrong)


def test_importing_every_library_module_loads_no_dashboard_code():
    # At run time too (an importlib call is invisible to the two checks above).
    code = (
        "import importlib, pkgutil, sys, barrierflow\n"
        "for m in pkgutil.walk_packages(barrierflow.__path__, 'barrierflow.'):\n"
        "    if not m.name.endswith('__main__'):\n"
        "        importlib.import_module(m.name)\n"
        "print(sorted(n for n in sys.modules if n.split('.')[0] in ('dash', 'plotly', 'dashboard')))\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, cwd=ROOT)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"


def test_every_public_name_resolves():
    # barrierflow.__all__ is the public API; the lazy names (simulate, Result, ...) must resolve too
    code = (
        "import barrierflow, sys\n"
        "fast = 'numba' not in sys.modules\n"
        "from barrierflow import *\n"
        "missing = [n for n in barrierflow.__all__ if getattr(barrierflow, n, None) is None]\n"
        "print(fast, missing)\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, cwd=ROOT)
    assert done.returncode == 0, done.stderr
    # `import barrierflow` alone does not load the numerics (numba): they load on first use
    assert done.stdout.strip() == "True []"
