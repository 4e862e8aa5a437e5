"""Validation of a protocol document into :class:`~tracer.protocol.model.Protocol`.

Every check adds a problem to the context and carries on, so one run reports everything
that is wrong. Checks against a bench profile (hard limits, switch channels, which
instruments exist) run in the same pass when a bench is given.
"""
from __future__ import annotations

import datetime as _dt
import math
import re
from typing import Any

from tracer.plan import ACQUISITIONS, DIRECTIONS, HOLD_MODES, SPACINGS, Limits

from ._fields import (INVALID, MISSING, Bool, Choice, Ctx, Custom, Field, Number, Text, describe,
                      fmt_num, ok, read_mapping, unknown_key)
from ._yamltree import Document, format_path
from .model import (ALPHA_UNITS, BETA_UNITS, MODELS, PROCEDURES, SCHEMA_VERSION, SHUTTER,
                    STEP_KINDS, AnalysisSpec, ChecksSpec, Coefficient, FrozenMap, HoldSpec,
                    MppSpec, PixelLoopSpec, ProcedureParameters, Protocol, ReferenceCellSpec,
                    SampleSpec, SetLightSpec, SweepSpec, TemperatureCoefficients,
                    TranslationSpec, WaitTemperatureSpec)

# Intrinsic bounds, independent of any bench (the largest SMU range in docs/scpi-dialect.md
# is 200 V with protection up to 210 V; the largest current range 3 A; the list memory holds
# 10,000 points; NPLC 0 … 10; the lamp set-point 0 … 1500 W/m2).
MAX_VOLTAGE_V = 210.0
MAX_CURRENT_A = 3.0
MAX_POWER_W = MAX_VOLTAGE_V * MAX_CURRENT_A
MAX_POINTS = 10_000
MAX_STEPS = 500
MAX_LOOP_STEPS = 200
MAX_PIXELS = 64
LINE_FREQUENCY_HZ_SLOWEST = 50.0     # one NPLC lasts 1/50 s on a 50 Hz mains (the longer one)

NAME_PATTERN = r"[A-Za-z0-9][A-Za-z0-9 ._+()-]*"
NAME_HELP = "letters, digits, space and . _ + ( ) -, starting with a letter or digit"
ID_PATTERN = r"[A-Za-z0-9][A-Za-z0-9._-]*"
ID_HELP = "letters, digits and . _ -, starting with a letter or digit"

ADDRESS_MESSAGE = ("a protocol cannot name instruments or their addresses; they belong in the "
                   "bench profile (--bench FILE)")
_VISA_ADDRESS = re.compile(r"^\s*(TCPIP|GPIB|USB|ASRL|VXI|PXI|VICP)\d*::", re.IGNORECASE)

SHUTTER_HINT = " (YAML reads on/off/yes/no as true/false: write open or closed)"


def _name_kind() -> Text:
    return Text(64, pattern=NAME_PATTERN, pattern_help=NAME_HELP, min_len=1)


def _visa_check(ctx: Ctx, path: tuple, value: Any) -> None:
    if isinstance(value, str) and _VISA_ADDRESS.match(value):
        ctx.add(path, f"{describe(value)} looks like an instrument address; " + ADDRESS_MESSAGE,
                value=value, allowed="no instrument addresses")


# --------------------------------------------------------------------------- top level
TOP_KEYS = ("schema", "name", "description", "sample", "limits", "checks", "steps", "analysis",
            "metadata")


def validate(doc: Document, bench: Any = None) -> tuple[Protocol | None, list]:
    """Check a parsed document; return (protocol or None, problems)."""
    ctx = Ctx(doc)
    raw = doc.value
    for key in raw:
        if key not in TOP_KEYS:
            unknown_key(ctx, (key,), key, TOP_KEYS, what="the protocol",
                        address_message=ADDRESS_MESSAGE,
                        extra_help={"bench": "the bench is given separately (--bench FILE)",
                                    "hard_limits": "hard limits belong in the bench profile; "
                                    "a protocol has 'limits'"})
    schema = SCHEMA_VERSION
    if "schema" in raw and raw["schema"] is not INVALID:
        schema = Choice((SCHEMA_VERSION,)).check(ctx, ("schema",), raw["schema"])
    name = _top_field(ctx, raw, "name", _name_kind(), required=True)
    description = _top_field(ctx, raw, "description", Text(4000), default="")
    if isinstance(description, str):
        _visa_check(ctx, ("description",), description)

    sample = _read_sample(ctx, raw.get("sample", MISSING))
    limits = _read_limits(ctx, raw.get("limits", MISSING), bench)
    checks = _read_checks(ctx, raw.get("checks", None), bench)
    steps = _read_steps(ctx, raw.get("steps", MISSING), limits, checks, sample, bench)
    analysis = _read_analysis(ctx, raw.get("analysis", None))
    metadata = _read_metadata(ctx, raw.get("metadata", None))

    if ctx.problems or not ok(schema, name, description, sample, limits, checks, steps, analysis,
                              metadata):
        if not ctx.problems:  # pragma: no cover - every INVALID comes with a problem
            ctx.add((), "is not a valid protocol")
        return None, ctx.problems
    protocol = Protocol(name=name, sample=sample, limits=limits, steps=steps, checks=checks,
                        analysis=analysis, metadata=metadata, description=description,
                        schema=schema, source=doc.file, lines=dict(doc.lines))
    return protocol, []


def _top_field(ctx: Ctx, raw: dict, key: str, kind: Any, *, required: bool = False,
               default: Any = None) -> Any:
    if key not in raw:
        if required:
            ctx.add((), f"missing required key {key!r}; allowed {kind.allowed}",
                    allowed=kind.allowed, line=ctx.line(()))
            return INVALID
        return default
    value = raw[key]
    if value is INVALID:
        return INVALID
    if value is None:
        if required:
            ctx.add((key,), f"must not be empty; allowed {kind.allowed}", allowed=kind.allowed)
            return INVALID
        return default
    return kind.check(ctx, (key,), value)


