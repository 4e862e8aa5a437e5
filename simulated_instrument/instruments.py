"""The four simulated instruments: SCPI command tables over the virtual bench.

Headers and behaviour follow ``docs/scpi-dialect.md``.  Every handler runs with the bench
lock held (see :mod:`simulated_instrument.world`).
"""
from __future__ import annotations

import struct
from typing import Any

from .scpi_engine import (
    Boolean, ChannelList, Choice, CommandTable, Context, Integer, Numeric, NumericList,
    ScpiError, ScpiInstrument, format_nr3,
)
from .world import (
    LIST_MAX_POINTS, OVP_MAX_V, SMU_CURRENT_RANGES_A, SMU_VOLTAGE_RANGES_V, STATUS_POLL_S, SmuState,
    VirtualBench,
)

QUES_VOLTAGE = 1 << 0
QUES_CURRENT = 1 << 1
QUES_TEMPERATURE = 1 << 4
QUES_INTERLOCK = 1 << 9
OPER_SETTLING = 1 << 1
OPER_SWEEPING = 1 << 3
STAGE_OFF_K = 2.0            # QUES TEMPerature while the stage is further than this from its set-point

RANGES = {"VOLT": SMU_VOLTAGE_RANGES_V, "CURR": SMU_CURRENT_RANGES_A}
UNITS = {"VOLT": "V", "CURR": "A"}


def _range_for(value: float, ranges: tuple[float, ...]) -> float | None:
    for r in ranges:
        if abs(value) <= r * (1 + 1e-12):
            return r
    return None


class BenchInstrument(ScpiInstrument):
    role = ""
    settings_section = ""

    def __init__(self, world: VirtualBench):
        self.world = world
        self.identity = world.settings[self.settings_section]["identity"]
        super().__init__()

    def spend_time(self, seconds: float) -> None:
        self.world.spend(seconds)

    def settling(self) -> bool:
        """Something this instrument reports is still on its way (lamp, stage, sweep)."""
        return self.operation_pending()

    def status_polled(self) -> None:
        # At time scale 0 nothing else moves the clock while a client polls a status register:
        # each poll of a settling instrument stands for the client's wait between polls.
        w = self.world
        if w.time_scale == 0:
            w.advance_to_now()
            if self.settling():
                w.spend(STATUS_POLL_S)


# =========================================================================== SMU


