"""What the bench window knows about the run in progress — without Qt.

The window feeds every engine event to :meth:`RunModel.apply_many` (on the GUI thread, in
the order the engine published them) and, on its redraw timer, asks
:meth:`RunModel.take_changes` what to redraw. Nothing here imports Qt, so the model is
tested without a display.

Points are kept per sweep in a :class:`ColumnBuffer`: preallocated float64 columns whose
capacity doubles when full (amortised O(1) per point; a batch of points is written with one
slice assignment per column), and whose columns are handed out as views — the plot's
``setData`` receives the buffer itself, never a per-point copy.

Sign: events carry the SMU's load-convention current; the one conversion to the generator
convention (Isc > 0 under light) is :func:`tracer.conventions.generator_current`, applied
here to each batch. Display columns are in mA (or mA/cm2 when the sample's area is known)
and mW (or mW/cm2).
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from tracer import events as ev
from tracer.conventions import generator_current

#: Columns of a sweep's buffer: volts, generator-convention amperes and watts, then the
#: displayed current and power (mA or mA/cm2, mW or mW/cm2), |displayed current| for the
#: semilog plot (0 -> NaN), seconds since the run started, the compliance flag (0/1) and
#: the value sourced (V or A, as the sweep sources; the plots read ahead from it).
SWEEP_COLUMNS = ("voltage_v", "current_a", "power_w", "y", "p", "abs_y", "t_s", "compliance",
                 "setpoint")


class ColumnBuffer:
    """Growing float64 columns. ``column(name)`` is a view of the filled part (no copy);
    a view taken before the buffer grows keeps the old storage, so take it afresh."""

    def __init__(self, names: Sequence[str], capacity: int = 64):
        self.names = tuple(names)
        self._index = {n: k for k, n in enumerate(self.names)}
        self._data = np.full((len(self.names), max(1, int(capacity))), np.nan)
        self._size = 0
        self.growths = 0          # how often the storage was reallocated

    def __len__(self) -> int:
        return self._size

    @property
    def capacity(self) -> int:
        return int(self._data.shape[1])

    def reserve(self, total: int) -> None:
        """Make room for ``total`` rows, doubling the capacity as often as needed."""
        capacity = self.capacity
        if total <= capacity:
            return
        while capacity < total:
            capacity *= 2
        data = np.full((len(self.names), capacity), np.nan)
        data[:, :self._size] = self._data[:, :self._size]
        self._data = data
        self.growths += 1

    def extend(self, **columns: Any) -> None:
        """Append rows: one equally long array (or scalar) per column; a column not given
        stays NaN."""
        unknown = set(columns) - set(self._index)
        if unknown:
            raise KeyError(f"unknown column(s) {sorted(unknown)}; have {self.names}")
        arrays = {k: np.asarray(v, dtype=float) for k, v in columns.items()}
        lengths = {a.size for a in arrays.values() if a.ndim > 0}
        if len(lengths) > 1:
            raise ValueError(f"columns differ in length: {sorted(lengths)}")
        count = lengths.pop() if lengths else 1
        if count == 0:
            return
        start = self._size
        self.reserve(start + count)
        for name, array in arrays.items():
            self._data[self._index[name], start:start + count] = array
        self._size = start + count

    def column(self, name: str) -> np.ndarray:
        return self._data[self._index[name], :self._size]

    def clear(self) -> None:
        self._size = 0


@dataclass
class SweepTrace:
    """One sweep (or hold, or MPP track) of the run, as drawn."""

    started: ev.SweepStarted
    order: int                          # 0-based position in the run (colour index)
    buffer: ColumnBuffer = field(default_factory=lambda: ColumnBuffer(SWEEP_COLUMNS))
    finished: ev.SweepFinished | None = None
    analysis: Mapping[str, Any] | None = None
    _model_curve: tuple[np.ndarray, np.ndarray] | None | bool = field(default=False, repr=False)

    @property
    def uid(self) -> str:
        return self.started.sweep_uid

    @property
    def light(self) -> bool:
        return bool(self.started.light)

    @property
    def is_iv(self) -> bool:
        """An I-V sweep (not a hold or MPP track)."""
        return self.started.kind == "sweep"

    @property
    def direction(self) -> str:
        return self.started.direction

    @property
    def points(self) -> int:
        return len(self.buffer)

    def label(self) -> str:
        s = self.started
        parts = [f"{s.sweep_index + 1}. {s.step_name}"]
        if s.direction in ("forward", "reverse"):
            parts.append("fwd" if s.direction == "forward" else "rev")
        if s.pixel is not None:
            parts.append(f"px {s.pixel}")
        return " ".join(parts)

    def column(self, name: str) -> np.ndarray:
        return self.buffer.column(name)

    def model_curve(self, current_scale: float, samples: int = 240
                    ) -> tuple[np.ndarray, np.ndarray] | None:
        """The fitted model over the measured voltage span, as (volts, displayed current)
        — |current| for a dark sweep — or None without a usable fit. Computed once."""
        if self._model_curve is False:
            self._model_curve = None
            v = self.column("voltage_v")
            v = v[np.isfinite(v)]
            if self.analysis is not None and v.size >= 2:
                model = fitted_model(self.analysis)
                if model is not None:
                    grid = np.linspace(float(v.min()), float(v.max()), samples)
                    try:
                        current = np.asarray(model.current(grid), dtype=float)
                    except (ValueError, ArithmeticError, FloatingPointError):
                        current = None
                    if current is not None:
                        y = current * current_scale
                        if not self.light:
                            y = np.abs(y)
                            y[y == 0.0] = np.nan
                        self._model_curve = (grid, y)
        return self._model_curve  # type: ignore[return-value]


def chosen_fit(result: Mapping[str, Any] | None) -> Mapping[str, Any] | None:
    """The fit the analysis prefers: ``auto`` when it ran, else the first model requested."""
    if not result:
        return None
    fits = result.get("fits") or {}
    if not isinstance(fits, Mapping) or not fits:
        return None
    fit = fits.get("auto") or next(iter(fits.values()))
    return fit if isinstance(fit, Mapping) else None


def fitted_model(result: Mapping[str, Any]):
    """A ``tracer.model`` object built from the analysis' chosen fit, at the temperature
    and cell count the fit used; None when there is no usable fit."""
    from tracer.model import DoubleDiode, SingleDiode

    fit = chosen_fit(result)
    if fit is None:
        return None
    conditions = result.get("conditions") or {}
    t_c = conditions.get("temperature_c")
    temperature_k = (25.0 if t_c is None else float(t_c)) + 273.15   # as the analysis does
    ns = int(conditions.get("cells_in_series") or 1)
    shunt = fit.get("shunt_resistance_ohm")
    shunt = math.inf if shunt is None else float(shunt)      # JSON keeps inf as None
    try:
        if fit.get("model") == "double":
            return DoubleDiode(
                photocurrent_a=float(fit["photocurrent_a"]),
                saturation_current_1_a=float(fit["saturation_current_1_a"]),
                saturation_current_2_a=float(fit["saturation_current_2_a"]),
                ideality_1=float(fit["ideality_1"]), ideality_2=float(fit["ideality_2"]),
                series_resistance_ohm=float(fit["series_resistance_ohm"]),
                shunt_resistance_ohm=shunt, temperature_k=temperature_k, cells_in_series=ns)
        return SingleDiode(
            photocurrent_a=float(fit["photocurrent_a"]),
            saturation_current_a=float(fit["saturation_current_a"]),
            ideality=float(fit["ideality"]),
            series_resistance_ohm=float(fit["series_resistance_ohm"]),
            shunt_resistance_ohm=shunt, temperature_k=temperature_k, cells_in_series=ns)
    except (KeyError, TypeError, ValueError):
        return None


@dataclass(frozen=True)
class OutputState:
    """The SMU output as last known. ``on`` None = unknown; ``source`` says where from."""

    on: bool | None
    source: str
    time: float
    alarm: bool = False          # the output could not be verified off


@dataclass(frozen=True)
class Alarm:
    """A fault, interlock or abort to show in the banner and the status bar."""

    cause: str
    message: str
    time: float
    severe: bool = False         # output not verified off

    def text(self) -> str:
        return f"{self.cause}: {self.message}" if self.cause else self.message


@dataclass(frozen=True)
class InstrumentReading:
    """One answer of the periodic poll (made off the GUI thread while no run goes)."""

    time: float
    output_on: bool | None = None
    interlock_open: bool | None = None
    error: str | None = None


@dataclass
class Changes:
    """What changed since the last :meth:`RunModel.take_changes` (what to redraw)."""

    new_run: bool = False
    added: list[SweepTrace] = field(default_factory=list)
    grown: list[SweepTrace] = field(default_factory=list)
    analysed: list[SweepTrace] = field(default_factory=list)
    status: bool = False
    oldest_point_time: float | None = None    # Point.time of the oldest point not yet shown
    points: int = 0                          # points arrived since the last take

    @property
    def any(self) -> bool:
        return bool(self.new_run or self.added or self.grown or self.analysed or self.status)


class RunModel:
    """The state of the run on show, fed with engine events; see the module docstring."""

    def __init__(self) -> None:
        self.run: ev.RunStarted | None = None
        self.finished: ev.RunFinished | None = None
        self.sweeps: dict[str, SweepTrace] = {}
        self.current: SweepTrace | None = None
        self.last_analysed: SweepTrace | None = None
        self.points_total = 0
        self.current_scale = 1e3            # A -> mA (mA/cm2 once an area is known)
        self.density = False
        self.output = OutputState(None, "not read yet", time.time())
        self.interlock_open: bool | None = None
        self.interlock_source = "not read yet"
        self.link_ok: bool | None = None
        self.link_message = "not read yet"
        self.alarm: Alarm | None = None
        self.interlocks: list[ev.InterlockTripped] = []
        self.limits: Mapping[str, Any] | None = None
        self.events_seen = 0
        self._changes = Changes()

    # ------------------------------------------------------------------ queries
    @property
    def running(self) -> bool:
        return self.run is not None and self.finished is None

    @property
    def dirty(self) -> bool:
        return self._changes.any

    @property
    def current_unit(self) -> str:
        return "mA/cm²" if self.density else "mA"

    @property
    def power_unit(self) -> str:
        return "mW/cm²" if self.density else "mW"

    def iv_sweeps(self, light: bool) -> list[SweepTrace]:
        return [s for s in self.sweeps.values() if s.is_iv and s.light == light]

    def analysed_sweeps(self) -> list[SweepTrace]:
        return [s for s in self.sweeps.values() if s.analysis is not None]

    def status_text(self) -> str:
        if self.run is None:
            return "No run yet"
        if self.finished is not None:
            f = self.finished
            tail = f" - {f.reason}" if f.reason else ""
            return f"Run {f.status}{tail} ({f.points} points)"
        s = self.current
        if s is None:
            return f"Run '{self.run.protocol_name}' started"
        planned = f"/{s.started.points_planned}" if s.started.points_planned else ""
        return (f"Running '{self.run.protocol_name}': sweep {s.started.sweep_index + 1} "
                f"'{s.started.step_name}', {s.points}{planned} points")

    def take_changes(self) -> Changes:
        changes, self._changes = self._changes, Changes()
        return changes

    # ------------------------------------------------------------------ feeding
    def apply(self, event: Any) -> None:
        self.apply_many((event,))

    def apply_many(self, events: Iterable[Any]) -> None:
        """Apply events in order; runs of consecutive points of one sweep are appended
        to its buffer in one go."""
        batch: list[ev.Point] = []
        for event in events:
            self.events_seen += 1
            if isinstance(event, ev.Point):
                if batch and (batch[-1].sweep_uid != event.sweep_uid
                              or batch[-1].run_uid != event.run_uid):
                    self._points(batch)
                    batch = []
                batch.append(event)
                continue
            if batch:
                self._points(batch)
                batch = []
            self._event(event)
        if batch:
            self._points(batch)

    def apply_reading(self, reading: InstrumentReading) -> None:
        """A poll of the instrument (while idle). Ignored during a run: then the events
        are the truth and the poller stands aside."""
        if self.running:
            return
        if reading.error:
            self.link_ok = False
            self.link_message = reading.error
            self.output = OutputState(None, f"no answer from the SMU: {reading.error}",
                                      reading.time)
            self.interlock_open = None
            self.interlock_source = "no answer"
        else:
            self.link_ok = True
            self.link_message = "answering"
            if reading.output_on is not None:
                self.output = OutputState(bool(reading.output_on), "read from the SMU",
                                          reading.time)
            if reading.interlock_open is not None:
                self.interlock_open = bool(reading.interlock_open)
                self.interlock_source = "read from the SMU"
        self._changes.status = True

    def note_emergency_stop(self, verified: bool, when: float | None = None) -> None:
        """The result of an emergency stop made by this window."""
        when = time.time() if when is None else when
        if verified:
            self.output = OutputState(False, "read back off after the emergency stop", when)
        else:
            self.output = OutputState(None, "NOT verified off after the emergency stop", when,
                                      alarm=True)
            self.alarm = Alarm("emergency-stop", "the output could NOT be verified off: check "
                               "the instrument before touching the sample", when, severe=True)
        self._changes.status = True

    def set_alarm(self, cause: str, message: str, severe: bool = False) -> None:
        self.alarm = Alarm(cause, message, time.time(), severe)
        self._changes.status = True

    def clear_alarm(self) -> None:
        if self.alarm is not None and not self.alarm.severe:
            self.alarm = None
            self._changes.status = True

    # ------------------------------------------------------------------ internals
    def _points(self, points: list[ev.Point]) -> None:
        if self.run is None or points[0].run_uid != self.run.run_uid:
            return
        trace = self.sweeps.get(points[0].sweep_uid)
        if trace is None:
            return
        n = len(points)
        v = np.fromiter((p.voltage_v for p in points), dtype=float, count=n)
        load = np.fromiter((p.current_a for p in points), dtype=float, count=n)
        t = np.fromiter((p.time for p in points), dtype=float, count=n)
        comp = np.fromiter((p.in_compliance for p in points), dtype=float, count=n)
        setpoint = np.fromiter((p.setpoint for p in points), dtype=float, count=n)
        i = generator_current(load)
        power = v * i
        y = i * self.current_scale
        abs_y = np.abs(y)
        abs_y[abs_y == 0.0] = np.nan             # log axis: no zero
        trace.buffer.extend(voltage_v=v, current_a=i, power_w=power, y=y,
                            p=power * self.current_scale, abs_y=abs_y,
                            t_s=t - float(self.run.time), compliance=comp, setpoint=setpoint)
        self.points_total += n
        ch = self._changes
        if trace not in ch.grown and trace not in ch.added:
            ch.grown.append(trace)
        oldest = float(np.min(t))
        if ch.oldest_point_time is None or oldest < ch.oldest_point_time:
            ch.oldest_point_time = oldest
        ch.points += n
        ch.status = True
        if not (self.output.on and self.output.source.startswith("points arriving")):
            self.output = OutputState(True, "points arriving (switched on and read back by "
                                      "the run)", float(t[-1]))

    def _event(self, e: Any) -> None:
        ch = self._changes
        if isinstance(e, ev.RunStarted):
            self.run = e
            self.finished = None
            self.sweeps = {}
            self.current = None
            self.last_analysed = None
            self.points_total = 0
            self.interlocks = []
            self.limits = dict(e.limits or {})
            area = (e.sample or {}).get("area_cm2")
            try:
                area = float(area) if area is not None else None
            except (TypeError, ValueError):
                area = None
            self.density = area is not None and math.isfinite(area) and area > 0
            self.current_scale = 1e3 / area if self.density else 1e3
            if self.alarm is not None and not self.alarm.severe:
                self.alarm = None
            self._changes = ch = Changes(new_run=True, status=True)
            return
        if self.run is None or getattr(e, "run_uid", None) != self.run.run_uid:
            return
        ch.status = True
        if isinstance(e, ev.SweepStarted):
            trace = SweepTrace(started=e, order=len(self.sweeps))
            self.sweeps[e.sweep_uid] = trace
            self.current = trace
            ch.added.append(trace)
        elif isinstance(e, ev.SweepFinished):
            trace = self.sweeps.get(e.sweep_uid)
            if trace is not None:
                trace.finished = e
                if trace not in ch.added and trace not in ch.grown:
                    ch.grown.append(trace)
            if e.status == ev.SWEEP_ABORTED and e.reason:
                self.alarm = Alarm("sweep aborted", e.reason, e.time)
            # steps end with the output switched off and read back off by the engine
            self.output = OutputState(False, "read back off by the run at the end of the sweep",
                                      e.time)
        elif isinstance(e, ev.Analysis):
            trace = self.sweeps.get(e.sweep_uid)
            if trace is not None:
                trace.analysis = dict(e.result or {})
                trace._model_curve = False
                self.last_analysed = trace
                ch.analysed.append(trace)
        elif isinstance(e, ev.InterlockTripped):
            self.interlocks.append(e)
            self.alarm = Alarm(e.cause, e.message, e.time)
            if e.cause in ("interlock-open",):
                self.interlock_open = True
                self.interlock_source = "reported by the run"
            self.output = OutputState(None, "being switched off by the run", e.time)
        elif isinstance(e, ev.RunFinished):
            self.finished = e
            self.current = None
            if e.output_verified_off:
                self.output = OutputState(False, "read back off at the end of the run", e.time)
            else:
                self.output = OutputState(None, "NOT verified off at the end of the run", e.time,
                                          alarm=True)
                self.alarm = Alarm("output-not-verified-off",
                                   "the output could NOT be verified off: check the instrument "
                                   "before touching the sample", e.time, severe=True)
            if e.status != ev.RUN_COMPLETED and (self.alarm is None or not self.alarm.severe):
                if not self.interlocks:
                    self.alarm = Alarm(f"run {e.status}", e.reason or "no reason given", e.time)
