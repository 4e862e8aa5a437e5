"""Loading entry point, canonical dump, and compilation of a protocol into a
:class:`tracer.plan.Plan`."""
from __future__ import annotations

import dataclasses
import hashlib
import os
from typing import Any, Mapping

import yaml

from tracer import plan as P

from ._fields import Ctx
from ._yamltree import Document, load_document
from .errors import Problem, ProtocolError
from .model import (AnalysisSpec, Coefficient, HoldSpec, MppSpec, PixelLoopSpec, Protocol,
                    SetLightSpec, SweepSpec, WaitTemperatureSpec)
from .schema import validate


# --------------------------------------------------------------------------- load
def load_protocol(source: Any, *, bench: Any = None, source_name: str | None = None) -> Protocol:
    """Load and validate a protocol.

    ``source`` is a path (``str`` or ``os.PathLike``), YAML text (a ``str`` holding a newline
    or not naming a ``.yaml``/``.yml`` file) or ``bytes``. ``bench`` is a
    :class:`tracer.bench_profile.BenchProfile` or the path of a bench profile; when given, the
    protocol's limits must lie within the bench's hard limits, pixel loops need its switch,
    and so on. ``source_name`` names the text in messages (default: the path or ``<text>``).

    Raises :class:`ProtocolError` listing every problem found (a bad bench profile file
    raises ``tracer.bench_profile.BenchProfileError``).
    """
    bench = _resolve_bench(bench)
    doc = load_document(source, source_name=source_name, what="protocol", error=ProtocolError)
    protocol, problems = validate(doc, bench)
    if problems or protocol is None:
        raise ProtocolError(problems)
    return protocol


def _resolve_bench(bench: Any) -> Any:
    if bench is None:
        return None
    if isinstance(bench, (str, os.PathLike)):
        from tracer.bench_profile import load_bench_profile
        return load_bench_profile(bench)
    for attr in ("hard_limits", "name", "has_role", "switch_channels"):
        if not hasattr(bench, attr):
            raise TypeError(f"bench must be a BenchProfile or a path; got {type(bench).__name__}")
    return bench


# --------------------------------------------------------------------------- canonical form
def _float(x: Any) -> Any:
    return float(x) if isinstance(x, (int, float)) and not isinstance(x, bool) else x


def _step_dict(step: Any) -> dict[str, Any]:
    if isinstance(step, SweepSpec):
        u = "v" if step.source == "voltage" else "a"
        d = {"kind": "sweep", "name": step.name, "light": step.light, "source": step.source,
             "range": {f"start_{u}": step.start, f"stop_{u}": step.stop},
             "points": step.points, "spacing": step.spacing, "direction": step.direction,
             "settle_s": step.settle_s, "nplc": step.nplc, "four_wire": step.four_wire,
             "repeats": step.repeats, "acquisition": step.acquisition,
             ("compliance_a" if u == "v" else "compliance_v"): step.compliance}
        if step.voc_estimate_v is not None:
            d["voc_estimate_v"] = step.voc_estimate_v
        return d
    if isinstance(step, HoldSpec):
        d = {"kind": "hold", "name": step.name, "light": step.light, "mode": step.mode,
             "duration_s": step.duration_s, "interval_s": step.interval_s}
        if step.level_v is not None:
            d["level_v"] = step.level_v
        d |= {"nplc": step.nplc, "four_wire": step.four_wire,
              ("compliance_v" if step.mode == "voc" else "compliance_a"): step.compliance}
        return d
    if isinstance(step, MppSpec):
        d = {"kind": "mpp", "name": step.name, "duration_s": step.duration_s,
             "interval_s": step.interval_s, "step_v": step.step_v}
        if step.start_v is not None:
            d["start_v"] = step.start_v
        d |= {"nplc": step.nplc, "four_wire": step.four_wire, "compliance_a": step.compliance_a}
        return d
    if isinstance(step, SetLightSpec):
        d = {"kind": "set-light", "shutter": step.shutter}
        if step.irradiance_w_m2 is not None:
            d["irradiance_w_m2"] = step.irradiance_w_m2
        d |= {"stability_tolerance_rel": step.stability_tolerance_rel,
              "settle_timeout_s": step.settle_timeout_s}
        return d
    if isinstance(step, WaitTemperatureSpec):
        return {"kind": "wait-temperature", "target_c": step.target_c,
                "tolerance_c": step.tolerance_c, "timeout_s": step.timeout_s}
    if isinstance(step, PixelLoopSpec):
        return {"kind": "pixel-loop",
                "pixels": step.pixels if isinstance(step.pixels, str) else list(step.pixels),
                "steps": [_step_dict(s) for s in step.steps]}
    raise TypeError(f"not a protocol step: {step!r}")