class SmuInstrument(BenchInstrument):
    role = "smu"
    settings_section = "smu"

    @property
    def s(self) -> SmuState:
        return self.world.smu

    # ---- helpers
    def _idle(self) -> None:
        if self.s.sweep is not None:
            raise ScpiError(-221, "sweep running")

    def _source_max(self, f: str) -> float:
        s = self.s
        return RANGES[f][-1] if s.source_auto[f] else s.source_range[f]

    def _invalidate_buffer(self) -> None:
        self.s.buffer = []
        self.s.buffer_valid = False

    def reset(self) -> None:
        w = self.world
        w.advance_to_now()
        w.smu = SmuState()
        w.output_off_reason = "*RST"

    def operation_pending(self) -> bool:
        self.world.advance_to_now()
        return self.s.sweep is not None

    def wait_operations(self, ctx: Context) -> None:
        self.world.wait_for(lambda: self.s.sweep is None, self.world.sweep_remaining)

    def update_conditions(self) -> None:
        w = self.world
        w.check_protection()
        ques = 0
        point = w.present_point()
        if point is not None and point.in_compliance:
            ques |= QUES_CURRENT if self.s.function == "VOLT" else QUES_VOLTAGE
        if w.interlock_open:
            ques |= QUES_INTERLOCK
        self.status.questionable.set_condition(ques)
        self.status.operation.set_condition(OPER_SWEEPING if self.s.sweep is not None else 0)

    def _reading(self):
        w = self.world
        if self.s.sweep is not None:
            raise ScpiError(-213, "sweep running")
        if not self.s.output_on:
            raise ScpiError(-221, "output off")
        w.spend(w.reading_duration())
        if not self.s.output_on:
            raise ScpiError(-221, "output forced off")
        return w.measure()

    def _block_or_ascii(self, rows: list[tuple[float, float, bool]]) -> bytes:
        s = self.s
        flat = [x for v, i, c in rows for x in (v, i, 1.0 if c else 0.0)]
        if s.data_format == "REAL":
            order = ">" if s.byte_order == "NORM" else "<"
            payload = struct.pack(f"{order}{len(flat)}d", *flat)
            length = str(len(payload))
            return f"#{len(length)}{length}".encode("ascii") + payload
        return ",".join(f"{format_nr3(v)},{format_nr3(i)},{1 if c else 0}" for v, i, c in rows).encode("ascii")

    # ---- the table
    def build_commands(self, t: CommandTable) -> None:
        w = self.world

        # source function and levels
        def set_function(ctx, value):
            if value != self.s.function:
                if self.s.output_on:
                    raise ScpiError(-221, "output on")
                self._idle()
                self.s.function = value
                self._invalidate_buffer()

        t.setting("[SOURce#1:]FUNCtion[:MODE]", Choice("VOLTage", "CURRent"),
                  lambda ctx: self.s.function, set_function)

        for f in ("VOLT", "CURR"):
            word = "VOLTage" if f == "VOLT" else "CURRent"
            unit = UNITS[f]

            def put_level(ctx, v, f=f):
                self._idle()
                self.s.level[f] = v
                w.check_protection()

            t.setting(f"[SOURce#1:]{word}[:LEVel][:IMMediate][:AMPLitude]",
                      Numeric(unit, lambda ctx, f=f: -self._source_max(f), lambda ctx, f=f: self._source_max(f), 0.0),
                      lambda ctx, f=f: self.s.level[f], put_level)

            def put_source_range(ctx, v, f=f):
                self._idle()
                r = _range_for(v, RANGES[f])
                if abs(self.s.level[f]) > r:
                    raise ScpiError(-221, f"level {self.s.level[f]:g} exceeds range {r:g}")
                self.s.source_range[f] = r
                self.s.source_auto[f] = False

            def get_source_range(ctx, f=f):
                if self.s.source_auto[f]:
                    return _range_for(self.s.level[f], RANGES[f]) or RANGES[f][-1]
                return self.s.source_range[f]

            t.setting(f"[SOURce#1:]{word}:RANGe[:UPPer]", Numeric(unit, 0.0, RANGES[f][-1], RANGES[f][-1]),
                      get_source_range, put_source_range)

            def put_source_auto(ctx, v, f=f):
                self._idle()
                self.s.source_auto[f] = v

            t.setting(f"[SOURce#1:]{word}:RANGe:AUTO", Boolean(),
                      lambda ctx, f=f: self.s.source_auto[f], put_source_auto)

            if f == "VOLT":
                def put_ovp(ctx, v):
                    self.s.ovp_v = v
                    w.check_protection()

                t.setting("[SOURce#1:]VOLTage:PROTection[:LEVel]", Numeric("V", 0.0, OVP_MAX_V, OVP_MAX_V),
                          lambda ctx: self.s.ovp_v, put_ovp)
                t.add("[SOURce#1:]VOLTage:PROTection:TRIPped", query=lambda ctx: w.ovp_tripped, reply=Boolean())

            def put_mode(ctx, v, f=f):
                self._idle()
                self.s.source_mode[f] = v

            t.setting(f"[SOURce#1:]{word}:MODE", Choice("FIXed", "LIST"),
                      lambda ctx, f=f: self.s.source_mode[f], put_mode)

            def put_list(ctx, values, f=f):
                self._idle()
                self.s.lists[f] = list(values)
                self._invalidate_buffer()

            list_param = NumericList(unit, -RANGES[f][-1], RANGES[f][-1], LIST_MAX_POINTS)
            t.add(f"[SOURce#1:]LIST:{word}", set=put_list, params=(list_param,),
                  query=lambda ctx, f=f: ",".join(format_nr3(v) for v in self.s.lists[f]))
            t.add(f"[SOURce#1:]LIST:{word}:POINts", query=lambda ctx, f=f: str(len(self.s.lists[f])))

        # compliance (sense subsystem)
        for f, word in (("CURR", "CURRent"), ("VOLT", "VOLTage")):
            unit = UNITS[f]
            lo, hi, default = (1e-9, 3.0, 0.01) if f == "CURR" else (0.0, OVP_MAX_V, 20.0)

            def put_compliance(ctx, v, f=f):
                self.s.compliance[f] = v
                w.check_protection()

            t.setting(f"[SENSe#1:]{word}[:DC]:PROTection[:LEVel]", Numeric(unit, lo, hi, default),
                      lambda ctx, f=f: self.s.compliance[f], put_compliance)
            t.add(f"[SENSe#1:]{word}[:DC]:PROTection:TRIPped", query=lambda ctx, f=f: self.s.last_clamped[f],
                  reply=Boolean())

            def put_measure_range(ctx, v, f=f):
                self.s.measure_range[f] = _range_for(v, RANGES[f])
                self.s.measure_auto[f] = False

            def get_measure_range(ctx, f=f):
                return self.s.last_range[f] if self.s.measure_auto[f] else self.s.measure_range[f]

            t.setting(f"[SENSe#1:]{word}[:DC]:RANGe[:UPPer]", Numeric(unit, 0.0, RANGES[f][-1], RANGES[f][-1]),
                      get_measure_range, put_measure_range)
            t.setting(f"[SENSe#1:]{word}[:DC]:RANGe:AUTO", Boolean(),
                      lambda ctx, f=f: self.s.measure_auto[f],
                      lambda ctx, v, f=f: self.s.measure_auto.__setitem__(f, v))

            def put_nplc(ctx, v):
                self._idle()
                self.s.nplc = v

            t.setting(f"[SENSe#1:]{word}[:DC]:NPLCycles", Numeric(None, 0.0, 10.0, 1.0),
                      lambda ctx: self.s.nplc, put_nplc)

        def put_remote(ctx, v):
            self.s.remote_sense = v
            w.check_protection()

        t.setting("[SENSe#1:]REMote[:STATe]", Boolean(), lambda ctx: self.s.remote_sense, put_remote)

        # output
        def put_output(ctx, on):
            w.advance_to_now()
            if on:
                if w.interlock_open:
                    raise ScpiError(-221, "interlock open")
                if w.ovp_tripped or w.forced_off:
                    raise ScpiError(-221, "protection latched; send OUTP:PROT:CLE")
                self.s.output_on = True
                w.output_off_reason = ""
                w.check_protection()
            else:
                self.s.sweep = None
                self.s.output_on = False
                w.output_off_reason = "OUTP OFF"

        t.setting("OUTPut#1[:STATe]", Boolean(), lambda ctx: self.s.output_on, put_output)
        t.add("OUTPut#1:PROTection:TRIPped", query=lambda ctx: w.forced_off or w.ovp_tripped, reply=Boolean())

        def clear_protection(ctx):
            w.ovp_tripped = False
            if w.interlock_open:
                raise ScpiError(-221, "interlock open")
            w.forced_off = False

        t.add("OUTPut#1:PROTection:CLEar", set=clear_protection)
        t.add("OUTPut#1:INTerlock:TRIPped", query=lambda ctx: w.interlock_open, reply=Boolean())

        # measurements
        def meas_current(ctx):
            return format_nr3(self._reading().current_a)

        def meas_voltage(ctx):
            return format_nr3(self._reading().voltage_v)

        def read(ctx):
            r = self._reading()
            return f"{format_nr3(r.voltage_v)},{format_nr3(r.current_a)}"

        t.add("MEASure:CURRent[:DC]", query=meas_current)
        t.add("MEASure:VOLTage[:DC]", query=meas_voltage)
        t.add("READ", query=read)

        # triggering, sweeps and the buffer
        t.setting("TRIGger[:SEQuence]:COUNt", Integer(None, 1, LIST_MAX_POINTS, 1),
                  lambda ctx: self.s.trigger_count,
                  lambda ctx, v: (self._idle(), setattr(self.s, "trigger_count", v)))
        t.setting("TRIGger[:SEQuence]:DELay", Numeric("S", 0.0, 100.0, 0.0),
                  lambda ctx: self.s.trigger_delay_s,
                  lambda ctx, v: (self._idle(), setattr(self.s, "trigger_delay_s", v)))

        def initiate(ctx):
            w.advance_to_now()
            s = self.s
            if s.sweep is not None:
                raise ScpiError(-213, "sweep running")
            if not s.output_on:
                raise ScpiError(-221, "output off")
            f = s.function
            if s.source_mode[f] == "LIST":
                levels = s.lists[f]
                if not levels:
                    raise ScpiError(-221, "empty list")
                if s.trigger_count != len(levels):
                    raise ScpiError(-226, f"TRIG:COUN {s.trigger_count} != {len(levels)} list points")
                limit = self._source_max(f)
                if any(abs(v) > limit for v in levels):
                    raise ScpiError(-221, "list value beyond the source range")
            else:
                levels = [s.level[f]] * s.trigger_count
            w.start_sweep(f, levels)
            if w.time_scale == 0:
                # Run the whole sweep now. wait_for keeps stepping the clock until the last
                # point is stored: a single jump by the remaining time can fall a rounding
                # error short of the last point's end and leave the sweep running forever.
                w.wait_for(lambda: self.s.sweep is None, w.sweep_remaining)

        t.add("INITiate[:IMMediate]", set=initiate)
        t.add("ABORt", set=lambda ctx: w.abort_sweep())

        def points_actual(ctx):
            w.advance_to_now()
            return str(len(self.s.buffer))

        t.add("TRACe:POINts:ACTual", query=points_actual)

        def trace_data(ctx, start, count):
            w.advance_to_now()
            if not self.s.buffer_valid:
                raise ScpiError(-230, "no sweep data")
            n = len(self.s.buffer)
            if start + count > n:
                raise ScpiError(-222, f"readings {start}..{start + count - 1} requested, {n} stored")
            return self._block_or_ascii(self.s.buffer[start:start + count])

        t.add("TRACe:DATA", query=trace_data,
              query_params=(Integer(None, 0, LIST_MAX_POINTS), Integer(None, 0, LIST_MAX_POINTS)))

        def fetch(ctx):
            if not self.s.buffer_valid:
                raise ScpiError(-230, "no sweep data")
            self.wait_operations(ctx)
            return self._block_or_ascii(self.s.buffer)

        t.add("FETCh", query=fetch)

        def put_format(ctx, kind, length=None):
            if kind == "REAL":
                if length not in (None, 64):
                    raise ScpiError(-224, f"REAL,{length}: only REAL,64")
            self.s.data_format = kind

        t.add("FORMat[:DATA]", set=put_format,
              params=(Choice("ASCii", "REAL"), Integer(None, 0, 64)), optional_params=1,
              query=lambda ctx: "REAL,64" if self.s.data_format == "REAL" else "ASC")
        t.setting("FORMat:BORDer", Choice("NORMal", "SWAPped"), lambda ctx: self.s.byte_order,
                  lambda ctx, v: setattr(self.s, "byte_order", v))
        t.add("SYSTem:LFRequency", query=lambda ctx: format_nr3(w.settings["smu"]["line_frequency_hz"]))


