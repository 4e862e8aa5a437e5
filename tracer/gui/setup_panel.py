"""Set-up: the bench and its link, the sample, the protocol (picker and editor checked as
you type) and the Start / Stop buttons."""
from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Callable

from PyQt6.QtCore import QTimer, pyqtSignal
from PyQt6.QtGui import QColor, QFontDatabase, QTextCursor, QTextFormat
from PyQt6.QtWidgets import (QComboBox, QDoubleSpinBox, QFileDialog, QFormLayout, QGroupBox,
                             QHBoxLayout, QLabel, QLineEdit, QListWidget, QListWidgetItem,
                             QPlainTextEdit, QPushButton, QSizePolicy, QSpinBox, QTextEdit,
                             QVBoxLayout, QWidget)

from .bench_info import ROLE_NAMES, BenchInfo
from .validation import SampleFields, Validation, validate_protocol_text

DEBOUNCE_MS = 350


def display_name(path: Path) -> str:
    """The file as `tracer check` would be given it: relative to the current folder when
    inside it."""
    try:
        return os.path.relpath(path) if path.resolve().is_relative_to(Path.cwd().resolve()) \
            else str(path)
    except (OSError, ValueError):
        return str(path)


class SetupPanel(QWidget):
    start_requested = pyqtSignal()
    stop_requested = pyqtSignal()
    validated = pyqtSignal(object)          # Validation

    def __init__(self, *, bench_info: BenchInfo, validate: Callable[..., Validation] | None = None,
                 bench_profile: Any = None, engine: Any = None, protocols_dir: Path | None = None,
                 operator: str = "", debounce_ms: int = DEBOUNCE_MS, parent: QWidget | None = None):
        super().__init__(parent)
        self.bench_info = bench_info
        self._bench_profile = bench_profile
        self._engine = engine
        self._validate_fn = validate or validate_protocol_text
        self.protocols_dir = protocols_dir
        self.protocol_path: Path | None = None
        self._loaded_text = ""
        self.validation = Validation(False, problems=("no protocol yet",))
        self._running = False
        self._busy = False
        self._state_applied = False

        layout = QVBoxLayout(self)
        layout.setContentsMargins(6, 6, 6, 6)
        layout.setSpacing(8)

        # -- bench
        bench_box = QGroupBox("Bench")
        bl = QVBoxLayout(bench_box)
        bl.setSpacing(2)
        name = QLabel(f"<b>{_escape(bench_info.name)}</b>"
                      + (" &nbsp;<span style='color:#555'>(built-in simulated bench)</span>"
                         if bench_info.simulated else ""))
        bl.addWidget(name)
        self.link_label = QLabel("● link: checking…")
        self.link_label.setObjectName("bench-link")
        bl.addWidget(self.link_label)
        lines = []
        for inst in bench_info.instruments:
            ident = inst.identity.split(",")
            short = " ".join(x for x in ident[:2] if x) or inst.identity or "?"
            lines.append(f"{ROLE_NAMES.get(inst.role, inst.role)}: {_escape(short)}")
        inst_label = QLabel("<br>".join(lines) or "no instruments")
        inst_label.setStyleSheet("color:#444")
        inst_label.setToolTip("\n".join(f"{i.role}: {i.identity} at {i.address}"
                                        for i in bench_info.instruments))
        bl.addWidget(inst_label)
        layout.addWidget(bench_box)

        # -- sample
        sample_box = QGroupBox("Sample")
        sample_box.setToolTip("Leave a field empty to keep the protocol's value (shown grey)")
        form = QFormLayout(sample_box)
        form.setFieldGrowthPolicy(QFormLayout.FieldGrowthPolicy.AllNonFixedFieldsGrow)
        self.sample_id = QLineEdit()
        self.sample_id.setObjectName("sample-id")
        self.area = QDoubleSpinBox()
        self.area.setObjectName("sample-area")
        self.area.setRange(0.0, 1e5)
        self.area.setDecimals(4)
        self.area.setSingleStep(0.1)
        self.area.setSpecialValueText("as in protocol")
        self.area.setSuffix(" cm²")
        self.cells = QSpinBox()
        self.cells.setObjectName("sample-cells")
        self.cells.setRange(0, 10000)
        self.cells.setSpecialValueText("as in protocol")
        self.operator = QLineEdit(operator)
        self.operator.setObjectName("operator")
        form.addRow("Sample id", self.sample_id)
        form.addRow("Area", self.area)
        form.addRow("Cells in series", self.cells)
        form.addRow("Operator", self.operator)
        layout.addWidget(sample_box)

        # -- protocol
        proto_box = QGroupBox("Protocol")
        pl = QVBoxLayout(proto_box)
        self.picker = QComboBox()
        self.picker.setObjectName("protocol-picker")
        self.picker.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Fixed)
        self.picker.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToMinimumContentsLengthWithIcon)
        self.picker.setMinimumContentsLength(12)
        self.open_button = QPushButton("Open…")
        self.open_button.setToolTip("Open a protocol file")
        self.save_button = QPushButton("Save…")
        self.save_button.setToolTip("Save the editor's text as a protocol file")
        pl.addWidget(self.picker)
        row = QHBoxLayout()
        hint = QLabel("checked as you type")
        hint.setStyleSheet("color:#666;font-size:8pt")
        row.addWidget(hint, 1)
        row.addWidget(self.open_button)
        row.addWidget(self.save_button)
        pl.addLayout(row)
        self.editor = QPlainTextEdit()
        self.editor.setObjectName("protocol-editor")
        mono = QFontDatabase.systemFont(QFontDatabase.SystemFont.FixedFont)
        mono.setPointSize(9)
        self.editor.setFont(mono)
        self.editor.setLineWrapMode(QPlainTextEdit.LineWrapMode.NoWrap)
        self.editor.setTabChangesFocus(False)
        self.editor.setPlaceholderText("Pick a protocol above or type one (YAML)")
        pl.addWidget(self.editor, 1)
        self.check_title = QLabel("")
        self.check_title.setObjectName("check-title")
        self.check_title.setWordWrap(True)
        pl.addWidget(self.check_title)
        self.problems = QListWidget()
        self.problems.setObjectName("protocol-problems")
        self.problems.setWordWrap(True)
        self.problems.setMaximumHeight(84)
        self.problems.setFont(mono)
        pl.addWidget(self.problems)
        layout.addWidget(proto_box, 1)

        # -- start / stop
        buttons = QHBoxLayout()
        self.start_button = QPushButton("▶  Start")
        self.start_button.setObjectName("start")
        self.start_button.setMinimumHeight(38)
        self.start_button.setStyleSheet(
            "QPushButton{font-weight:bold;font-size:12pt;background:#009E73;color:white;"
            "border-radius:4px;padding:4px 12px}"
            "QPushButton:disabled{background:#C8C8C8;color:#6A6A6A}")
        self.stop_button = QPushButton("■  Stop")
        self.stop_button.setObjectName("stop")
        self.stop_button.setMinimumHeight(38)
        self.stop_button.setToolTip("Graceful stop: the point in progress completes, then the "
                                    "output goes to 0 and off")
        buttons.addWidget(self.start_button, 2)
        buttons.addWidget(self.stop_button, 1)
        layout.addLayout(buttons)

        # -- wiring
        self._debounce = QTimer(self)
        self._debounce.setSingleShot(True)
        self._debounce.setInterval(debounce_ms)
        self._debounce.timeout.connect(self.validate_now)
        self.editor.textChanged.connect(self._schedule_validation)
        for w in (self.sample_id, self.operator):
            w.textChanged.connect(self._schedule_validation)
        self.area.valueChanged.connect(self._schedule_validation)
        self.cells.valueChanged.connect(self._schedule_validation)
        self.problems.itemActivated.connect(self._go_to_problem)
        self.problems.itemClicked.connect(self._go_to_problem)
        self.open_button.clicked.connect(self._open_dialog)
        self.save_button.clicked.connect(self._save_dialog)
        self.start_button.clicked.connect(self.start_requested)
        self.stop_button.clicked.connect(self.stop_requested)
        self._fill_picker()
        self.picker.currentIndexChanged.connect(self._picked)
        self._refresh_buttons()

    # ------------------------------------------------------------------ protocols
    def _fill_picker(self) -> None:
        self.picker.blockSignals(True)
        self.picker.clear()
        self.picker.addItem("— choose a protocol —", None)
        if self.protocols_dir is not None and self.protocols_dir.is_dir():
            for p in sorted(self.protocols_dir.glob("*.yaml")):
                self.picker.addItem(p.name, str(p))
        self.picker.blockSignals(False)

    def _picked(self, index: int) -> None:
        path = self.picker.itemData(index)
        if path:
            self.load_file(Path(path))

    def load_file(self, path: Path) -> None:
        """Put a protocol file into the editor (and the picker)."""
        path = Path(path)
        text = path.read_text(encoding="utf-8")
        self.protocol_path = path
        self._loaded_text = text
        idx = self.picker.findData(str(path))
        self.picker.blockSignals(True)
        if idx < 0:
            self.picker.addItem(path.name, str(path))
            idx = self.picker.count() - 1
        self.picker.setCurrentIndex(idx)
        self.picker.blockSignals(False)
        self.editor.setPlainText(text)
        self.validate_now()

    def _open_dialog(self) -> None:
        start = str(self.protocols_dir or Path.cwd())
        name, _ = QFileDialog.getOpenFileName(self, "Open a protocol", start,
                                              "Protocols (*.yaml *.yml);;All files (*)")
        if name:
            try:
                self.load_file(Path(name))
            except OSError as exc:
                self._show_problems(Validation(False, problems=(f"{name}: {exc}",)))

    def _save_dialog(self) -> None:
        start = str(self.protocol_path or (self.protocols_dir or Path.cwd()) / "protocol.yaml")
        name, _ = QFileDialog.getSaveFileName(self, "Save the protocol as", start,
                                              "Protocols (*.yaml *.yml)")
        if name:
            path = Path(name)
            path.write_text(self.editor.toPlainText(), encoding="utf-8")
            self.protocol_path = path
            self._loaded_text = self.editor.toPlainText()
            self.validate_now()

    @property
    def edited(self) -> bool:
        return self.editor.toPlainText() != self._loaded_text

    def source_name(self) -> str:
        if self.protocol_path is None:
            return "<editor>"
        return display_name(self.protocol_path)

    # ------------------------------------------------------------------ validation
    def sample_fields(self) -> SampleFields:
        return SampleFields(sample_id=self.sample_id.text(),
                            area_cm2=self.area.value() or None,
                            cells_in_series=self.cells.value() or None)

    def _schedule_validation(self) -> None:
        self._debounce.start()
        self.start_button.setEnabled(False)      # until the new text has been checked

    def validate_now(self) -> Validation:
        self._debounce.stop()
        v = self._validate_fn(self.editor.toPlainText(), source_name=self.source_name(),
                              bench_profile=self._bench_profile,
                              sample_overrides=self.sample_fields().overrides(),
                              engine=self._engine)
        self.validation = v
        self._show_problems(v)
        self._update_placeholders(v)
        self._refresh_buttons()
        self.validated.emit(v)
        return v

    def _show_problems(self, v: Validation) -> None:
        self.problems.clear()
        if v.ok:
            self.check_title.setText("<span style='color:#006B4F'><b>✔ protocol OK</b></span>")
            item = QListWidgetItem(v.summary)
            item.setForeground(QColor("#006B4F"))
            self.problems.addItem(item)
        else:
            n = len(v.problems)
            self.check_title.setText(f"<span style='color:#B34700'><b>✖ {n} problem"
                                     f"{'s' if n != 1 else ''}</b> — Start stays off until the "
                                     "protocol is valid</span>")
            for p in v.problems:
                item = QListWidgetItem(p)
                item.setForeground(QColor("#9A3D00"))
                self.problems.addItem(item)
        marks = []
        for line in v.lines:
            block = self.editor.document().findBlockByLineNumber(line - 1)
            if not block.isValid():
                continue
            sel = QTextEdit.ExtraSelection()
            sel.format.setBackground(QColor(213, 94, 0, 45))   # Okabe-Ito vermillion, faint
            sel.format.setProperty(QTextFormat.Property.FullWidthSelection, True)
            cur = QTextCursor(block)
            sel.cursor = cur
            marks.append(sel)
        self.editor.setExtraSelections(marks)

    def _update_placeholders(self, v: Validation) -> None:
        sample = getattr(v.protocol, "sample", None)
        if sample is None:
            return
        sid = getattr(sample, "id", None) or getattr(sample, "sample_id", None)
        if sid:
            self.sample_id.setPlaceholderText(f"{sid} (protocol)")
        area = getattr(sample, "area_cm2", None)
        self.area.setSpecialValueText(f"{area:g} cm² (protocol)" if area else "unknown (protocol)")
        cells = getattr(sample, "cells_in_series", None)
        self.cells.setSpecialValueText(f"{cells} (protocol)" if cells else "as in protocol")
        meta = getattr(v.protocol, "metadata", None) or {}
        who = meta.get("operator") if hasattr(meta, "get") else None
        if who and not self.operator.placeholderText():
            self.operator.setPlaceholderText(f"{who} (protocol)")

    def _go_to_problem(self, item: QListWidgetItem) -> None:
        text = item.text()
        head = text.split(": ", 1)[0]
        _, _, line = head.rpartition(":")
        if line.isdigit():
            block = self.editor.document().findBlockByLineNumber(int(line) - 1)
            if block.isValid():
                self.editor.setTextCursor(QTextCursor(block))
                self.editor.setFocus()

    # ------------------------------------------------------------------ state
    def set_running(self, running: bool) -> None:
        if running == self._running and self._state_applied:
            return
        self._state_applied = True
        self._running = running
        for w in (self.picker, self.open_button, self.sample_id, self.area, self.cells,
                  self.operator):
            w.setEnabled(not running)
        self.editor.setReadOnly(running)
        self._refresh_buttons()

    def set_busy(self, busy: bool) -> None:
        """An emergency stop or a close is in progress: nothing may start."""
        self._busy = busy
        self._refresh_buttons()

    def _refresh_buttons(self) -> None:
        self.start_button.setEnabled(self.validation.ok and not self._running and not self._busy
                                     and not self._debounce.isActive())
        self.stop_button.setEnabled(self._running)
        self.start_button.setToolTip("Run the protocol on the bench" if self.validation.ok
                                     else "The protocol has problems (listed below the editor)")

    def set_link(self, ok: bool | None, message: str) -> None:
        colour = {True: "#006B4F", False: "#B34700", None: "#666666"}[ok]
        state = {True: "connected", False: "NO ANSWER", None: "checking…"}[ok]
        tail = "" if ok else f" — {_escape(message)}" if ok is False else ""
        self.link_label.setText(f"<span style='color:{colour}'>●</span> link: <b>{state}</b>{tail}")
        self.link_label.setToolTip(message)

    def operator_name(self) -> str:
        return self.operator.text().strip() or self.operator.placeholderText().split(" (")[0]


def _escape(text: str) -> str:
    return (str(text).replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;"))
