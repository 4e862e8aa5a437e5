"""The virtual bench: the physical world behind the four simulated instruments.

One :class:`VirtualBench` holds everything that exists on the bench: the lamp and its
shutter, the reference cell, the temperature-controlled stage, the pixel switch, the devices
under test and the source-measure unit's output stage.  The SCPI instruments
(``instruments.py``) are thin command tables over it.

Time.  The bench has its own simulated clock.  With ``time_scale`` X > 0 simulated time runs
1/X times as fast as real time (X = 1: real time) and operations that take time (integration,
settling, sweeps, lamp settling) really last X times their simulated duration.  With X = 0
everything is instantaneous: the clock only moves when an operation spends time (a reading,
a sweep, ``*OPC?``) or when the harness calls :meth:`VirtualBench.advance`.

Everything continuous (lamp output, stage and reference-cell temperatures, the slow internal
state of hysteretic cells, a running list sweep) is brought up to date lazily, in order,
whenever anyone looks (:meth:`advance_to_now`), so the result does not depend on when the
server threads happen to run.

Locking.  ``self.lock`` (not re-entrant) guards the whole bench.  The server holds it while it
executes one message; :meth:`spend` and :meth:`wait_for` release it while they sleep.
"""
from __future__ import annotations

import math
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from .cell_physics import CircuitPoint, OperatingCell, at_conditions, open_circuit_voltage, operating_point
from .scenario import Scenario

OVERFLOW = 9.9e37

SMU_VOLTAGE_RANGES_V = (0.2, 2.0, 20.0, 200.0)
SMU_CURRENT_RANGES_A = (1e-6, 1e-5, 1e-4, 1e-3, 1e-2, 1e-1, 1.0, 3.0)
OVP_MAX_V = 210.0
FAULT_SHORT_OHM = 0.01
LIST_MAX_POINTS = 10_000
#: simulated time one status poll (``*STB?``, ``*ESR?``, ``STAT:...?``) spends at time scale 0
#: while its instrument is settling: it stands for the client's wait between two polls, so a
#: client that polls (rather than blocking on ``*OPC?``) still sees the lamp or stage arrive
STATUS_POLL_S = 0.1

FAULT_NAMES = ("disconnect", "stall", "garble", "instrument-error", "interlock", "compliance",
               "overtemp", "light-failure")

#: harness knobs accepted by ``set``: knob -> (scenario section, key)
KNOBS = {
    "flicker_rel": ("light", "flicker_rel"),
    "warmup_drift_rel": ("light", "warmup_drift_rel"),
    "warmup_time_constant_s": ("light", "warmup_time_constant_s"),
    "lamp_time_constant_s": ("light", "lamp_time_constant_s"),
    "failure_factor": ("light", "failure_factor"),
    "stage_time_constant_s": ("stage", "time_constant_s"),
    "stage_heating_k_per_kw_m2": ("stage", "heating_k_per_kw_m2"),
    "stage_noise_k": ("stage", "noise_k"),
    "ambient_c": ("stage", "ambient_c"),
    "noise_rel_of_range": ("smu", "noise_rel_of_range"),
    "lead_resistance_ohm": ("smu", "lead_resistance_ohm"),
    "source_settle_s": ("smu", "source_settle_s"),
    "reference_noise_rel": ("reference_cell", "noise_rel"),
    "reference_heating_k_per_kw_m2": ("reference_cell", "heating_k_per_kw_m2"),
}


class SimClock:
    def __init__(self, time_scale: float):
        if time_scale < 0:
            raise ValueError("time_scale must be >= 0")
        self.time_scale = float(time_scale)
        self._offset = 0.0
        self._t0 = time.monotonic()

    def now(self) -> float:
        if self.time_scale > 0:
            return self._offset + (time.monotonic() - self._t0) / self.time_scale
        return self._offset

    def jump(self, seconds: float) -> None:
        self._offset += max(0.0, seconds)


@dataclass
class Sweep:
    function: str            # "VOLT" or "CURR"
    levels: list[float]
    t_start: float
    point_time_s: float
    next_index: int = 0
    level_applied: int = -1  # index of the level currently applied

    @property
    def t_end(self) -> float:
        return self.t_start + len(self.levels) * self.point_time_s


