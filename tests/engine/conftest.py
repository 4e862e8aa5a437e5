"""Fixtures for engine tests against the in-memory fakes."""
from __future__ import annotations

import threading

import pytest

from tracer import plan as pl
from tracer.engine import Bench, Engine

from .fakes import FakeBench, make_fake_bench, reference_calibration

# Bench hard limits for the fake bench: a lab bench for single cells (demo values).
HARD = pl.Limits(voltage_v=10.0, current_a=0.5, power_w=2.0, reverse_voltage_v=3.0)
# The limits most test plans ask for.
LIMITS = pl.Limits(voltage_v=2.0, current_a=0.1, power_w=0.15, reverse_voltage_v=1.0)
SAMPLE = pl.Sample(sample_id="fake-cell-1", area_cm2=1.0)
FAST = dict(poll_interval_s=0.001, conditions_interval_s=0.0, list_poll_interval_s=0.0005,
            analysis_timeout_s=10.0)


class Recorder:
    """A subscriber that keeps every event (thread-safe)."""

    def __init__(self):
        self.events: list = []
        self._lock = threading.Lock()

    def __call__(self, event):
        with self._lock:
            self.events.append(event)


def bench_for(fake: FakeBench, **kw) -> Bench:
    return Bench(name="fake-bench", smu=fake.smu, light=fake.light, thermometer=fake.thermometer,
                 switch=fake.switch, hard_limits=kw.pop("hard_limits", HARD),
                 irradiance_from_reference=(reference_calibration(fake.light)
                                            if fake.light is not None else None),
                 snapshot={"note": "fake"}, **kw)


def make_plan(*steps, limits: pl.Limits = LIMITS, checks: pl.Checks | None = None,
              name: str = "test-plan") -> pl.Plan:
    return pl.Plan(name=name, steps=tuple(steps), limits=limits, sample=SAMPLE,
                   checks=checks or pl.Checks(watchdog_s=2.0))


def light_sweep(**kw) -> pl.SweepStep:
    base = dict(name="light-iv", light=True, start=-0.1, stop=0.75, points=30, compliance=0.05)
    base.update(kw)
    return pl.SweepStep(**base)


def dark_sweep(**kw) -> pl.SweepStep:
    base = dict(name="dark-iv", light=False, start=-0.5, stop=0.8, points=27, compliance=0.05)
    base.update(kw)
    return pl.SweepStep(**base)


@pytest.fixture
def fake():
    return make_fake_bench()


@pytest.fixture
def make_engine():
    engines: list[Engine] = []

    def build(fake: FakeBench, analyzer=None, *, critical=None, **options) -> tuple[Engine, Recorder, Recorder]:
        engine = Engine(bench_for(fake), analyzer, **{**FAST, **options})
        critical_rec = critical or Recorder()
        engine.subscribe(critical_rec, critical=True)
        other = Recorder()
        engine.subscribe(other)
        engines.append(engine)
        return engine, critical_rec, other

    yield build
    for engine in engines:
        engine.close(timeout=5.0)


def run_to_end(engine: Engine, plan: pl.Plan, timeout: float = 20.0):
    engine.start(plan)
    finished = engine.wait(timeout)
    assert finished is not None, "the run did not finish"
    assert engine.flush(10.0)
    return finished
