"""``tracer run`` killed with SIGKILL at seeded random moments (``tracer.reliability.crash``).

Quick (CI): 6 trials. ``--run-slow``: 50. Every trial: the logbook opens and passes SQLite's
integrity check, every printed point is stored, the run reads as interrupted (or as ended,
if the kill came after its end) once the logbook has been opened again, and whatever the
bench was left with is within the limits the run set.
"""
from __future__ import annotations

import pytest

from tracer.reliability import crash


@pytest.mark.timeout(1800)
def test_sigkill_at_random_moments_loses_nothing(request, tmp_path):
    count = crash.FULL_TRIALS if request.config.getoption("--run-slow") else crash.QUICK_TRIALS
    duration, trials = crash.run_kill_trials(count, workdir=tmp_path, workers=2)
    assert len(trials) == count
    failed = [t.summary() for t in trials if not t.passed]
    assert not failed, "\n".join(failed)
    assert sum(t.points_lost for t in trials) == 0
    # the trials did kill runs in progress, not only start-ups and reports
    assert any(t.run_status == "interrupted" and t.points_printed for t in trials)
    if count >= crash.FULL_TRIALS:
        # over 50 trials some must leave the output on, so the limits on the bench are checked
        assert any(t.output_on_after_kill for t in trials)