# =========================================================================== light


class LightInstrument(BenchInstrument):
    role = "light"
    settings_section = "light"

    def reset(self) -> None:
        w = self.world
        w.advance_to_now()
        w.shutter_open = False
        w.set_lamp_setpoint(float(w.settings["light"]["setpoint_w_m2"]))

    def operation_pending(self) -> bool:
        self.world.advance_to_now()
        return not self.world.lamp_settled()

    def wait_operations(self, ctx: Context) -> None:
        self.world.wait_for(self.world.lamp_settled, self.world.lamp_settle_remaining)

    def update_conditions(self) -> None:
        self.status.operation.set_condition(0 if self.world.lamp_settled() else OPER_SETTLING)

    def build_commands(self, t: CommandTable) -> None:
        w = self.world

        def put_shutter(ctx, v):
            w.advance_to_now()
            w.shutter_open = v
            w.check_protection()

        t.setting("OUTPut[:STATe]", Boolean(), lambda ctx: w.shutter_open, put_shutter)

        def put_irradiance(ctx, v):
            w.advance_to_now()
            w.set_lamp_setpoint(v)

        t.setting("[SOURce#1:]IRRadiance[:LEVel]",
                  Numeric(None, 0.0, 1500.0, lambda ctx: float(w.settings["light"]["setpoint_w_m2"])),
                  lambda ctx: w.lamp_setpoint, put_irradiance)

        def meas_current(ctx):
            w.spend(1.0 / w.settings["smu"]["line_frequency_hz"])
            return format_nr3(w.reference_isc())

        t.add("MEASure:CURRent[:DC]", query=meas_current)
        t.add("MEASure:TEMPerature", query=lambda ctx: (w.advance_to_now(), format_nr3(w.reference_t_c))[1])


