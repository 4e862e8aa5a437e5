"""History: the sample's earlier sweeps from the logbook, laid over the live plots to
compare, and exported as PNG (the plots) or CSV (the logbook's own export).

Exports go into the folder the user picks and nowhere else: file names are built from
sanitised ids (:func:`tracer.logbook.safe_name`) and every target is resolved and checked
to lie inside the chosen folder before anything is written (the CSV export checks the same
way itself).
"""
from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
from PyQt6.QtCore import Qt, pyqtSignal
from PyQt6.QtWidgets import (QFileDialog, QHBoxLayout, QLabel, QPushButton, QTreeWidget,
                             QTreeWidgetItem, QVBoxLayout, QWidget)

from tracer.conventions import generator_current

from .plots import OverlayCurve
from .results_format import fmt

ROLE_SWEEP = Qt.ItemDataRole.UserRole


class ExportRefused(Exception):
    """An export target outside the chosen folder."""


def target_inside(folder: Path, name: str) -> Path:
    """``folder/name`` after checking that it resolves inside ``folder``."""
    from tracer.logbook import safe_name

    base = Path(folder).resolve()
    stem, dot, ext = name.rpartition(".")
    clean = safe_name(stem or name) + (f".{safe_name(ext)}" if dot else "")
    target = (base / clean).resolve()
    if not target.is_relative_to(base) or target.parent != base:
        raise ExportRefused(f"refusing to write {target}: outside {base}")
    return target


@dataclass(frozen=True)
class SweepRow:
    run_uid: str
    sweep_uid: str
    label: str
    light: bool
    direction: str
    area_cm2: float | None


