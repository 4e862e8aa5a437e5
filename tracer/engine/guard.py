"""The per-point safety check and the exceptions that end a run.

A :class:`Trip` is an interlock firing: it carries a short ``cause`` code, one sentence for
a person, and the offending value and limit (SI). The engine raises it, makes the output
safe, then publishes ``InterlockTripped`` from it.

Compliance policy (decided here, documented in ``tracer/engine/README.md``):

- a reading in compliance while the step's compliance is *below* the protection limit is
  the source clamping as asked (e.g. a dark forward sweep running into its current
  compliance): the point is recorded with ``in_compliance=True`` and the sweep goes on;
- a reading in compliance while the step's compliance is *at* the protection limit
  (``limits.current_a`` for a voltage source, ``limits.voltage_v`` for a current source,
  within :data:`ROUNDING_REL`) means the device sits at the most the plan allows: the run
  is aborted (cause ``"compliance"``) so that an operator looks before anything else is
  measured on that device.
"""
from __future__ import annotations

import math

from tracer.plan import Limits

from .planning import ROUNDING_REL


class Trip(Exception):
    """An interlock fired. Raised inside the worker; never escapes the engine."""

    def __init__(self, cause: str, message: str, *, value: float | None = None,
                 limit: float | None = None):
        super().__init__(message)
        self.cause = cause
        self.message = message
        self.value = value
        self.limit = limit


def matches(requested: float, readback: float, rel: float = ROUNDING_REL) -> bool:
    """True when an instrument's read-back equals the requested setting within rounding."""
    try:
        requested = float(requested)
        readback = float(readback)
    except (TypeError, ValueError):
        return False
    if not (math.isfinite(requested) and math.isfinite(readback)):
        return False
    return abs(readback - requested) <= rel * abs(requested) + 1e-15


class PointGuard:
    """Checks one reading against the plan limits. ``check`` returns a :class:`Trip` (not
    raised, so the caller decides the order of "make safe" and "record"), or None."""

    __slots__ = ("v_max", "i_max", "p_max", "v_reverse", "limits", "source_mode",
                 "compliance", "compliance_at_limit")

    def __init__(self, limits: Limits, *, source_mode: str, compliance: float):
        slack = 1.0 + ROUNDING_REL
        self.limits = limits
        self.v_max = limits.voltage_v * slack
        self.i_max = limits.current_a * slack
        self.p_max = limits.power_w * slack
        self.v_reverse = -limits.reverse_voltage_v * slack
        self.source_mode = source_mode
        self.compliance = compliance
        protection = limits.current_a if source_mode == "voltage" else limits.voltage_v
        self.compliance_at_limit = compliance >= protection * (1.0 - ROUNDING_REL)

    def check(self, voltage_v: float, current_a: float, in_compliance: bool) -> Trip | None:
        v = voltage_v
        i = current_a
        # NaN fails every comparison below, so test it first (a garbled reading that slipped
        # through as NaN must never count as "inside the limits").
        if not (math.isfinite(v) and math.isfinite(i)):
            return Trip("bad-reading", f"the source-measure unit returned a non-finite reading "
                        f"(V={v!r}, I={i!r})", value=v if not math.isfinite(v) else i)
        if in_compliance and self.compliance_at_limit:
            unit = "A" if self.source_mode == "voltage" else "V"
            value = i if self.source_mode == "voltage" else v
            return Trip("compliance", f"the source reached its compliance of {self.compliance:g} {unit}, "
                        f"which is the protection limit of this plan", value=value,
                        limit=self.compliance)
        if v < self.v_reverse:
            return Trip("reverse-bias", f"reverse bias {v:.6g} V beyond the limit of "
                        f"{self.limits.reverse_voltage_v:g} V", value=v,
                        limit=-self.limits.reverse_voltage_v)
        if abs(v) > self.v_max:
            return Trip("voltage-limit", f"|V| = {abs(v):.6g} V exceeds the limit of "
                        f"{self.limits.voltage_v:g} V", value=v, limit=self.limits.voltage_v)
        if abs(i) > self.i_max:
            return Trip("current-limit", f"|I| = {abs(i):.6g} A exceeds the limit of "
                        f"{self.limits.current_a:g} A", value=i, limit=self.limits.current_a)
        if abs(v * i) > self.p_max:
            return Trip("power-limit", f"|V*I| = {abs(v * i):.6g} W exceeds the limit of "
                        f"{self.limits.power_w:g} W", value=abs(v * i), limit=self.limits.power_w)
        return None


def iec_instability(values: list[float]) -> float:
    """Temporal instability (max - min) / (max + min), the IEC 60904-9 definition applied to
    reference-cell readings. Infinite when there is no light to speak of (max + min <= 0)."""
    if not values:
        return 0.0
    hi, lo = max(values), min(values)
    if not (math.isfinite(hi) and math.isfinite(lo)) or hi + lo <= 0:
        return math.inf
    return (hi - lo) / (hi + lo)
