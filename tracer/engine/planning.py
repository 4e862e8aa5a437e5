"""Checking a plan against the bench before anything is touched, and the level lists of sweeps.

Everything here is pure: no instrument is called (reading ``switch.channels``, an attribute
the driver filled at connect, is the only contact with a bench object).

Rules a plan must satisfy (each refusal names the limit it broke):

- every plan limit is a positive finite number and does not exceed the bench's hard limit
  of the same name;
- every source level of a voltage-sourced step lies in ``[-reverse_voltage_v, voltage_v]``
  and its compliance (a current) does not exceed ``current_a``;
- every source level of a current-sourced step satisfies ``|I| <= current_a``, its
  compliance (a voltage) does not exceed ``voltage_v``, and, when the step drives negative
  current (which pushes a cell into reverse bias), it does not exceed ``reverse_voltage_v``;
- steps that need an instrument (pixel, light, temperature) find it on the bench; a
  temperature window needs a thermometer; a temperature target lies inside the window.

The power limit cannot be checked in advance (the current depends on the device); it is
checked on every point.
"""
from __future__ import annotations

import math
from dataclasses import fields
from typing import Any, Iterable

from tracer import plan as pl

# Relative rounding allowed between a requested setting and what the instrument reads back,
# and between a measured value and a limit (a 4.5-digit instrument resolves 1 part in
# 2e4; 0.1 % also covers the reading noise of a bench SMU - common practice).
ROUNDING_REL = 1e-3

# "dense-near-voc" spacing: point density 1 + GAIN * gaussian(width = WIDTH_FRACTION * span)
# around the Voc estimate, i.e. up to 5x denser near Voc than far from it (our design).
DENSE_GAIN = 4.0
DENSE_WIDTH_FRACTION = 0.08


class PlanRefused(ValueError):
    """A plan the engine will not run. ``problems`` lists every reason, each naming the limit
    (``limits.current_a``, ``hard_limits.voltage_v``, ``checks.temperature_window_c``, ...)."""

    def __init__(self, problems: list[str]):
        self.problems = list(problems)
        super().__init__("plan refused: " + "; ".join(self.problems))


