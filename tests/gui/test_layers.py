"""The window is a subscriber: it never imports a driver or the VISA library (DEVELOPERS.md
layer table); only the composition root (`tracer/cli/gui_cmd.py` via `tracer.app`) builds
the bench."""
import ast
from pathlib import Path

GUI = Path(__file__).resolve().parents[2] / "tracer" / "gui"


def _imports(path: Path) -> set[str]:
    names = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names.update(a.name.split(".")[0] for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names.add(node.module.split(".")[0])
            if node.module == "tracer":
                names.update(f"tracer.{a.name}" for a in node.names)
            elif node.module.startswith("tracer."):
                names.add(node.module)
    return names


def test_the_window_never_imports_drivers_visa_or_the_simulator():
    files = sorted(GUI.rglob("*.py"))
    assert files
    for path in files:
        bad = {n for n in _imports(path) if n in ("drivers", "pyvisa", "pyvisa_py",
                                                  "simulated_instrument")
               or n.startswith("tracer.app")}
        assert not bad, f"{path.name} imports {sorted(bad)}"