@dataclass
class SmuState:
    """Settings and output state of the source-measure unit (``*RST`` values)."""

    function: str = "VOLT"
    level: dict = field(default_factory=lambda: {"VOLT": 0.0, "CURR": 0.0})
    source_range: dict = field(default_factory=lambda: {"VOLT": 200.0, "CURR": 3.0})
    source_auto: dict = field(default_factory=lambda: {"VOLT": True, "CURR": True})
    compliance: dict = field(default_factory=lambda: {"CURR": 0.01, "VOLT": 20.0})
    measure_range: dict = field(default_factory=lambda: {"CURR": 3.0, "VOLT": 200.0})
    measure_auto: dict = field(default_factory=lambda: {"CURR": True, "VOLT": True})
    last_range: dict = field(default_factory=lambda: {"CURR": 3.0, "VOLT": 200.0})
    ovp_v: float = OVP_MAX_V
    nplc: float = 1.0
    remote_sense: bool = False
    output_on: bool = False
    source_mode: dict = field(default_factory=lambda: {"VOLT": "FIX", "CURR": "FIX"})
    lists: dict = field(default_factory=lambda: {"VOLT": [], "CURR": []})
    trigger_count: int = 1
    trigger_delay_s: float = 0.0
    data_format: str = "ASC"
    byte_order: str = "NORM"
    last_clamped: dict = field(default_factory=lambda: {"CURR": False, "VOLT": False})
    buffer: list = field(default_factory=list)
    buffer_valid: bool = False
    sweep: Sweep | None = None


@dataclass
class Reading:
    voltage_v: float
    current_a: float
    in_compliance: bool