def _require_section(ctx: Ctx, raw: Any, key: str, allowed: str) -> bool:
    if raw is MISSING:
        ctx.add((), f"missing required section {key!r}; allowed {allowed}", allowed=allowed)
        return False
    if raw is None:
        ctx.add((key,), f"section {key!r} is empty; allowed {allowed}", allowed=allowed)
        return False
    return raw is not INVALID


# --------------------------------------------------------------------------- sample
SAMPLE_FIELDS = {
    "id": Field(Text(64, pattern=ID_PATTERN, pattern_help=ID_HELP, min_len=1), required=True),
    "area_cm2": Field(Number(0, 10_000, lo_open=True, unit="cm2")),
    "cells_in_series": Field(Number(1, 1000, integer=True), default=1),
    "pixels": Field(Number(1, MAX_PIXELS, integer=True)),
    "description": Field(Text(4000), default=""),
}


def _read_sample(ctx: Ctx, raw: Any) -> Any:
    if not _require_section(ctx, raw, "sample", "a mapping with id, area_cm2, cells_in_series, "
                            "pixels, description"):
        return INVALID
    v = read_mapping(ctx, ("sample",), raw, SAMPLE_FIELDS, what="sample",
                     address_message=ADDRESS_MESSAGE)
    if v is None or not ok(*v.values()):
        return INVALID
    _visa_check(ctx, ("sample", "description"), v["description"])
    return SampleSpec(id=v["id"], area_cm2=v["area_cm2"], cells_in_series=v["cells_in_series"],
                      pixels=v["pixels"], description=v["description"] or "")


# --------------------------------------------------------------------------- limits
LIMIT_FIELDS = {
    "voltage_v": Field(Number(0, MAX_VOLTAGE_V, lo_open=True, unit="V"), required=True),
    "current_a": Field(Number(0, MAX_CURRENT_A, lo_open=True, unit="A"), required=True),
    "power_w": Field(Number(0, MAX_POWER_W, lo_open=True, unit="W"), required=True),
    "reverse_voltage_v": Field(Number(0, MAX_VOLTAGE_V, unit="V"), required=True),
}


def _read_limits(ctx: Ctx, raw: Any, bench: Any) -> Any:
    if not _require_section(ctx, raw, "limits", "a mapping with voltage_v, current_a, power_w, "
                            "reverse_voltage_v"):
        return INVALID
    v = read_mapping(ctx, ("limits",), raw, LIMIT_FIELDS, what="limits",
                     extra_help={"compliance": "compliance is set per step "
                                 "(compliance_a / compliance_v)"})
    if v is None:
        return INVALID
    if bench is not None:
        hard = bench.hard_limits
        for key in LIMIT_FIELDS:
            value = v[key]
            if value is INVALID or value is None:
                continue
            cap = getattr(hard, key)
            if value > cap:
                allowed = f"0 < x ≤ {fmt_num(cap)}" if key != "reverse_voltage_v" \
                    else f"0 … {fmt_num(cap)}"
                ctx.add(("limits", key), f"{describe(value)} is beyond the hard limit "
                        f"{fmt_num(cap)} of bench {bench.name!r}; allowed {allowed}",
                        value=value, allowed=allowed)
                v[key] = INVALID
    if not ok(*v.values()):
        return INVALID
    if v["reverse_voltage_v"] > v["voltage_v"]:
        ctx.add(("limits", "reverse_voltage_v"), f"{describe(v['reverse_voltage_v'])} is larger "
                f"than limits.voltage_v {fmt_num(v['voltage_v'])}; allowed 0 … "
                f"{fmt_num(v['voltage_v'])}", value=v["reverse_voltage_v"],
                allowed=f"0 … {fmt_num(v['voltage_v'])}")
        return INVALID
    return Limits(**v)


# --------------------------------------------------------------------------- checks
def _window(ctx: Ctx, path: tuple, value: Any) -> Any:
    allowed = "[low, high] in °C, -40 … 150, low < high"
    if not isinstance(value, list) or len(value) != 2:
        ctx.add(path, f"expected two temperatures [low, high]; got {describe(value)}",
                value=value, allowed=allowed)
        return INVALID
    kind = Number(-40, 150, unit="°C")
    lo = kind.check(ctx, path + (0,), value[0]) if value[0] is not INVALID else INVALID
    hi = kind.check(ctx, path + (1,), value[1]) if value[1] is not INVALID else INVALID
    if not ok(lo, hi):
        return INVALID
    if not lo < hi:
        ctx.add(path, f"low {fmt_num(lo)} must be below high {fmt_num(hi)}", value=value,
                allowed=allowed)
        return INVALID
    return (lo, hi)


CHECK_FIELDS = {
    "temperature_window_c": Field(Custom(_window, "[low, high] in °C, -40 … 150, low < high"),
                                  nullable=True),
    "light_stability_rel": Field(Number(0, 1, lo_open=True), default=0.05, nullable=True),
    "watchdog_s": Field(Number(0.1, 3600, unit="s"), default=10.0),
}


def _read_checks(ctx: Ctx, raw: Any, bench: Any) -> Any:
    if raw is None:
        return ChecksSpec()
    v = read_mapping(ctx, ("checks",), raw, CHECK_FIELDS, what="checks")
    if v is None or not ok(*v.values()):
        return INVALID
    if v["temperature_window_c"] is not None and bench is not None \
            and not bench.has_role("thermometer"):
        ctx.add(("checks", "temperature_window_c"), f"a temperature window needs a stage "
                f"thermometer, and bench {bench.name!r} has none; allowed null",
                value=list(v["temperature_window_c"]), allowed="null")
    return ChecksSpec(**v)


# --------------------------------------------------------------------------- steps
def _common_names() -> dict[str, Field]:
    return {"kind": Field(Choice(STEP_KINDS), required=True),
            "name": Field(_name_kind())}


