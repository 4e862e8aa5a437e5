"""What a plan will do, in numbers: steps, planned readings, rough duration.

The duration is an estimate for planning a bench session, not a promise: each reading is
taken to last its integration time (NPLC on 50 Hz mains, the slower of the two common line
frequencies) plus its settle time plus a per-reading overhead for the round trip to the
instrument; lamp settling and temperature waits are counted at a typical and at their
timeout respectively.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from tracer import plan as P

LINE_FREQUENCY_HZ = 50.0
OVERHEAD_POINT_S = 0.005     # one set-level-and-read round trip per reading (common practice)
OVERHEAD_LIST_S = 0.0005     # per reading of an instrument-run list sweep (common practice)
OVERHEAD_STEP_S = 0.2        # configure, output on/off, verification per measuring step
LAMP_SETTLE_TYPICAL_S = 2.0  # a lamp change usually settles in seconds (common practice)


@dataclass(frozen=True)
class PlanSummary:
    steps: int                    # steps of the plan (pixel loops unrolled)
    sweeps: int
    holds: int
    mpp_tracks: int
    pixels: tuple[int, ...]       # pixels selected, in order of first use
    planned_points: int           # readings of sweeps and holds (MPP tracking: one per interval)
    duration_s: float             # estimated, excluding temperature waits
    temperature_wait_max_s: float  # the sum of the temperature-wait timeouts


def sweep_points(step: P.SweepStep) -> int:
    return step.points * (2 if step.direction == "both" else 1) * step.repeats


def reading_s(nplc: float) -> float:
    return nplc / LINE_FREQUENCY_HZ


def summarize(plan: P.Plan) -> PlanSummary:
    points = 0
    duration = 0.0
    wait_max = 0.0
    sweeps = holds = mpps = 0
    pixels: list[int] = []
    for step in plan.steps:
        if isinstance(step, P.SweepStep):
            sweeps += 1
            n = sweep_points(step)
            points += n
            overhead = OVERHEAD_LIST_S if step.acquisition == "list" else OVERHEAD_POINT_S
            duration += OVERHEAD_STEP_S + n * (reading_s(step.nplc) + step.settle_s + overhead)
        elif isinstance(step, P.HoldStep):
            holds += 1
            points += int(math.floor(step.duration_s / step.interval_s)) + 1
            duration += OVERHEAD_STEP_S + step.duration_s
        elif isinstance(step, P.MpptStep):
            mpps += 1
            points += int(math.floor(step.duration_s / step.interval_s)) + 1
            duration += OVERHEAD_STEP_S + step.duration_s
        elif isinstance(step, P.SetLight):
            duration += LAMP_SETTLE_TYPICAL_S
        elif isinstance(step, P.WaitTemperature):
            wait_max += step.timeout_s
        elif isinstance(step, P.SelectPixel):
            if step.pixel not in pixels:
                pixels.append(step.pixel)
    return PlanSummary(steps=len(plan.steps), sweeps=sweeps, holds=holds, mpp_tracks=mpps,
                       pixels=tuple(pixels), planned_points=points, duration_s=duration,
                       temperature_wait_max_s=wait_max)


def format_duration(seconds: float) -> str:
    seconds = max(0.0, seconds)
    if seconds < 60:
        return f"{seconds:.0f} s" if seconds >= 10 else f"{seconds:.1f} s"
    minutes, s = divmod(int(round(seconds)), 60)
    if minutes < 60:
        return f"{minutes} min {s:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"
