"""The seams between the engine and the instruments: structural types, stdlib only.

Drivers in ``drivers/`` satisfy these protocols *structurally* (they never import this
module); a contract test checks ``isinstance(driver, SourceMeter)``. The engine only ever
sees these types, so a fake in a unit test and a real instrument are interchangeable.

Errors: every driver method raises a subclass of ``drivers.errors.InstrumentError``; the
engine recognises the family by the attribute ``instrument_error = True`` on the exception
class (so the engine need not import ``drivers``), and ``link_lost = True`` marks a lost or
hung connection (timeout, closed socket) after which ``reconnect()`` is the way back.
"""
from __future__ import annotations

from typing import Protocol, Sequence, runtime_checkable


@runtime_checkable
class Reading(Protocol):
    voltage_v: float          # at the terminals (sense point when four-wire)
    current_a: float          # LOAD convention: into the + terminal
    in_compliance: bool       # the source was clamped by its compliance limit


@runtime_checkable
class SourceMeter(Protocol):
    address: str
    identity: str             # raw *IDN? reply, read at connect

    def configure(self, *, source_mode: str, compliance: float, nplc: float, four_wire: bool,
                  source_range: float | None = None, measure_range: float | None = None) -> None:
        """Set mode ("voltage"|"current"), compliance [A or V], integration [NPLC], sense,
        ranges (None = auto); each step followed by an error-queue check."""

    def read_compliance(self) -> float:
        """The compliance limit as the instrument reports it [A or V]."""

    def set_overvoltage_protection(self, voltage_v: float) -> None: ...

    def read_overvoltage_protection(self) -> float: ...

    def set_level(self, value: float) -> None:
        """Source level [V or A] (load convention for current)."""

    def measure(self) -> Reading:
        """One reading at the present level, with the compliance flag."""

    def set_level_and_measure(self, value: float) -> Reading:
        """Set the level and read one point in a single round trip."""

    def output(self, on: bool) -> None: ...

    def output_is_on(self) -> bool:
        """Queried from the instrument, never cached."""

    def protection_tripped(self) -> bool:
        """OVP latched or output forced off by protection/interlock."""

    def interlock_open(self) -> bool: ...

    # Instrument-run list sweeps
    def load_list(self, levels: Sequence[float], *, settle_s: float) -> None: ...

    def start_list(self) -> None: ...

    def list_points_done(self) -> int: ...

    def fetch_list(self, start: int, count: int) -> list[Reading]: ...

    def abort(self) -> None: ...

    # Recovery
    def make_safe(self) -> bool:
        """Best effort, never raises: abort, level 0, output off, then read the output
        state back; True only if it was read back off."""

    def reconnect(self) -> None: ...

    def close(self) -> None: ...


@runtime_checkable
class LightSource(Protocol):
    address: str
    identity: str

    def shutter(self, open_: bool) -> None: ...

    def shutter_is_open(self) -> bool: ...

    def set_irradiance(self, irradiance_w_m2: float) -> None: ...

    def wait_settled(self, timeout_s: float) -> None: ...

    def reference_current(self) -> float:
        """Reference cell short-circuit current [A]."""

    def reference_temperature(self) -> float:
        """Reference cell temperature [C]."""

    def close(self) -> None: ...


@runtime_checkable
class Thermometer(Protocol):
    address: str
    identity: str

    def temperature(self) -> float:
        """Stage temperature [C]."""

    def set_target(self, temperature_c: float) -> None: ...

    def close(self) -> None: ...


@runtime_checkable
class ChannelSwitch(Protocol):
    address: str
    identity: str
    channels: int

    def select(self, channel: int) -> None:
        """Connect exactly this channel (break before make)."""

    def selected(self) -> int | None: ...

    def open_all(self) -> None: ...

    def close(self) -> None: ...
