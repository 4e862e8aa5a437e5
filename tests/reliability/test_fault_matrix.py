"""Every simulated fault in every phase of a run, through ``tracer run`` in a subprocess
against a standalone simulated bench (see ``tracer.reliability.matrix`` for how faults are
aimed and what each cell checks).

CI runs :data:`matrix.QUICK_CELLS` (every fault and every phase at least once);
``--run-slow`` runs all 8 x 5 cells.
"""
from __future__ import annotations

import pytest

from simulated_instrument import FAULT_NAMES
from tracer.reliability import matrix
from tracer.reliability.protocols import matrix_protocol


def test_quick_cells_cover_every_fault_and_every_phase():
    assert matrix.covers_every_fault_and_phase(matrix.QUICK_CELLS)
    assert set(matrix.FAULTS) == set(FAULT_NAMES)          # the simulator's own list
    assert len(matrix.all_cells()) == len(FAULT_NAMES) * len(matrix.PHASES)


def test_every_fault_has_a_named_cause():
    assert set(matrix.EXPECTED_CAUSES) == set(FAULT_NAMES)


@pytest.mark.timeout(1800)
def test_calibration_aims_each_phase_inside_its_stretch(matrix_outcome):
    cal, _ = matrix_outcome
    c, p1, p2, p3 = cal.anchors
    points = cal.points
    # configuring: before the first point of the point step (its non-point messages are
    # its configuration before and its closing after; a quarter of them is configuration)
    index, offset = cal.aim("configuring")
    assert index == 0 and 0 < offset < (p1 - c) - points["points"]
    index, offset = cal.aim("point-sweep")
    assert index == 0 and c + offset < p1
    index, offset = cal.aim("mpp")
    assert index == 1 and p1 + offset < p2
    index, offset = cal.aim("list-fetch")
    first, last = cal.list_running
    assert index == 2 and first <= p2 + offset <= last
    index, offset = cal.aim("teardown")
    assert index == 3 and p3 < p3 + offset <= cal.total
    doc = matrix_protocol()
    assert sum(points.values()) == sum(s.get("points", 0) for s in doc["steps"]) + points["track"]


@pytest.mark.timeout(1800)
def test_fault_cell(matrix_cell, matrix_outcome):
    _, results = matrix_outcome
    result = results[matrix_cell]
    assert result.passed, result.summary()
    status, causes = matrix.expected_outcome(*matrix_cell)
    assert result.run_status == status
    assert result.output_on_after is False
    assert result.points_missing == 0
    if causes:
        assert set(result.causes) & causes
        assert result.exit_status == 3
    else:
        assert result.exit_status == 0