def _finite(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def _fmt(x: float) -> str:
    return f"{x:g}"


def _step_label(index: int, step: Any) -> str:
    name = getattr(step, "name", None)
    kind = type(step).__name__
    return f"step {index} ({kind} {name!r})" if name else f"step {index} ({kind})"


def check_plan(plan: pl.Plan, *, hard_limits: pl.Limits, has_light: bool,
               has_thermometer: bool, switch_channels: int | None) -> None:
    """Raise :class:`PlanRefused` listing every reason ``plan`` cannot run on this bench."""
    problems: list[str] = []
    add = problems.append
    limits = plan.limits

    for f in fields(pl.Limits):
        value = getattr(limits, f.name)
        hard = getattr(hard_limits, f.name)
        if not _finite(value) or value <= 0:
            add(f"limits.{f.name} = {value!r} must be a positive finite number")
        elif not _finite(hard) or hard <= 0:
            add(f"hard_limits.{f.name} = {hard!r} of the bench is not a positive finite number")
        elif value > hard:
            add(f"limits.{f.name} = {_fmt(value)} exceeds the bench hard limit "
                f"hard_limits.{f.name} = {_fmt(hard)}")
    if problems:   # the step checks below need sane limits
        raise PlanRefused(problems)

    checks = plan.checks
    window = checks.temperature_window_c
    if window is not None:
        if (len(window) != 2 or not all(_finite(w) for w in window) or window[0] >= window[1]):
            add(f"checks.temperature_window_c = {window!r} must be (low, high) with low < high")
        elif not has_thermometer:
            add("checks.temperature_window_c is set but the bench has no thermometer")
    if checks.light_stability_rel is not None and (
            not _finite(checks.light_stability_rel) or checks.light_stability_rel <= 0):
        add(f"checks.light_stability_rel = {checks.light_stability_rel!r} must be positive")
    if not _finite(checks.watchdog_s) or checks.watchdog_s <= 0:
        add(f"checks.watchdog_s = {checks.watchdog_s!r} must be positive")

    for index, step in enumerate(plan.steps):
        label = _step_label(index, step)
        if isinstance(step, pl.SweepStep):
            _check_sweep(step, limits, label, add)
        elif isinstance(step, pl.HoldStep):
            _check_hold(step, limits, label, add)
        elif isinstance(step, pl.MpptStep):
            _check_mppt(step, limits, label, add)
        elif isinstance(step, pl.SelectPixel):
            if switch_channels is None:
                add(f"{label}: selects pixel {step.pixel} but the bench has no channel switch")
            elif not isinstance(step.pixel, int) or not 1 <= step.pixel <= switch_channels:
                add(f"{label}: pixel {step.pixel!r} is outside the switch's channels "
                    f"1..{switch_channels}")
        elif isinstance(step, pl.SetLight):
            if not has_light:
                add(f"{label}: sets the light but the bench has no light source")
            if step.irradiance_w_m2 is not None and (
                    not _finite(step.irradiance_w_m2) or step.irradiance_w_m2 < 0):
                add(f"{label}: irradiance_w_m2 = {step.irradiance_w_m2!r} must be >= 0")
            if not _finite(step.stability_tolerance_rel) or step.stability_tolerance_rel <= 0:
                add(f"{label}: stability_tolerance_rel must be positive")
            if not _finite(step.settle_timeout_s) or step.settle_timeout_s <= 0:
                add(f"{label}: settle_timeout_s must be positive")
        elif isinstance(step, pl.WaitTemperature):
            if not has_thermometer:
                add(f"{label}: waits for a temperature but the bench has no thermometer")
            if not _finite(step.target_c):
                add(f"{label}: target_c = {step.target_c!r} is not a number")
            elif window is not None and len(window) == 2 and not (
                    window[0] <= step.target_c <= window[1]):
                add(f"{label}: target {_fmt(step.target_c)} C lies outside "
                    f"checks.temperature_window_c = ({_fmt(window[0])}, {_fmt(window[1])})")
            if not _finite(step.tolerance_c) or step.tolerance_c <= 0:
                add(f"{label}: tolerance_c must be positive")
            if not _finite(step.timeout_s) or step.timeout_s <= 0:
                add(f"{label}: timeout_s must be positive")
        else:
            add(f"step {index}: unknown step type {type(step).__name__}")
    if problems:
        raise PlanRefused(problems)


def _check_levels(label: str, mode: str, levels: Iterable[float], compliance: float,
                  limits: pl.Limits, add) -> None:
    levels = list(levels)
    if not all(_finite(x) for x in levels):
        add(f"{label}: levels {levels!r} must be finite numbers")
        return
    if not _finite(compliance) or compliance <= 0:
        add(f"{label}: compliance = {compliance!r} must be positive")
        return
    lo, hi = min(levels), max(levels)
    if mode == "voltage":
        if hi > limits.voltage_v:
            add(f"{label}: level {_fmt(hi)} V exceeds limits.voltage_v = {_fmt(limits.voltage_v)} V")
        if lo < -limits.voltage_v:
            add(f"{label}: level {_fmt(lo)} V exceeds limits.voltage_v = {_fmt(limits.voltage_v)} V")
        elif lo < -limits.reverse_voltage_v:
            add(f"{label}: level {_fmt(lo)} V is a reverse bias beyond "
                f"limits.reverse_voltage_v = {_fmt(limits.reverse_voltage_v)} V")
        if compliance > limits.current_a:
            add(f"{label}: compliance {_fmt(compliance)} A exceeds limits.current_a = "
                f"{_fmt(limits.current_a)} A")
    elif mode == "current":
        worst = max(abs(lo), abs(hi))
        if worst > limits.current_a:
            add(f"{label}: level {_fmt(worst)} A exceeds limits.current_a = {_fmt(limits.current_a)} A")
        if compliance > limits.voltage_v:
            add(f"{label}: compliance {_fmt(compliance)} V exceeds limits.voltage_v = "
                f"{_fmt(limits.voltage_v)} V")
        elif lo < 0 and compliance > limits.reverse_voltage_v:
            add(f"{label}: negative current with compliance {_fmt(compliance)} V could reverse-bias "
                f"the cell beyond limits.reverse_voltage_v = {_fmt(limits.reverse_voltage_v)} V")
    else:
        add(f"{label}: source_mode {mode!r} must be one of {pl.SOURCE_MODES}")


def _check_common(step: Any, label: str, add) -> None:
    if not _finite(step.nplc) or step.nplc < 0:
        add(f"{label}: nplc = {step.nplc!r} must be >= 0 (0: the shortest integration)")


def _check_sweep(step: pl.SweepStep, limits: pl.Limits, label: str, add) -> None:
    _check_common(step, label, add)
    if step.spacing not in pl.SPACINGS:
        add(f"{label}: spacing {step.spacing!r} must be one of {pl.SPACINGS}")
    if step.direction not in pl.DIRECTIONS:
        add(f"{label}: direction {step.direction!r} must be one of {pl.DIRECTIONS}")
    if step.acquisition not in pl.ACQUISITIONS:
        add(f"{label}: acquisition {step.acquisition!r} must be one of {pl.ACQUISITIONS}")
    if not isinstance(step.points, int) or step.points < 1:
        add(f"{label}: points = {step.points!r} must be a whole number >= 1")
    if not isinstance(step.repeats, int) or step.repeats < 1:
        add(f"{label}: repeats = {step.repeats!r} must be a whole number >= 1")
    if not _finite(step.settle_s) or step.settle_s < 0:
        add(f"{label}: settle_s = {step.settle_s!r} must be >= 0")
    _check_levels(label, step.source_mode, (step.start, step.stop), step.compliance, limits, add)
    if step.spacing == "log" and _finite(step.start) and _finite(step.stop):
        if step.start == 0 or step.stop == 0 or (step.start > 0) != (step.stop > 0):
            add(f"{label}: log spacing needs start and stop of the same sign, neither zero")
    if step.spacing == "dense-near-voc" and step.voc_estimate_v is not None:
        if not _finite(step.voc_estimate_v):
            add(f"{label}: voc_estimate_v = {step.voc_estimate_v!r} is not a number")


def _check_hold(step: pl.HoldStep, limits: pl.Limits, label: str, add) -> None:
    _check_common(step, label, add)
    if step.mode not in pl.HOLD_MODES:
        add(f"{label}: mode {step.mode!r} must be one of {pl.HOLD_MODES}")
        return
    if not _finite(step.duration_s) or step.duration_s < 0:
        add(f"{label}: duration_s = {step.duration_s!r} must be >= 0")
    if not _finite(step.interval_s) or step.interval_s <= 0:
        add(f"{label}: interval_s = {step.interval_s!r} must be positive")
    mode, level = hold_source(step)
    _check_levels(label, mode, (level,), step.compliance, limits, add)


def _check_mppt(step: pl.MpptStep, limits: pl.Limits, label: str, add) -> None:
    _check_common(step, label, add)
    if not _finite(step.duration_s) or step.duration_s < 0:
        add(f"{label}: duration_s = {step.duration_s!r} must be >= 0")
    if not _finite(step.interval_s) or step.interval_s <= 0:
        add(f"{label}: interval_s = {step.interval_s!r} must be positive")
    if not _finite(step.step_v) or step.step_v <= 0 or step.step_v >= limits.voltage_v:
        add(f"{label}: step_v = {step.step_v!r} must be positive and below limits.voltage_v")
    levels = [0.0, limits.voltage_v] if step.start_v is None else [step.start_v]
    if step.start_v is not None and _finite(step.start_v) and step.start_v < 0:
        add(f"{label}: start_v = {_fmt(step.start_v)} V must be >= 0 (the power quadrant)")
    _check_levels(label, "voltage", levels, step.compliance, limits, add)


def hold_source(step: pl.HoldStep) -> tuple[str, float]:
    """(source mode, level) that realise a hold: Voc = 0 A from a current source, Isc = 0 V,
    bias = ``level`` volts."""
    if step.mode == "voc":
        return "current", 0.0
    if step.mode == "isc":
        return "voltage", 0.0
    return "voltage", float(step.level)


# ---------------------------------------------------------------------------------------
# Levels

def sweep_levels(step: pl.SweepStep, voc_v: float | None = None) -> list[float]:
    """The set of levels of a sweep, ordered from ``start`` to ``stop``.

    ``voc_v`` is the Voc to crowd points around for "dense-near-voc" (defaults to the step's
    ``voc_estimate_v``; with neither the spacing falls back to linear). A current-sourced
    sweep crowds its points around 0 A, where the cell is at open circuit."""
    n = step.points
    a, b = float(step.start), float(step.stop)
    if n == 1:
        return [a]
    if step.spacing == "log":
        ratio = b / a
        return [a] + [a * ratio ** (k / (n - 1)) for k in range(1, n - 1)] + [b]
    if step.spacing == "dense-near-voc":
        voc = step.voc_estimate_v if voc_v is None else voc_v
        if step.source_mode == "current":
            voc = 0.0
        if voc is not None and a != b:
            return _dense_near(a, b, n, float(voc))
    return [a] + [a + (b - a) * k / (n - 1) for k in range(1, n - 1)] + [b]


def _dense_near(a: float, b: float, n: int, centre: float) -> list[float]:
    """``n`` levels from ``a`` to ``b`` whose density is 1 + G*exp(-((x-c)/w)^2/2): the inverse
    of the density's cumulative integral (closed form with erf) taken at equal steps."""
    lo, hi = min(a, b), max(a, b)
    width = DENSE_WIDTH_FRACTION * (hi - lo)
    s = math.sqrt(2.0) * width
    k = DENSE_GAIN * width * math.sqrt(math.pi / 2.0)

    def cumulative(x: float) -> float:
        return (x - lo) + k * (math.erf((x - centre) / s) - math.erf((lo - centre) / s))

    total = cumulative(hi)
    out = [lo]
    for j in range(1, n - 1):
        target = total * j / (n - 1)
        x0, x1 = lo, hi
        for _ in range(60):          # bisection: the cumulative integral is strictly increasing
            xm = 0.5 * (x0 + x1)
            if cumulative(xm) < target:
                x0 = xm
            else:
                x1 = xm
        out.append(0.5 * (x0 + x1))
    out.append(hi)
    return out if a <= b else out[::-1]


def sweep_segments(step: pl.SweepStep, voc_v: float | None = None) -> list[tuple[str, list[float]]]:
    """The measured order: ``[(direction, levels), ...]``. "forward" runs from the lower to
    the higher level, "reverse" the other way; "both" measures from ``start`` towards
    ``stop`` and back (forward first when start < stop, reverse first otherwise)."""
    levels = sweep_levels(step, voc_v)
    ascending = sorted(levels)
    descending = ascending[::-1]
    if step.direction == "forward":
        return [("forward", ascending)]
    if step.direction == "reverse":
        return [("reverse", descending)]
    if step.start <= step.stop:
        return [("forward", ascending), ("reverse", descending)]
    return [("reverse", descending), ("forward", ascending)]