NPLC = Field(Number(0.01, 10), default=1.0)
FOUR_WIRE = Field(Bool(), default=True)
DURATION = Field(Number(0, 86_400, lo_open=True, unit="s"), required=True)
INTERVAL = Field(Number(0, 3600, lo_open=True, unit="s"), required=True)


def _read_steps(ctx: Ctx, raw: Any, limits: Any, checks: Any, sample: Any, bench: Any) -> Any:
    allowed = f"a list of 1 … {MAX_STEPS} steps"
    if not _require_section(ctx, raw, "steps", allowed):
        return INVALID
    if not isinstance(raw, list):
        ctx.add(("steps",), f"expected a list of steps (lines starting with '- '); got "
                f"{describe(raw)}", value=raw, allowed=allowed)
        return INVALID
    if not 1 <= len(raw) <= MAX_STEPS:
        ctx.add(("steps",), f"{len(raw)} steps; allowed {allowed}", value=len(raw),
                allowed=allowed)
        return INVALID
    reader = _StepReader(ctx, limits, checks, sample, bench)
    steps = [reader.step(("steps", i), item, in_loop=False) for i, item in enumerate(raw)]
    if not ok(*steps):
        return INVALID
    steps = reader.assign_names(steps)
    if steps is INVALID:
        return INVALID
    _check_light_order(ctx, steps)
    return tuple(steps)


