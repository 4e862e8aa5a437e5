"""Check the protocol text of the editor as `tracer check` does — without Qt.

:func:`validate_protocol_text` loads the text with :func:`tracer.protocol.load_protocol`
(against the bench profile, so the bench's hard limits and instruments count), compiles it
with the sample fields of the set-up panel as overrides, and lets the engine say whether it
would refuse the plan (``Engine.check``: touches no instrument). Problems are the very
``Problem`` objects `tracer check` prints, so the messages are the same, line numbers
included.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Mapping


@dataclass(frozen=True)
class Validation:
    ok: bool
    plan: Any = None                         # tracer.plan.Plan when ok
    protocol: Any = None                     # tracer.protocol.Protocol when it loaded
    problems: tuple[str, ...] = ()           # one line each, as `tracer check` prints them
    lines: tuple[int, ...] = ()              # 1-based lines with a problem (editor marks)
    summary: str = ""                        # one line: what the plan will do

    def report(self) -> str:
        if self.ok:
            return self.summary
        n = len(self.problems)
        return "\n".join([f"{n} problem{'s' if n != 1 else ''}:"] + [f"  {p}" for p in self.problems])


def _summary(plan: Any) -> str:
    from tracer.protocol import format_duration, summarize

    s = summarize(plan)
    kinds = [f"{n} {w}{'' if n == 1 else 's'}" for n, w in
             ((s.sweeps, "sweep"), (s.holds, "hold"), (s.mpp_tracks, "MPP track")) if n]
    parts = [", ".join(kinds) or f"{s.steps} steps", f"{s.planned_points} planned points",
             f"about {format_duration(s.duration_s)}"]
    if s.temperature_wait_max_s:
        parts[-1] += f" + up to {format_duration(s.temperature_wait_max_s)} for temperature"
    lim = plan.limits
    parts.append(f"limits {lim.voltage_v:g} V, {lim.current_a:g} A, {lim.power_w:g} W, "
                 f"reverse {lim.reverse_voltage_v:g} V")
    return f"OK: {plan.name}, " + ", ".join(parts)


def validate_protocol_text(text: str, *, source_name: str = "<editor>", bench_profile: Any = None,
                           sample_overrides: Mapping[str, Any] | None = None,
                           engine: Any = None) -> Validation:
    """See the module docstring. Never raises for a bad protocol."""
    from tracer.protocol import ProtocolError, compile_plan, load_protocol

    if not text.strip():
        return Validation(False, problems=(f"{source_name}: the protocol is empty",))
    overrides = {k: v for k, v in (sample_overrides or {}).items() if v not in (None, "")}
    protocol = None
    try:
        # a str is taken as YAML text when it holds a newline (see load_protocol)
        source = text if "\n" in text else text + "\n"
        protocol = load_protocol(source, bench=bench_profile, source_name=source_name)
        plan = compile_plan(protocol, bench=bench_profile, sample_overrides=overrides or None)
    except ProtocolError as exc:
        problems = tuple(str(p) for p in exc.problems)
        lines = tuple(sorted({p.line for p in exc.problems if p.line}))
        return Validation(False, protocol=protocol, problems=problems, lines=lines)
    except (ValueError, TypeError) as exc:      # a bad override value
        return Validation(False, protocol=protocol, problems=(f"{source_name}: {exc}",))
    if engine is not None:
        from tracer.engine import PlanRefused

        try:
            engine.check(plan)
        except PlanRefused as exc:
            bench = getattr(bench_profile, "name", "this bench")
            return Validation(False, protocol=protocol,
                              problems=tuple(f"{source_name}: the bench {bench!r} refuses: {p}"
                                             for p in exc.problems))
    return Validation(True, plan=plan, protocol=protocol, summary=_summary(plan))


@dataclass
class SampleFields:
    """The set-up panel's sample fields; empty/None = keep the protocol's value."""

    sample_id: str = ""
    area_cm2: float | None = None
    cells_in_series: int | None = None
    extra: dict = field(default_factory=dict)

    def overrides(self) -> dict[str, Any]:
        out: dict[str, Any] = {}
        if self.sample_id.strip():
            out["id"] = self.sample_id.strip()
        if self.area_cm2 is not None and self.area_cm2 > 0:
            out["area_cm2"] = float(self.area_cm2)
        if self.cells_in_series is not None and self.cells_in_series > 0:
            out["cells_in_series"] = int(self.cells_in_series)
        return out
