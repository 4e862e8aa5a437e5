"""The sweep engine: runs a plan on a bench, owns the safety interlocks, publishes events.

    from tracer.engine import Engine, Bench, PlanRefused, SweepRecord
    engine = Engine(Bench(name=..., smu=..., hard_limits=...), analyzer=None)
    engine.subscribe(logbook_writer, critical=True)
    engine.subscribe(gui_bridge)                 # non-critical: its own thread
    run_uid = engine.start(plan)                 # PlanRefused before any instrument is touched
    finished = engine.wait()                     # RunFinished

The engine imports no driver, no pyvisa, no Qt and no logbook: instruments arrive as
objects satisfying ``tracer.ports``. See ``docs/engine.md`` for the safety rules.
"""
from .bench import Bench
from .bus import CriticalSubscriberError
from .engine import Engine, EngineOptions
from .guard import Trip
from .planning import PlanRefused, check_plan, sweep_levels, sweep_segments
from .records import SweepRecord

__all__ = ["Bench", "Engine", "EngineOptions", "PlanRefused", "SweepRecord", "Trip",
           "CriticalSubscriberError", "check_plan", "sweep_levels", "sweep_segments"]
