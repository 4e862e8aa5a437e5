"""The safety strip across the top of the window, always visible: the output state as last
read from the instrument, the interlock, the limits in force, a caution, and the
EMERGENCY STOP button. Also the fault banner shown under it."""
from __future__ import annotations

import time

from PyQt6.QtCore import Qt, pyqtSignal
from PyQt6.QtGui import QKeySequence, QShortcut
from PyQt6.QtWidgets import (QFrame, QHBoxLayout, QLabel, QPushButton, QSizePolicy, QVBoxLayout,
                             QWidget)

from . import palette
from .bench_info import limits_text
from .run_model import RunModel

CAUTION = ("CAUTION: this window switches a real source. Follow your lab's safety rules; "
           "never touch the sample or its leads while the output is on.")


def _pill(label: QLabel, text: str, colours: tuple[str, str]) -> None:
    """Set a status label's text and colours — only when they change (a style sheet change
    restyles the widget; this runs on every redraw during a run)."""
    if label.property("pill") == (text, colours):
        return
    label.setProperty("pill", (text, colours))
    fg, bg = colours
    label.setText(text)
    label.setStyleSheet(f"QLabel{{background:{bg};color:{fg};font-weight:bold;"
                        "border-radius:5px;padding:4px 10px}")


def _set_text(label: QLabel, text: str) -> None:
    if label.text() != text:
        label.setText(text)


class SafetyStrip(QFrame):
    emergency_stop_clicked = pyqtSignal()

    def __init__(self, parent: QWidget | None = None):
        super().__init__(parent)
        self.setObjectName("safety-strip")
        self.setFrameShape(QFrame.Shape.StyledPanel)
        self.setStyleSheet("QFrame#safety-strip{background:#F3F3F3;border:1px solid #C8C8C8}")
        row = QHBoxLayout(self)
        row.setContentsMargins(8, 6, 8, 6)
        row.setSpacing(10)

        col = QVBoxLayout()
        col.setSpacing(1)
        self.output = QLabel()
        self.output.setObjectName("output-state")
        self.output.setMinimumWidth(170)
        self.output.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.output_source = QLabel()
        self.output_source.setObjectName("output-source")
        self.output_source.setStyleSheet("color:#444;font-size:8pt")
        self.output_source.setWordWrap(True)
        self.output_source.setFixedWidth(230)
        col.addWidget(self.output)
        col.addWidget(self.output_source)
        row.addLayout(col)

        col = QVBoxLayout()
        col.setSpacing(1)
        self.interlock = QLabel()
        self.interlock.setObjectName("interlock-state")
        self.interlock.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.interlock_source = QLabel()
        self.interlock_source.setStyleSheet("color:#444;font-size:8pt")
        self.interlock_source.setWordWrap(True)
        self.interlock_source.setMaximumWidth(160)
        col.addWidget(self.interlock)
        col.addWidget(self.interlock_source)
        row.addLayout(col)

        col = QVBoxLayout()
        col.setSpacing(1)
        self.limits = QLabel()
        self.limits.setObjectName("limits")
        self.limits.setTextFormat(Qt.TextFormat.RichText)
        self.limits.setWordWrap(True)
        self.limits.setMaximumWidth(330)
        self.bench_limits = QLabel()
        self.bench_limits.setStyleSheet("color:#444;font-size:8pt")
        self.bench_limits.setWordWrap(True)
        self.bench_limits.setMaximumWidth(330)
        col.addWidget(self.limits)
        col.addWidget(self.bench_limits)
        row.addLayout(col)

        self.caution = QLabel(CAUTION)
        self.caution.setObjectName("caution")
        self.caution.setWordWrap(True)
        fg, bg = palette.CAUTION_COLOURS
        self.caution.setStyleSheet(f"QLabel{{background:{bg};color:{fg};border:1px solid #D9C36A;"
                                   "border-radius:4px;padding:3px 8px;font-size:9pt}")
        self.caution.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Preferred)
        self.caution.setMinimumWidth(220)
        row.addWidget(self.caution, 1)

        self.estop = QPushButton("EMERGENCY\nSTOP")
        self.estop.setObjectName("emergency-stop")
        self.estop.setToolTip("Level 0 and output off at once, from any state (Esc)")
        self.estop.setMinimumSize(150, 58)
        self.estop.setFocusPolicy(Qt.FocusPolicy.NoFocus)
        fg, bg = palette.ESTOP_COLOURS
        self.estop.setStyleSheet(
            f"QPushButton{{background:{bg};color:{fg};font-size:13pt;font-weight:bold;"
            "border:3px solid #7A0000;border-radius:8px;padding:2px 10px}"
            "QPushButton:pressed{background:#8A0000}")
        self.estop.clicked.connect(self.emergency_stop_clicked)
        row.addWidget(self.estop)
        shortcut = QShortcut(QKeySequence(Qt.Key.Key_Escape), self)
        shortcut.setContext(Qt.ShortcutContext.WindowShortcut)
        shortcut.activated.connect(self.emergency_stop_clicked)
        self._bench_limits = None
        self.set_limits(None, None)

    def set_limits(self, limits, bench_limits) -> None:
        if limits:
            _set_text(self.limits, f"<b>Limits in force</b><br>{limits_text(limits)}")
        else:
            _set_text(self.limits, "<b>Limits in force</b><br>none yet (pick a protocol)")
        if bench_limits is not None:
            self._bench_limits = bench_limits
        _set_text(self.bench_limits, f"bench hard limits: {limits_text(self._bench_limits)}"
                  if self._bench_limits else "")

    def update_from(self, model: RunModel, estop_busy: bool = False) -> None:
        out = model.output
        stamp = time.strftime("%H:%M:%S", time.localtime(out.time))
        if estop_busy:
            _pill(self.output, "OUTPUT → OFF…", palette.LIVE_COLOURS)
            _set_text(self.output_source, "emergency stop in progress")
        elif out.on is True:
            _pill(self.output, "● OUTPUT ON", palette.LIVE_COLOURS)
            _set_text(self.output_source, f"{out.source} · {stamp}")
        elif out.on is False:
            _pill(self.output, "○ OUTPUT OFF", palette.OK_COLOURS)
            _set_text(self.output_source, f"{out.source} · {stamp}")
        elif out.alarm:
            _pill(self.output, "⚠ OUTPUT NOT VERIFIED OFF", palette.ALARM_COLOURS)
            _set_text(self.output_source, f"{out.source} · {stamp}")
        else:
            _pill(self.output, "OUTPUT ?", palette.UNKNOWN_COLOURS)
            _set_text(self.output_source, out.source)
        self.output_source.setToolTip(self.output_source.text())
        if model.interlock_open is True:
            _pill(self.interlock, "INTERLOCK OPEN", palette.ALARM_COLOURS)
        elif model.interlock_open is False:
            _pill(self.interlock, "interlock closed", palette.OK_COLOURS)
        else:
            _pill(self.interlock, "interlock ?", palette.UNKNOWN_COLOURS)
        _set_text(self.interlock_source, model.interlock_source)