class VirtualBench:
    def __init__(self, scenario: Scenario, time_scale: float = 0.0, seed: int | None = 0):
        self.scenario = scenario
        self.settings = {k: dict(v) for k, v in scenario.settings.items()}
        self.clock = SimClock(time_scale)
        self.rng = np.random.default_rng(seed)
        self.lock = threading.Lock()
        self.stop_event = threading.Event()
        self.pixels = list(scenario.pixels)
        self.memory_v = [0.0] * len(self.pixels)
        self.t = 0.0
        # switch
        self.closed_pixel: int | None = None
        # light
        light = self.settings["light"]
        self.lamp_setpoint = float(light["setpoint_w_m2"])
        self.lamp_output = self.lamp_setpoint       # the lamp is warm and settled at power-on
        self.lamp_ignition_t = 0.0
        self.shutter_open = False
        self.light_failed = False
        # stage and reference cell
        stage = self.settings["stage"]
        self.stage_setpoint_c = float(stage["setpoint_c"])
        self.stage_t_c = self.stage_setpoint_c
        self.stage_runaway = False
        self.reference_t_c = float(stage["ambient_c"])
        # SMU
        self.smu = SmuState()
        self.interlock_open = False
        self.forced_off = False       # OUTP:PROT:TRIP? latch
        self.ovp_tripped = False      # VOLT:PROT:TRIP? latch
        self.short_fault = False
        self.output_off_reason = ""
        # harness bookkeeping
        self.messages = {"smu": 0, "light": 0, "thermometer": 0, "switch": 0}
        self.armed_faults: list[dict] = []
        self.fault_history: list[dict] = []
        self.pending_garble = False
        self.stall_next_connection = False
        self.last_smu_connection: Any = None
        self.connection_hooks: dict[str, Callable] = {}
        self.instruments: dict[str, Any] = {}
        self._point_cache: tuple | None = None
        self._last_vd: float | None = None

    # ------------------------------------------------------------------ time
    @property
    def time_scale(self) -> float:
        return self.clock.time_scale

    def now(self) -> float:
        return self.clock.now()

    def spend(self, seconds: float) -> None:
        """Let ``seconds`` of simulated time pass (caller holds the lock)."""
        if seconds <= 0:
            self.advance_to_now()
            return
        if self.time_scale == 0:
            self.clock.jump(seconds)
        else:
            self.lock.release()
            try:
                self.stop_event.wait(seconds * self.time_scale)
            finally:
                self.lock.acquire()
        self.advance_to_now()

    def wait_for(self, done: Callable[[], bool], remaining: Callable[[], float]) -> None:
        """Spend simulated time until ``done()``; ``remaining()`` estimates what is left."""
        for _ in range(1_000_000):
            self.advance_to_now()
            if done() or self.stop_event.is_set():
                return
            left = max(remaining(), 1e-6)
            if self.time_scale == 0:
                self.clock.jump(left)
            else:
                self.lock.release()
                try:
                    self.stop_event.wait(min(left * self.time_scale, 0.05))
                finally:
                    self.lock.acquire()

    def advance(self, seconds: float) -> None:
        """Harness: move the simulated clock forward (caller holds the lock)."""
        self.clock.jump(seconds)
        self.advance_to_now()

    def advance_to_now(self) -> None:
        self.advance_to(self.now())

    def advance_to(self, t: float) -> None:
        smu = self.smu
        while smu.sweep is not None:
            sw = smu.sweep
            k = sw.next_index
            t0 = sw.t_start + k * sw.point_time_s
            t1 = t0 + sw.point_time_s
            if self.t < t0:
                self._evolve(min(t, t0) - self.t)
            if t < t0:
                return
            if sw.level_applied != k:
                smu.level[sw.function] = sw.levels[k]
                sw.level_applied = k
                if not self.check_protection():
                    return
            if t < t1:
                self._evolve(t - self.t)
                self.check_protection()
                return
            self._evolve(t1 - self.t)
            if not self.check_protection():
                return
            r = self.measure()
            smu.buffer.append((r.voltage_v, r.current_a, r.in_compliance))
            sw.next_index += 1
            if sw.next_index >= len(sw.levels):
                smu.sweep = None
        if t > self.t:
            self._evolve(t - self.t)
            self.check_protection()

    def _evolve(self, dt: float) -> None:
        """Continuous dynamics over ``dt`` with the present settings held constant."""
        if dt <= 0:
            return
        light, stage, ref = self.settings["light"], self.settings["stage"], self.settings["reference_cell"]
        taus = [light["lamp_time_constant_s"], stage["time_constant_s"], ref["time_constant_s"]]
        memory_taus = [p.memory_time_constant_s for p in self.pixels if p.has_memory]
        if self.stage_runaway:
            taus.append(stage["runaway_time_constant_s"])
        tau_min = min(taus + memory_taus)
        steps = int(min(200, max(1, math.ceil(dt / (0.25 * tau_min)))))
        h = dt / steps
        t_target = self.t + dt
        for _ in range(steps):
            a_lamp = 1.0 - math.exp(-h / light["lamp_time_constant_s"])
            self.lamp_output += (self.lamp_setpoint - self.lamp_output) * a_lamp
            g = self.irradiance_at_sample(self.t)
            if self.stage_runaway:
                target, tau = stage["runaway_target_c"], stage["runaway_time_constant_s"]
            else:
                target = self.stage_setpoint_c + stage["heating_k_per_kw_m2"] * g / 1000.0
                tau = stage["time_constant_s"]
            self.stage_t_c += (target - self.stage_t_c) * (1.0 - math.exp(-h / tau))
            ref_target = stage["ambient_c"] + ref["heating_k_per_kw_m2"] * g / 1000.0
            self.reference_t_c += (ref_target - self.reference_t_c) * (1.0 - math.exp(-h / ref["time_constant_s"]))
            if memory_taus:
                self._evolve_memory(h)
            self.t += h
        self.t = t_target

    def _evolve_memory(self, h: float) -> None:
        for index, p in enumerate(self.pixels):
            if not p.has_memory:
                continue
            target = self._memory_target(index)
            a = 1.0 - math.exp(-h / p.memory_time_constant_s)
            self.memory_v[index] += (target - self.memory_v[index]) * a

    def _memory_target(self, index: int) -> float:
        cell = self.device_at(index, self.irradiance_at_sample(self.t))
        if self.closed_pixel == index + 1 and self.smu.output_on:
            return self.solve(cell).cell_voltage_v
        return open_circuit_voltage(cell, self.memory_v[index])

    # ------------------------------------------------------------------ light
    def lamp_irradiance(self, t: float) -> float:
        """What the lamp delivers (shutter open), without flicker [W/m2]."""
        light = self.settings["light"]
        g = self.lamp_output
        if light["warmup_drift_rel"]:
            g *= 1.0 + light["warmup_drift_rel"] * math.exp(-(t - self.lamp_ignition_t) / light["warmup_time_constant_s"])
        if self.light_failed:
            g *= light["failure_factor"]
        return max(0.0, g)

    def irradiance_at_sample(self, t: float | None = None) -> float:
        if not self.shutter_open:
            return 0.0
        return self.lamp_irradiance(self.t if t is None else t)

    def sampled_irradiance(self) -> float:
        """One reading's worth of irradiance, with the lamp's flicker."""
        g = self.irradiance_at_sample()
        flicker = self.settings["light"]["flicker_rel"]
        if g > 0 and flicker:
            g *= 1.0 + flicker * self.rng.standard_normal()
        return max(0.0, g)

    def set_lamp_setpoint(self, value: float) -> None:
        if self.lamp_setpoint <= 0.0 < value:
            self.lamp_ignition_t = self.t
        self.lamp_setpoint = value

    def lamp_settled(self) -> bool:
        rel = self.settings["light"]["settled_rel"]
        return abs(self.lamp_output - self.lamp_setpoint) <= max(rel * self.lamp_setpoint, 0.05)

    def lamp_settle_remaining(self) -> float:
        light = self.settings["light"]
        tol = max(light["settled_rel"] * self.lamp_setpoint, 0.05)
        err = abs(self.lamp_output - self.lamp_setpoint)
        if err <= tol:
            return 0.0
        return light["lamp_time_constant_s"] * math.log(err / tol) * 1.01 + 1e-6

    def reference_isc(self) -> float:
        ref = self.settings["reference_cell"]
        g = self.sampled_irradiance()
        isc = ref["calibration_isc_a"] * g / 1000.0 * (
            1.0 + ref["temperature_coefficient_per_k"] * (self.reference_t_c - 25.0))
        return isc * (1.0 + ref["noise_rel"] * self.rng.standard_normal())

    # ------------------------------------------------------------------ stage
    def stage_reading_c(self) -> float:
        return self.stage_t_c + self.settings["stage"]["noise_k"] * self.rng.standard_normal()

    # ------------------------------------------------------------------ devices and the SMU
    def device_at(self, index: int, irradiance_w_m2: float) -> OperatingCell:
        return at_conditions(self.pixels[index], irradiance_w_m2, self.stage_t_c,
                             FAULT_SHORT_OHM if self.short_fault else None)

    def connected_device(self, irradiance_w_m2: float) -> tuple[OperatingCell | None, float]:
        if self.closed_pixel is None:
            return None, 0.0
        index = self.closed_pixel - 1
        return self.device_at(index, irradiance_w_m2), self.memory_v[index]

    def solve(self, cell: OperatingCell | None, memory_v: float | None = None) -> CircuitPoint:
        smu = self.smu
        f = smu.function
        limit = smu.compliance["CURR"] if f == "VOLT" else smu.compliance["VOLT"]
        if memory_v is None:
            memory_v = self.memory_v[self.closed_pixel - 1] if self.closed_pixel else 0.0
        leads = 2.0 * self.settings["smu"]["lead_resistance_ohm"] + self.settings["switch"]["on_resistance_ohm"]
        point = operating_point(cell, mode=f, level=smu.level[f], limit=limit, lead_resistance_ohm=leads,
                                remote_sense=smu.remote_sense, memory_v=memory_v, guess_v=self._last_vd)
        self._last_vd = point.junction_voltage_v if cell is not None else None
        return point

    def present_point(self) -> CircuitPoint | None:
        """The true operating point now (no noise, no flicker), or None with the output off."""
        smu = self.smu
        if not smu.output_on:
            return None
        g = self.irradiance_at_sample()
        pixel = self.closed_pixel
        key = (smu.function, smu.level[smu.function], smu.compliance["CURR"], smu.compliance["VOLT"],
               smu.remote_sense, pixel, g, self.stage_t_c, self.memory_v[pixel - 1] if pixel else 0.0,
               self.short_fault, self.settings["smu"]["lead_resistance_ohm"])
        if self._point_cache is not None and self._point_cache[0] == key:
            return self._point_cache[1]
        cell, memory = self.connected_device(g)
        point = self.solve(cell, memory)
        self._point_cache = (key, point)
        return point

    def check_protection(self) -> bool:
        """Trip the OVP if the terminal voltage exceeds it; False if the output went off."""
        smu = self.smu
        if not smu.output_on:
            return False
        point = self.present_point()
        if point is not None and abs(point.terminal_voltage_v) > smu.ovp_v:
            self.ovp_tripped = True
            self.force_output_off(f"over-voltage protection ({point.terminal_voltage_v:.3f} V > {smu.ovp_v:g} V)")
            self.instruments["smu"].push_error(302, "Over-voltage protection tripped;output forced off")
            return False
        return True

    def force_output_off(self, reason: str) -> None:
        smu = self.smu
        smu.output_on = False
        self.forced_off = True
        self.output_off_reason = reason
        if smu.sweep is not None:
            smu.sweep = None

    def reading_duration(self) -> float:
        smu_cfg = self.settings["smu"]
        return smu_cfg["source_settle_s"] + self.smu.nplc / smu_cfg["line_frequency_hz"]

    def measure(self) -> Reading:
        """One reading of the SMU now (caller has spent the integration time)."""
        smu = self.smu
        cell, memory = self.connected_device(self.sampled_irradiance())
        point = self.solve(cell, memory)
        v_true = point.cell_voltage_v if smu.remote_sense else point.terminal_voltage_v
        i_true = point.load_current_a
        v = self._ranged("VOLT", v_true, SMU_VOLTAGE_RANGES_V)
        i = self._ranged("CURR", i_true, SMU_CURRENT_RANGES_A)
        clamp_key = "CURR" if smu.function == "VOLT" else "VOLT"
        smu.last_clamped = {"CURR": False, "VOLT": False}
        smu.last_clamped[clamp_key] = point.in_compliance
        return Reading(v, i, point.in_compliance)

    def _ranged(self, quantity: str, value: float, ranges: tuple[float, ...]) -> float:
        smu = self.smu
        if smu.measure_auto[quantity]:
            fitting = [r for r in ranges if abs(value) <= r]
            if not fitting:
                smu.last_range[quantity] = ranges[-1]
                return OVERFLOW
            rng_ = fitting[0]
        else:
            rng_ = smu.measure_range[quantity]
            if abs(value) > rng_:
                smu.last_range[quantity] = rng_
                return OVERFLOW
        smu.last_range[quantity] = rng_
        sigma = self.settings["smu"]["noise_rel_of_range"] * rng_ / math.sqrt(max(smu.nplc, 0.01))
        return value + sigma * self.rng.standard_normal()

    def noise_sigma(self, quantity: str, range_value: float) -> float:
        """1-sigma reading noise of a quantity on a range at the present NPLC (for tests)."""
        return self.settings["smu"]["noise_rel_of_range"] * range_value / math.sqrt(max(self.smu.nplc, 0.01))

    # ------------------------------------------------------------------ sweeps
    def start_sweep(self, function: str, levels: list[float]) -> None:
        smu = self.smu
        point_time = smu.trigger_delay_s + self.reading_duration()
        smu.buffer = []
        smu.buffer_valid = True
        smu.sweep = Sweep(function, list(levels), self.t, point_time)
        self.advance_to(self.t)

    def abort_sweep(self) -> None:
        self.advance_to_now()
        self.smu.sweep = None

    def sweep_remaining(self) -> float:
        sw = self.smu.sweep
        return 0.0 if sw is None else max(sw.t_end - self.t, 0.0)

    # ------------------------------------------------------------------ faults
    def inject(self, name: str, after: int = 0, source: str = "api") -> dict:
        if name not in FAULT_NAMES:
            raise ValueError(f"unknown fault '{name}' (known: {', '.join(FAULT_NAMES)})")
        if after < 0:
            raise ValueError("after must be >= 0")
        entry = {"name": name, "source": source, "armed_at_message": self.messages["smu"],
                 "fires_after_message": self.messages["smu"] + int(after), "fired": False}
        if after == 0:
            self._fire(entry)
        else:
            self.armed_faults.append(entry)
        return entry

    def fire_due_faults(self) -> None:
        """Called after each SMU message has been handled."""
        due = [f for f in self.armed_faults if self.messages["smu"] >= f["fires_after_message"]]
        for entry in due:
            self.armed_faults.remove(entry)
            self._fire(entry)

    def _fire(self, entry: dict) -> None:
        self.advance_to_now()
        name = entry["name"]
        entry.update(fired=True, fired_at_message=self.messages["smu"], fired_at_time_s=self.t)
        self.fault_history.append(entry)
        if name == "disconnect":
            hook = self.connection_hooks.get("disconnect")
            if hook:
                hook()
        elif name == "stall":
            conn = self.last_smu_connection
            if conn is not None and not getattr(conn, "closed", False):
                conn.stalled = True
            else:
                self.stall_next_connection = True
        elif name == "garble":
            self.pending_garble = True
        elif name == "instrument-error":
            self.instruments["smu"].push_error(-240, "output stage fault")
        elif name == "interlock":
            self.interlock_open = True
            if self.smu.output_on:
                self.force_output_off("interlock opened")
            self.forced_off = True
            self.instruments["smu"].push_error(
                int(self.settings["smu"]["interlock_error_code"]), "Interlock open;output forced off")
        elif name == "compliance":
            self.short_fault = True
            self.check_protection()
        elif name == "overtemp":
            self.stage_runaway = True
        elif name == "light-failure":
            self.light_failed = True

    def clear_faults(self) -> None:
        """Harness: disarm pending faults and restore the physical world (latches stay)."""
        self.advance_to_now()
        self.armed_faults.clear()
        self.pending_garble = False
        self.stall_next_connection = False
        self.interlock_open = False
        self.short_fault = False
        self.stage_runaway = False
        self.light_failed = False
        self.fault_history.append({"name": "clear-faults", "fired": True,
                                   "fired_at_message": self.messages["smu"], "fired_at_time_s": self.t})

    def set_knobs(self, **knobs: float) -> None:
        for key, value in knobs.items():
            if key not in KNOBS:
                raise ValueError(f"unknown knob '{key}' (known: {', '.join(sorted(KNOBS))})")
        self.advance_to_now()
        for key, value in knobs.items():
            section, name = KNOBS[key]
            self.settings[section][name] = float(value)

    # ------------------------------------------------------------------ observability
    def state(self) -> dict:
        """A plain snapshot of the true state (caller holds the lock)."""
        self.advance_to_now()
        smu = self.smu
        point = self.present_point()
        f = smu.function
        return {
            "time_s": self.t,
            "time_scale": self.time_scale,
            "smu": {
                "output_on": smu.output_on,
                "function": f,
                "level": smu.level[f],
                "voltage_level_v": smu.level["VOLT"],
                "current_level_a": smu.level["CURR"],
                "current_compliance_a": smu.compliance["CURR"],
                "voltage_compliance_v": smu.compliance["VOLT"],
                "in_compliance": bool(point.in_compliance) if point else False,
                "terminal_voltage_v": point.terminal_voltage_v if point else None,
                "cell_voltage_v": point.cell_voltage_v if point else None,
                "current_a": point.load_current_a if point else 0.0,
                "ovp_v": smu.ovp_v,
                "ovp_tripped": self.ovp_tripped,
                "output_forced_off": self.forced_off,
                "output_off_reason": self.output_off_reason,
                "interlock_open": self.interlock_open,
                "remote_sense": smu.remote_sense,
                "nplc": smu.nplc,
                "sweeping": smu.sweep is not None,
                "buffer_points": len(smu.buffer),
                "error_queue": [list(e) for e in self.instruments["smu"].errors.snapshot()] if "smu" in self.instruments else [],
            },
            "switch": {"closed_pixel": self.closed_pixel, "channels": len(self.pixels),
                       "pixel_labels": [p.label for p in self.pixels]},
            "light": {"shutter_open": self.shutter_open, "setpoint_w_m2": self.lamp_setpoint,
                      "lamp_w_m2": self.lamp_irradiance(self.t),
                      "irradiance_w_m2": self.irradiance_at_sample(), "settled": self.lamp_settled(),
                      "failed": self.light_failed},
            "reference_cell": {"temperature_c": self.reference_t_c,
                               "calibration_isc_a": self.settings["reference_cell"]["calibration_isc_a"]},
            "stage": {"temperature_c": self.stage_t_c, "setpoint_c": self.stage_setpoint_c,
                      "runaway": self.stage_runaway},
            "faults": {"armed": [dict(f) for f in self.armed_faults],
                       "history": [dict(f) for f in self.fault_history],
                       "short": self.short_fault},
            "messages": dict(self.messages),
            "scenario": self.scenario.name,
        }
