"""Reliability checks: quick (CI) size by default, full size with ``--run-slow``.

The fault matrix runs its cells in parallel on two slots once per session; each cell is
then reported as its own test.
"""
from __future__ import annotations

import pytest

from tracer.reliability import matrix


def full_size(config) -> bool:
    return bool(config.getoption("--run-slow"))


def pytest_generate_tests(metafunc):
    if "matrix_cell" in metafunc.fixturenames:
        cells = matrix.select_cells(quick=not full_size(metafunc.config))
        metafunc.parametrize("matrix_cell", cells, ids=[f"{f}@{p}" for f, p in cells])


@pytest.fixture(scope="session")
def matrix_outcome(request, tmp_path_factory):
    """(calibration, {cell: CellResult}) for every selected cell, run once, two at a time."""
    cells = matrix.select_cells(quick=not full_size(request.config))
    cal, results = matrix.run_matrix(cells, workdir=tmp_path_factory.mktemp("matrix"), workers=2)
    return cal, {(r.fault, r.phase): r for r in results}