class _StepReader:
    def __init__(self, ctx: Ctx, limits: Any, checks: Any, sample: Any, bench: Any):
        self.ctx = ctx
        self.limits = limits if isinstance(limits, Limits) else None
        self.checks = checks if isinstance(checks, ChecksSpec) else None
        self.sample = sample if isinstance(sample, SampleSpec) else None
        self.bench = bench
        self.name_paths: list[tuple[tuple, Any]] = []   # (path, step) for naming

    # ------------------------------------------------------------------ dispatch
    def step(self, path: tuple, raw: Any, *, in_loop: bool) -> Any:
        ctx = self.ctx
        if raw is INVALID:
            return INVALID
        if not isinstance(raw, dict):
            ctx.add(path, f"a step must be a mapping with a 'kind' key; got {describe(raw)}",
                    value=raw, allowed="kind: " + " | ".join(STEP_KINDS))
            return INVALID
        if "kind" not in raw:
            ctx.add(path, "missing required key 'kind'; allowed " + ", ".join(STEP_KINDS),
                    allowed=", ".join(STEP_KINDS))
            return INVALID
        kind = Choice(STEP_KINDS).check(ctx, path + ("kind",), raw["kind"]) \
            if raw["kind"] is not INVALID else INVALID
        if kind is INVALID:
            return INVALID
        if kind == "pixel-loop":
            if in_loop:
                ctx.add(path + ("kind",), "pixel loops cannot be nested", value=kind,
                        allowed=", ".join(k for k in STEP_KINDS if k != "pixel-loop"))
                return INVALID
            return self.pixel_loop(path, raw)
        return getattr(self, kind.replace("-", "_"))(path, raw)

    def _read(self, path: tuple, raw: dict, fields: dict[str, Field], what: str,
              extra_help: dict[str, str] | None = None) -> dict | None:
        return read_mapping(self.ctx, path, raw, fields, what=what, extra_help=extra_help,
                            address_message=ADDRESS_MESSAGE)

    # ------------------------------------------------------------------ sweep
    def sweep(self, path: tuple, raw: dict) -> Any:
        ctx = self.ctx
        source = "voltage"
        if "source" in raw and raw["source"] not in (INVALID, None):
            source = Choice(("voltage", "current")).check(ctx, path + ("source",), raw["source"])
            if source is INVALID:
                return INVALID
        u = "v" if source == "voltage" else "a"
        comp_key = "compliance_a" if u == "v" else "compliance_v"
        wrong_comp = "compliance_v" if u == "v" else "compliance_a"
        fields = _common_names() | {
            "light": Field(Bool(), required=True),
            "source": Field(Choice(("voltage", "current")), default="voltage"),
            "range": Field(Custom(lambda c, p, x: self._range(c, p, x, u),
                                  f"start_{u} and stop_{u}"), required=True),
            "points": Field(Number(2, MAX_POINTS, integer=True), required=True),
            "spacing": Field(Choice(SPACINGS), default="linear"),
            "direction": Field(Choice(DIRECTIONS), default="forward"),
            "settle_s": Field(Number(0, 3600, unit="s"), default=0.0),
            "nplc": NPLC,
            "four_wire": FOUR_WIRE,
            "repeats": Field(Number(1, 1000, integer=True), default=1),
            "acquisition": Field(Choice(ACQUISITIONS), default="point"),
            comp_key: Field(Number(0, MAX_CURRENT_A if u == "v" else MAX_VOLTAGE_V,
                                   lo_open=True, unit="A" if u == "v" else "V")),
            "voc_estimate_v": Field(Number(0, MAX_VOLTAGE_V, lo_open=True, unit="V")),
        }
        help_ = {wrong_comp: f"this sweep sources {source}, so its compliance is "
                             f"{comp_key!r}",
                 "start": f"put it under range, with its unit: start_{u}",
                 "stop": f"put it under range, with its unit: stop_{u}",
                 "compliance": f"write the unit: {comp_key}",
                 "mode": "the key is 'source' (voltage or current)"}
        v = self._read(path, raw, fields, "a sweep step", help_)
        if v is None:
            return INVALID
        lim = self.limits
        start, stop = (v["range"] if isinstance(v["range"], tuple) else (INVALID, INVALID))
        if ok(start, stop) and lim is not None:
            for key, value in ((f"start_{u}", start), (f"stop_{u}", stop)):
                if not self._level_ok(path + ("range", key), value, source):
                    v["range"] = INVALID
        compliance = v[comp_key]
        if lim is not None and compliance is not INVALID:
            cap = lim.current_a if u == "v" else lim.voltage_v
            if compliance is None:
                compliance = cap
            elif compliance > cap:
                limit_key = "limits.current_a" if u == "v" else "limits.voltage_v"
                ctx.add(path + (comp_key,), f"{describe(compliance)} is beyond {limit_key} "
                        f"{fmt_num(cap)}; allowed 0 < x ≤ {fmt_num(cap)}", value=compliance,
                        allowed=f"0 < x ≤ {fmt_num(cap)}")
                compliance = INVALID
        elif compliance is None:
            compliance = INVALID  # limits are invalid: a problem is already recorded
        spacing, voc = v["spacing"], v["voc_estimate_v"]
        if ok(start, stop, spacing):
            if spacing == "log" and (start == 0 or stop == 0 or (start > 0) != (stop > 0)):
                ctx.add(path + ("spacing",), f"log spacing needs start and stop of the same sign "
                        f"and not zero; the range is {fmt_num(start)} … {fmt_num(stop)}",
                        value=spacing, allowed="linear, or a range not crossing zero")
                spacing = INVALID
            if spacing == "dense-near-voc":
                if source != "voltage":
                    ctx.add(path + ("spacing",), "dense-near-voc needs a voltage source",
                            value=spacing, allowed="linear or log for a current source")
                    spacing = INVALID
                elif v["light"] is False:
                    ctx.add(path + ("spacing",), "dense-near-voc is for light sweeps (a dark "
                            "curve has no Voc)", value=spacing, allowed="linear or log")
                    spacing = INVALID
                elif voc not in (None, INVALID) and not min(start, stop) < voc < max(start, stop):
                    ctx.add(path + ("voc_estimate_v",), f"{describe(voc)} is outside the sweep "
                            f"range; allowed {fmt_num(min(start, stop))} < x < "
                            f"{fmt_num(max(start, stop))}", value=voc,
                            allowed=f"inside the range")
                    voc = INVALID
            elif voc not in (None, INVALID):
                ctx.add(path + ("voc_estimate_v",), "is only used with spacing dense-near-voc",
                        value=voc, allowed="leave it out, or spacing: dense-near-voc")
                voc = INVALID
        values = [v[k] for k in fields if k not in (comp_key,)] + [compliance, spacing, voc]
        if not ok(*values):
            return INVALID
        return SweepSpec(name=v["name"], light=v["light"], source=source, start=start,
                         stop=stop, points=v["points"], spacing=spacing,
                         direction=v["direction"], settle_s=v["settle_s"], nplc=v["nplc"],
                         four_wire=v["four_wire"], repeats=v["repeats"],
                         acquisition=v["acquisition"], compliance=compliance,
                         voc_estimate_v=voc)

    def _range(self, ctx: Ctx, path: tuple, raw: Any, u: str) -> Any:
        unit = "V" if u == "v" else "A"
        cap = MAX_VOLTAGE_V if u == "v" else MAX_CURRENT_A
        other = "a" if u == "v" else "v"
        fields = {f"start_{u}": Field(Number(-cap, cap, unit=unit), required=True),
                  f"stop_{u}": Field(Number(-cap, cap, unit=unit), required=True)}
        help_ = {f"start_{other}": f"the unit does not match the source; use start_{u}",
                 f"stop_{other}": f"the unit does not match the source; use stop_{u}",
                 "start": f"write the unit: start_{u}", "stop": f"write the unit: stop_{u}"}
        v = read_mapping(ctx, path, raw, fields, what="a sweep range", extra_help=help_)
        if v is None or not ok(*v.values()):
            return INVALID
        start, stop = v[f"start_{u}"], v[f"stop_{u}"]
        if start == stop:
            ctx.add(path, f"start and stop are both {fmt_num(start)}; a sweep needs two "
                    "different levels", value=start, allowed="start ≠ stop")
            return INVALID
        return (start, stop)

    def _level_ok(self, path: tuple, value: float, source: str) -> bool:
        lim = self.limits
        assert lim is not None
        if source == "voltage":
            lo, hi = -min(lim.reverse_voltage_v, lim.voltage_v), lim.voltage_v
            allowed = f"{fmt_num(lo)} … {fmt_num(hi)} V (limits)"
            if value > hi:
                self.ctx.add(path, f"{describe(value)} is beyond limits.voltage_v "
                             f"{fmt_num(hi)}; allowed {allowed}", value=value, allowed=allowed)
                return False
            if value < lo:
                self.ctx.add(path, f"{describe(value)} is a reverse bias beyond "
                             f"limits.reverse_voltage_v {fmt_num(-lo)}; allowed {allowed}",
                             value=value, allowed=allowed)
                return False
            return True
        cap = lim.current_a
        allowed = f"{fmt_num(-cap)} … {fmt_num(cap)} A (limits)"
        if abs(value) > cap:
            self.ctx.add(path, f"{describe(value)} is beyond limits.current_a {fmt_num(cap)}; "
                         f"allowed {allowed}", value=value, allowed=allowed)
            return False
        return True

    def _check_interval(self, path: tuple, v: dict) -> None:
        ctx = self.ctx
        duration, interval, nplc = v["duration_s"], v["interval_s"], v["nplc"]
        if ok(duration, interval) and interval > duration:
            ctx.add(path + ("interval_s",), f"{describe(interval)} is longer than duration_s "
                    f"{fmt_num(duration)}; allowed 0 < x ≤ {fmt_num(duration)}", value=interval,
                    allowed=f"0 < x ≤ {fmt_num(duration)}")
            v["interval_s"] = INVALID
        elif ok(interval, nplc) and interval < nplc / LINE_FREQUENCY_HZ_SLOWEST:
            need = nplc / LINE_FREQUENCY_HZ_SLOWEST
            ctx.add(path + ("interval_s",), f"{describe(interval)} is shorter than one reading "
                    f"at nplc {fmt_num(nplc)} ({fmt_num(need)} s on 50 Hz mains); allowed "
                    f"≥ {fmt_num(need)} s", value=interval, allowed=f"≥ {fmt_num(need)} s")
            v["interval_s"] = INVALID

    def _compliance(self, path: tuple, v: dict, key: str) -> Any:
        lim = self.limits
        value = v[key]
        if value is INVALID:
            return INVALID
        if lim is None:
            return INVALID if value is None else value
        cap = lim.current_a if key == "compliance_a" else lim.voltage_v
        if value is None:
            return cap
        if value > cap:
            limit_key = "limits.current_a" if key == "compliance_a" else "limits.voltage_v"
            self.ctx.add(path + (key,), f"{describe(value)} is beyond {limit_key} "
                         f"{fmt_num(cap)}; allowed 0 < x ≤ {fmt_num(cap)}", value=value,
                         allowed=f"0 < x ≤ {fmt_num(cap)}")
            return INVALID
        return value

    # ------------------------------------------------------------------ hold
    def hold(self, path: tuple, raw: dict) -> Any:
        ctx = self.ctx
        mode = raw.get("mode")
        comp_key = "compliance_v" if mode == "voc" else "compliance_a"
        wrong = "compliance_a" if comp_key == "compliance_v" else "compliance_v"
        fields = _common_names() | {
            "light": Field(Bool(), required=True),
            "mode": Field(Choice(HOLD_MODES), required=True),
            "duration_s": DURATION,
            "interval_s": INTERVAL,
            "level_v": Field(Number(-MAX_VOLTAGE_V, MAX_VOLTAGE_V, unit="V")),
            "nplc": NPLC,
            "four_wire": FOUR_WIRE,
            comp_key: Field(Number(0, MAX_VOLTAGE_V if comp_key == "compliance_v"
                                   else MAX_CURRENT_A, lo_open=True,
                                   unit="V" if comp_key == "compliance_v" else "A")),
        }
        help_ = {wrong: ("a voc hold sources 0 A, so its compliance is 'compliance_v'"
                         if mode == "voc" else
                         "this hold sources a voltage, so its compliance is 'compliance_a'"),
                 "level": "write the unit: level_v", "compliance": f"write the unit: {comp_key}"}
        v = self._read(path, raw, fields, "a hold step", help_)
        if v is None:
            return INVALID
        self._check_interval(path, v)
        level = v["level_v"]
        if v["mode"] == "bias":
            if level is None:
                ctx.add(path, "missing required key 'level_v' for mode bias", allowed="a "
                        "voltage in V within the limits")
                level = INVALID
            elif level is not INVALID and self.limits is not None \
                    and not self._level_ok(path + ("level_v",), level, "voltage"):
                level = INVALID
        elif v["mode"] is not INVALID and level not in (None, INVALID):
            ctx.add(path + ("level_v",), f"is only used with mode bias (this hold is "
                    f"{v['mode']})", value=level, allowed="leave it out")
            level = INVALID
        compliance = self._compliance(path, v, comp_key)
        if not ok(*v.values(), level, compliance):
            return INVALID
        return HoldSpec(name=v["name"], light=v["light"], mode=v["mode"],
                        duration_s=v["duration_s"], interval_s=v["interval_s"], level_v=level,
                        nplc=v["nplc"], four_wire=v["four_wire"], compliance=compliance)

    # ------------------------------------------------------------------ mpp
    def mpp(self, path: tuple, raw: dict) -> Any:
        fields = _common_names() | {
            "duration_s": DURATION,
            "interval_s": INTERVAL,
            "step_v": Field(Number(0, 1, lo_open=True, unit="V"), default=0.005),
            "start_v": Field(Number(0, MAX_VOLTAGE_V, unit="V")),
            "nplc": NPLC,
            "four_wire": FOUR_WIRE,
            "compliance_a": Field(Number(0, MAX_CURRENT_A, lo_open=True, unit="A")),
        }
        help_ = {"light": "maximum-power-point tracking always runs under light",
                 "compliance_v": "MPP tracking sources voltage, so its compliance is "
                                 "'compliance_a'",
                 "step": "write the unit: step_v", "start": "write the unit: start_v"}
        v = self._read(path, raw, fields, "an mpp step", help_)
        if v is None:
            return INVALID
        self._check_interval(path, v)
        start = v["start_v"]
        if start not in (None, INVALID) and self.limits is not None \
                and not self._level_ok(path + ("start_v",), start, "voltage"):
            start = INVALID
        compliance = self._compliance(path, v, "compliance_a")
        if not ok(*v.values(), start, compliance):
            return INVALID
        return MppSpec(name=v["name"], duration_s=v["duration_s"], interval_s=v["interval_s"],
                       step_v=v["step_v"], start_v=start, nplc=v["nplc"],
                       four_wire=v["four_wire"], compliance_a=compliance)

    # ------------------------------------------------------------------ set-light
    def set_light(self, path: tuple, raw: dict) -> Any:
        fields = {
            "kind": Field(Choice(STEP_KINDS), required=True),
            "shutter": Field(Choice(SHUTTER, bool_hint=SHUTTER_HINT), required=True),
            "irradiance_w_m2": Field(Number(0, 1500, unit="W/m2")),
            "stability_tolerance_rel": Field(Number(0, 0.5, lo_open=True), default=0.02),
            "settle_timeout_s": Field(Number(0, 3600, lo_open=True, unit="s"), default=60.0),
        }
        help_ = {"irradiance": "write the unit: irradiance_w_m2",
                 "name": "set-light steps have no name"}
        v = self._read(path, raw, fields, "a set-light step", help_)
        if v is None:
            return INVALID
        if self.bench is not None and not self.bench.has_role("light"):
            self.ctx.add(path + ("kind",), f"bench {self.bench.name!r} has no light source "
                         "to set", value="set-light", allowed="a bench with a 'light' "
                         "instrument")
            return INVALID
        if not ok(*v.values()):
            return INVALID
        return SetLightSpec(shutter=v["shutter"], irradiance_w_m2=v["irradiance_w_m2"],
                            stability_tolerance_rel=v["stability_tolerance_rel"],
                            settle_timeout_s=v["settle_timeout_s"])

    # ------------------------------------------------------------------ wait-temperature
    def wait_temperature(self, path: tuple, raw: dict) -> Any:
        fields = {
            "kind": Field(Choice(STEP_KINDS), required=True),
            "target_c": Field(Number(-40, 150, unit="°C"), required=True),
            "tolerance_c": Field(Number(0, 20, lo_open=True, unit="K"), default=1.0),
            "timeout_s": Field(Number(0, 86_400, lo_open=True, unit="s"), default=600.0),
        }
        help_ = {"target": "write the unit: target_c", "temperature_c": "the key is target_c",
                 "name": "wait-temperature steps have no name"}
        v = self._read(path, raw, fields, "a wait-temperature step", help_)
        if v is None:
            return INVALID
        if self.bench is not None and not self.bench.has_role("thermometer"):
            self.ctx.add(path + ("kind",), f"bench {self.bench.name!r} has no stage "
                         "thermometer", value="wait-temperature",
                         allowed="a bench with a 'thermometer' instrument")
            return INVALID
        target = v["target_c"]
        window = self.checks.temperature_window_c if self.checks is not None else None
        if window is not None and target is not INVALID and not window[0] <= target <= window[1]:
            self.ctx.add(path + ("target_c",), f"{describe(target)} is outside "
                         f"checks.temperature_window_c [{fmt_num(window[0])}, "
                         f"{fmt_num(window[1])}]; allowed {fmt_num(window[0])} … "
                         f"{fmt_num(window[1])} °C", value=target,
                         allowed=f"{fmt_num(window[0])} … {fmt_num(window[1])} °C")
            return INVALID
        if not ok(*v.values()):
            return INVALID
        return WaitTemperatureSpec(target_c=target, tolerance_c=v["tolerance_c"],
                                   timeout_s=v["timeout_s"])

    # ------------------------------------------------------------------ pixel-loop
    def pixel_loop(self, path: tuple, raw: dict) -> Any:
        fields = {
            "kind": Field(Choice(STEP_KINDS), required=True),
            "pixels": Field(Custom(self._pixels, f"all, or a list of distinct channels "
                                   f"1 … {MAX_PIXELS}"), required=True),
            "steps": Field(Custom(lambda c, p, x: x, "a list of steps"), required=True),
        }
        v = self._read(path, raw, fields, "a pixel-loop step",
                       {"pixel": "the key is 'pixels'", "name": "a pixel loop has no name; "
                        "name the steps inside it"})
        if v is None:
            return INVALID
        body = v["steps"]
        allowed = f"a list of 1 … {MAX_LOOP_STEPS} steps (no nested pixel-loop)"
        if body is not INVALID:
            if not isinstance(body, list) or not 1 <= len(body) <= MAX_LOOP_STEPS:
                self.ctx.add(path + ("steps",), f"expected {allowed}; got {describe(body)}"
                             + (f" of {len(body)}" if isinstance(body, list) else ""),
                             value=body if not isinstance(body, list) else len(body),
                             allowed=allowed)
                body = INVALID
            else:
                body = [self.step(path + ("steps", j), item, in_loop=True)
                        for j, item in enumerate(body)]
                body = tuple(body) if ok(*body) else INVALID
        pixels = v["pixels"]
        if pixels is not INVALID and self.bench is not None:
            channels = self.bench.switch_channels
            if channels is None:
                self.ctx.add(path + ("pixels",), f"bench {self.bench.name!r} has no pixel "
                             "switch", value=pixels if isinstance(pixels, str) else list(pixels),
                             allowed="a bench with a 'switch' instrument")
                pixels = INVALID
            elif isinstance(pixels, tuple) and max(pixels) > channels:
                self.ctx.add(path + ("pixels",), f"pixel {max(pixels)} is beyond the "
                             f"{channels} channels of bench {self.bench.name!r}'s switch; "
                             f"allowed 1 … {channels}", value=list(pixels),
                             allowed=f"1 … {channels}")
                pixels = INVALID
            elif pixels == "all" and self.sample is not None and self.sample.pixels is not None \
                    and self.sample.pixels > channels:
                self.ctx.add(("sample", "pixels"), f"{self.sample.pixels} pixels but bench "
                             f"{self.bench.name!r}'s switch has {channels} channels; allowed "
                             f"1 … {channels}", value=self.sample.pixels,
                             allowed=f"1 … {channels}")
                pixels = INVALID
        if isinstance(pixels, tuple) and self.sample is not None and self.sample.pixels \
                and max(pixels) > self.sample.pixels:
            self.ctx.add(path + ("pixels",), f"pixel {max(pixels)} is beyond sample.pixels "
                         f"{self.sample.pixels}; allowed 1 … {self.sample.pixels}",
                         value=list(pixels), allowed=f"1 … {self.sample.pixels}")
            pixels = INVALID
        if not ok(pixels, body):
            return INVALID
        return PixelLoopSpec(pixels=pixels, steps=body)

    def _pixels(self, ctx: Ctx, path: tuple, value: Any) -> Any:
        allowed = f"all, or a list of distinct channels 1 … {MAX_PIXELS}"
        if value == "all":
            return "all"
        if isinstance(value, bool) or isinstance(value, int):
            value = [value]
        if not isinstance(value, list) or not value:
            ctx.add(path, f"expected all or a list of pixel numbers; got {describe(value)}",
                    value=value, allowed=allowed)
            return INVALID
        kind = Number(1, MAX_PIXELS, integer=True)
        out = []
        for i, item in enumerate(value):
            if item is INVALID:
                return INVALID
            n = kind.check(ctx, path + (i,), item)
            if n is INVALID:
                return INVALID
            if n in out:
                ctx.add(path + (i,), f"pixel {n} is listed twice", value=n, allowed=allowed)
                return INVALID
            out.append(n)
        return tuple(out)

    # ------------------------------------------------------------------ names
    def assign_names(self, steps: list) -> Any:
        """Fill default names (``dark-sweep-1``, ``voc-hold-1``, ``mpp-1``) and check that
        the names are unique."""
        ctx = self.ctx
        flat: list[tuple[tuple, Any]] = []
        for i, step in enumerate(steps):
            if isinstance(step, PixelLoopSpec):
                flat += [(("steps", i, "steps", j), s) for j, s in enumerate(step.steps)]
            else:
                flat.append((("steps", i), step))
        taken: dict[str, tuple] = {}
        bad = False
        for path, step in flat:
            name = getattr(step, "name", None)
            if name is None:
                continue
            if name in taken:
                ctx.add(path + ("name",), f"the name {name!r} is already used by "
                        f"{format_path(taken[name])}; allowed a name not used before",
                        value=name, allowed="a unique name")
                bad = True
            taken[name] = path
        if bad:
            return INVALID
        counters: dict[str, int] = {}
        renamed: dict[int, Any] = {}
        for path, step in flat:
            if not hasattr(step, "name") or step.name is not None:
                continue
            if isinstance(step, SweepSpec):
                base = "light-sweep" if step.light else "dark-sweep"
            elif isinstance(step, HoldSpec):
                base = f"{step.mode}-hold"
            else:
                base = "mpp"
            n = counters.get(base, 0)
            while True:
                n += 1
                if f"{base}-{n}" not in taken:
                    break
            counters[base] = n
            taken[f"{base}-{n}"] = path
            renamed[id(step)] = _replace(step, name=f"{base}-{n}")
        out = []
        for step in steps:
            if isinstance(step, PixelLoopSpec):
                out.append(PixelLoopSpec(pixels=step.pixels,
                                         steps=tuple(renamed.get(id(s), s) for s in step.steps)))
            else:
                out.append(renamed.get(id(step), step))
        return out


