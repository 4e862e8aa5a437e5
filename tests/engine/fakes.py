"""In-memory instruments satisfying ``tracer.ports``, for fast engine tests.

The fake cell's physics is pvlib's single-diode solution (``pvlib.pvsystem.i_from_v`` /
``v_from_i``, Lambert W), i.e. an oracle from outside the project. The fake SMU keeps the
*true* state (``output_on``, ``level``) that tests assert on, logs every call, and takes
injected faults: raise an exception at the n-th call of a method (or at the n-th call of
any method), hang inside a call, override readings, open the interlock, trip OVP.
"""
from __future__ import annotations

import functools
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

from pvlib.pvsystem import i_from_v, v_from_i


class FakeInstrumentError(Exception):
    instrument_error = True
    link_lost = False


class FakeLinkLost(FakeInstrumentError):
    link_lost = True


@dataclass(frozen=True)
class FakeReading:
    voltage_v: float
    current_a: float
    in_compliance: bool


@dataclass(frozen=True)
class CellParams:
    """Single-diode parameters of the fake cell (demo values, not a real device)."""

    photocurrent_stc_a: float = 0.035      # at 1000 W/m2
    saturation_current_a: float = 2e-10
    resistance_series_ohm: float = 0.8
    resistance_shunt_ohm: float = 800.0
    n_ns_vth_v: float = 1.3 * 0.025693     # ideality 1.3 x kT/q at 25 C (scipy.constants)


@functools.lru_cache(maxsize=100_000)
def _gen_current(voltage_v: float, photocurrent_a: float, p: CellParams) -> float:
    return float(i_from_v(voltage_v, photocurrent_a, p.saturation_current_a,
                          p.resistance_series_ohm, p.resistance_shunt_ohm, p.n_ns_vth_v))


@functools.lru_cache(maxsize=100_000)
def _voltage(gen_current_a: float, photocurrent_a: float, p: CellParams) -> float:
    return float(v_from_i(gen_current_a, photocurrent_a, p.saturation_current_a,
                          p.resistance_series_ohm, p.resistance_shunt_ohm, p.n_ns_vth_v))


@dataclass
class Fault:
    method: str | None            # None: any method
    at: int                       # 1-based count of matching calls
    exc: BaseException | None = None
    hang_s: float = 0.0           # block this long first (a silent instrument)
    action: Callable[[Any], None] | None = None   # run against the instrument instead
    seen: int = 0
    fired: bool = False


class FakeInstrument:
    """Call logging and fault injection shared by all fakes."""

    identity = "Fake Works,FAKE,0,1"

    def __init__(self, address: str):
        self.address = address
        self.calls: list[str] = []
        self.faults: list[Fault] = []
        self.link_down = False
        self._lock = threading.RLock()

    def inject(self, method: str | None = None, *, at: int = 1, exc: BaseException | None = None,
               hang_s: float = 0.0, action: Callable[[Any], None] | None = None) -> Fault:
        fault = Fault(method, at, exc, hang_s, action)
        self.faults.append(fault)
        return fault

    def _enter(self, name: str) -> None:
        self.calls.append(name)
        if self.link_down and name not in ("reconnect", "make_safe", "close"):
            raise FakeLinkLost(f"{self.address}: link is down ({name})")
        for fault in self.faults:
            if fault.fired or (fault.method is not None and fault.method != name):
                continue
            fault.seen += 1
            if fault.seen != fault.at:
                continue
            fault.fired = True
            if fault.hang_s:
                time.sleep(fault.hang_s)
            if fault.action is not None:
                fault.action(self)
            if fault.exc is not None:
                if getattr(fault.exc, "link_lost", False):
                    self.link_down = True
                raise fault.exc

    def reconnect(self) -> None:
        self._enter("reconnect")
        self.link_down = False

    def close(self) -> None:
        self._enter("close")


class FakeLight(FakeInstrument):
    def __init__(self, *, reference_isc_stc_a: float = 0.12, irradiance_w_m2: float = 1000.0):
        super().__init__("FAKE::LIGHT")
        self.reference_isc_stc_a = reference_isc_stc_a
        self.irradiance_set_w_m2 = irradiance_w_m2
        self.open = False
        self.failed = False                  # lamp dead: no light even with the shutter open
        self.drift: Callable[[int], float] = lambda k: 1.0   # factor on the k-th reference read
        self.reads = 0

    @property
    def irradiance_w_m2(self) -> float:
        if not self.open or self.failed:
            return 0.0
        return self.irradiance_set_w_m2 * self.drift(self.reads)

    def shutter(self, open_: bool) -> None:
        self._enter("shutter")
        self.open = bool(open_)

    def shutter_is_open(self) -> bool:
        self._enter("shutter_is_open")
        return self.open

    def set_irradiance(self, irradiance_w_m2: float) -> None:
        self._enter("set_irradiance")
        self.irradiance_set_w_m2 = float(irradiance_w_m2)

    def wait_settled(self, timeout_s: float) -> None:
        self._enter("wait_settled")

    def reference_current(self) -> float:
        self._enter("reference_current")
        self.reads += 1
        return self.reference_isc_stc_a * self.irradiance_w_m2 / 1000.0

    def reference_temperature(self) -> float:
        self._enter("reference_temperature")
        return 25.0


