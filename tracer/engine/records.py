"""What the analyser receives: one finished sweep with everything needed to judge it."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from tracer.events import Point, SweepFinished, SweepStarted
from tracer.plan import Plan


@dataclass(frozen=True)
class SweepRecord:
    """A finished sweep.

    ``points`` are the ``Point`` events in order (load convention). ``pair`` is the
    opposite-direction sweep of a "both" pair measured *before* this one (so the second
    sweep of a pair carries the first; the first carries None). ``irradiance_w_m2`` and
    ``temperature_c`` are the readings taken over the sweep (start, periodically, end);
    ``reading_times`` their POSIX times. ``step`` is the plan step that made the sweep.
    """

    started: SweepStarted
    points: tuple[Point, ...]
    finished: SweepFinished
    plan: Plan
    pair: "SweepRecord | None" = None
    irradiance_w_m2: tuple[float, ...] = ()
    temperature_c: tuple[float, ...] = ()
    reading_times: tuple[float, ...] = ()
    step: Any = None

    @property
    def voltages_v(self) -> tuple[float, ...]:
        return tuple(p.voltage_v for p in self.points)

    @property
    def currents_a(self) -> tuple[float, ...]:
        """Measured currents, LOAD convention (convert with ``tracer.conventions``)."""
        return tuple(p.current_a for p in self.points)