def _replace(step: Any, **changes: Any) -> Any:
    import dataclasses
    return dataclasses.replace(step, **changes)


def _check_light_order(ctx: Ctx, steps: list) -> None:
    """A light step needs the shutter opened by an earlier set-light step; a dark step must not
    follow an opened shutter. Loop bodies are walked twice (the second pass starts in the
    state the first left)."""
    state: tuple[str, str | None] = ("unknown", None)
    reported: set[tuple] = set()

    def visit(path: tuple, step: Any) -> None:
        nonlocal state
        if isinstance(step, SetLightSpec):
            state = (step.shutter, format_path(path))
            return
        is_light = getattr(step, "light", None)
        if is_light is None or path in reported:
            return
        if is_light and state[0] != "open":
            why = (f"the shutter was closed by {state[1]}" if state[0] == "closed"
                   else "no set-light step opens the shutter before it")
            ctx.add(path, f"a light step with the shutter not open ({why}); add a set-light "
                    "step with shutter: open before it", value=getattr(step, "name", None),
                    allowed="a set-light step with shutter: open before any light step")
            reported.add(path)
        elif is_light is False and state[0] == "open":
            ctx.add(path, f"a dark step with the shutter open (opened by {state[1]}); add a "
                    "set-light step with shutter: closed before it",
                    value=getattr(step, "name", None),
                    allowed="a set-light step with shutter: closed before any dark step that "
                    "follows light")
            reported.add(path)

    for i, step in enumerate(steps):
        if isinstance(step, PixelLoopSpec):
            for _ in range(2):
                for j, inner in enumerate(step.steps):
                    visit(("steps", i, "steps", j), inner)
        else:
            visit(("steps", i), step)