def reference_calibration(light: FakeLight) -> Callable[[float, float], float]:
    """G = 1000 W/m2 * Isc / Isc_STC: the reference-cell relation of IEC 60904-2 without the
    temperature term (the fake reference cell sits at 25 C)."""
    return lambda isc_a, temp_c: 1000.0 * isc_a / light.reference_isc_stc_a


class FakeThermometer(FakeInstrument):
    def __init__(self, temperature_c: float = 25.0):
        super().__init__("FAKE::THERM")
        self.value_c = temperature_c
        self.target_c = temperature_c
        self.approach = 0.5           # fraction of the gap closed per read

    def temperature(self) -> float:
        self._enter("temperature")
        self.value_c += (self.target_c - self.value_c) * self.approach
        return self.value_c

    def set_target(self, temperature_c: float) -> None:
        self._enter("set_target")
        self.target_c = float(temperature_c)


class FakeSwitch(FakeInstrument):
    def __init__(self, channels: int = 4):
        super().__init__("FAKE::SWITCH")
        self.channels = channels
        self.closed_channel: int | None = None
        self.misroute = False          # a stuck relay: reports a different channel

    def select(self, channel: int) -> None:
        self._enter("select")
        self.closed_channel = int(channel)

    def selected(self) -> int | None:
        self._enter("selected")
        if self.misroute and self.closed_channel is not None:
            return self.closed_channel % self.channels + 1
        return self.closed_channel

    def open_all(self) -> None:
        self._enter("open_all")
        self.closed_channel = None


