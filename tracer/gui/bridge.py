"""Engine events into the GUI thread, and blocking work out of it.

:class:`EventBridge` is subscribed to the engine as an ordinary (non-critical) batch
subscriber: the engine's dispatcher thread calls it with the list of events queued since
the last call, and it re-emits that list as a Qt signal. The window connects the signal
with ``Qt.ConnectionType.QueuedConnection``, so the slot always runs in the GUI thread, in
order, and the engine never waits for the window (a slow window only lets its own queue
grow). Each point reaching the window is already in the logbook (the logbook is the
engine's critical subscriber).

:class:`Worker` runs one blocking call (an emergency stop, the wait for the run to end) on
a plain thread and reports the result through a queued signal.
"""
from __future__ import annotations

import threading
from typing import Any, Callable

from PyQt6.QtCore import QObject, Qt, pyqtSignal


class EventBridge(QObject):
    """``bridge(events)`` from any thread -> ``events_arrived(list)`` in the receiver's thread."""

    events_arrived = pyqtSignal(object)

    def __init__(self, parent: QObject | None = None):
        super().__init__(parent)
        self.batches = 0
        self._closed = False

    def __call__(self, events: Any) -> None:
        if self._closed:
            return
        if not isinstance(events, list):
            events = [events]
        self.batches += 1
        self.events_arrived.emit(events)

    def connect_to(self, slot: Callable[[list], None]) -> None:
        self.events_arrived.connect(slot, Qt.ConnectionType.QueuedConnection)

    def close(self) -> None:
        self._closed = True


class Worker(QObject):
    """Run ``fn()`` on a daemon thread; ``done(result)`` or ``failed(message)`` follow,
    queued to the thread that owns this object."""

    done = pyqtSignal(object)
    failed = pyqtSignal(str)

    def __init__(self, fn: Callable[[], Any], name: str, parent: QObject | None = None):
        super().__init__(parent)
        self._fn = fn
        self.thread = threading.Thread(target=self._run, name=name, daemon=True)

    def start(self) -> "Worker":
        self.thread.start()
        return self

    def _run(self) -> None:
        try:
            result = self._fn()
        except BaseException as exc:  # noqa: BLE001 - reported to the window
            try:
                self.failed.emit(f"{type(exc).__name__}: {exc}")
            except RuntimeError:       # the window is gone
                pass
            return
        try:
            self.done.emit(result)
        except RuntimeError:
            pass