# --------------------------------------------------------------------------- analysis
def _list_of(choice: Choice, allowed: str):
    def check(ctx: Ctx, path: tuple, value: Any) -> Any:
        items = value if isinstance(value, list) else [value]
        if not items:
            ctx.add(path, f"the list is empty; allowed {allowed}", value=value, allowed=allowed)
            return INVALID
        out = []
        for i, item in enumerate(items):
            p = path + (i,) if isinstance(value, list) else path
            if item is INVALID:
                return INVALID
            got = choice.check(ctx, p, item)
            if got is INVALID:
                return INVALID
            if got in out:
                ctx.add(p, f"{describe(item)} is listed twice", value=item, allowed=allowed)
                return INVALID
            out.append(got)
        return tuple(out)
    return check


MODELS_ALLOWED = "one or a list of single, double, auto"
PROCEDURES_ALLOWED = "one or a list of 1, 2, 3, model (IEC 60891 procedure numbers, or the " \
                     "diode-model translation)"


def _coefficient(units: tuple[str, ...], ranges: dict[str, float]):
    allowed = "{value: number, unit: " + " | ".join(units) + "}"

    def check(ctx: Ctx, path: tuple, value: Any) -> Any:
        fields = {"value": Field(Number(), required=True),
                  "unit": Field(Choice(units), required=True)}
        v = read_mapping(ctx, path, value, fields, what="a temperature coefficient")
        if v is None or not ok(*v.values()):
            return INVALID
        cap = ranges[v["unit"]]
        if abs(v["value"]) > cap:
            ctx.add(path + ("value",), f"{describe(v['value'])} {v['unit']} is implausibly "
                    f"large; allowed {fmt_num(-cap)} … {fmt_num(cap)} {v['unit']}",
                    value=v["value"], allowed=f"{fmt_num(-cap)} … {fmt_num(cap)}")
            return INVALID
        return Coefficient(value=v["value"], unit=v["unit"])
    return Custom(check, allowed)


