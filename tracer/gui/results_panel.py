"""Results of the sweep just finished: the verdict (big), figures of merit, fitted
parameters with uncertainties, STC values per procedure; "Copy" puts them on the clipboard
as tab-separated text."""
from __future__ import annotations

from typing import Any, Mapping

from PyQt6.QtCore import Qt
from PyQt6.QtGui import QGuiApplication
from PyQt6.QtWidgets import (QAbstractItemView, QComboBox, QFrame, QHBoxLayout, QHeaderView,
                             QLabel, QPushButton, QScrollArea, QSizePolicy, QTableWidget,
                             QTableWidgetItem, QVBoxLayout, QWidget)

from . import palette
from .results_format import Table, result_tables, tables_tsv, verdict_of, conditions_text
from .run_model import SweepTrace


class _TableView(QTableWidget):
    """A read-only table as tall as its rows (the panel scrolls, not each table)."""

    def __init__(self, table: Table, parent: QWidget | None = None):
        super().__init__(len(table.rows), len(table.header), parent)
        self.setHorizontalHeaderLabels(list(table.header))
        self.verticalHeader().setVisible(False)
        self.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.setSelectionMode(QAbstractItemView.SelectionMode.ContiguousSelection)
        self.setWordWrap(False)
        font = self.font()
        font.setPointSizeF(max(7.5, font.pointSizeF() - 0.5))
        self.setFont(font)
        self.horizontalHeader().setFont(font)
        self.setAlternatingRowColors(True)
        self.setHorizontalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.setTextElideMode(Qt.TextElideMode.ElideMiddle)
        self.setVerticalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        for r, row in enumerate(table.rows):
            for c, text in enumerate(row):
                item = QTableWidgetItem(text)
                if c > 0:
                    item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                item.setToolTip(text)
                self.setItem(r, c, item)
        header = self.horizontalHeader()
        header.setSectionResizeMode(QHeaderView.ResizeMode.Stretch)
        header.setSectionResizeMode(0, QHeaderView.ResizeMode.ResizeToContents)
        self.resizeRowsToContents()
        height = header.sizeHint().height() + 2 * self.frameWidth()
        height += sum(self.rowHeight(r) for r in range(self.rowCount()))
        self.setFixedHeight(height + 2)
        self.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Fixed)


