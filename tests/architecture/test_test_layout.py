"""The test tree itself: pytest's default import mode needs unique module basenames.

Test folders without ``__init__.py`` are imported as top-level modules, so two files called
``test_report.py`` in two such folders make collection fail ("import file mismatch") on a
clean checkout. This check names the clash before CI meets it.
"""
from __future__ import annotations

from collections import defaultdict
from pathlib import Path

TESTS = Path(__file__).resolve().parents[1]


def test_module_basenames_are_unique_outside_packages():
    seen: dict[str, list[Path]] = defaultdict(list)
    for path in TESTS.rglob("*.py"):
        if "__pycache__" in path.parts or path.name == "conftest.py":
            continue
        if (path.parent / "__init__.py").exists():
            continue  # imported as part of a package: its own namespace
        seen[path.stem].append(path.relative_to(TESTS))
    clashes = {name: paths for name, paths in seen.items() if len(paths) > 1}
    assert not clashes, f"rename one of each pair: {clashes}"