ALPHA = _coefficient(ALPHA_UNITS, {"A/K": 1.0, "mA/K": 1000.0, "1/K": 0.01, "%/K": 1.0})
BETA = _coefficient(BETA_UNITS, {"V/K": 1.0, "mV/K": 1000.0, "1/K": 0.02, "%/K": 2.0})


def _procedure_params(number: int):
    fields = {"rs_ohm": Field(Number(0, 1000, unit="Ω")),
              "kappa_ohm_per_k": Field(Number(-1, 1, unit="Ω/K"))}
    if number == 2:
        fields["voc_irradiance_factor"] = Field(Number(-1, 1))

    def check(ctx: Ctx, path: tuple, value: Any) -> Any:
        v = read_mapping(ctx, path, value, fields, what=f"procedure {number} parameters")
        if v is None or not ok(*v.values()):
            return INVALID
        return ProcedureParameters(**v)
    return Custom(check, "a mapping with " + ", ".join(fields))


TRANSLATION_FIELDS = {
    "target_irradiance_w_m2": Field(Number(0, 1500, lo_open=True, unit="W/m2"), default=1000.0),
    "target_temperature_c": Field(Number(-40, 150, unit="°C"), default=25.0),
    "procedures": Field(Custom(_list_of(Choice(PROCEDURES), PROCEDURES_ALLOWED),
                               PROCEDURES_ALLOWED), default=(1,)),
    "procedure_1": Field(_procedure_params(1)),
    "procedure_2": Field(_procedure_params(2)),
}
REFERENCE_FIELDS = {
    "calibration_isc_a": Field(Number(0, 10, lo_open=True, unit="A"), required=True),
    "calibration_uncertainty_rel": Field(Number(0, 0.5)),
    "temperature_coefficient_per_k": Field(Number(-0.01, 0.01, unit="1/K")),
    "id": Field(Text(64), default=""),
}