class ResultsPanel(QWidget):
    def __init__(self, parent: QWidget | None = None):
        super().__init__(parent)
        self.trace: SweepTrace | None = None
        self._traces: list[SweepTrace] = []
        self.tables: list[Table] = []

        layout = QVBoxLayout(self)
        layout.setContentsMargins(6, 6, 6, 6)
        layout.setSpacing(6)
        top = QHBoxLayout()
        self.chooser = QComboBox()
        self.chooser.setObjectName("results-sweep")
        self.chooser.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Fixed)
        self.chooser.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToMinimumContentsLengthWithIcon)
        self.chooser.setMinimumContentsLength(12)
        self.copy_button = QPushButton("Copy")
        self.copy_button.setObjectName("results-copy")
        self.copy_button.setToolTip("Copy these results as tab-separated text (pastes into a "
                                    "spreadsheet)")
        top.addWidget(self.chooser, 1)
        top.addWidget(self.copy_button)
        layout.addLayout(top)

        self.verdict = QLabel("no results yet")
        self.verdict.setObjectName("verdict")
        self.verdict.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.verdict.setMinimumHeight(52)
        self._style_verdict(None)
        layout.addWidget(self.verdict)
        self.reasons = QLabel("Results appear here when a sweep has been analysed.")
        self.reasons.setObjectName("verdict-reasons")
        self.reasons.setWordWrap(True)
        self.reasons.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        layout.addWidget(self.reasons)
        self.conditions = QLabel("")
        self.conditions.setObjectName("results-conditions")
        self.conditions.setWordWrap(True)
        self.conditions.setStyleSheet("color:#333")
        layout.addWidget(self.conditions)

        self._tables_host = QWidget()
        self._tables_layout = QVBoxLayout(self._tables_host)
        self._tables_layout.setContentsMargins(0, 0, 0, 0)
        self._tables_layout.setSpacing(4)
        self._tables_layout.addStretch(1)
        scroll = QScrollArea()
        scroll.setWidgetResizable(True)
        scroll.setFrameShape(QFrame.Shape.NoFrame)
        scroll.setWidget(self._tables_host)
        layout.addWidget(scroll, 1)

        self.chooser.currentIndexChanged.connect(self._chosen)
        self.copy_button.clicked.connect(self.copy_to_clipboard)
        self.copy_button.setEnabled(False)

    # ------------------------------------------------------------------ content
    def clear(self) -> None:
        self._traces = []
        self.trace = None
        self.tables = []
        self.chooser.blockSignals(True)
        self.chooser.clear()
        self.chooser.blockSignals(False)
        self._style_verdict(None)
        self.verdict.setText("no results yet")
        self.reasons.setText("Results appear here when a sweep has been analysed.")
        self.conditions.setText("")
        self._set_tables([])
        self.copy_button.setEnabled(False)

    def add_trace(self, trace: SweepTrace, show: bool = True) -> None:
        """A sweep's analysis arrived: list it and (by default) show it."""
        if trace in self._traces:
            idx = self._traces.index(trace)
        else:
            self._traces.append(trace)
            self.chooser.blockSignals(True)
            self.chooser.addItem(trace.label() + ("  (dark)" if not trace.light else ""))
            self.chooser.blockSignals(False)
            idx = len(self._traces) - 1
        if show:
            self.chooser.blockSignals(True)
            self.chooser.setCurrentIndex(idx)
            self.chooser.blockSignals(False)
            self.show_trace(trace)

    def _chosen(self, index: int) -> None:
        if 0 <= index < len(self._traces):
            self.show_trace(self._traces[index])

    def show_trace(self, trace: SweepTrace) -> None:
        self.trace = trace
        result: Mapping[str, Any] = trace.analysis or {}
        verdict, reasons = verdict_of(result)
        self._style_verdict(verdict)
        if verdict == "keep":
            self.verdict.setText("KEEP")
        elif verdict == "re-measure":
            self.verdict.setText("RE-MEASURE")
        else:
            self.verdict.setText("NO VERDICT")
        notes = [f"• {r}" for r in reasons]
        notes += [f"• note: {e}" for e in result.get("errors") or ()]
        if verdict == "keep" and not notes:
            notes = ["Every check passed."]
        self.reasons.setText("\n".join(notes))
        self.conditions.setText(f"<b>{trace.label()}</b> · {conditions_text(result)}")
        self.tables = result_tables(result)
        self._set_tables([t for t in self.tables if t.title != "Verdict"])
        self.copy_button.setEnabled(True)

    def _set_tables(self, tables: list[Table]) -> None:
        lay = self._tables_layout
        while lay.count() > 1:
            item = lay.takeAt(0)
            w = item.widget()
            if w is not None:
                w.deleteLater()
        for k, t in enumerate(tables):
            title = QLabel(f"<b>{t.title}</b>")
            lay.insertWidget(lay.count() - 1, title)
            if t.rows:
                view = _TableView(t)
                view.setObjectName(f"results-table-{k}")
                lay.insertWidget(lay.count() - 1, view)
            if t.notes:
                note = QLabel("\n".join(t.notes))
                note.setWordWrap(True)
                note.setStyleSheet("color:#444;font-size:8pt")
                note.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
                lay.insertWidget(lay.count() - 1, note)

    def _style_verdict(self, verdict: str | None) -> None:
        fg, bg = {"keep": palette.OK_COLOURS, "re-measure": palette.ALARM_COLOURS}.get(
            verdict or "", palette.UNKNOWN_COLOURS)
        self.verdict.setStyleSheet(
            f"QLabel{{background:{bg};color:{fg};font-size:20pt;font-weight:bold;"
            "border-radius:6px;padding:4px}")

    def tsv(self) -> str:
        if self.trace is None:
            return ""
        return tables_tsv(self.tables, heading=f"sweep\t{self.trace.label()}")

    def copy_to_clipboard(self) -> str:
        text = self.tsv()
        if text:
            QGuiApplication.clipboard().setText(text)
        return text
