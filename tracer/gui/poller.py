"""The periodic read of the output and interlock state, made off the GUI thread.

The window is given a ``probe()`` callable by the composition root (`tracer gui`): it asks
the instrument whether its output is on and its interlock open, and may take as long as the
instrument's time-out. :class:`InstrumentPoller` calls it every ``interval_s`` on its own
thread and hands each :class:`~tracer.gui.run_model.InstrumentReading` to the GUI thread
through a queued signal; the GUI thread never waits on an instrument. While a run goes the
probe is not called (``paused()`` is true): the run's events are the truth then, and the
poller does not add traffic to the instrument the sweep is using.
"""
from __future__ import annotations

import threading
import time
from typing import Any, Callable, Mapping

from PyQt6.QtCore import QObject, Qt, pyqtSignal

from .run_model import InstrumentReading


class InstrumentPoller(QObject):
    reading = pyqtSignal(object)          # InstrumentReading

    def __init__(self, probe: Callable[[], Mapping[str, Any] | None], *, interval_s: float = 1.0,
                 paused: Callable[[], bool] = lambda: False, parent: QObject | None = None):
        super().__init__(parent)
        self._probe = probe
        self.interval_s = float(interval_s)
        self._paused = paused
        self._stop = threading.Event()
        self._wake = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="tracer-gui-poller", daemon=True)
        self.polls = 0

    def connect_to(self, slot: Callable[[InstrumentReading], None]) -> None:
        self.reading.connect(slot, Qt.ConnectionType.QueuedConnection)

    def start(self) -> None:
        if not self._thread.is_alive():
            self._thread.start()

    def poll_now(self) -> None:
        self._wake.set()

    def stop(self, timeout: float = 0.2) -> None:
        """Stop polling; a probe in flight is left to finish on its (daemon) thread."""
        self._stop.set()
        self._wake.set()
        if self._thread.is_alive() and threading.current_thread() is not self._thread:
            self._thread.join(timeout)

    def _loop(self) -> None:
        while not self._stop.is_set():
            if not self._paused():
                reading = self._read()
                if self._stop.is_set():
                    return
                if reading is not None:
                    try:
                        self.reading.emit(reading)
                    except RuntimeError:       # the window is gone
                        return
            self._wake.wait(self.interval_s)
            self._wake.clear()

    def _read(self) -> InstrumentReading | None:
        self.polls += 1
        try:
            answer = self._probe()
        except Exception as exc:  # noqa: BLE001 - an unreachable instrument is news, not a crash
            return InstrumentReading(time.time(), error=f"{type(exc).__name__}: {exc}")
        if answer is None:
            return None
        return InstrumentReading(time.time(), output_on=answer.get("output_on"),
                                 interlock_open=answer.get("interlock_open"))
