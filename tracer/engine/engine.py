"""The control plane: subscribe, check, start, stop, emergency stop, wait.

One :class:`Engine` per bench. It runs one plan at a time on a worker thread
(:mod:`tracer.engine.runner`), watched by a watchdog thread that catches an instrument call
that never returns. Everything that makes the output safe goes through
:meth:`Engine.secure_output`, under one lock.
"""
from __future__ import annotations

import atexit
import logging
import threading
import time
import uuid
import weakref
from dataclasses import dataclass
from typing import Any, Callable, Mapping

from tracer import events as ev
from tracer.plan import Plan

from .bench import Bench
from .bus import EventBus
from .planning import check_plan
from .records import SweepRecord
from .runner import CRITICAL_SUBSCRIBER, Control, Outcome, Runner

log = logging.getLogger("tracer.engine")

# Attempts of the "make safe" sequence before the output is reported as not verified off,
# and the pause before each retry [s] (the driver reconnects in between).
SAFE_ATTEMPTS = 3
SAFE_RETRY_PAUSE_S = (0.0, 0.1, 0.5)


@dataclass(frozen=True)
class EngineOptions:
    """Timing knobs (seconds). The defaults suit a real bench; tests shorten the polls."""

    poll_interval_s: float = 0.2          # light/temperature settling polls
    conditions_interval_s: float = 1.0    # light, temperature and protection flags during a sweep
    list_poll_interval_s: float = 0.01    # list sweep progress polls when nothing new arrived
    analysis_timeout_s: float = 120.0     # longest wait for an analysis before RunFinished
    dispatch_interval_s: float = 0.02     # non-critical subscribers: pause between deliveries