def _drop_none(d: dict[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in d.items() if v is not None}


def _coefficient(c: Coefficient | None) -> Any:
    return None if c is None else {"value": c.value, "unit": c.unit}


def _analysis_dict(a: AnalysisSpec) -> dict[str, Any]:
    out: dict[str, Any] = {"models": list(a.models)}
    if a.translation is not None:
        t = a.translation
        td: dict[str, Any] = {"target_irradiance_w_m2": t.target_irradiance_w_m2,
                              "target_temperature_c": t.target_temperature_c,
                              "procedures": list(t.procedures)}
        for n in (1, 2):
            params = getattr(t, f"procedure_{n}")
            if params is not None:
                td[f"procedure_{n}"] = _drop_none(dataclasses.asdict(params))
        out["translation"] = td
    tc = _drop_none({"alpha_isc": _coefficient(a.temperature_coefficients.alpha_isc),
                     "beta_voc": _coefficient(a.temperature_coefficients.beta_voc)})
    if tc:
        out["temperature_coefficients"] = tc
    if a.reference_cell is not None:
        r = dataclasses.asdict(a.reference_cell)
        if not r["id"]:
            del r["id"]
        out["reference_cell"] = _drop_none(r)
    return out


def protocol_to_dict(protocol: Protocol) -> dict[str, Any]:
    """The canonical plain form: every default written out, keys in schema order, JSON-safe."""
    s = protocol.sample
    sample = _drop_none({"id": s.id, "area_cm2": s.area_cm2,
                         "cells_in_series": s.cells_in_series, "pixels": s.pixels})
    if s.description:
        sample["description"] = s.description
    c = protocol.checks
    out: dict[str, Any] = {"schema": protocol.schema, "name": protocol.name}
    if protocol.description:
        out["description"] = protocol.description
    out |= {
        "sample": sample,
        "limits": dataclasses.asdict(protocol.limits),
        "checks": {"temperature_window_c": None if c.temperature_window_c is None
                   else list(c.temperature_window_c),
                   "light_stability_rel": c.light_stability_rel,
                   "watchdog_s": c.watchdog_s},
        "steps": [_step_dict(step) for step in protocol.steps],
        "analysis": _analysis_dict(protocol.analysis),
        "metadata": protocol.metadata.to_plain(),
    }
    return out


def dump_protocol(protocol: Protocol) -> str:
    """Canonical YAML text of a protocol; ``load_protocol(dump_protocol(p)) == p``."""
    return yaml.safe_dump(protocol_to_dict(protocol), sort_keys=False, allow_unicode=True,
                          default_flow_style=False, width=100)


def protocol_sha256(protocol: Protocol) -> str:
    return hashlib.sha256(dump_protocol(protocol).encode("utf-8")).hexdigest()


# --------------------------------------------------------------------------- compile
SAMPLE_OVERRIDE_KEYS = {"id": "sample_id", "sample_id": "sample_id", "area_cm2": "area_cm2",
                        "cells_in_series": "cells_in_series", "description": "description"}


def compile_plan(protocol: Protocol, *, bench: Any = None,
                 sample_overrides: Mapping[str, Any] | None = None) -> P.Plan:
    """Turn a validated protocol into the engine's :class:`tracer.plan.Plan`.

    Pixel loops are unrolled: for each pixel a ``SelectPixel`` step, then the loop's steps
    with ``-p<pixel>`` appended to their names. ``pixels: all`` means 1 … ``sample.pixels``,
    or 1 … the bench switch's channels when the sample does not say. With ``bench`` the
    protocol is checked against it again (hard limits, instruments). ``sample_overrides``
    replaces sample fields for this run: ``id`` (or ``sample_id``), ``area_cm2``,
    ``cells_in_series``, ``description``. On a bench with a switch, a protocol without a
    pixel loop starts with ``SelectPixel(1)`` (a switch connects nothing until told).
    """
    if not isinstance(protocol, Protocol):
        raise TypeError(f"compile_plan needs a Protocol; got {type(protocol).__name__}")
    bench = _resolve_bench(bench)
    canonical = protocol_to_dict(protocol)
    if bench is not None:
        doc = Document(protocol.source, canonical, dict(protocol.lines))
        _, problems = validate(doc, bench)
        if problems:
            raise ProtocolError(problems)
    problems: list[Problem] = []
    sample = _sample(protocol, sample_overrides, problems)
    steps: list[P.Step] = []
    for i, step in enumerate(protocol.steps):
        if isinstance(step, PixelLoopSpec):
            pixels = _pixels(protocol, step, bench, f"steps[{i}].pixels", problems)
            for pixel in pixels:
                steps.append(P.SelectPixel(pixel=pixel))
                steps += [_compile_step(s, suffix=f"-p{pixel}") for s in step.steps]
        else:
            steps.append(_compile_step(step))
    if (bench is not None and getattr(bench, "switch_channels", None)
            and not any(isinstance(s, P.SelectPixel) for s in steps)):
        # A bench with a pixel switch connects nothing until a channel is closed: a protocol
        # without a pixel loop measures the sample on channel 1.
        steps.insert(0, P.SelectPixel(pixel=1))
    if problems:
        raise ProtocolError(problems)
    c = protocol.checks
    text = dump_protocol(protocol)
    return P.Plan(
        name=protocol.name,
        steps=tuple(steps),
        limits=protocol.limits,
        sample=sample,
        checks=P.Checks(temperature_window_c=c.temperature_window_c,
                        light_stability_rel=c.light_stability_rel, watchdog_s=c.watchdog_s),
        analysis=analysis_settings(protocol, bench),
        metadata=protocol.metadata.to_plain(),
        protocol_snapshot=canonical,
        protocol_sha256=hashlib.sha256(text.encode("utf-8")).hexdigest(),
    )


def _sample(protocol: Protocol, overrides: Mapping[str, Any] | None,
            problems: list[Problem]) -> P.Sample:
    s = protocol.sample
    values = {"sample_id": s.id, "area_cm2": s.area_cm2, "cells_in_series": s.cells_in_series,
              "description": s.description}
    if not overrides:
        return P.Sample(**values)
    # Overrides are checked with the same rules as the protocol's own sample section.
    from ._yamltree import Document as _Doc
    from .schema import SAMPLE_FIELDS
    from ._fields import INVALID
    ctx = Ctx(_Doc("sample override", {}, {}))
    for key, value in overrides.items():
        target = SAMPLE_OVERRIDE_KEYS.get(key)
        if target is None:
            ctx.add(("sample", str(key)), f"unknown sample override {key!r}", value=key,
                    allowed=", ".join(SAMPLE_OVERRIDE_KEYS))
            continue
        spec = SAMPLE_FIELDS["id" if target == "sample_id" else target]
        if value is None and target == "area_cm2":
            values[target] = None
            continue
        checked = spec.kind.check(ctx, ("sample", str(key)), value)
        if checked is not INVALID:
            values[target] = checked
    problems += ctx.problems
    return P.Sample(**values)


def _pixels(protocol: Protocol, loop: PixelLoopSpec, bench: Any, key: str,
            problems: list[Problem]) -> tuple[int, ...]:
    if isinstance(loop.pixels, tuple):
        return loop.pixels
    count = protocol.sample.pixels
    if count is None and bench is not None:
        count = bench.switch_channels
    if count is None:
        problems.append(Problem(protocol.source, protocol.line_of(key), key, "all",
                                "sample.pixels, or a bench profile with a switch",
                                "'all' pixels needs sample.pixels or a bench profile whose "
                                "switch says how many channels it has"))
        return ()
    return tuple(range(1, count + 1))


def _compile_step(step: Any, suffix: str = "") -> P.Step:
    if isinstance(step, SweepSpec):
        return P.SweepStep(name=step.name + suffix, light=step.light, start=step.start,
                           stop=step.stop, points=step.points, source_mode=step.source,
                           spacing=step.spacing, direction=step.direction,
                           settle_s=step.settle_s, nplc=step.nplc, four_wire=step.four_wire,
                           repeats=step.repeats, acquisition=step.acquisition,
                           compliance=step.compliance, voc_estimate_v=step.voc_estimate_v)
    if isinstance(step, HoldSpec):
        return P.HoldStep(name=step.name + suffix, light=step.light, mode=step.mode,
                          duration_s=step.duration_s, interval_s=step.interval_s,
                          level=step.level_v if step.level_v is not None else 0.0,
                          nplc=step.nplc, four_wire=step.four_wire, compliance=step.compliance)
    if isinstance(step, MppSpec):
        return P.MpptStep(name=step.name + suffix, duration_s=step.duration_s,
                          interval_s=step.interval_s, step_v=step.step_v, start_v=step.start_v,
                          nplc=step.nplc, four_wire=step.four_wire,
                          compliance=step.compliance_a)
    if isinstance(step, SetLightSpec):
        return P.SetLight(shutter_open=step.shutter == "open",
                          irradiance_w_m2=step.irradiance_w_m2,
                          stability_tolerance_rel=step.stability_tolerance_rel,
                          settle_timeout_s=step.settle_timeout_s)
    if isinstance(step, WaitTemperatureSpec):
        return P.WaitTemperature(target_c=step.target_c, tolerance_c=step.tolerance_c,
                                 timeout_s=step.timeout_s)
    raise TypeError(f"not a protocol step: {step!r}")  # pragma: no cover


# --------------------------------------------------------------------------- analysis settings
_TO_SI = {"A/K": ("a_per_k", 1.0), "mA/K": ("a_per_k", 1e-3), "1/K": ("per_k", 1.0),
          "%/K": ("per_k", 1e-2), "V/K": ("v_per_k", 1.0), "mV/K": ("v_per_k", 1e-3)}


def analysis_settings(protocol: Protocol, bench: Any = None) -> dict[str, Any]:
    """The plain dict handed to the analyser (``Plan.analysis``); units in the key names.

    ``{"models": [...], "translation": {...} | None, "temperature_coefficients": {
    "alpha_isc_a_per_k" | "alpha_isc_per_k": x, "beta_voc_v_per_k" | "beta_voc_per_k": y},
    "reference_cell": {...} | None, "reference_cell_source": "protocol" | "bench" | None}``
    """
    a = protocol.analysis
    out: dict[str, Any] = {"models": list(a.models), "translation": None}
    if a.translation is not None:
        t = a.translation
        out["translation"] = {
            "target_irradiance_w_m2": t.target_irradiance_w_m2,
            "target_temperature_c": t.target_temperature_c,
            "procedures": list(t.procedures),
            "procedure_1": None if t.procedure_1 is None else dataclasses.asdict(t.procedure_1),
            "procedure_2": None if t.procedure_2 is None else dataclasses.asdict(t.procedure_2),
        }
    coeffs: dict[str, float] = {}
    for name in ("alpha_isc", "beta_voc"):
        c = getattr(a.temperature_coefficients, name)
        if c is not None:
            suffix, scale = _TO_SI[c.unit]
            coeffs[f"{name}_{suffix}"] = c.value * scale
    out["temperature_coefficients"] = coeffs
    if a.reference_cell is not None:
        out["reference_cell"] = dataclasses.asdict(a.reference_cell)
        out["reference_cell_source"] = "protocol"
    elif bench is not None and getattr(bench, "reference_cell", None) is not None:
        out["reference_cell"] = dataclasses.asdict(bench.reference_cell)
        out["reference_cell_source"] = "bench"
    else:
        out["reference_cell"] = None
        out["reference_cell_source"] = None
    return out
