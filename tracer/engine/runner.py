"""One run of one plan: the worker thread's code.

Structure of :meth:`Runner.run` (the guarantee that no path leaves the output on)::

    try:
        try:
            RunStarted, then every step            # raises on any trip, error, stop
        except BaseException:                      # incl. KeyboardInterrupt, SystemExit
            classify the cause
        finally:
            engine.secure_output()                 # abort, level 0, output off, read back;
                                                   # reconnects and retries if the link broke
        close the run: pending point, SweepFinished(aborted), Analysis, InterlockTripped,
        RunFinished(output_verified_off)
    except BaseException:                          # even closing failed: still RunFinished
    finally:
        the run is marked done

Every instrument call goes through :meth:`Runner._io`, which posts "what is in flight since
when" for the engine's watchdog thread; switching the output *on* happens under the
engine's safety lock after a last look at the abort flag, so an emergency stop that raced
with it cannot be undone by the worker.
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
import logging
import math
import queue
import threading
import time
import uuid
from collections import deque
from typing import TYPE_CHECKING, Any, Callable, Mapping

import tracer
from tracer import events as ev
from tracer import plan as pl
from tracer.conventions import generator_current

from .bus import CriticalSubscriberError
from .guard import PointGuard, Trip, iec_instability, matches
from .mppt import PerturbObserve
from .planning import hold_source, sweep_segments
from .records import SweepRecord

if TYPE_CHECKING:  # pragma: no cover
    from .engine import Engine

log = logging.getLogger("tracer.engine")

# A tracker or search sweep stays this far below the voltage limit, so that reading noise at
# the top level cannot trip the over-voltage protection set at the limit (our design).
VOLTAGE_HEADROOM = 0.98
# Points of the coarse sweep that finds a starting point for MPP tracking (our design).
MPP_SEARCH_POINTS = 21
# Consecutive readings that must agree before light or temperature counts as settled
# (common practice).
SETTLED_READINGS = 3
# Most list readings fetched in one query (keeps one reply well under the 1 MiB line limit).
LIST_CHUNK = 1000
# The longer power-line cycle of the two mains frequencies [s]: an integration of NPLC
# cycles lasts at most NPLC times this, which the watchdog allows on top of its period.
LONGEST_LINE_CYCLE_S = 1.0 / 50.0
# A lamp delivering less than this fraction of its set irradiance (by the calibrated
# reference cell) has failed; smaller deviations are left to the analysis (our design).
LIGHT_FAILURE_FRACTION = 0.5
# Trips that a stage out of its temperature window can cause; after one of them the stage
# temperature is read, and if it is outside the window that is named as the cause.
_TEMPERATURE_SYMPTOMS = ("compliance", "current-limit", "voltage-limit", "power-limit",
                         "reverse-bias", "bad-reading", "instrument-error")

# The watchdog's label for a critical subscriber (the logbook) that does not return: the
# output is made safe, but the run is not closed from outside (the subscriber holds the bus).
CRITICAL_SUBSCRIBER = "the critical subscriber"
_SET_MEASURE = "smu.set_level_and_measure"
_SET = "smu.set_level"
_MEASURE = "smu.measure"


class StopRequested(Exception):
    """The operator asked for a graceful stop."""


class AbortRequested(Exception):
    """An emergency stop or the watchdog asked the run to end."""


@dataclasses.dataclass
class Outcome:
    status: str                     # ev.RUN_COMPLETED | RUN_ABORTED | RUN_FAILED
    reason: str = ""
    cause: str | None = None        # None: no InterlockTripped
    message: str = ""
    value: float | None = None
    limit: float | None = None

    @classmethod
    def completed(cls) -> "Outcome":
        return cls(ev.RUN_COMPLETED)

    @classmethod
    def trip(cls, cause: str, message: str, *, status: str = ev.RUN_ABORTED,
             value: float | None = None, limit: float | None = None) -> "Outcome":
        return cls(status, f"{cause}: {message}", cause, message, value, limit)


class Control:
    """State shared between the worker, the engine's control methods and the watchdog."""

    def __init__(self, watchdog_s: float):
        self.watchdog_s = watchdog_s
        self.wake = threading.Event()
        self.stop_requested = False
        self.abort: tuple[str, str] | None = None
        self.inflight: tuple[str, float, float] | None = None
        self.emit_lock = threading.RLock()
        self.sealed_by: int | None = None     # thread that closes the run; others stay silent
        self.done = threading.Event()
        self.result: ev.RunFinished | None = None

    def request_abort(self, cause: str, message: str) -> None:
        if self.abort is None:
            self.abort = (cause, message)
        self.wake.set()


class _OpenSweep:
    __slots__ = ("uid", "started", "points", "readings", "fresh", "pair", "light", "step",
                 "kind")

    def __init__(self, uid: str, started: ev.SweepStarted, *, light: bool, step: Any,
                 kind: str, pair: SweepRecord | None):
        self.uid = uid
        self.started = started
        self.points: list[ev.Point] = []
        self.readings: list[dict[str, float]] = []
        self.fresh: dict[str, float] | None = None
        self.pair = pair
        self.light = light
        self.step = step
        self.kind = kind


def plain(value: Any, _depth: int = 0) -> Any:
    """A JSON-safe copy: mappings, sequences, numbers, strings; numpy values via tolist()."""
    if _depth > 50:
        return repr(value)
    if value is None or isinstance(value, (str, bool, int)):
        return value
    if isinstance(value, float):
        return value
    if isinstance(value, Mapping):
        return {str(k): plain(v, _depth + 1) for k, v in value.items()}
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {"type": type(value).__name__,
                **{f.name: plain(getattr(value, f.name), _depth + 1)
                   for f in dataclasses.fields(value)}}
    if isinstance(value, (list, tuple, set, frozenset)):
        return [plain(v, _depth + 1) for v in value]
    tolist = getattr(value, "tolist", None)
    if callable(tolist):
        return plain(tolist(), _depth + 1)
    return repr(value)