class Engine:
    """Runs plans on a bench and publishes the event stream.

    ``analyzer(record: SweepRecord) -> Mapping`` is called after each completed I-V sweep on
    a side thread; its result (or the exception it raised) becomes an ``Analysis`` event,
    always before ``RunFinished``.
    """

    def __init__(self, bench: Bench, analyzer: Callable[[SweepRecord], Mapping] | None = None,
                 *, options: EngineOptions | None = None, **option_overrides: float):
        self.bench = bench
        self.analyzer = analyzer
        base = options or EngineOptions()
        self.options = EngineOptions(**{**base.__dict__, **option_overrides})
        self.bus = EventBus(dispatch_interval_s=self.options.dispatch_interval_s)
        self.safety_lock = threading.RLock()
        self._lock = threading.Lock()
        self._control: Control | None = None
        self._runner: Runner | None = None
        self._worker: threading.Thread | None = None
        self.last_emergency_verified: bool | None = None
        _ENGINES.add(self)

    # ------------------------------------------------------------------ subscribers
    def subscribe(self, callback: Callable[[Any], None], critical: bool = False, *,
                  batch: bool = False) -> int:
        """Register ``callback(event)``; returns a token for :meth:`unsubscribe`.

        Critical subscribers run synchronously in the worker thread, before anyone else sees
        the event; if one raises, the run ends (output off) as failed. Others are called from
        their own dispatcher thread (``batch=True``: with a list of the events queued since
        the last call) and their exceptions are logged, never fatal."""
        return self.bus.subscribe(callback, critical=critical, batch=batch)

    def unsubscribe(self, token: int) -> None:
        self.bus.unsubscribe(token)

    def flush(self, timeout: float | None = None) -> bool:
        """Wait until the non-critical subscribers have handled every event so far."""
        return self.bus.flush(timeout)

    # ------------------------------------------------------------------ runs
    def check(self, plan: Plan) -> None:
        """Raise :class:`PlanRefused` (naming the limit) if ``plan`` may not run on this
        bench. Touches no instrument."""
        switch = self.bench.switch
        check_plan(plan, hard_limits=self.bench.hard_limits, has_light=self.bench.light is not None,
                   has_thermometer=self.bench.thermometer is not None,
                   switch_channels=None if switch is None else int(switch.channels))

    @property
    def running(self) -> bool:
        control = self._control
        return control is not None and not control.done.is_set()

    def start(self, plan: Plan, operator: str = "", metadata: Mapping[str, Any] | None = None) -> str:
        """Check ``plan`` and run it on the worker thread; returns the run's uid."""
        with self._lock:
            if self.running:
                raise RuntimeError("a run is already in progress on this bench")
            if self._worker is not None and self._worker.is_alive():
                raise RuntimeError("the previous run's worker is still inside an instrument "
                                   "call; wait for its driver time-out before starting again")
            self.check(plan)
            run_uid = uuid.uuid4().hex
            control = Control(float(plan.checks.watchdog_s))
            runner = Runner(self, plan, run_uid=run_uid, operator=operator, metadata=metadata,
                            control=control)
            worker = threading.Thread(target=runner.run, name=f"tracer-engine-run-{run_uid[:8]}",
                                      daemon=True)
            watchdog = threading.Thread(target=self._watch, args=(runner, control),
                                        name=f"tracer-engine-watchdog-{run_uid[:8]}", daemon=True)
            self._control, self._runner, self._worker = control, runner, worker
            worker.start()
            watchdog.start()
            return run_uid

    def stop(self) -> None:
        """Graceful: finish the current point, then level 0 and output off; the run ends
        as aborted ("stopped by the operator")."""
        control = self._control
        if control is not None and not control.done.is_set():
            control.stop_requested = True
            control.wake.set()

    def emergency_stop(self, cause: str = "emergency-stop",
                       message: str = "emergency stop by the operator") -> bool:
        """From any thread: level 0 and output off now, on this thread (not waiting for the
        worker), read back; the worker then ends the run as aborted naming ``cause``.
        Also works with no run in progress. Returns True if the output was read back off.
        Blocks at most for one make-safe sequence of the driver (bounded by its time-out;
        longer only while another thread is inside an exchange with the SMU)."""
        control = self._control
        if control is not None and not control.done.is_set():
            control.request_abort(cause, message)
        # one attempt here, so the caller (a GUI thread) is held as briefly as possible;
        # the worker retries when it ends the run
        verified = self.secure_output(attempts=1)
        self.last_emergency_verified = verified
        return verified

    def wait(self, timeout: float | None = None) -> ev.RunFinished | None:
        """The last run's RunFinished, waiting up to ``timeout``; None if none (yet)."""
        control = self._control
        if control is None:
            return None
        control.done.wait(timeout)
        return control.result

    def run(self, plan: Plan, operator: str = "", metadata: Mapping[str, Any] | None = None
            ) -> ev.RunFinished:
        """Start and wait (for scripts and the CLI). Ctrl-C during the wait is an emergency
        stop; the run then ends as aborted with cause "keyboard-interrupt"."""
        self.start(plan, operator, metadata)
        try:
            while True:
                result = self.wait(0.1)
                if result is not None:
                    return result
        except KeyboardInterrupt:
            self.emergency_stop("keyboard-interrupt", "interrupted by Ctrl-C")
            result = self.wait()
            assert result is not None
            return result

    def close(self, timeout: float | None = 5.0) -> None:
        """End any run (emergency stop), then stop the subscriber threads."""
        if self.running:
            self.emergency_stop("engine-closed", "the engine was closed during a run")
            self.wait(timeout)
        self.bus.close(timeout)
        _ENGINES.discard(self)

    # ------------------------------------------------------------------ safety
    def secure_output(self, attempts: int = SAFE_ATTEMPTS) -> bool:
        """Abort, level 0, output off, read back (the driver's ``make_safe``; if that fails,
        the explicit sequence); retried after a reconnect. Never raises. True only when the
        output was read back off."""
        smu = self.bench.smu
        with self.safety_lock:
            for attempt in range(max(1, min(attempts, SAFE_ATTEMPTS))):
                if SAFE_RETRY_PAUSE_S[attempt]:
                    time.sleep(SAFE_RETRY_PAUSE_S[attempt])
                try:
                    if smu.make_safe():
                        return True
                except BaseException:  # noqa: BLE001 - make_safe must not raise; be sure
                    log.warning("make_safe raised (attempt %d)", attempt + 1, exc_info=True)
                try:                   # the explicit sequence, in case make_safe is at fault
                    smu.set_level(0.0)
                    smu.output(False)
                    if not smu.output_is_on():
                        return True
                except BaseException:  # noqa: BLE001
                    log.warning("explicit output-off failed (attempt %d)", attempt + 1,
                                exc_info=True)
                try:
                    smu.reconnect()
                except BaseException:  # noqa: BLE001
                    log.warning("reconnect failed (attempt %d)", attempt + 1, exc_info=True)
            log.error("the output could NOT be verified off")
            return False

    def _watch(self, runner: Runner, control: Control) -> None:
        """Watchdog: an instrument call (or a critical subscriber) in flight longer than its
        deadline trips the run (output made safe from here, since the worker is stuck); if
        an instrument call is still stuck one more watchdog period later, the run is closed
        from here too."""
        period = control.watchdog_s
        tick = max(0.005, min(0.1, period / 20.0))
        tripped_at: float | None = None
        stuck: tuple[str, float, float] | None = None
        verified = False
        while not control.done.wait(tick):
            inflight = control.inflight
            now = time.monotonic()
            if tripped_at is None:
                if inflight is not None and now - inflight[1] > inflight[2]:
                    label, _, deadline = inflight
                    log.error("watchdog: %s silent for more than %g s", label, deadline)
                    control.request_abort("watchdog", f"{label} gave no answer within {deadline:g} s")
                    stuck = inflight
                    verified = self.secure_output(attempts=1)
                    tripped_at = time.monotonic()
            elif (control.inflight is stuck and stuck[0] != CRITICAL_SUBSCRIBER
                  and now - tripped_at > period):
                cause, message = control.abort or ("watchdog", "instrument silent")
                log.error("watchdog: the worker is still stuck; closing run %s", runner.run_uid)
                try:
                    runner.close(Outcome.trip(cause, message), verified)
                finally:
                    control.done.set()
                return


_ENGINES: "weakref.WeakSet[Engine]" = weakref.WeakSet()


@atexit.register
def _make_safe_at_exit() -> None:
    """The interpreter is exiting (daemon workers would simply vanish): end every run safely."""
    for engine in list(_ENGINES):
        try:
            if engine.running:
                engine.emergency_stop("process-exit", "the program exited during a run")
                engine.wait(5.0)
        except BaseException:  # noqa: BLE001
            log.exception("could not end a run at exit")
