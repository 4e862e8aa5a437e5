"""What the engine executes: a plan, an ordered tuple of typed steps. Stdlib only.

A YAML protocol is validated and compiled into a :class:`Plan` by ``tracer.protocol``;
tests may build plans by hand. Loops over pixels are already unrolled here: a
:class:`SelectPixel` step precedes the steps that measure that pixel. Values are SI.
Sweep levels are *source levels* in the SMU's own convention: for a voltage source the
terminal voltage, for a current source the current into the + terminal (load convention).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Mapping, Union

SPACINGS = ("linear", "log", "dense-near-voc")
DIRECTIONS = ("forward", "reverse", "both")
ACQUISITIONS = ("point", "list")
SOURCE_MODES = ("voltage", "current")
HOLD_MODES = ("voc", "isc", "bias")


@dataclass(frozen=True)
class Limits:
    """Software limits checked on every point; also set on the instrument where it can."""

    voltage_v: float            # largest |V| at the terminals
    current_a: float            # largest |I|
    power_w: float              # largest |V*I|
    reverse_voltage_v: float    # largest reverse bias (V < 0 on a cell in the load convention)


@dataclass(frozen=True)
class Sample:
    sample_id: str
    area_cm2: float | None = None
    cells_in_series: int = 1
    description: str = ""


@dataclass(frozen=True)
class SweepStep:
    """An I-V sweep. ``start``/``stop`` are source levels [V or A]; ``direction`` says
    which order to measure in: forward = from the lower to the higher level."""

    name: str
    light: bool
    start: float
    stop: float
    points: int
    source_mode: str = "voltage"
    spacing: str = "linear"
    direction: str = "forward"
    settle_s: float = 0.0
    nplc: float = 1.0
    four_wire: bool = True
    repeats: int = 1
    acquisition: str = "point"
    compliance: float = 0.1     # [A] when sourcing voltage, [V] when sourcing current
    voc_estimate_v: float | None = None  # for "dense-near-voc" spacing


@dataclass(frozen=True)
class HoldStep:
    """Hold at open circuit (Voc), short circuit (Isc) or a fixed bias and read over time."""

    name: str
    light: bool
    mode: str                   # "voc" | "isc" | "bias"
    duration_s: float
    interval_s: float
    level: float = 0.0          # the bias [V] for mode "bias"
    nplc: float = 1.0
    four_wire: bool = True
    compliance: float = 0.1


@dataclass(frozen=True)
class MpptStep:
    """Track the maximum-power point over time (perturb and observe with adaptive step)."""

    name: str
    duration_s: float
    interval_s: float
    step_v: float = 0.005
    start_v: float | None = None    # None: start from a quick coarse sweep's MPP
    nplc: float = 1.0
    four_wire: bool = True
    compliance: float = 0.1


@dataclass(frozen=True)
class SelectPixel:
    pixel: int                  # 1-based channel of the switch


@dataclass(frozen=True)
class SetLight:
    """Set the lamp and shutter; wait until the reference cell reads stable."""

    shutter_open: bool
    irradiance_w_m2: float | None = None   # None: leave the set-point as it is
    stability_tolerance_rel: float = 0.02  # common practice
    settle_timeout_s: float = 60.0


@dataclass(frozen=True)
class WaitTemperature:
    target_c: float
    tolerance_c: float = 1.0
    timeout_s: float = 600.0


Step = Union[SweepStep, HoldStep, MpptStep, SelectPixel, SetLight, WaitTemperature]


@dataclass(frozen=True)
class Checks:
    """Run-time checks during light steps."""

    temperature_window_c: tuple[float, float] | None = None   # stage must stay inside
    light_stability_rel: float | None = 0.05                  # max relative irradiance change within a sweep
    watchdog_s: float = 10.0                                  # silent instrument


@dataclass(frozen=True)
class Plan:
    name: str
    steps: tuple[Step, ...]
    limits: Limits
    sample: Sample
    checks: Checks = Checks()
    analysis: Mapping[str, Any] = field(default_factory=dict)   # passed through to the analyser
    metadata: Mapping[str, Any] = field(default_factory=dict)
    protocol_snapshot: Mapping[str, Any] = field(default_factory=dict)
    protocol_sha256: str = ""
