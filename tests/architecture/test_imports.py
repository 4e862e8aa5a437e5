"""Layer rules of DEVELOPERS.md, checked by importing in a clean interpreter and by AST scan.

- The pure packages (numpy/scipy only) import with Qt, VISA and YAML made unimportable.
- ``drivers/`` and ``simulated_instrument/`` never import ``tracer``;
  ``simulated_instrument/`` never imports ``drivers`` or ``pyvisa``.
- ``pvlib`` (a test-only oracle) is imported nowhere in the product.
"""
import ast
import json
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]

#: Packages that must import with nothing but numpy and scipy (and the stdlib).
PURE_PACKAGES = ("tracer.model", "tracer.fit", "tracer.stc", "tracer.quality")

#: Made unimportable (``sys.modules[name] = None``) before a pure package is imported.
BLOCKED_FOR_PURE = ("PyQt6", "pyvisa", "pyqtgraph", "yaml", "pvlib", "pandas")

#: Application parts that a pure package must not pull in.
NOT_FOR_PURE = ("drivers", "simulated_instrument", "tracer.engine", "tracer.gui",
                "tracer.logbook", "tracer.cli", "tracer.app", "tracer.protocol")


def _package_exists(dotted: str) -> bool:
    path = ROOT.joinpath(*dotted.split("."))
    return (path / "__init__.py").is_file() or path.with_suffix(".py").is_file()


@pytest.mark.parametrize("package", PURE_PACKAGES)
def test_pure_package_imports_without_gui_visa_or_yaml(package):
    assert _package_exists(package), f"{package} is a pure package of the layer table and must exist"
    script = textwrap.dedent(f"""
        import importlib, json, sys
        for name in {BLOCKED_FOR_PURE!r}:
            sys.modules[name] = None
        importlib.import_module({package!r})
        print(json.dumps(sorted(m for m in sys.modules if sys.modules[m] is not None)))
    """)
    result = subprocess.run([sys.executable, "-c", script], cwd=ROOT, capture_output=True,
                            text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    loaded = json.loads(result.stdout.strip().splitlines()[-1])
    offending = [m for m in loaded
                 if any(m == bad or m.startswith(bad + ".") for bad in NOT_FOR_PURE)]
    assert not offending, f"{package} pulls in {offending}"
    if package == "tracer.model":
        # the model is the bottom layer: no other part of tracer at all
        others = [m for m in loaded if m.startswith("tracer.")
                  and not (m == "tracer.model" or m.startswith("tracer.model."))]
        assert not others, f"tracer.model pulls in {others}"


def imported_top_level_names(source: str) -> set[str]:
    """Top-level module names imported by ``source`` (absolute imports only).

    Covers ``import a.b``, ``from a.b import c``, and ``importlib.import_module("a.b")``
    / ``__import__("a")`` with a literal string.
    """
    names = set()
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            names.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names.add(node.module.split(".")[0])
        elif isinstance(node, ast.Call) and node.args:
            func = node.func
            called = (func.attr if isinstance(func, ast.Attribute)
                      else func.id if isinstance(func, ast.Name) else "")
            first = node.args[0]
            if (called in ("import_module", "__import__") and isinstance(first, ast.Constant)
                    and isinstance(first.value, str)):
                names.add(first.value.split(".")[0])
    return names


def _python_files(folder: str):
    return sorted((ROOT / folder).rglob("*.py"))


def _violations(folders, forbidden):
    found = []
    for folder in folders:
        for path in _python_files(folder):
            bad = imported_top_level_names(path.read_text(encoding="utf-8")) & set(forbidden)
            if bad:
                found.append(f"{path.relative_to(ROOT)} imports {sorted(bad)}")
    return found


def test_scanner_sees_every_import_form():
    source = textwrap.dedent("""
        import os, tracer.model as m
        from drivers.smu import Smu
        from . import sibling
        import importlib
        importlib.import_module("pyvisa.constants")
        __import__("pvlib")
    """)
    assert imported_top_level_names(source) == {"os", "tracer", "drivers", "importlib",
                                                "pyvisa", "pvlib"}


def test_drivers_and_simulator_do_not_import_the_application():
    assert _violations(["drivers", "simulated_instrument"], ["tracer"]) == []


def test_simulator_does_not_import_drivers_or_visa():
    assert _violations(["simulated_instrument"], ["drivers", "pyvisa", "pyvisa_py"]) == []


def test_pvlib_is_a_test_only_oracle():
    assert _violations(["tracer", "drivers", "simulated_instrument"], ["pvlib"]) == []