def _read_analysis(ctx: Ctx, raw: Any) -> Any:
    if raw is None:
        return AnalysisSpec()
    fields = {
        "models": Field(Custom(_list_of(Choice(MODELS), MODELS_ALLOWED), MODELS_ALLOWED),
                        default=("auto",)),
        "translation": Field(Custom(lambda c, p, x: x, "a mapping")),
        "temperature_coefficients": Field(Custom(lambda c, p, x: x, "a mapping")),
        "reference_cell": Field(Custom(lambda c, p, x: x, "a mapping")),
    }
    v = read_mapping(ctx, ("analysis",), raw, fields, what="analysis")
    if v is None:
        return INVALID
    translation = None
    if v["translation"] not in (None, INVALID):
        t = read_mapping(ctx, ("analysis", "translation"), v["translation"], TRANSLATION_FIELDS,
                         what="translation")
        if t is None or not ok(*t.values()):
            translation = INVALID
        else:
            for number in (1, 2):
                if t[f"procedure_{number}"] is not None and number not in t["procedures"]:
                    ctx.add(("analysis", "translation", f"procedure_{number}"),
                            f"parameters for procedure {number} are given but procedure "
                            f"{number} is not in procedures", allowed=f"add {number} to "
                            "procedures, or leave these out")
                    t[f"procedure_{number}"] = INVALID
            translation = TranslationSpec(**t) if ok(*t.values()) else INVALID
    elif v["translation"] is INVALID:
        translation = INVALID
    coeffs = TemperatureCoefficients()
    if v["temperature_coefficients"] not in (None, INVALID):
        c = read_mapping(ctx, ("analysis", "temperature_coefficients"),
                         v["temperature_coefficients"],
                         {"alpha_isc": Field(ALPHA), "beta_voc": Field(BETA)},
                         what="temperature_coefficients",
                         extra_help={"alpha": "the key is alpha_isc", "beta": "the key is "
                                     "beta_voc"})
        coeffs = TemperatureCoefficients(**c) if c is not None and ok(*c.values()) else INVALID
    elif v["temperature_coefficients"] is INVALID:
        coeffs = INVALID
    if isinstance(translation, TranslationSpec) and isinstance(coeffs, TemperatureCoefficients):
        need = []
        procs = translation.procedures
        if 1 in procs or 2 in procs:
            need = ["alpha_isc", "beta_voc"]
        elif "model" in procs:
            need = ["alpha_isc"]
        missing = [n for n in need if getattr(coeffs, n) is None]
        if missing:
            which = ", ".join(str(p) for p in procs)
            ctx.add(("analysis", "translation", "procedures"), f"translation by procedure(s) "
                    f"{which} needs temperature_coefficients {' and '.join(missing)}",
                    value=list(procs), allowed="add analysis.temperature_coefficients."
                    + missing[0])
            translation = INVALID
    reference = None
    if v["reference_cell"] not in (None, INVALID):
        r = read_mapping(ctx, ("analysis", "reference_cell"), v["reference_cell"],
                         REFERENCE_FIELDS, what="reference_cell")
        reference = ReferenceCellSpec(**r) if r is not None and ok(*r.values()) else INVALID
    elif v["reference_cell"] is INVALID:
        reference = INVALID
    if not ok(v["models"], translation, coeffs, reference):
        return INVALID
    return AnalysisSpec(models=v["models"], translation=translation,
                        temperature_coefficients=coeffs, reference_cell=reference)


# --------------------------------------------------------------------------- metadata
def _read_metadata(ctx: Ctx, raw: Any) -> Any:
    if raw is None:
        return FrozenMap()
    if raw is INVALID:
        return INVALID
    if not isinstance(raw, dict):
        ctx.add(("metadata",), f"expected a mapping of free keys; got {describe(raw)}",
                value=raw, allowed="a mapping")
        return INVALID
    before = len(ctx.problems)
    plain = _plain(ctx, ("metadata",), raw)
    if len(ctx.problems) > before:
        return INVALID
    return FrozenMap(plain)


def _plain(ctx: Ctx, path: tuple, value: Any) -> Any:
    """Metadata values as JSON-safe plain data: dates become ISO text."""
    if isinstance(value, dict):
        return {k: _plain(ctx, path + (k,), v) for k, v in value.items()}
    if isinstance(value, list):
        return [_plain(ctx, path + (i,), v) for i, v in enumerate(value)]
    if isinstance(value, float) and not math.isfinite(value):
        ctx.add(path, f"{describe(value)} is not a finite number", value=value,
                allowed="finite numbers, text, true/false, null, lists, mappings")
        return None
    if isinstance(value, (_dt.date, _dt.datetime)):
        return value.isoformat()
    if isinstance(value, str):
        _visa_check(ctx, path, value)
        if len(value) > 10_000:
            ctx.add(path, f"text of {len(value)} characters is too long", value=value[:40],
                    allowed="at most 10000 characters")
        return value
    if value is INVALID:
        return None
    return value