def plan_snapshot(plan: pl.Plan) -> tuple[dict[str, Any], str]:
    """The protocol snapshot and its SHA-256 for RunStarted (built from the plan itself
    when it was made by hand rather than compiled from a protocol file)."""
    if plan.protocol_snapshot:
        snapshot = plain(plan.protocol_snapshot)
    else:
        snapshot = {"name": plan.name, "limits": plain(plan.limits), "sample": plain(plan.sample),
                    "checks": plain(plan.checks), "analysis": plain(plan.analysis),
                    "steps": [plain(s) for s in plan.steps]}
    digest = plan.protocol_sha256 or hashlib.sha256(
        json.dumps(snapshot, sort_keys=True, default=repr).encode()).hexdigest()
    return snapshot, digest


class AnalysisQueue:
    """Runs the analyser on its own thread, one sweep after another; the worker publishes
    the results (so every event is published by the worker, in one order)."""

    def __init__(self, analyzer: Callable[[SweepRecord], Mapping], run_uid: str):
        self._analyzer = analyzer
        self._run_uid = run_uid
        self._inbox: queue.Queue = queue.Queue()
        self._done: deque[ev.Analysis] = deque()
        self._cond = threading.Condition()
        self._submitted: list[str] = []
        self._finished: set[str] = set()
        self._abandoned: set[str] = set()
        self._thread: threading.Thread | None = None

    def submit(self, record: SweepRecord) -> None:
        with self._cond:
            self._submitted.append(record.started.sweep_uid)
        if self._thread is None:
            self._thread = threading.Thread(target=self._loop, daemon=True,
                                            name=f"tracer-engine-analysis-{self._run_uid[:8]}")
            self._thread.start()
        self._inbox.put(record)

    def _loop(self) -> None:
        while True:
            record = self._inbox.get()
            if record is None:
                return
            t0 = time.perf_counter()
            try:
                result = self._analyzer(record)
                result = plain(result) if isinstance(result, Mapping) else {"value": plain(result)}
            except BaseException as exc:  # noqa: BLE001 - reported in the result, never fatal
                log.warning("analysis of sweep %s failed: %s", record.started.sweep_uid, exc,
                            exc_info=True)
                result = {"ok": False, "error": f"{type(exc).__name__}: {exc}"}
            event = ev.Analysis(run_uid=self._run_uid, sweep_uid=record.started.sweep_uid,
                                time=time.time(), result=result,
                                elapsed_s=time.perf_counter() - t0)
            with self._cond:
                uid = record.started.sweep_uid
                self._finished.add(uid)
                if uid not in self._abandoned:
                    self._done.append(event)
                self._cond.notify_all()

    @property
    def ready(self) -> bool:
        return bool(self._done)

    def take_ready(self) -> list[ev.Analysis]:
        out = []
        while self._done:
            out.append(self._done.popleft())
        return out

    def drain(self, timeout_s: float) -> list[ev.Analysis]:
        """Everything submitted, waiting up to ``timeout_s``; a sweep whose analysis has not
        finished by then gets an Analysis reporting the time-out (its late result is dropped)."""
        deadline = time.monotonic() + timeout_s
        with self._cond:
            self._cond.wait_for(
                lambda: all(u in self._finished or u in self._abandoned for u in self._submitted),
                max(0.0, deadline - time.monotonic()))
            late = [u for u in self._submitted
                    if u not in self._finished and u not in self._abandoned]
            self._abandoned.update(late)
        out = self.take_ready()
        for uid in late:
            out.append(ev.Analysis(run_uid=self._run_uid, sweep_uid=uid, time=time.time(),
                                   result={"ok": False, "error":
                                           f"analysis did not finish within {timeout_s:g} s"},
                                   elapsed_s=timeout_s))
        self._inbox.put(None)
        return out


