"""Delivery of engine events to subscribers.

Critical subscribers (the logbook) are called synchronously by the publishing thread (the
run's worker), in subscription order, before the event is handed to anyone else. If one
raises, :class:`CriticalSubscriberError` propagates to the publisher, which ends the run.

Every other subscriber has its own dispatcher thread and an unbounded queue: a slow one (a
GUI) only delays itself, never the sweep or the other subscribers. Its exceptions are
logged and counted, never fatal. Events reach it in order, at most ``dispatch_interval_s``
after publication (bursts are delivered together). ``batch=True`` subscribers receive
lists of all events that queued up since their last call (one redraw per batch).

Which events reach the non-critical subscribers when a critical one failed: a
:class:`~tracer.events.Point` the critical subscribers did not accept is withheld (a point
anyone has seen is stored); all other events are still forwarded, so every consumer sees
a well-formed stream that ends with ``RunFinished``.
"""
from __future__ import annotations

import itertools
import logging
import threading
from collections import deque
from typing import Any, Callable

from tracer.events import Point

log = logging.getLogger("tracer.engine")


class CriticalSubscriberError(Exception):
    """A critical subscriber raised; ``__cause__`` is its exception."""

    def __init__(self, subscriber: Any, error: BaseException):
        self.subscriber = subscriber
        self.error = error
        super().__init__(f"critical subscriber {subscriber!r} failed: "
                         f"{type(error).__name__}: {error}")


class _Dispatcher:
    """One non-critical subscriber: a queue and the thread that empties it.

    After each delivery the thread pauses ``interval_s`` before looking again, so events
    published in a burst reach it together (one wake-up per batch, not per point: the
    sweep's worker never trades the interpreter lock with a viewer per point). ``flush``
    and ``close`` cut the pause short."""

    def __init__(self, callback: Callable[[Any], None], batch: bool, name: str,
                 interval_s: float):
        self.callback = callback
        self.batch = batch
        self.interval_s = interval_s
        self.errors = 0
        self._queue: deque = deque()
        self._cond = threading.Condition()
        self._urgent = threading.Event()
        self._waiting = False
        self._busy = False
        self._closed = False
        self._thread = threading.Thread(target=self._loop, name=name, daemon=True)
        self._thread.start()

    def put(self, event: Any) -> None:
        with self._cond:
            if self._closed:
                return
            self._queue.append(event)
            if self._waiting:
                self._cond.notify()

    def _loop(self) -> None:
        while True:
            with self._cond:
                while not self._queue and not self._closed:
                    self._waiting = True
                    self._cond.wait()
                    self._waiting = False
                if not self._queue:          # closed and drained
                    self._cond.notify_all()
                    return
                items = list(self._queue)
                self._queue.clear()
                self._busy = True
            try:
                if self.batch:
                    self._deliver(items)
                else:
                    for item in items:
                        self._deliver(item)
            finally:
                with self._cond:
                    self._busy = False
                    self._cond.notify_all()
            if self.interval_s > 0 and not self._closed:
                self._urgent.wait(self.interval_s)

    def _deliver(self, item: Any) -> None:
        try:
            self.callback(item)
        except Exception:   # a consumer's bug must never reach the sweep
            self.errors += 1
            log.exception("non-critical subscriber %r raised; continuing", self.callback)

    def idle(self, timeout: float | None) -> bool:
        self._urgent.set()
        try:
            with self._cond:
                return self._cond.wait_for(lambda: not self._queue and not self._busy, timeout)
        finally:
            self._urgent.clear()

    def close(self, timeout: float | None) -> None:
        with self._cond:
            self._closed = True
            self._cond.notify_all()
        self._urgent.set()
        if threading.current_thread() is not self._thread:
            self._thread.join(timeout)


class EventBus:
    def __init__(self, *, dispatch_interval_s: float = 0.02) -> None:
        self.dispatch_interval_s = dispatch_interval_s
        self._lock = threading.RLock()          # subscription changes
        self._publish_lock = threading.RLock()  # one event at a time, in order
        self._tokens = itertools.count(1)
        self._critical: dict[int, Callable[[Any], None]] = {}
        self._others: dict[int, _Dispatcher] = {}

    def subscribe(self, callback: Callable[[Any], None], *, critical: bool = False,
                  batch: bool = False) -> int:
        if not callable(callback):
            raise TypeError("a subscriber must be callable")
        if critical and batch:
            raise ValueError("a critical subscriber takes events one at a time")
        with self._lock:
            token = next(self._tokens)
            if critical:
                self._critical = {**self._critical, token: callback}
            else:
                self._others = {**self._others, token: _Dispatcher(
                    callback, batch, name=f"tracer-engine-subscriber-{token}",
                    interval_s=self.dispatch_interval_s)}
            return token

    def unsubscribe(self, token: int) -> None:
        with self._lock:
            if token in self._critical:
                self._critical = {k: v for k, v in self._critical.items() if k != token}
                return
            dispatcher = self._others.get(token)
            if dispatcher is None:
                raise KeyError(f"no subscription {token}")
            self._others = {k: v for k, v in self._others.items() if k != token}
        dispatcher.close(timeout=1.0)

    def publish(self, event: Any, *, closing: bool = False) -> None:
        """Deliver ``event``. A critical subscriber's failure raises
        :class:`CriticalSubscriberError` unless ``closing`` (the events that end a run after
        a failure: then it is logged and the event is still forwarded)."""
        with self._publish_lock:
            failure: CriticalSubscriberError | None = None
            for callback in self._critical.values():   # a snapshot: replaced, never mutated
                try:
                    callback(event)
                except BaseException as exc:  # noqa: BLE001 - any failure ends the run
                    failure = CriticalSubscriberError(callback, exc)
                    failure.__cause__ = exc
                    log.error("%s", failure)
                    break
            if failure is None or not isinstance(event, Point):
                for dispatcher in self._others.values():
                    dispatcher.put(event)
            if failure is not None and not closing:
                raise failure

    def flush(self, timeout: float | None = None) -> bool:
        """Wait until every non-critical subscriber has handled everything queued so far."""
        import time
        deadline = None if timeout is None else time.monotonic() + timeout
        for dispatcher in list(self._others.values()):
            left = None if deadline is None else max(0.0, deadline - time.monotonic())
            if not dispatcher.idle(left):
                return False
        return True

    def subscriber_errors(self) -> int:
        return sum(d.errors for d in self._others.values())

    def close(self, timeout: float | None = 2.0) -> None:
        with self._lock:
            others = list(self._others.values())
            self._others = {}
            self._critical = {}
        for dispatcher in others:
            dispatcher.close(timeout)
