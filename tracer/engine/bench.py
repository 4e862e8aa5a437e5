"""The bench the engine runs on: instruments (objects satisfying ``tracer.ports``) and limits."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Mapping

from tracer.plan import Limits
from tracer.ports import ChannelSwitch, LightSource, SourceMeter, Thermometer


@dataclass(frozen=True, kw_only=True)
class Bench:
    """What the composition root hands to :class:`~tracer.engine.Engine`.

    ``hard_limits``: nothing a plan asks for may exceed these. ``irradiance_from_reference``
    turns the reference cell's (short-circuit current [A], temperature [C]) into irradiance
    [W/m2] (its calibration); without it, light stability is judged on the reference current
    itself. ``snapshot``: JSON-safe description recorded as ``RunStarted.bench``.
    """

    name: str
    smu: SourceMeter
    hard_limits: Limits
    light: LightSource | None = None
    thermometer: Thermometer | None = None
    switch: ChannelSwitch | None = None
    irradiance_from_reference: Callable[[float, float], float] | None = None
    snapshot: Mapping[str, Any] = field(default_factory=dict)

    def describe(self) -> dict[str, Any]:
        """``RunStarted.bench``: the snapshot, completed with the name, the hard limits and
        each instrument's address and identity as the driver objects report them."""
        out: dict[str, Any] = dict(self.snapshot)
        out.setdefault("name", self.name)
        out.setdefault("hard_limits", {
            "voltage_v": self.hard_limits.voltage_v, "current_a": self.hard_limits.current_a,
            "power_w": self.hard_limits.power_w,
            "reverse_voltage_v": self.hard_limits.reverse_voltage_v})
        instruments = {role: dict(v) if isinstance(v, Mapping) else v
                       for role, v in dict(out.get("instruments", {})).items()}
        for role in ("smu", "light", "thermometer", "switch"):
            obj = getattr(self, role)
            if obj is None:
                continue
            entry = instruments.setdefault(role, {})
            if isinstance(entry, dict):
                entry.setdefault("address", str(getattr(obj, "address", "")))
                entry.setdefault("identity", str(getattr(obj, "identity", "")))
                entry.setdefault("driver", type(obj).__name__)
        out["instruments"] = instruments
        return out
