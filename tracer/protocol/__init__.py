"""Sweep protocols: YAML in, validated frozen dataclasses, compiled into a
:class:`tracer.plan.Plan` for the engine. The schema is documented in
``protocols/README.md``.

    from tracer.protocol import load_protocol, compile_plan, dump_protocol, ProtocolError
    protocol = load_protocol("protocols/dark-then-light.yaml", bench=bench_profile)
    plan = compile_plan(protocol, bench=bench_profile, sample_overrides={"id": "PLT-0412-B"})

Every problem is reported at once: ``ProtocolError.problems`` is a list of
:class:`Problem` (file, line, key, value, allowed, message).
"""
from __future__ import annotations

from .compiler import (analysis_settings, compile_plan, dump_protocol, load_protocol,
                       protocol_sha256, protocol_to_dict)
from .errors import Problem, ProblemReport, ProtocolError
from .estimate import PlanSummary, format_duration, summarize
from .model import (AnalysisSpec, ChecksSpec, Coefficient, FrozenMap, HoldSpec, MppSpec,
                    PixelLoopSpec, ProcedureParameters, Protocol, ReferenceCellSpec, SampleSpec,
                    SetLightSpec, SweepSpec, TemperatureCoefficients, TranslationSpec,
                    WaitTemperatureSpec)
from ._yamltree import MAX_FILE_BYTES

__all__ = [
    "load_protocol", "compile_plan", "dump_protocol", "protocol_to_dict", "protocol_sha256",
    "analysis_settings", "summarize", "format_duration", "PlanSummary",
    "Problem", "ProblemReport", "ProtocolError", "MAX_FILE_BYTES",
    "Protocol", "SampleSpec", "ChecksSpec", "SweepSpec", "HoldSpec", "MppSpec", "SetLightSpec",
    "WaitTemperatureSpec", "PixelLoopSpec", "AnalysisSpec", "TranslationSpec",
    "ProcedureParameters", "TemperatureCoefficients", "Coefficient", "ReferenceCellSpec",
    "FrozenMap",
]