# =========================================================================== thermometer


class ThermometerInstrument(BenchInstrument):
    role = "thermometer"
    settings_section = "stage"

    def __init__(self, world: VirtualBench):
        self.unit = "C"
        super().__init__(world)

    def reset(self) -> None:
        self.unit = "C"
        self.world.advance_to_now()
        self.world.stage_setpoint_c = float(self.world.settings["stage"]["setpoint_c"])

    def settling(self) -> bool:
        w = self.world
        return abs(w.stage_t_c - w.stage_setpoint_c) > STAGE_OFF_K

    def update_conditions(self) -> None:
        self.status.questionable.set_condition(QUES_TEMPERATURE if self.settling() else 0)

    def build_commands(self, t: CommandTable) -> None:
        w = self.world

        def read(ctx):
            w.spend(0.05)
            value = w.stage_reading_c()
            return format_nr3(value + 273.15 if self.unit == "K" else value)

        t.add("MEASure:TEMPerature", query=read)
        t.add("READ", query=read)

        def put_unit(ctx, v):
            self.unit = "K" if v.startswith("K") else "C"

        t.setting("UNIT:TEMPerature", Choice("C", "CELsius", "K", "KELvin"), lambda ctx: self.unit, put_unit)

        def put_setpoint(ctx, v):
            w.advance_to_now()
            w.stage_setpoint_c = v

        t.setting("[SOURce#1:]TEMPerature[:LEVel]",
                  Numeric(None, -20.0, 120.0, lambda ctx: float(w.settings["stage"]["setpoint_c"])),
                  lambda ctx: w.stage_setpoint_c, put_setpoint)


