"""The engine's event stream: small immutable records, stdlib only.

Order within a run::

    RunStarted
      (SweepStarted  Point*  SweepFinished  Analysis?)*     # one block per sweep/hold/MPP step
      InterlockTripped?                                      # before the RunFinished it caused
    RunFinished                                              # always last, on every path

An ``Analysis`` is computed off the sweep's thread, so it may arrive after later blocks
have started; it always follows its own ``SweepFinished`` (match it by ``sweep_uid``) and
always precedes ``RunFinished``. A sweep that ends aborted gets no ``Analysis``.

Every event carries ``run_uid``. Points carry the SMU's raw readings: current in the
**load** convention (into the cell's + terminal); use ``tracer.conventions`` to convert.
``Point.seq`` is 1-based and contiguous within a sweep; ``Point.run_seq`` is 1-based and
contiguous within a run. The logbook subscriber is synchronous and first: a point that
any other subscriber sees is already committed.

``to_dict()`` gives a JSON-safe dict with an ``"event"`` key naming the type;
``event_from_dict()`` is its inverse.
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Any, Mapping

RUN_COMPLETED = "completed"
RUN_ABORTED = "aborted"          # stopped by an interlock, a fault or the operator
RUN_FAILED = "failed"            # a software error; output still made safe
RUN_INTERRUPTED = "interrupted"  # found unfinished by the logbook (process died)

SWEEP_COMPLETED = "completed"
SWEEP_ABORTED = "aborted"


def _json_safe(value: Any) -> Any:
    if isinstance(value, float):
        if math.isnan(value) or math.isinf(value):
            return None if math.isnan(value) else (1e308 if value > 0 else -1e308)
        return value
    if isinstance(value, Mapping):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    return value


class _Event:
    def to_dict(self) -> dict[str, Any]:
        out = {"event": type(self).__name__}
        for f in dataclasses.fields(self):  # type: ignore[arg-type]
            out[f.name] = _json_safe(getattr(self, f.name))
        return out


@dataclass(frozen=True)
class RunStarted(_Event):
    run_uid: str
    time: float                      # POSIX seconds
    protocol_name: str
    protocol: Mapping[str, Any]      # the validated protocol, as a plain dict snapshot
    protocol_sha256: str
    sample: Mapping[str, Any]        # id, area_cm2, cells_in_series, description
    operator: str
    bench: Mapping[str, Any]         # name, hard limits, instruments: role -> {address, identity, driver}
    limits: Mapping[str, Any]        # the limits in force for this run
    software_version: str
    metadata: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class SweepStarted(_Event):
    run_uid: str
    sweep_uid: str
    sweep_index: int                 # 0-based within the run
    step_index: int                  # index of the plan step that made it
    step_name: str
    kind: str                        # "sweep" | "hold" | "mpp"
    light: bool                      # shutter open (light) or dark
    direction: str                   # "forward" (toward +V) | "reverse" | "none" (hold, mpp)
    pixel: int | None
    source_mode: str                 # "voltage" | "current"
    acquisition: str                 # "point" | "list"
    points_planned: int              # 0 when open-ended (hold, mpp)
    four_wire: bool
    nplc: float
    settle_s: float
    compliance: float                # [A] when sourcing voltage, [V] when sourcing current
    time: float
    conditions: Mapping[str, Any] = field(default_factory=dict)  # irradiance_w_m2, temperature_c, ...
    pair_sweep_uid: str | None = None  # the opposite-direction sweep of a "both" pair


@dataclass(frozen=True)
class Point(_Event):
    run_uid: str
    sweep_uid: str
    seq: int                         # 1-based within the sweep
    run_seq: int                     # 1-based within the run
    time: float
    setpoint: float                  # [V] or [A], as sourced
    voltage_v: float                 # measured at the terminals
    current_a: float                 # measured, LOAD convention
    in_compliance: bool
    irradiance_w_m2: float | None = None
    temperature_c: float | None = None


@dataclass(frozen=True)
class SweepFinished(_Event):
    run_uid: str
    sweep_uid: str
    status: str                      # "completed" | "aborted"
    reason: str                      # "" when completed
    points: int
    time: float
    conditions: Mapping[str, Any] = field(default_factory=dict)  # readings over the sweep


@dataclass(frozen=True)
class Analysis(_Event):
    run_uid: str
    sweep_uid: str
    time: float
    result: Mapping[str, Any]        # tracer.analysis result, as a JSON-safe dict
    elapsed_s: float = 0.0


@dataclass(frozen=True)
class InterlockTripped(_Event):
    run_uid: str
    sweep_uid: str | None
    cause: str                       # short code, e.g. "current-limit", "compliance", "link-lost"
    message: str                     # one sentence for a person
    time: float
    value: float | None = None       # the offending value, SI
    limit: float | None = None       # the limit it broke, SI


@dataclass(frozen=True)
class RunFinished(_Event):
    run_uid: str
    status: str                      # "completed" | "aborted" | "failed"
    reason: str                      # "" when completed
    time: float
    output_verified_off: bool        # the SMU's output was read back off at the end
    points: int = 0


EVENT_TYPES = {
    cls.__name__: cls
    for cls in (RunStarted, SweepStarted, Point, SweepFinished, Analysis, InterlockTripped, RunFinished)
}


def event_from_dict(data: Mapping[str, Any]) -> _Event:
    """Rebuild an event from :meth:`to_dict` output."""
    data = dict(data)
    cls = EVENT_TYPES[data.pop("event")]
    names = {f.name for f in dataclasses.fields(cls)}
    return cls(**{k: v for k, v in data.items() if k in names})
