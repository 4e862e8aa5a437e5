"""The bench window: set-up, live plots, results, history, and the safety strip.

Threads:

- the engine runs the protocol in its worker thread; its dispatcher thread calls the
  :class:`~tracer.gui.bridge.EventBridge`, which re-emits each batch of events as a Qt
  signal, delivered to :meth:`BenchWindow._on_events` in the GUI thread (queued);
- :meth:`_on_events` only feeds the :class:`~tracer.gui.run_model.RunModel` (cheap);
  a ``QTimer`` redraws every ``redraw_ms`` when the model says something changed;
- the output/interlock poll (:class:`~tracer.gui.poller.InstrumentPoller`) and the
  emergency stop (:class:`~tracer.gui.bridge.Worker`) run on their own threads, so the GUI
  thread never waits on an instrument.

Closing the window during a run first makes the output safe — ``engine.emergency_stop()``
and ``engine.wait()`` on a helper thread — and only then closes.
"""
from __future__ import annotations

import logging
import sys
import time
from pathlib import Path
from typing import Any, Callable, Mapping

from PyQt6.QtCore import Qt, QTimer, pyqtSignal
from PyQt6.QtGui import QCloseEvent
from PyQt6.QtWidgets import (QLabel, QMainWindow, QSizePolicy, QSplitter, QTabWidget,
                             QVBoxLayout, QWidget)

from tracer import events as ev

from .bench_info import BenchInfo
from .bridge import EventBridge, Worker
from .history import HistoryPanel
from .plots import FrameStats, FrozenLayer, PlotArea
from .poller import InstrumentPoller
from .results_panel import ResultsPanel
from .run_model import RunModel
from .safety import Banner, SafetyStrip
from .setup_panel import SetupPanel

log = logging.getLogger("tracer.gui")

REDRAW_MS = 33          # ~30 redraws a second at most, and only when something changed
CLOSE_WAIT_S = 15.0     # how long closing waits for the run to end after the emergency stop