class Banner(QFrame):
    """The cause of a fault, interlock or abort, in plain words, until dismissed."""

    def __init__(self, parent: QWidget | None = None):
        super().__init__(parent)
        self.setObjectName("fault-banner")
        row = QHBoxLayout(self)
        row.setContentsMargins(10, 6, 6, 6)
        self.label = QLabel()
        self.label.setObjectName("fault-banner-text")
        self.label.setWordWrap(True)
        self.label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.dismiss = QPushButton("Dismiss")
        self.dismiss.setFocusPolicy(Qt.FocusPolicy.NoFocus)
        row.addWidget(self.label, 1)
        row.addWidget(self.dismiss)
        self.dismiss.clicked.connect(self.hide)
        self.text = ""
        self.hide()

    def show_message(self, title: str, text: str, severe: bool = False) -> None:
        fg, bg = palette.ALARM_COLOURS if severe else ("#000000", "#FAD7BF")
        border = "#7A0000" if severe else palette.OKABE_ITO["vermillion"]
        self.setStyleSheet(f"QFrame#fault-banner{{background:{bg};border:2px solid {border};"
                           "border-radius:4px}" f"QLabel{{color:{fg};font-size:11pt}}")
        self.text = f"{title}: {text}" if title else text
        self.label.setText(f"<b>⚠ {_escape(title)}</b> — {_escape(text)}" if title else _escape(text))
        self.show()


def _escape(text: str) -> str:
    return str(text).replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