# =========================================================================== switch


class SwitchInstrument(BenchInstrument):
    role = "switch"
    settings_section = "switch"

    def reset(self) -> None:
        self._switch(None)

    def _switch(self, pixel: int | None) -> None:
        w = self.world
        w.advance_to_now()
        w.closed_pixel = pixel
        w.check_protection()

    def build_commands(self, t: CommandTable) -> None:
        w = self.world
        channels = ChannelList(lambda ctx: len(w.pixels))

        def close(ctx, chans):
            if len(set(chans)) != 1:
                raise ScpiError(-221, "exclusive switch: close exactly one channel")
            self._switch(chans[0])

        def close_query(ctx, chans):
            return ",".join("1" if c == w.closed_pixel else "0" for c in chans)

        def open_(ctx, chans):
            if w.closed_pixel in chans:
                self._switch(None)

        t.add("ROUTe:CLOSe", set=close, params=(channels,), query=close_query, query_params=(channels,))
        t.add("ROUTe:OPEN:ALL", set=lambda ctx: self._switch(None))
        t.add("ROUTe:OPEN", set=open_, params=(channels,))


INSTRUMENT_CLASSES: dict[str, type[BenchInstrument]] = {
    "smu": SmuInstrument,
    "light": LightInstrument,
    "thermometer": ThermometerInstrument,
    "switch": SwitchInstrument,
}


def build_instruments(world: VirtualBench) -> dict[str, Any]:
    instruments = {role: cls(world) for role, cls in INSTRUMENT_CLASSES.items()}
    world.instruments = instruments
    return instruments
