"""Invariants every event stream of a run must satisfy (tracer/events.py module docstring)."""
from __future__ import annotations

import json

from tracer import events as ev


def check_stream(events: list) -> ev.RunFinished:
    """Assert the documented order and numbering; return the RunFinished."""
    assert events, "no events"
    assert isinstance(events[0], ev.RunStarted), f"first event is {type(events[0]).__name__}"
    assert isinstance(events[-1], ev.RunFinished), f"last event is {type(events[-1]).__name__}"
    assert sum(isinstance(e, ev.RunStarted) for e in events) == 1
    assert sum(isinstance(e, ev.RunFinished) for e in events) == 1
    run_uid = events[0].run_uid
    assert all(e.run_uid == run_uid for e in events)
    open_uid = None
    seq = 0
    run_seq = 0
    finished_sweeps: dict[str, str] = {}
    analysed: set[str] = set()
    trips = [i for i, e in enumerate(events) if isinstance(e, ev.InterlockTripped)]
    assert len(trips) <= 1, "more than one InterlockTripped"
    if trips:
        assert trips[0] == len(events) - 2, "InterlockTripped must come right before RunFinished"
    for e in events[1:-1]:
        if isinstance(e, ev.SweepStarted):
            assert open_uid is None, "a sweep started inside another"
            open_uid = e.sweep_uid
            seq = 0
        elif isinstance(e, ev.Point):
            assert open_uid == e.sweep_uid, "a point outside its sweep"
            seq += 1
            run_seq += 1
            assert e.seq == seq, f"seq {e.seq} where {seq} was due"
            assert e.run_seq == run_seq, f"run_seq {e.run_seq} where {run_seq} was due"
        elif isinstance(e, ev.SweepFinished):
            assert open_uid == e.sweep_uid, "SweepFinished for a sweep that is not open"
            assert e.points == seq
            assert e.status in (ev.SWEEP_COMPLETED, ev.SWEEP_ABORTED)
            assert (e.reason == "") == (e.status == ev.SWEEP_COMPLETED)
            finished_sweeps[e.sweep_uid] = e.status
            open_uid = None
        elif isinstance(e, ev.Analysis):
            assert finished_sweeps.get(e.sweep_uid) == ev.SWEEP_COMPLETED, \
                "Analysis for a sweep that did not complete"
            assert e.sweep_uid not in analysed, "two analyses of one sweep"
            analysed.add(e.sweep_uid)
    assert open_uid is None, "a sweep was left open at RunFinished"
    finished = events[-1]
    assert finished.points == run_seq
    assert finished.status in (ev.RUN_COMPLETED, ev.RUN_ABORTED, ev.RUN_FAILED)
    assert (finished.reason == "") == (finished.status == ev.RUN_COMPLETED)
    for e in events:                      # every event serialises and round-trips
        d = json.loads(json.dumps(e.to_dict(), allow_nan=False))
        assert ev.event_from_dict(d).run_uid == run_uid
    return finished


def of_type(events: list, cls: type) -> list:
    return [e for e in events if isinstance(e, cls)]