class HistoryPanel(QWidget):
    overlays_changed = pyqtSignal(object)        # list[OverlayCurve]
    message = pyqtSignal(str)

    def __init__(self, logbook_path: Path | None, *, render_png: Callable[[Path], None] | None = None,
                 parent: QWidget | None = None):
        super().__init__(parent)
        self.logbook_path = logbook_path
        self.render_png = render_png
        self.sample_id = ""
        self.exclude_run: str | None = None
        self._curves: dict[str, OverlayCurve] = {}

        layout = QVBoxLayout(self)
        layout.setContentsMargins(6, 6, 6, 6)
        self.title = QLabel("Earlier sweeps of the sample")
        self.title.setWordWrap(True)
        layout.addWidget(self.title)
        self.tree = QTreeWidget()
        self.tree.setObjectName("history-tree")
        self.tree.setHeaderLabels(["run / sweep", "status / verdict", "Pmax (mW)", "points"])
        self.tree.setRootIsDecorated(True)
        self.tree.setAlternatingRowColors(True)
        layout.addWidget(self.tree, 1)
        hint = QLabel("Tick sweeps to lay them over the live plots (thin, dotted).")
        hint.setStyleSheet("color:#555")
        hint.setWordWrap(True)
        layout.addWidget(hint)
        row = QHBoxLayout()
        self.refresh_button = QPushButton("Refresh")
        self.clear_button = QPushButton("Clear overlay")
        self.png_button = QPushButton("Export PNG…")
        self.csv_button = QPushButton("Export CSV…")
        for b in (self.refresh_button, self.clear_button, self.png_button, self.csv_button):
            row.addWidget(b)
        layout.addLayout(row)
        self.refresh_button.clicked.connect(self.refresh)
        self.clear_button.clicked.connect(self.clear_overlay)
        self.png_button.clicked.connect(lambda: self._export_dialog("png"))
        self.csv_button.clicked.connect(lambda: self._export_dialog("csv"))
        self.tree.itemChanged.connect(self._item_changed)

    # ------------------------------------------------------------------ reading
    def _open(self):
        from tracer.logbook import Logbook

        return Logbook(self.logbook_path, recover=False)

    def set_sample(self, sample_id: str, exclude_run: str | None = None) -> None:
        changed = sample_id != self.sample_id
        self.sample_id = sample_id
        self.exclude_run = exclude_run
        if changed:
            self._curves.clear()
            self.overlays_changed.emit([])
        self.refresh()

    def refresh(self) -> None:
        self.tree.blockSignals(True)
        self.tree.clear()
        self.tree.blockSignals(False)
        if not self.sample_id or self.logbook_path is None:
            self.title.setText("Earlier sweeps: pick a protocol (its sample) first")
            return
        try:
            with self._open() as lb:
                runs = [r for r in lb.list_runs(sample_id=self.sample_id, limit=50)
                        if r.uid != self.exclude_run and r.status != "running"]
                entries = []
                for r in runs:
                    sweeps = []
                    for s in lb.sweeps(r.uid):
                        if s.kind != "sweep":
                            continue
                        a = lb.latest_analysis(s.uid)
                        sweeps.append((s, a.result if a is not None else None))
                    area = (lb.run(r.uid).sample or {}).get("area_cm2")
                    entries.append((r, area, sweeps))
        except Exception as exc:  # noqa: BLE001 - a logbook problem is shown, not raised
            self.title.setText(f"Earlier sweeps: cannot read the logbook: {exc}")
            return
        self.title.setText(f"Earlier sweeps of sample <b>{self.sample_id}</b> "
                           f"({len(entries)} run{'s' if len(entries) != 1 else ''} in "
                           f"{self.logbook_path.name})")
        self.tree.blockSignals(True)
        for r, area, sweeps in entries:
            when = time.strftime("%Y-%m-%d %H:%M", time.localtime(r.started_at))
            top = QTreeWidgetItem([f"{when}  {r.protocol_name}", r.status, "", str(r.points)])
            top.setToolTip(0, f"run {r.uid} by {r.operator or '?'} on {r.bench_name}")
            self.tree.addTopLevelItem(top)
            for s, result in sweeps:
                verdict = ((result or {}).get("verdict") or {}).get("verdict") or s.status
                pmax = ((result or {}).get("data_figures") or {}).get("pmax_w")
                label = (f"{s.sweep_index + 1}. {s.step_name} "
                         f"{'light' if s.light else 'dark'} {s.direction}"
                         + (f" px {s.pixel}" if s.pixel is not None else ""))
                child = QTreeWidgetItem([label, verdict, fmt(pmax, 1e3), str(s.points_stored)])
                child.setFlags(child.flags() | Qt.ItemFlag.ItemIsUserCheckable)
                key = s.uid
                child.setCheckState(0, Qt.CheckState.Checked if key in self._curves
                                    else Qt.CheckState.Unchecked)
                child.setData(0, ROLE_SWEEP, SweepRow(r.uid, s.uid, f"{when} {s.step_name} "
                                                      f"{'fwd' if s.direction == 'forward' else 'rev'}",
                                                      s.light, s.direction,
                                                      float(area) if area else None))
                top.addChild(child)
            top.setExpanded(True)
        self.tree.blockSignals(False)
        for c in range(4):
            self.tree.resizeColumnToContents(c)

    def _item_changed(self, item: QTreeWidgetItem, column: int) -> None:
        row = item.data(0, ROLE_SWEEP)
        if not isinstance(row, SweepRow):
            return
        if item.checkState(0) == Qt.CheckState.Checked:
            if row.sweep_uid not in self._curves:
                curve = self._load_curve(row)
                if curve is None:
                    return
                self._curves[row.sweep_uid] = curve
        else:
            self._curves.pop(row.sweep_uid, None)
        self.overlays_changed.emit(list(self._curves.values()))

    def _load_curve(self, row: SweepRow) -> OverlayCurve | None:
        try:
            with self._open() as lb:
                points = lb.points(row.sweep_uid)
        except Exception as exc:  # noqa: BLE001
            self.message.emit(f"cannot read sweep {row.sweep_uid[:8]}: {exc}")
            return None
        v = np.fromiter((p.voltage_v for p in points), dtype=float, count=len(points))
        i = generator_current(np.fromiter((p.current_a for p in points), dtype=float,
                                          count=len(points)))
        return OverlayCurve(key=row.sweep_uid, label=f"earlier: {row.label}", light=row.light,
                            direction=row.direction, voltage_v=v, current_a=i,
                            area_cm2=row.area_cm2)

    def checked_rows(self) -> list[SweepRow]:
        rows = []
        for k in range(self.tree.topLevelItemCount()):
            top = self.tree.topLevelItem(k)
            for j in range(top.childCount()):
                child = top.child(j)
                row = child.data(0, ROLE_SWEEP)
                if isinstance(row, SweepRow) and child.checkState(0) == Qt.CheckState.Checked:
                    rows.append(row)
        return rows

    def clear_overlay(self) -> None:
        self._curves.clear()
        self.tree.blockSignals(True)
        for k in range(self.tree.topLevelItemCount()):
            top = self.tree.topLevelItem(k)
            for j in range(top.childCount()):
                top.child(j).setCheckState(0, Qt.CheckState.Unchecked)
        self.tree.blockSignals(False)
        self.overlays_changed.emit([])

    # ------------------------------------------------------------------ exports
    def _export_dialog(self, kind: str) -> None:
        folder = QFileDialog.getExistingDirectory(self, f"Export {kind.upper()} into folder")
        if folder:
            try:
                written = self.export_png(Path(folder)) if kind == "png" else \
                    self.export_csv(Path(folder))
            except Exception as exc:  # noqa: BLE001 - shown to the user
                self.message.emit(f"export failed: {exc}")
                return
            self.message.emit(f"exported {len(written)} file{'s' if len(written) != 1 else ''} "
                              f"into {folder}")

    def export_png(self, folder: Path) -> list[Path]:
        """A picture of the plots (with the overlays) as ``<sample>-curves-<time>.png``."""
        if self.render_png is None:
            raise ExportRefused("no plots to export")
        name = f"{self.sample_id or 'sample'}-curves-{time.strftime('%Y%m%d-%H%M%S')}.png"
        target = target_inside(folder, name)
        self.render_png(target)
        return [target]

    def export_csv(self, folder: Path) -> list[Path]:
        """The runs of the ticked sweeps (every run listed when none is ticked), as the
        logbook's CSV export: ``folder/<run uid>/NN-<step>-<direction>.csv``."""
        from tracer.logbook import export_run

        runs = []
        for row in self.checked_rows():
            if row.run_uid not in runs:
                runs.append(row.run_uid)
        if not runs:
            for k in range(self.tree.topLevelItemCount()):
                top = self.tree.topLevelItem(k)
                if top.childCount():
                    row = top.child(0).data(0, ROLE_SWEEP)
                    if isinstance(row, SweepRow) and row.run_uid not in runs:
                        runs.append(row.run_uid)
        base = Path(folder).resolve()
        written: list[Path] = []
        with self._open() as lb:
            for uid in runs:
                result = export_run(lb, uid, base, fmt="csv")
                for f in result.files:
                    if not Path(f).resolve().is_relative_to(base):   # belt and braces
                        raise ExportRefused(f"{f} is outside {base}")
                written += list(result.files)
        return written