class FakeSourceMeter(FakeInstrument):
    """A source-measure unit wired to a fake single-diode cell (lit by ``light``, if any)."""

    def __init__(self, *, cell: CellParams = CellParams(), light: FakeLight | None = None,
                 list_rate: int = 7):
        super().__init__("FAKE::SMU")
        self.cell = cell
        self.light = light
        self.mode = "voltage"
        self.level = 0.0
        self.compliance = 0.01
        self.ovp = 210.0
        self.nplc = 1.0
        self.four_wire = False
        self.output_on = False
        self.interlock = False
        self.protection_latched = False
        self.compliance_scale = 1.0           # >1: reads back a different compliance
        self.ovp_scale = 1.0
        self.reading_override: Callable[[FakeReading], FakeReading] | None = None
        self.make_safe_works = True
        self.list_rate = list_rate            # list points completed per progress poll
        self.list_levels: list[float] = []
        self.list_settle_s = 0.0
        self.list_done = 0
        self.list_running = False
        self.output_history: list[bool] = []  # every change of the true output state
        self.max_abs_level_on = 0.0           # largest |level| ever applied with the output on

    # -- physics
    def _photocurrent(self) -> float:
        g = 0.0 if self.light is None else self.light.irradiance_w_m2
        return self.cell.photocurrent_stc_a * g / 1000.0

    def _solve(self, level: float) -> FakeReading:
        iph = self._photocurrent()
        if self.mode == "voltage":
            i_load = -_gen_current(round(level, 12), iph, self.cell)
            if abs(i_load) > self.compliance:
                i_load = self.compliance if i_load > 0 else -self.compliance
                v = _voltage(round(-i_load, 15), iph, self.cell)
                reading = FakeReading(v, i_load, True)
            else:
                reading = FakeReading(level, i_load, False)
        else:
            v = _voltage(round(-level, 15), iph, self.cell)
            if abs(v) > self.compliance:
                v = self.compliance if v > 0 else -self.compliance
                reading = FakeReading(v, -_gen_current(round(v, 12), iph, self.cell), True)
            else:
                reading = FakeReading(v, level, False)
        if self.reading_override is not None:
            reading = self.reading_override(reading)
        if abs(reading.voltage_v) > self.ovp:
            self._force_off()
        return reading

    def _set_output(self, on: bool) -> None:
        if on != self.output_on:
            self.output_history.append(on)
        self.output_on = on
        if on:
            self.max_abs_level_on = max(self.max_abs_level_on, abs(self.level))

    def _force_off(self) -> None:
        self.protection_latched = True
        self._set_output(False)
        self.list_running = False

    def open_interlock(self) -> None:
        """The safety interlock opens: the output is forced off and stays off."""
        self.interlock = True
        self._force_off()

    def _require_on(self, what: str) -> None:
        if not self.output_on:
            raise FakeInstrumentError(f'-221,"Settings conflict; output off" ({what})')

    # -- the port
    def configure(self, *, source_mode: str, compliance: float, nplc: float, four_wire: bool,
                  source_range: float | None = None, measure_range: float | None = None) -> None:
        self._enter("configure")
        if self.output_on and source_mode != self.mode:
            raise FakeInstrumentError('-221,"Settings conflict; mode change with output on"')
        self.mode = source_mode
        self.compliance = float(compliance)
        self.nplc = nplc
        self.four_wire = four_wire

    def read_compliance(self) -> float:
        self._enter("read_compliance")
        return self.compliance * self.compliance_scale

    def set_overvoltage_protection(self, voltage_v: float) -> None:
        self._enter("set_overvoltage_protection")
        self.ovp = float(voltage_v)

    def read_overvoltage_protection(self) -> float:
        self._enter("read_overvoltage_protection")
        return self.ovp * self.ovp_scale

    def set_level(self, value: float) -> None:
        self._enter("set_level")
        self.level = float(value)
        if self.output_on:
            self.max_abs_level_on = max(self.max_abs_level_on, abs(self.level))

    def measure(self) -> FakeReading:
        self._enter("measure")
        self._require_on("measure")
        return self._solve(self.level)

    def set_level_and_measure(self, value: float) -> FakeReading:
        self._enter("set_level_and_measure")
        self.level = float(value)
        self._require_on("set_level_and_measure")
        self.max_abs_level_on = max(self.max_abs_level_on, abs(self.level))
        return self._solve(self.level)

    def output(self, on: bool) -> None:
        self._enter("output")
        if on and (self.interlock or self.protection_latched):
            raise FakeInstrumentError('-221,"Settings conflict; interlock open or OVP latched"')
        self._set_output(bool(on))

    def output_is_on(self) -> bool:
        self._enter("output_is_on")
        return self.output_on

    def protection_tripped(self) -> bool:
        self._enter("protection_tripped")
        return self.protection_latched

    def interlock_open(self) -> bool:
        self._enter("interlock_open")
        return self.interlock

    def load_list(self, levels: Sequence[float], *, settle_s: float) -> None:
        self._enter("load_list")
        self.list_levels = [float(x) for x in levels] + [0.0]   # drivers end lists at 0
        self.list_settle_s = settle_s
        self.list_done = 0
        self.list_running = False

    def start_list(self) -> None:
        self._enter("start_list")
        self._require_on("start_list")
        self.list_done = 0
        self.list_running = True
        self.list_readings: list[FakeReading] = []

    def list_points_done(self) -> int:
        """Like the driver: the appended 0 level is hidden; the last reading counts only
        once that 0 level has been reached too."""
        self._enter("list_points_done")
        if self.list_running:
            for _ in range(self.list_rate):
                if self.list_done >= len(self.list_levels) or not self.output_on:
                    self.list_running = False
                    break
                self.level = self.list_levels[self.list_done]
                self.max_abs_level_on = max(self.max_abs_level_on, abs(self.level))
                self.list_readings.append(self._solve(self.level))
                self.list_done += 1
            if self.list_done >= len(self.list_levels):
                self.list_running = False
        n = len(self.list_levels) - 1
        return n if self.list_done > n else min(self.list_done, n - 1)

    def fetch_list(self, start: int, count: int) -> list[FakeReading]:
        self._enter("fetch_list")
        return list(self.list_readings[start:start + count])

    def abort(self) -> None:
        self._enter("abort")
        self.list_running = False

    def make_safe(self) -> bool:
        self._enter("make_safe")
        if not self.make_safe_works:
            return False
        self.link_down = False
        self.list_running = False
        self.level = 0.0
        self._set_output(False)
        return not self.output_on


@dataclass
class FakeBench:
    smu: FakeSourceMeter
    light: FakeLight | None = None
    thermometer: FakeThermometer | None = None
    switch: FakeSwitch | None = None
    instruments: list[FakeInstrument] = field(default_factory=list)

    def all_calls(self) -> int:
        return sum(len(i.calls) for i in self.instruments)


def make_fake_bench(*, light: bool = True, thermometer: bool = True, switch: bool = True,
                    cell: CellParams = CellParams(), list_rate: int = 7) -> FakeBench:
    lamp = FakeLight() if light else None
    smu = FakeSourceMeter(cell=cell, light=lamp, list_rate=list_rate)
    therm = FakeThermometer() if thermometer else None
    sw = FakeSwitch() if switch else None
    instruments = [x for x in (smu, lamp, therm, sw) if x is not None]
    return FakeBench(smu, lamp, therm, sw, instruments)