class Runner:
    """Executes ``plan`` on ``engine.bench``; publishes through ``engine``'s bus."""

    def __init__(self, engine: "Engine", plan: pl.Plan, *, run_uid: str, operator: str,
                 metadata: Mapping[str, Any] | None, control: Control):
        self.engine = engine
        self.bench = engine.bench
        self.plan = plan
        self.run_uid = run_uid
        self.operator = operator
        self.metadata = dict(plan.metadata)
        self.metadata.update(metadata or {})
        self.control = control
        self.options = engine.options
        self.watchdog_s = float(plan.checks.watchdog_s)
        self.run_seq = 0
        self.sweep_index = 0
        self.step_index = -1
        self.pixel: int | None = None
        self.light_setpoint_w_m2: float | None = None   # last irradiance a SetLight asked for
        self.output_on = False
        self.open_sweep: _OpenSweep | None = None
        self.pending_point: tuple[_OpenSweep, float, float, float, bool, float] | None = None
        self.arm_conditions: dict[str, float] | None = None
        self.next_periodic = math.inf
        self.reading_deadline_s = self.watchdog_s
        self.analyses = (AnalysisQueue(engine.analyzer, run_uid)
                         if engine.analyzer is not None else None)
        self.closed = False

    # ------------------------------------------------------------------ plumbing
    def _io(self, label: str, fn: Callable, *args: Any, deadline_s: float | None = None,
            **kwargs: Any) -> Any:
        """Call an instrument, posting the call for the watchdog."""
        ctl = self.control
        ctl.inflight = (label, time.monotonic(), deadline_s or self.watchdog_s)
        try:
            return fn(*args, **kwargs)
        finally:
            ctl.inflight = None

    def _publish(self, event: Any, *, closing: bool = False) -> None:
        ctl = self.control
        with ctl.emit_lock:
            if ctl.sealed_by is not None and ctl.sealed_by != threading.get_ident():
                return   # the run was closed by the watchdog while this thread was stuck
            outer = ctl.inflight       # the logbook stalling with the output on is watched too
            ctl.inflight = (CRITICAL_SUBSCRIBER, time.monotonic(), self.watchdog_s)
            try:
                self.engine.bus.publish(event, closing=closing)
            finally:
                ctl.inflight = outer

    def _checkpoint(self) -> None:
        ctl = self.control
        if ctl.abort is not None:
            raise AbortRequested(ctl.abort[1])
        if ctl.stop_requested:
            raise StopRequested()

    def _sleep(self, seconds: float) -> None:
        """Interruptible wait: returns early (raising) on stop or abort."""
        if seconds > 0:
            self.control.wake.wait(seconds)
        self._checkpoint()

    def _publish_ready_analyses(self) -> None:
        if self.analyses is not None and self.analyses.ready:
            for event in self.analyses.take_ready():
                self._publish(event)

    # ------------------------------------------------------------------ the run
    def run(self) -> None:
        ctl = self.control
        outcome: Outcome | None = None
        verified = False
        try:
            try:
                self._body()
                outcome = Outcome.completed()
            except BaseException as exc:  # noqa: BLE001 - every cause ends in the same safe state
                outcome = self._classify(exc)
            finally:
                verified = self.engine.secure_output()
            if outcome.status != ev.RUN_COMPLETED:
                self._close_shutter_after_fault()
                self._diagnose(outcome, verified)
            self.close(outcome, verified)
        except BaseException as exc:  # noqa: BLE001 - closing itself failed
            log.exception("closing run %s failed", self.run_uid)
            self._last_resort_close(exc, verified)
        finally:
            ctl.done.set()

    def _body(self) -> None:
        snapshot, digest = plan_snapshot(self.plan)
        limits = {**plain(self.plan.limits), "checks": plain(self.plan.checks)}
        self._publish(ev.RunStarted(
            run_uid=self.run_uid, time=time.time(), protocol_name=self.plan.name,
            protocol=snapshot, protocol_sha256=digest, sample=plain(self.plan.sample),
            operator=self.operator, bench=plain(self.bench.describe()), limits=limits,
            software_version=tracer.__version__, metadata=plain(self.metadata)))
        self._prepare()
        for index, step in enumerate(self.plan.steps):
            self._checkpoint()
            self.step_index = index
            self._execute(index, step)
            self._publish_ready_analyses()
        self._checkpoint()
        if self.analyses is not None:
            for event in self.analyses.drain(self.options.analysis_timeout_s):
                self._publish(event)

    def _classify(self, exc: BaseException) -> Outcome:
        ctl = self.control
        if ctl.abort is not None:       # an emergency stop or the watchdog got there first
            cause, message = ctl.abort
            return Outcome.trip(cause, message)
        if isinstance(exc, StopRequested):
            return Outcome(ev.RUN_ABORTED, "stopped by the operator")
        if isinstance(exc, Trip):
            return Outcome.trip(exc.cause, exc.message, value=exc.value, limit=exc.limit)
        if isinstance(exc, CriticalSubscriberError):
            return Outcome.trip("critical-subscriber", str(exc), status=ev.RUN_FAILED)
        if isinstance(exc, KeyboardInterrupt):
            return Outcome.trip("keyboard-interrupt", "interrupted (KeyboardInterrupt)")
        if getattr(exc, "instrument_error", False):
            cause = "link-lost" if getattr(exc, "link_lost", False) else "instrument-error"
            return Outcome.trip(cause, str(exc) or type(exc).__name__)
        log.error("run %s: unexpected error", self.run_uid, exc_info=exc)
        return Outcome.trip("software-error", f"{type(exc).__name__}: {exc}",
                            status=ev.RUN_FAILED)

    def _diagnose(self, outcome: Outcome, verified: bool) -> None:
        """Name the root cause once the output is safe: after an instrument error ask the
        SMU whether its interlock or protection caused it; after a symptom an overheated
        stage produces (a cell running into compliance, ...) check the temperature window."""
        if outcome.cause in _TEMPERATURE_SYMPTOMS:
            self._diagnose_temperature(outcome)
        if outcome.cause not in ("instrument-error", "link-lost"):
            return
        if outcome.cause == "link-lost" and not verified:
            return   # no answer to be had; do not wait out more time-outs
        smu = self.bench.smu
        try:
            if self._io("smu.interlock_open", smu.interlock_open):
                outcome.cause = "interlock-open"
            elif self._io("smu.protection_tripped", smu.protection_tripped):
                outcome.cause = "protection-tripped"
            else:
                return
        except BaseException:  # noqa: BLE001 - diagnosis is best effort
            return
        outcome.reason = f"{outcome.cause}: {outcome.message}"

    def _diagnose_temperature(self, outcome: Outcome) -> None:
        window = self.plan.checks.temperature_window_c
        therm = self.bench.thermometer
        if window is None or therm is None:
            return
        try:
            t = float(self._io("thermometer.temperature", therm.temperature))
        except BaseException:  # noqa: BLE001 - diagnosis is best effort
            return
        if window[0] <= t <= window[1]:
            return
        first = outcome.reason
        outcome.cause = "temperature-window"
        outcome.message = (f"the stage is at {t:.2f} C, outside the window {window[0]:g}.."
                           f"{window[1]:g} C (first symptom: {first})")
        outcome.value = t
        outcome.limit = window[1] if t > window[1] else window[0]
        outcome.reason = f"{outcome.cause}: {outcome.message}"

    def _close_shutter_after_fault(self) -> None:
        """Best effort after a fault: close the shutter so the light does not keep heating
        a stage that may have run away."""
        light = self.bench.light
        if light is None:
            return
        for attempt in (1, 2):   # a link the fault broke is reopened by the second try
            try:
                self._io("light.shutter", light.shutter, False)
                return
            except BaseException:  # noqa: BLE001
                if attempt == 2:
                    log.warning("could not close the shutter after the fault", exc_info=True)

    def seal(self) -> bool:
        """Claim the right to close the run for this thread; False if already claimed."""
        ctl = self.control
        with ctl.emit_lock:
            if ctl.sealed_by is not None and ctl.sealed_by != threading.get_ident():
                return False
            ctl.sealed_by = threading.get_ident()
            return True

    def close(self, outcome: Outcome, verified: bool) -> None:
        """Publish the events that end the run. Called once the output is safe."""
        if not self.seal() or self.closed:
            return
        self.closed = True
        if self.pending_point is not None:    # the reading that tripped: recorded after safety
            sweep, level, v, i, c, t = self.pending_point
            self.pending_point = None
            self._emit_point(sweep, level, v, i, c, t, closing=True)
        sweep = self.open_sweep
        if sweep is not None:
            reason = outcome.reason or "aborted"
            self._finish_sweep(sweep, ev.SWEEP_ABORTED, reason, closing=True)
        if self.analyses is not None:
            for event in self.analyses.drain(self.options.analysis_timeout_s):
                self._publish(event, closing=True)
        if outcome.cause is not None:
            self._publish(ev.InterlockTripped(
                run_uid=self.run_uid, sweep_uid=sweep.uid if sweep is not None else None,
                cause=outcome.cause, message=outcome.message, time=time.time(),
                value=outcome.value, limit=outcome.limit), closing=True)
        finished = ev.RunFinished(run_uid=self.run_uid, status=outcome.status,
                                  reason=outcome.reason, time=time.time(),
                                  output_verified_off=bool(verified), points=self.run_seq)
        self.control.result = finished
        self._publish(finished, closing=True)
        log.info("run %s %s%s (output verified off: %s, %d points)", self.run_uid,
                 outcome.status, f" - {outcome.reason}" if outcome.reason else "", verified,
                 self.run_seq)

    def _last_resort_close(self, exc: BaseException, verified: bool) -> None:
        if self.control.result is not None:
            return
        finished = ev.RunFinished(run_uid=self.run_uid, status=ev.RUN_FAILED,
                                  reason=f"software-error: closing the run failed: "
                                         f"{type(exc).__name__}: {exc}",
                                  time=time.time(), output_verified_off=bool(verified),
                                  points=self.run_seq)
        self.control.result = finished
        try:
            self.engine.bus.publish(finished, closing=True)
        except BaseException:  # noqa: BLE001
            log.exception("could not publish RunFinished for %s", self.run_uid)

    # ------------------------------------------------------------------ steps
    def _prepare(self) -> None:
        smu = self.bench.smu
        if self._io("smu.output_is_on", smu.output_is_on):
            log.warning("the output was found on at the start of run %s; switching it off",
                        self.run_uid)
            self._io(_SET, smu.set_level, 0.0)
            self._io("smu.output", smu.output, False)
            if self._io("smu.output_is_on", smu.output_is_on):
                raise Trip("output-stuck-on", "the output was on at the start and would not "
                           "switch off")
        if self.bench.switch is not None:
            self.pixel = self._io("switch.selected", self.bench.switch.selected)

    def _execute(self, index: int, step: Any) -> None:
        if isinstance(step, pl.SweepStep):
            self._run_sweep_step(index, step)
        elif isinstance(step, pl.HoldStep):
            self._run_hold(index, step)
        elif isinstance(step, pl.MpptStep):
            self._run_mppt(index, step)
        elif isinstance(step, pl.SelectPixel):
            self._run_select_pixel(step)
        elif isinstance(step, pl.SetLight):
            self._run_set_light(step)
        elif isinstance(step, pl.WaitTemperature):
            self._run_wait_temperature(step)
        else:  # check_plan refuses these; kept so a bypass cannot run an unknown step
            raise Trip("plan", f"unknown step type {type(step).__name__}")

    # -- arming and disarming the source
    def _arm(self, mode: str, compliance: float, nplc: float, four_wire: bool, *,
             light: bool, level: float = 0.0) -> None:
        """Configure, read back compliance and OVP, check the interlocks and conditions,
        then switch the output on at ``level``."""
        smu = self.bench.smu
        ovp = self.plan.limits.voltage_v
        self.reading_deadline_s = self.watchdog_s + nplc * LONGEST_LINE_CYCLE_S
        self._io("smu.configure", smu.configure, source_mode=mode, compliance=compliance,
                 nplc=nplc, four_wire=four_wire)
        readback = self._io("smu.read_compliance", smu.read_compliance)
        if not matches(compliance, readback):
            raise Trip("readback", f"the compliance reads back as {readback!r}, "
                       f"{compliance:g} was set", value=_num(readback), limit=compliance)
        self._io("smu.set_overvoltage_protection", smu.set_overvoltage_protection, ovp)
        readback = self._io("smu.read_overvoltage_protection", smu.read_overvoltage_protection)
        if not matches(ovp, readback):
            raise Trip("readback", f"the over-voltage protection reads back as {readback!r}, "
                       f"{ovp:g} V was set", value=_num(readback), limit=ovp)
        self._check_protection()
        self.arm_conditions = self._sample(None, light=light)
        self._io(_SET, smu.set_level, level)
        with self.engine.safety_lock:    # an emergency stop cannot slip between check and on
            self._checkpoint()
            self.output_on = True
            self._io("smu.output", smu.output, True)
        if not self._io("smu.output_is_on", smu.output_is_on):
            raise Trip("output-not-on", "the output did not switch on (interlock or protection?)")
        self.next_periodic = time.monotonic() + self.options.conditions_interval_s

    def _disarm(self) -> None:
        smu = self.bench.smu
        self._io(_SET, smu.set_level, 0.0)
        self._io("smu.output", smu.output, False)
        self.output_on = False
        if self._io("smu.output_is_on", smu.output_is_on):
            raise Trip("output-stuck-on", "the output still reads on after it was switched off")

    def _check_protection(self) -> None:
        smu = self.bench.smu
        if self._io("smu.interlock_open", smu.interlock_open):
            raise Trip("interlock-open", "the safety interlock is open")
        if self._io("smu.protection_tripped", smu.protection_tripped):
            raise Trip("protection-tripped", "the source-measure unit's protection (over-voltage "
                       "or interlock) forced the output off")

    # -- conditions
    def _read_light(self) -> dict[str, float]:
        light = self.bench.light
        out: dict[str, float] = {}
        ref = float(self._io("light.reference_current", light.reference_current))
        out["reference_current_a"] = ref
        if self.bench.irradiance_from_reference is not None:
            t_ref = float(self._io("light.reference_temperature", light.reference_temperature))
            out["reference_temperature_c"] = t_ref
            out["irradiance_w_m2"] = float(self.bench.irradiance_from_reference(ref, t_ref))
        return out

    @staticmethod
    def _light_value(reading: Mapping[str, float]) -> float:
        value = reading.get("irradiance_w_m2", reading.get("reference_current_a"))
        return abs(value) if value is not None else math.nan

    def _sample(self, sweep: _OpenSweep | None, *, light: bool) -> dict[str, float]:
        """Read the conditions (light when ``light``; stage temperature) and check them:
        the temperature window, and the light's stability over the sweep so far."""
        reading: dict[str, float] = {"time": time.time()}
        if light and self.bench.light is not None:
            reading.update(self._read_light())
        if self.bench.thermometer is not None:
            reading["temperature_c"] = float(
                self._io("thermometer.temperature", self.bench.thermometer.temperature))
        checks = self.plan.checks
        window = checks.temperature_window_c
        t = reading.get("temperature_c")
        if window is not None and t is not None and not (window[0] <= t <= window[1]):
            raise Trip("temperature-window", f"the stage is at {t:.2f} C, outside the window "
                       f"{window[0]:g}..{window[1]:g} C", value=t,
                       limit=window[1] if t > window[1] else window[0])
        if light and self.bench.light is not None:
            self._check_light_level(reading)
        if light and self.bench.light is not None and checks.light_stability_rel is not None:
            history = [] if sweep is None else [self._light_value(r) for r in sweep.readings]
            history.append(self._light_value(reading))
            instability = iec_instability(history)
            if math.isinf(instability) or math.isnan(instability) or not history[-1] > 0:
                raise Trip("light-failure", "the reference cell reads no light during a light step",
                           value=history[-1])
            if instability > checks.light_stability_rel:
                raise Trip("light-unstable", f"the light varied by {instability:.2%} "
                           f"(IEC 60904-9 instability) during the sweep, more than the "
                           f"{checks.light_stability_rel:.2%} allowed", value=instability,
                           limit=checks.light_stability_rel)
        if sweep is not None:
            sweep.readings.append(reading)
            sweep.fresh = reading
        return reading

    def _check_light_level(self, reading: Mapping[str, float]) -> None:
        expected = self.light_setpoint_w_m2
        g = reading.get("irradiance_w_m2")
        if expected is None or g is None or expected <= 0:
            return
        if not g >= LIGHT_FAILURE_FRACTION * expected:
            raise Trip("light-failure", f"the reference cell reads {g:.1f} W/m2, less than "
                       f"{LIGHT_FAILURE_FRACTION:.0%} of the {expected:g} W/m2 set", value=g,
                       limit=LIGHT_FAILURE_FRACTION * expected)

    def _periodic(self, sweep: _OpenSweep) -> None:
        self._check_protection()
        self._sample(sweep, light=sweep.light)
        self.next_periodic = time.monotonic() + self.options.conditions_interval_s

    def _end_of_sweep_checks(self, sweep: _OpenSweep) -> None:
        self._check_protection()
        self._sample(sweep, light=sweep.light)

    # -- sweeps and points
    def _open_sweep(self, index: int, step: Any, *, kind: str, direction: str, source_mode: str,
                    acquisition: str, points_planned: int, nplc: float, four_wire: bool,
                    settle_s: float, compliance: float, light: bool, name: str,
                    uid: str | None = None, pair_uid: str | None = None,
                    pair: SweepRecord | None = None, extra: Mapping[str, Any] | None = None
                    ) -> _OpenSweep:
        uid = uid or uuid.uuid4().hex
        if self.arm_conditions is not None:    # read just before the output went on
            first = self.arm_conditions
            self.arm_conditions = None
        else:
            first = self._sample(None, light=light)
        conditions: dict[str, Any] = {k: v for k, v in first.items() if k != "time"}
        conditions.update(extra or {})
        started = ev.SweepStarted(
            run_uid=self.run_uid, sweep_uid=uid, sweep_index=self.sweep_index, step_index=index,
            step_name=name, kind=kind, light=light, direction=direction, pixel=self.pixel,
            source_mode=source_mode, acquisition=acquisition, points_planned=points_planned,
            four_wire=four_wire, nplc=nplc, settle_s=settle_s, compliance=compliance,
            time=time.time(), conditions=plain(conditions), pair_sweep_uid=pair_uid)
        sweep = _OpenSweep(uid, started, light=light, step=step, kind=kind, pair=pair)
        sweep.readings.append(first)
        sweep.fresh = first
        self.open_sweep = sweep
        self.sweep_index += 1
        self._publish(started)
        return sweep

    def _emit_point(self, sweep: _OpenSweep, setpoint: float, v: float, i: float, c: bool,
                    t: float, *, closing: bool = False) -> None:
        fresh = sweep.fresh
        sweep.fresh = None
        self.run_seq += 1
        point = ev.Point(run_uid=self.run_uid, sweep_uid=sweep.uid, seq=len(sweep.points) + 1,
                         run_seq=self.run_seq, time=t, setpoint=setpoint, voltage_v=v,
                         current_a=i, in_compliance=c,
                         irradiance_w_m2=None if fresh is None else fresh.get("irradiance_w_m2"),
                         temperature_c=None if fresh is None else fresh.get("temperature_c"))
        sweep.points.append(point)
        self._publish(point, closing=closing)

    def _accept(self, sweep: _OpenSweep, setpoint: float, reading: Any, guard: PointGuard) -> None:
        t = time.time()
        v = float(reading.voltage_v)
        i = float(reading.current_a)
        c = bool(reading.in_compliance)
        trip = guard.check(v, i, c)
        if trip is not None:
            self.pending_point = (sweep, float(setpoint), v, i, c, t)
            raise trip
        self._emit_point(sweep, float(setpoint), v, i, c, t)

    def _finish_sweep(self, sweep: _OpenSweep, status: str = ev.SWEEP_COMPLETED,
                      reason: str = "", *, closing: bool = False) -> SweepRecord:
        summary = _summarise(sweep.readings)
        finished = ev.SweepFinished(run_uid=self.run_uid, sweep_uid=sweep.uid, status=status,
                                    reason=reason, points=len(sweep.points), time=time.time(),
                                    conditions=plain(summary))
        self.open_sweep = None
        record = SweepRecord(
            started=sweep.started, points=tuple(sweep.points), finished=finished, plan=self.plan,
            pair=sweep.pair,
            irradiance_w_m2=tuple(r["irradiance_w_m2"] for r in sweep.readings
                                  if "irradiance_w_m2" in r),
            temperature_c=tuple(r["temperature_c"] for r in sweep.readings if "temperature_c" in r),
            reading_times=tuple(r["time"] for r in sweep.readings), step=sweep.step)
        self._publish(finished, closing=closing)
        if (status == ev.SWEEP_COMPLETED and sweep.kind == "sweep" and self.analyses is not None):
            self.analyses.submit(record)
        return record

    # -- sweep steps
    def _run_sweep_step(self, index: int, step: pl.SweepStep, *, name: str | None = None
                        ) -> list[SweepRecord]:
        voc_probe = None
        if (step.spacing == "dense-near-voc" and step.voc_estimate_v is None
                and step.source_mode == "voltage"):
            self._set_shutter(step.light)
            voc_probe = self._probe_voc(nplc=step.nplc, four_wire=step.four_wire, light=step.light,
                                        compliance_v=max(abs(step.start), abs(step.stop)))
        segments = sweep_segments(step, voc_probe)
        extra = {} if voc_probe is None else {"voc_probe_v": voc_probe}
        name = name or step.name
        self._set_shutter(step.light)
        guard = PointGuard(self.plan.limits, source_mode=step.source_mode,
                           compliance=step.compliance)
        self._arm(step.source_mode, step.compliance, step.nplc, step.four_wire, light=step.light)
        records: list[SweepRecord] = []
        for repeat in range(step.repeats):
            uids = [uuid.uuid4().hex for _ in segments]
            common = dict(kind="sweep", source_mode=step.source_mode,
                          acquisition=step.acquisition, nplc=step.nplc,
                          four_wire=step.four_wire, settle_s=step.settle_s,
                          compliance=step.compliance, light=step.light, name=name,
                          extra={**extra, "repeat": repeat})
            if step.acquisition == "list":
                records += self._list_sweeps(index, step, segments, uids, guard, common)
                continue
            previous: SweepRecord | None = None
            for k, (direction, levels) in enumerate(segments):
                pair_uid = uids[1 - k] if len(segments) == 2 else None
                sweep = self._open_sweep(index, step, direction=direction,
                                         points_planned=len(levels), uid=uids[k],
                                         pair_uid=pair_uid, pair=previous, **common)
                self._point_sweep(sweep, levels, step.settle_s, guard)
                previous = self._finish_sweep(sweep)
                records.append(previous)
        self._disarm()
        return records

    def _point_sweep(self, sweep: _OpenSweep, levels: list[float], settle_s: float,
                     guard: PointGuard) -> None:
        smu = self.bench.smu
        ctl = self.control
        io = self._io
        set_and_measure = smu.set_level_and_measure
        deadline = self.reading_deadline_s
        for level in levels:
            if settle_s > 0:
                io(_SET, smu.set_level, level)
                self._sleep(settle_s)
                reading = io(_MEASURE, smu.measure, deadline_s=deadline)
            else:
                reading = io(_SET_MEASURE, set_and_measure, level, deadline_s=deadline)
            self._accept(sweep, level, reading, guard)
            if ctl.abort is not None or ctl.stop_requested:
                self._checkpoint()
            if time.monotonic() >= self.next_periodic:
                self._periodic(sweep)
            if self.analyses is not None and self.analyses.ready:
                self._publish_ready_analyses()
        self._end_of_sweep_checks(sweep)

    def _list_sweeps(self, index: int, step: pl.SweepStep, segments: list[tuple[str, list[float]]],
                     uids: list[str], guard: PointGuard, common: dict[str, Any]
                     ) -> list[SweepRecord]:
        """One instrument-run list covering every direction of one repeat; its buffer is
        fetched in chunks while it runs, so the points stream live. (By the port's contract
        ``list_points_done() == len(levels)`` means the list is over and the source is back
        at the 0 level the driver appends.) The per-point checks run
        as readings arrive (within one poll of their measurement); between polls the
        instrument's own compliance and OVP, read back before the output went on, are the
        real-time protection."""
        smu = self.bench.smu
        io = self._io
        all_levels = [x for _, levels in segments for x in levels]
        ends = []
        total = 0
        for _, levels in segments:
            total += len(levels)
            ends.append(total)
        io("smu.load_list", smu.load_list, all_levels, settle_s=step.settle_s)
        records: list[SweepRecord] = []
        previous: SweepRecord | None = None

        def open_segment(k: int) -> _OpenSweep:
            direction, levels = segments[k]
            return self._open_sweep(index, step, direction=direction, points_planned=len(levels),
                                    uid=uids[k], pair_uid=uids[1 - k] if len(segments) == 2 else None,
                                    pair=previous, **common)

        k = 0
        sweep: _OpenSweep | None = open_segment(0)
        io("smu.start_list", smu.start_list)
        fetched = 0
        last_progress = time.monotonic()
        # no new reading for longer than one point can take, plus the watchdog period
        stall_s = self.watchdog_s + step.settle_s + step.nplc * LONGEST_LINE_CYCLE_S
        while fetched < total:
            done = min(int(io("smu.list_points_done", smu.list_points_done)), total)
            if done > fetched:
                count = min(done - fetched, LIST_CHUNK)
                readings = list(io("smu.fetch_list", smu.fetch_list, fetched, count))
                if len(readings) != count:
                    raise Trip("bad-reading", f"asked the list buffer for {count} readings from "
                               f"{fetched}, got {len(readings)}")
                for reading in readings:
                    if sweep is None:
                        sweep = open_segment(k)
                    self._accept(sweep, all_levels[fetched], reading, guard)
                    fetched += 1
                    if fetched == ends[k]:
                        self._end_of_sweep_checks(sweep)
                        previous = self._finish_sweep(sweep)
                        records.append(previous)
                        sweep = None
                        k += 1
                last_progress = time.monotonic()
                self._checkpoint()
            else:
                if time.monotonic() - last_progress > stall_s:
                    raise Trip("watchdog", f"the list sweep made no progress for "
                               f"{stall_s:g} s ({fetched} of {total} readings)")
                self._sleep(self.options.list_poll_interval_s)
            if sweep is not None and time.monotonic() >= self.next_periodic:
                self._periodic(sweep)
            self._publish_ready_analyses()
        return records

    def _probe_voc(self, *, nplc: float, four_wire: bool, light: bool,
                   compliance_v: float) -> float:
        """Open-circuit voltage from a current source at 0 A (recorded in the conditions of
        the sweep it serves, not as a point)."""
        smu = self.bench.smu
        guard = PointGuard(self.plan.limits, source_mode="current", compliance=compliance_v)
        self._arm("current", compliance_v, nplc, four_wire, light=light, level=0.0)
        self.arm_conditions = None
        reading = self._io(_MEASURE, smu.measure, deadline_s=self.reading_deadline_s)
        trip = guard.check(float(reading.voltage_v), float(reading.current_a),
                           bool(reading.in_compliance))
        if trip is not None:
            raise trip
        self._disarm()
        return float(reading.voltage_v)

    # -- hold and MPP tracking
    def _timed_series(self, sweep: _OpenSweep, duration_s: float, interval_s: float,
                      measure: Callable[[], tuple[float, Any]], guard: PointGuard,
                      after: Callable[[float, Any], None] | None = None) -> None:
        t0 = time.monotonic()
        k = 0
        while True:
            setpoint, reading = measure()
            self._accept(sweep, setpoint, reading, guard)
            if after is not None:
                after(setpoint, reading)
            k += 1
            t_next = t0 + k * interval_s
            if t_next > t0 + duration_s + 1e-9:
                break
            if time.monotonic() >= self.next_periodic:
                self._periodic(sweep)
            self._publish_ready_analyses()
            self._sleep(t_next - time.monotonic())
        self._end_of_sweep_checks(sweep)

    def _run_hold(self, index: int, step: pl.HoldStep) -> None:
        smu = self.bench.smu
        mode, level = hold_source(step)
        self._set_shutter(step.light)
        guard = PointGuard(self.plan.limits, source_mode=mode, compliance=step.compliance)
        self._arm(mode, step.compliance, step.nplc, step.four_wire, light=step.light, level=level)
        sweep = self._open_sweep(index, step, kind="hold", direction="none", source_mode=mode,
                                 acquisition="point", points_planned=0, nplc=step.nplc,
                                 four_wire=step.four_wire, settle_s=0.0,
                                 compliance=step.compliance, light=step.light, name=step.name,
                                 extra={"hold_mode": step.mode, "level": level})
        self._timed_series(sweep, step.duration_s, step.interval_s,
                           lambda: (level, self._io(_MEASURE, smu.measure,
                                                     deadline_s=self.reading_deadline_s)), guard)
        self._finish_sweep(sweep)
        self._disarm()

    def _shutter_state(self) -> bool:
        light = self.bench.light
        return True if light is None else bool(self._io("light.shutter_is_open", light.shutter_is_open))

    def _run_mppt(self, index: int, step: pl.MpptStep) -> None:
        smu = self.bench.smu
        limits = self.plan.limits
        light = self._shutter_state()
        v_top = limits.voltage_v * VOLTAGE_HEADROOM
        start = step.start_v
        extra: dict[str, Any] = {}
        if start is None:
            start, extra = self._mpp_search(index, step, light, v_top)
        guard = PointGuard(limits, source_mode="voltage", compliance=step.compliance)
        tracker = PerturbObserve(step_v=step.step_v, v_min=0.0, v_max=v_top)
        voltage = tracker.clamp(float(start))
        self._arm("voltage", step.compliance, step.nplc, step.four_wire, light=light, level=voltage)
        sweep = self._open_sweep(index, step, kind="mpp", direction="none", source_mode="voltage",
                                 acquisition="point", points_planned=0, nplc=step.nplc,
                                 four_wire=step.four_wire, settle_s=0.0, compliance=step.compliance,
                                 light=light, name=step.name,
                                 extra={**extra, "start_v": voltage, "tracker": "perturb-observe"})
        state = {"v": voltage}
        set_and_measure = smu.set_level_and_measure

        def measure() -> tuple[float, Any]:
            v = state["v"]
            return v, self._io(_SET_MEASURE, set_and_measure, v,
                               deadline_s=self.reading_deadline_s)

        def after(setpoint: float, reading: Any) -> None:
            power = float(reading.voltage_v) * generator_current(float(reading.current_a))
            state["v"] = tracker.next_voltage(setpoint, power)

        self._timed_series(sweep, step.duration_s, step.interval_s, measure, guard, after)
        self._finish_sweep(sweep)
        self._disarm()

    def _mpp_search(self, index: int, step: pl.MpptStep, light: bool, v_top: float
                    ) -> tuple[float, dict[str, Any]]:
        """Probe Voc, then a coarse forward sweep 0..Voc (its own sweep block); start the
        tracker at its highest-power point."""
        voc = self._probe_voc(nplc=step.nplc, four_wire=step.four_wire, light=light,
                              compliance_v=self.plan.limits.voltage_v)
        if not voc > 0:
            return 0.0, {"voc_probe_v": voc}
        search = pl.SweepStep(name=f"{step.name}/mpp-search", light=light, start=0.0,
                              stop=min(voc, v_top), points=MPP_SEARCH_POINTS, nplc=step.nplc,
                              four_wire=step.four_wire, compliance=step.compliance)
        records = self._run_sweep_step(index, search, name=search.name)
        best = max(records[-1].points,
                   key=lambda p: p.voltage_v * generator_current(p.current_a))
        return best.setpoint, {"voc_probe_v": voc, "search_sweep_uid": records[-1].started.sweep_uid}

    # -- other steps
    def _set_shutter(self, open_: bool) -> None:
        """Make the shutter match a measuring step's ``light`` flag (if the bench has one);
        when this opens it, wait for the light to be stable first."""
        light = self.bench.light
        if light is None:
            return
        if bool(self._io("light.shutter_is_open", light.shutter_is_open)) == open_:
            return
        self._io("light.shutter", light.shutter, open_)
        if bool(self._io("light.shutter_is_open", light.shutter_is_open)) != open_:
            raise Trip("shutter", f"the shutter did not {'open' if open_ else 'close'}")
        if open_:
            tolerance = self.plan.checks.light_stability_rel or pl.SetLight(True).stability_tolerance_rel
            self._wait_light_stable(tolerance, pl.SetLight(True).settle_timeout_s)

    def _run_set_light(self, step: pl.SetLight) -> None:
        light = self.bench.light
        if step.irradiance_w_m2 is not None:
            self._io("light.set_irradiance", light.set_irradiance, step.irradiance_w_m2)
            self.light_setpoint_w_m2 = float(step.irradiance_w_m2)
        self._io("light.shutter", light.shutter, step.shutter_open)
        if bool(self._io("light.shutter_is_open", light.shutter_is_open)) != step.shutter_open:
            raise Trip("shutter", f"the shutter did not {'open' if step.shutter_open else 'close'}")
        if step.shutter_open:
            self._io("light.wait_settled", light.wait_settled, step.settle_timeout_s,
                     deadline_s=step.settle_timeout_s + self.watchdog_s)
            self._wait_light_stable(step.stability_tolerance_rel, step.settle_timeout_s)

    def _wait_light_stable(self, tolerance: float, timeout_s: float) -> None:
        deadline = time.monotonic() + timeout_s
        window: deque[float] = deque(maxlen=SETTLED_READINGS)
        while True:
            reading = self._read_light()
            window.append(self._light_value(reading))
            instability = iec_instability(list(window))
            if len(window) == SETTLED_READINGS and instability <= tolerance:
                self._check_light_level(reading)
                return
            if time.monotonic() > deadline:
                if math.isinf(instability):
                    raise Trip("light-failure", "the reference cell reads no light after the "
                               "shutter opened")
                raise Trip("light-unstable", f"the light did not settle within "
                           f"{tolerance:.2%} in {timeout_s:g} s", value=instability,
                           limit=tolerance)
            self._sleep(self.options.poll_interval_s)

    def _run_wait_temperature(self, step: pl.WaitTemperature) -> None:
        therm = self.bench.thermometer
        self._io("thermometer.set_target", therm.set_target, step.target_c)
        deadline = time.monotonic() + step.timeout_s
        settled = 0
        while True:
            t = float(self._io("thermometer.temperature", therm.temperature))
            settled = settled + 1 if abs(t - step.target_c) <= step.tolerance_c else 0
            if settled >= SETTLED_READINGS:
                return
            if time.monotonic() > deadline:
                raise Trip("temperature-timeout", f"the stage reached {t:.2f} C, not "
                           f"{step.target_c:g} +/- {step.tolerance_c:g} C, within "
                           f"{step.timeout_s:g} s", value=t, limit=step.target_c)
            self._sleep(self.options.poll_interval_s)

    def _run_select_pixel(self, step: pl.SelectPixel) -> None:
        if self.output_on:     # never switch a live source (steps end with the output off)
            self._disarm()
        switch = self.bench.switch
        self._io("switch.select", switch.select, step.pixel)
        selected = self._io("switch.selected", switch.selected)
        if selected != step.pixel:
            raise Trip("switch", f"pixel {step.pixel} was selected but the switch reports "
                       f"{selected!r}")
        self.pixel = step.pixel


def _num(x: Any) -> float | None:
    try:
        return float(x)
    except (TypeError, ValueError):
        return None


def _summarise(readings: list[dict[str, float]]) -> dict[str, Any]:
    out: dict[str, Any] = {"times": [r["time"] for r in readings]}
    for key in ("irradiance_w_m2", "reference_current_a", "temperature_c"):
        values = [r[key] for r in readings if key in r]
        if values:
            out[key] = values
            out[f"{key}_mean"] = sum(values) / len(values)
    light = [abs(r.get("irradiance_w_m2", r.get("reference_current_a", math.nan)))
             for r in readings if "reference_current_a" in r]
    if light:
        out["light_instability_rel"] = iec_instability(light)
    return out
