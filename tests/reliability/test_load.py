"""Eight benches measuring at once (``tracer.reliability.load``): each into its own logbook,
then all eight into one shared logbook that the eight programs create together. No point
lost or stored twice, every run completed, no lock error shown to the user."""
from __future__ import annotations

import pytest

from tracer.reliability import load


@pytest.mark.timeout(900)
@pytest.mark.parametrize("shared", [False, True], ids=["own-logbooks", "shared-logbook"])
def test_eight_benches_at_once_lose_nothing(shared, request, tmp_path):
    points = 200 if request.config.getoption("--run-slow") else 40
    result = load.run_load(benches=8, points=points, shared=shared, workdir=tmp_path)
    assert len(result.runs) == 8
    assert result.passed, result.summary()
    # every run: a point sweep of `points` and a list sweep of twice as many
    assert [r.stored for r in result.runs] == [3 * points] * 8
    assert result.points_lost == 0
    assert sum(r.duplicates for r in result.runs) == 0
    if shared:
        assert len({r.logbook for r in result.runs}) == 1
    else:
        assert len({r.logbook for r in result.runs}) == 8