class BenchWindow(QMainWindow):
    """The main window. ``engine`` is a :class:`tracer.engine.Engine`; ``probe`` (optional)
    reads ``{"output_on": bool, "interlock_open": bool}`` from the instrument and is only
    ever called off the GUI thread."""

    run_finished_shown = pyqtSignal(object)     # RunFinished, once its results are drawn
    emergency_stop_done = pyqtSignal(bool)      # verified off?

    def __init__(self, engine: Any, *, bench_info: BenchInfo, bench_profile: Any = None,
                 logbook_path: Path | None = None, probe: Callable[[], Mapping] | None = None,
                 poll_interval_s: float = 1.0, protocols_dir: Path | None = None,
                 operator: str = "", redraw_ms: int = REDRAW_MS, debounce_ms: int | None = None,
                 parent: QWidget | None = None):
        super().__init__(parent)
        self.engine = engine
        self.bench_info = bench_info
        self.logbook_path = logbook_path
        self.model = RunModel()
        self.stats = FrameStats()
        self.exit_status: int | None = None
        self._estop_worker: Worker | None = None
        self._close_worker: Worker | None = None
        self._close_confirmed = False
        self._finished_shown: str | None = None
        self._protocol_file = ""
        self._shown_alarm = None
        self._split_done = False
        self._plan_limits: dict | None = None

        self.setWindowTitle(f"tracer — bench window — {bench_info.name}")
        self.setObjectName("bench-window")

        # -- widgets
        self.safety = SafetyStrip()
        self.safety.set_limits(None, bench_info.hard_limits)
        self.banner = Banner()
        kwargs = {} if debounce_ms is None else {"debounce_ms": debounce_ms}
        self.setup = SetupPanel(bench_info=bench_info, bench_profile=bench_profile, engine=engine,
                                protocols_dir=protocols_dir, operator=operator, **kwargs)
        self.plots = PlotArea(self.stats)
        self.results = ResultsPanel()
        self.history = HistoryPanel(logbook_path, render_png=self.save_plots_png)
        self.side_tabs = QTabWidget()
        self.side_tabs.setObjectName("side-tabs")
        self.side_tabs.addTab(self.results, "Results")
        self.side_tabs.addTab(self.history, "History")

        split = QSplitter(Qt.Orientation.Horizontal)
        split.setObjectName("main-splitter")
        split.addWidget(self.setup)
        split.addWidget(self.plots)
        split.addWidget(self.side_tabs)
        split.setStretchFactor(0, 0)
        split.setStretchFactor(1, 1)
        split.setStretchFactor(2, 0)
        split.setSizes([330, 760, 500])
        split.setChildrenCollapsible(False)
        self.setup.setMinimumWidth(280)
        self.side_tabs.setMinimumWidth(400)
        self.splitter = split

        central = QWidget()
        col = QVBoxLayout(central)
        col.setContentsMargins(6, 6, 6, 0)
        col.setSpacing(6)
        col.addWidget(self.safety)
        col.addWidget(self.banner)
        col.addWidget(split, 1)
        self.setCentralWidget(central)
        self.status_label = QLabel("Ready")
        self.status_label.setObjectName("status-text")
        # a long message is cut, never allowed to widen the window
        self.status_label.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Preferred)
        self.statusBar().addWidget(self.status_label, 1)
        self.points_label = QLabel("")
        self.statusBar().addPermanentWidget(self.points_label)

        # -- wiring
        self.bridge = EventBridge(self)
        self.bridge.connect_to(self._on_events)
        self._token = engine.subscribe(self.bridge, batch=True)
        self.timer = QTimer(self)
        self.timer.setInterval(int(redraw_ms))
        self.timer.timeout.connect(self._redraw)
        self.timer.start()
        self.poller: InstrumentPoller | None = None
        if probe is not None:
            self.poller = InstrumentPoller(probe, interval_s=poll_interval_s,
                                           paused=lambda: bool(engine.running), parent=self)
            self.poller.connect_to(self._on_reading)
            self.poller.start()
        self.safety.emergency_stop_clicked.connect(self.emergency_stop)
        self.setup.start_requested.connect(self.start_run)
        self.setup.stop_requested.connect(self.stop_run)
        self.setup.validated.connect(self._on_validated)
        self.history.overlays_changed.connect(self._on_overlays)
        self.history.message.connect(self.show_status)
        self.banner.dismiss.clicked.connect(self.model.clear_alarm)
        self.safety.update_from(self.model)

    # ------------------------------------------------------------------ events in
    def _on_events(self, events: list) -> None:
        self.model.apply_many(events)

    def _on_reading(self, reading) -> None:
        self.model.apply_reading(reading)
        self.setup.set_link(self.model.link_ok, self.model.link_message)

    def _redraw(self) -> None:
        if not self.model.dirty:
            return
        t0, c0 = time.perf_counter(), time.thread_time()
        changes = self.model.take_changes()
        self.plots.redraw(self.model, changes)
        if changes.new_run:
            self.results.clear()
        for trace in changes.analysed:
            self.results.add_trace(trace, show=True)
        if changes.status:
            self._update_status()
        self.stats.frame((time.perf_counter() - t0) * 1e3, changes.oldest_point_time,
                         (time.thread_time() - c0) * 1e3, self.plots.points_in_view)
        fin = self.model.finished
        if fin is not None and self._finished_shown != fin.run_uid:
            self._finished_shown = fin.run_uid
            self._run_ended(fin)

    def _update_status(self) -> None:
        m = self.model
        self.safety.update_from(m, estop_busy=self._estop_busy)
        # limits in force: the run's while it goes, else those of the protocol ready to start
        self.safety.set_limits(m.limits if m.running or self._plan_limits is None
                               else self._plan_limits, None)
        text = m.status_text()
        alarm = m.alarm
        if alarm is not None:
            text = f"{text} — {alarm.text()}"
            if alarm is not self._shown_alarm:
                self.banner.show_message(alarm.cause, alarm.message, alarm.severe)
        elif self._shown_alarm is not None:
            self.banner.hide()
        self._shown_alarm = alarm
        if self.status_label.text() != text:
            self.status_label.setText(text)
        points = f"{m.points_total} points" if m.run is not None else ""
        if self.points_label.text() != points:
            self.points_label.setText(points)
        self.setup.set_running(m.running or bool(self.engine.running))

    # ------------------------------------------------------------------ set-up
    def _on_validated(self, validation) -> None:
        if validation.ok:
            plan = validation.plan
            lim = plan.limits
            self._plan_limits = {"voltage_v": lim.voltage_v, "current_a": lim.current_a,
                                 "power_w": lim.power_w, "reverse_voltage_v": lim.reverse_voltage_v}
            if not self.model.running:
                self.safety.set_limits(self._plan_limits, None)
            if self.model.run is None:
                self.plots.set_units(bool(plan.sample.area_cm2))
            if plan.sample.sample_id != self.history.sample_id:
                self.history.set_sample(plan.sample.sample_id)

    def load_protocol(self, path: Path) -> None:
        self.setup.load_file(Path(path))

    # ------------------------------------------------------------------ run control
    @property
    def _estop_busy(self) -> bool:
        w = self._estop_worker
        return w is not None and w.thread.is_alive()

    def start_run(self) -> str | None:
        """Start the protocol in the editor; returns the run uid (None if it could not)."""
        from tracer.engine import PlanRefused

        if self.engine.running or self._estop_busy or self._close_worker is not None:
            return None
        validation = self.setup.validate_now()
        if not validation.ok:
            self.show_status("the protocol has problems; see the list under the editor")
            return None
        source = self.setup.source_name()
        metadata = {"protocol_file": source + (" (edited in the window)" if self.setup.edited
                                               else ""),
                    "command": "tracer gui", "simulated_bench": self.bench_info.simulated}
        try:
            run_uid = self.engine.start(validation.plan, operator=self.setup.operator_name(),
                                        metadata=metadata)
        except (PlanRefused, RuntimeError) as exc:
            self.model.set_alarm("not started", str(exc))
            self._update_status()
            return None
        self.model.clear_alarm()
        self.history.exclude_run = run_uid
        self.setup.set_running(True)
        self.show_status(f"run {run_uid[:8]} started")
        return run_uid

    def stop_run(self) -> None:
        """Graceful stop: the point in progress completes, then level 0 and output off."""
        self.engine.stop()
        self.show_status("stopping: the point in progress completes, then the output goes off")

    def emergency_stop(self) -> None:
        """Level 0 and output off at once, from any state; the instrument I/O happens on a
        helper thread, so the window stays responsive."""
        if self._estop_busy:
            return
        self.show_status("EMERGENCY STOP: level 0 and output off…")
        self.setup.set_busy(True)
        worker = Worker(lambda: self.engine.emergency_stop(
            "emergency-stop", "emergency stop pressed in the bench window"),
            "tracer-gui-emergency-stop", self)
        worker.done.connect(self._emergency_stop_done, Qt.ConnectionType.QueuedConnection)
        worker.failed.connect(lambda msg: self._emergency_stop_done(False, msg),
                              Qt.ConnectionType.QueuedConnection)
        self._estop_worker = worker
        worker.start()
        self.safety.update_from(self.model, estop_busy=True)

    def _emergency_stop_done(self, verified: Any, message: str = "") -> None:
        verified = bool(verified)
        self.model.note_emergency_stop(verified)
        self.setup.set_busy(False)
        self._estop_worker = None
        self.show_status("emergency stop: output read back OFF" if verified else
                         f"emergency stop: output NOT verified off {message}".strip())
        if self.poller is not None:
            self.poller.poll_now()
        self._update_status()
        self.emergency_stop_done.emit(verified)

    def _run_ended(self, finished: ev.RunFinished) -> None:
        self.exit_status = {ev.RUN_COMPLETED: 0, ev.RUN_ABORTED: 3}.get(finished.status, 1)
        self.setup.set_running(False)
        if self.poller is not None:
            self.poller.poll_now()
        if self.history.sample_id:
            self.history.refresh()
        self.run_finished_shown.emit(finished)

    def show_status(self, text: str) -> None:
        self.status_label.setText(text)

    # ------------------------------------------------------------------ overlays, export
    def _on_overlays(self, curves) -> None:
        skipped = []
        for plot in (self.plots.light_plot, self.plots.dark_plot):
            wanted = [c for c in curves if c.light == (plot is self.plots.light_plot)]
            skipped += plot.set_overlays(wanted, self.plots.density)
        if skipped:
            self.show_status(f"{len(skipped)} earlier sweep(s) have no area: not shown as density")

    def save_plots_png(self, path: Path) -> Path:
        with FrozenLayer.all_exact():
            pixmap = self.plots.grab()
        if not pixmap.save(str(path), "PNG"):
            raise OSError(f"could not write {path}")
        return Path(path)

    def save_screenshot(self, path: Path) -> Path:
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        with FrozenLayer.all_exact():
            image = self.grab()
        if not image.save(str(path), "PNG"):
            raise OSError(f"could not write {path}")
        return path

    def showEvent(self, event) -> None:  # noqa: N802 - Qt name
        super().showEvent(event)
        if not self._split_done:
            self._split_done = True
            total = max(self.splitter.width(), self.width() - 12)
            self.splitter.setSizes([int(total * 0.22), int(total * 0.47), int(total * 0.31)])

    # ------------------------------------------------------------------ closing
    def closeEvent(self, event: QCloseEvent) -> None:  # noqa: N802 - Qt name
        if self._close_confirmed or not (self.engine.running or self._estop_busy):
            self._shutdown()
            event.accept()
            return
        event.ignore()
        if self._close_worker is not None:
            return                              # already making safe
        self.banner.show_message("Closing", "switching the output off before the window "
                                 "closes…", severe=False)
        self.show_status("closing: emergency stop, then waiting for the run to end")
        self.setup.set_busy(True)
        engine = self.engine

        def make_safe() -> bool:
            verified = engine.emergency_stop("window-closed",
                                             "the bench window was closed during a run")
            engine.wait(CLOSE_WAIT_S)
            return bool(verified)

        worker = Worker(make_safe, "tracer-gui-close", self)
        worker.done.connect(self._closing_safe, Qt.ConnectionType.QueuedConnection)
        worker.failed.connect(lambda msg: self._closing_safe(False),
                              Qt.ConnectionType.QueuedConnection)
        self._close_worker = worker
        worker.start()

    def _closing_safe(self, verified: Any) -> None:
        self._close_worker = None
        if not verified:
            # Say so loudly and stay open; a second close goes through (the user was told).
            self.model.note_emergency_stop(False)
            self._update_status()
            self._close_confirmed = True
            print("tracer gui: the output could NOT be verified off; check the instrument",
                  file=sys.stderr)
            return
        self._close_confirmed = True
        self.close()

    def _shutdown(self) -> None:
        self.timer.stop()
        if self.poller is not None:
            self.poller.stop()
        try:
            self.engine.unsubscribe(self._token)
        except Exception:  # noqa: BLE001
            pass
        self.bridge.close()
