"""What the window shows about the bench it drives (plain data, filled in by the
composition root from the bench profile and the engine's bench description)."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Mapping


@dataclass(frozen=True)
class InstrumentInfo:
    role: str
    address: str
    identity: str = ""


@dataclass(frozen=True)
class BenchInfo:
    name: str
    simulated: bool = False
    instruments: tuple[InstrumentInfo, ...] = ()
    hard_limits: Mapping[str, float] = field(default_factory=dict)

    @classmethod
    def from_description(cls, description: Mapping[str, Any], *, simulated: bool = False
                         ) -> "BenchInfo":
        """From ``Bench.describe()`` (the same record a run's ``RunStarted.bench`` holds)."""
        instruments = []
        for role, entry in dict(description.get("instruments") or {}).items():
            entry = entry if isinstance(entry, Mapping) else {}
            instruments.append(InstrumentInfo(role=str(role), address=str(entry.get("address", "")),
                                              identity=str(entry.get("identity", ""))))
        limits = {k: float(v) for k, v in dict(description.get("hard_limits") or {}).items()
                  if isinstance(v, (int, float))}
        return cls(name=str(description.get("name", "bench")), simulated=simulated,
                   instruments=tuple(instruments), hard_limits=limits)


ROLE_NAMES = {"smu": "SMU", "light": "Light", "thermometer": "Stage", "switch": "Switch"}


def limits_text(limits: Mapping[str, Any] | None) -> str:
    """``1 V · 100 mA · 0.1 W · reverse 0.5 V`` from a limits mapping (SI)."""
    if not limits:
        return "–"
    parts = []

    def num(key: str) -> float | None:
        v = limits.get(key)
        return float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else None

    v, i, p, r = num("voltage_v"), num("current_a"), num("power_w"), num("reverse_voltage_v")
    if v is not None:
        parts.append(f"{v:g} V")
    if i is not None:
        parts.append(f"{i * 1e3:g} mA" if i < 1 else f"{i:g} A")
    if p is not None:
        parts.append(f"{p * 1e3:g} mW" if p < 1 else f"{p:g} W")
    if r is not None:
        parts.append(f"reverse {r:g} V")
    return " · ".join(p.replace(" ", "\u00a0") for p in parts) or "–"   # break between items
