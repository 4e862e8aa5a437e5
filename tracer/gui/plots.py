"""The live plots: illuminated I-V with power, dark I-V on a log axis, hold/MPP tracking.

Every plot item is created once per sweep and then only fed with ``setData`` (the sweep
buffer's own views, see :mod:`tracer.gui.run_model`). Redrawing is driven by the window's
timer; :class:`FrameStats` times each redraw (the ``setData`` work plus the paint that
follows it) and the delay from a point's time stamp to its first paint.

Styles: colours from the Okabe-Ito palette (:mod:`tracer.gui.palette`); forward sweeps
solid with round markers, reverse sweeps dashed with triangles, so the direction does not
rest on colour; the fitted model is a black line over the points.
"""
from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pyqtgraph as pg
from PyQt6.QtCore import Qt
from PyQt6.QtGui import QColor, QFont, QPen
from PyQt6.QtWidgets import (QGraphicsItem, QLabel, QSplitter, QTabWidget, QVBoxLayout,
                             QWidget)

from . import palette
from .run_model import RunModel, SweepTrace

MARKER_LIMIT = 400          # points per sweep up to which markers are drawn
MARKER_BUDGET = 4000        # markers per plot: beyond, the oldest sweeps keep only their line
LEGEND_SWEEPS = 8           # sweeps named in a plot's legend (the newest); older ones thin
POWER_SWEEPS = 4            # sweeps whose power curve is drawn (the newest)
LABEL_STYLE = {"color": "#202020", "font-size": "10pt"}


class FrameStats:
    """Frame times (redraw work + the paint that follows it) and point-to-paint latency."""

    def __init__(self, keep: int = 100_000):
        self.keep = keep
        self.frames_ms: list[float] = []
        self.parts_ms: list[tuple[float, float]] = []    # (redraw work, paint) per frame
        self.latencies_ms: list[float] = []
        self.cpu_frames_ms: list[float] = []   # the same frames in GUI-thread CPU time
        self._open_work_ms: float | None = None
        self._open_paint_ms = 0.0
        self._open_cpu_ms = 0.0
        self._pending_point_time: float | None = None

    def frame(self, work_ms: float, oldest_point_time: float | None, cpu_ms: float = 0.0) -> None:
        self._close()
        self._open_work_ms = work_ms
        self._open_paint_ms = 0.0
        self._open_cpu_ms = cpu_ms
        if oldest_point_time is not None and (self._pending_point_time is None
                                              or oldest_point_time < self._pending_point_time):
            self._pending_point_time = oldest_point_time

    def paint(self, ms: float, cpu_ms: float = 0.0) -> None:
        if self._open_work_ms is not None:
            self._open_paint_ms += ms
            self._open_cpu_ms += cpu_ms
        if self._pending_point_time is not None:
            self._append(self.latencies_ms, (time.time() - self._pending_point_time) * 1e3)
            self._pending_point_time = None

    def _close(self) -> None:
        if self._open_work_ms is not None:
            self._append(self.frames_ms, self._open_work_ms + self._open_paint_ms)
            self._append(self.parts_ms, (self._open_work_ms, self._open_paint_ms))
            self._append(self.cpu_frames_ms, self._open_cpu_ms)
            self._open_work_ms = None

    def _append(self, target: list[float], value: float) -> None:
        target.append(value)
        if len(target) > self.keep:
            del target[: len(target) - self.keep]

    def summary(self) -> dict[str, float]:
        self._close()
        out: dict[str, float] = {"frames": float(len(self.frames_ms))}
        if self.frames_ms:
            f = np.asarray(self.frames_ms)
            out.update(median_frame_ms=float(np.median(f)), worst_frame_ms=float(f.max()),
                       p99_frame_ms=float(np.percentile(f, 99)))
            c = np.asarray(self.cpu_frames_ms)
            out.update(median_frame_cpu_ms=float(np.median(c)), worst_frame_cpu_ms=float(c.max()))
        if self.latencies_ms:
            lat = np.asarray(self.latencies_ms)
            out.update(median_latency_ms=float(np.median(lat)), worst_latency_ms=float(lat.max()))
        return out

    def worst(self, n: int = 5) -> list[tuple[float, float]]:
        """The ``n`` slowest frames as (work, paint) in ms."""
        self._close()
        return sorted(self.parts_ms, key=sum, reverse=True)[:n]

    def reset(self) -> None:
        self.cpu_frames_ms.clear()
        self.parts_ms.clear()
        self.frames_ms.clear()
        self.latencies_ms.clear()
        self._open_work_ms = None
        self._pending_point_time = None


class TimedPlotWidget(pg.PlotWidget):
    """A PlotWidget that reports its paint time to a :class:`FrameStats`."""

    def __init__(self, stats: FrameStats, parent: QWidget | None = None):
        super().__init__(parent=parent, background="w")
        self._stats = stats

    def paintEvent(self, event) -> None:  # noqa: N802 - Qt name
        t0, c0 = time.perf_counter(), time.thread_time()
        super().paintEvent(event)
        self._stats.paint((time.perf_counter() - t0) * 1e3, (time.thread_time() - c0) * 1e3)


def _pen(colour: str, style: str = "SolidLine", width: float = 2.0, alpha: int = 255) -> QPen:
    c = QColor(colour)
    c.setAlpha(alpha)
    pen = pg.mkPen(c, width=width)
    pen.setStyle(getattr(Qt.PenStyle, style))
    pen.setCosmetic(True)
    return pen


@dataclass(frozen=True)
class OverlayCurve:
    """An earlier sweep from the logbook, laid over the live plots."""

    key: str
    label: str
    light: bool
    direction: str
    voltage_v: np.ndarray
    current_a: np.ndarray          # generator convention
    area_cm2: float | None


@dataclass
class _Items:
    current: pg.PlotDataItem
    power: pg.PlotDataItem | None = None
    fit: pg.PlotDataItem | None = None
    mpp: pg.ScatterPlotItem | None = None
    markers: bool = True
    in_legend: bool = True
    colour: str = "#000000"
    style: str = "SolidLine"


class CurvePlot(TimedPlotWidget):
    """One plot: linear (illuminated, with a power axis on the right) or semilog (dark)."""

    def __init__(self, stats: FrameStats, *, log_y: bool = False, with_power: bool = False,
                 placeholder: str = "", parent: QWidget | None = None):
        super().__init__(stats, parent)
        self.log_y = log_y
        pi = self.getPlotItem()
        pi.showGrid(x=True, y=True, alpha=0.25)
        pi.setMenuEnabled(False)
        # Long sweeps are drawn downsampled to the plot's width (min/max per pixel column).
        # No clip-to-view: pyqtgraph's clipping assumes increasing x, and reverse sweeps
        # run the other way (the range policy below shows all the data anyway).
        pi.setDownsampling(auto=True, mode="peak")
        for name in ("left", "bottom", "right"):
            ax = pi.getAxis(name)
            ax.setPen(pg.mkPen("#404040"))
            ax.setTextPen(pg.mkPen("#202020"))
            ax.setTickFont(QFont(self.font().family(), 9))
            ax.enableAutoSIPrefix(False)        # units are in the labels; no "(x0.001)"
            # An axis (with its grid lines) is costly to paint; cache it as a pixmap, redrawn
            # only when its range changes (the range policy below changes it rarely).
            ax.setCacheMode(QGraphicsItem.CacheMode.DeviceCoordinateCache)
            ax.setStyle(maxTickLevel=1)         # major and minor ticks/grid only: far cheaper
        pi.getAxis("left").setWidth(62)         # the plots' voltage axes line up
        pi.getAxis("right").setWidth(62)
        pi.setLabel("bottom", "voltage (V)", **LABEL_STYLE)
        if log_y:
            pi.setLogMode(x=False, y=True)
        else:
            for line in (pg.InfiniteLine(pos=0, angle=0), pg.InfiniteLine(pos=0, angle=90)):
                line.setPen(_pen("#808080", "DashLine", 1.0))
                line.setZValue(-10)
                pi.addItem(line, ignoreBounds=True)
        # Legend where these curves leave room: bottom left of an illuminated I-V plot (below
        # the zero line, before Voc), top left of a dark semilog plot.
        self.legend = pg.LegendItem(labelTextSize="9pt", labelTextColor="#202020",
                                    brush=pg.mkBrush(255, 255, 255, 230), pen=pg.mkPen("#B0B0B0"),
                                    verSpacing=-4)
        self.legend.setParentItem(pi.getViewBox())
        corner = (0, 0) if log_y else (0, 1)
        self.legend.anchor(corner, corner, offset=(8, 8) if log_y else (8, -8))
        pi.hideButtons()
        self._auto_view = True              # the range policy below, until the user zooms
        pi.getViewBox().sigRangeChangedManually.connect(self._user_moved_view)
        self.scene().sigMouseClicked.connect(self._clicked)
        self.running_sweep = False          # set by PlotArea while points arrive
        self.budget_pending = False         # a sweep was added: budgets on a later frame
        self.power_view: pg.ViewBox | None = None
        if with_power:
            self.power_view = pg.ViewBox()
            # no automatic range here: an auto-ranging linked view would drag the shared
            # voltage axis along with every new point (the range policy sets it instead)
            self.power_view.disableAutoRange()
            self.power_view.setYRange(-5, 25, padding=0)
            pi.showAxis("right")
            pi.scene().addItem(self.power_view)
            right = pi.getAxis("right")
            right.linkToView(self.power_view)
            self.power_view.setXLink(pi)
            pi.getViewBox().sigResized.connect(self._sync_power_view)
            self._sync_power_view()
        else:                                   # an empty right axis keeps the plots aligned
            pi.showAxis("right")
            pi.getAxis("right").setStyle(showValues=False)
        # a plain label over the empty plot (not a scene item: it must not move with the view)
        self._placeholder = QLabel(placeholder, self)
        self._placeholder.setObjectName("plot-placeholder")
        self._placeholder.setStyleSheet("QLabel{color:#707070;font-size:11pt;background:transparent}")
        self._placeholder.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self._placeholder.setAttribute(Qt.WidgetAttribute.WA_TransparentForMouseEvents)
        self._placeholder.setVisible(bool(placeholder))
        self.legend.hide()
        self._empty_view()
        self._fit_in_legend = False
        self._power_in_legend = False
        # legend samples for the power and fit lines, kept at the end of the legend
        self._power_sample = pg.PlotDataItem(pen=_pen("#606060", "DotLine", 1.5))
        self._fit_sample = pg.PlotDataItem(pen=_pen(palette.FIT_COLOUR, "SolidLine", 1.5))
        self.items: dict[str, _Items] = {}
        self.overlay_items: dict[str, pg.PlotDataItem] = {}

    # ------------------------------------------------------------------ layout
    def _user_moved_view(self, *args) -> None:
        self._auto_view = False

    def _clicked(self, event) -> None:
        if event.double():
            self.reset_view()

    def reset_view(self) -> None:
        """Back to the automatic range (also on a double click)."""
        self._auto_view = True
        self._view = None
        self.fit_view()

    def fit_view(self) -> None:
        """Automatic range. Illuminated plot: the voltage span of the data, current from a
        margin below zero to just above the largest current, so the power-producing part
        fills the plot (points beyond, e.g. a compliance clamp past Voc, run off the bottom);
        the power axis is scaled so that its zero lines up with the current's zero.
        Semilog plot: pyqtgraph's own automatic range."""
        vb = self.getPlotItem().getViewBox()
        if not self._auto_view:
            return
        if self.log_y:
            self._fit_log_view(vb)
            return
        if self.power_view is None:
            if self.items or self.overlay_items:
                vb.enableAutoRange()
            return
        xs, ys, ps = [], [], []
        # xData/yData: the data as given (getData() is clipped to the present view)
        for items in self.items.values():
            x, y = items.current.xData, items.current.yData
            if x is not None and len(x):
                xs.append(x)
                ys.append(y)
            if items.power is not None:
                p = items.power.yData
                if p is not None and len(p):
                    ps.append(p)
        for item in self.overlay_items.values():
            x, y = item.xData, item.yData
            if x is not None and len(x):
                xs.append(x)
                ys.append(y)
        if not xs:
            return
        with np.errstate(all="ignore"):
            x = np.concatenate(xs)
            y = np.concatenate(ys)
            x0, x1 = np.nanmin(x), np.nanmax(x)
            ymax, ymin = np.nanmax(y), np.nanmin(y)
            pmax = max((np.nanmax(p) for p in ps), default=np.nan)
        if not (np.isfinite(x0) and np.isfinite(x1) and np.isfinite(ymax)):
            return
        top = 1.12 * ymax if ymax > 0 else 1.0
        # below zero: the curve past Voc down to -35 % of the top, and never less than
        # -25 %, which keeps the bottom-left corner free for the legend
        bottom = min(-0.25 * top, max(ymin, -0.35 * top) - 0.05 * top)
        pad = 0.03 * (x1 - x0 or 1.0)
        ptop = 1.12 * pmax if np.isfinite(pmax) and pmax > 0 else 1.0
        wanted = (x0 - pad, x1 + pad, bottom, top, ptop)
        old = getattr(self, "_view", None)
        if old is not None and self.running_sweep:
            # A sweep in progress keeps extending its range: grow only, doubling the span on
            # the side it grows, so the axes are redrawn a few times per sweep, not per frame.
            lo, hi, ylo, yhi, pt = old
            span = x1 - x0 + 2 * pad
            changed = False
            if x0 - pad < lo:
                lo, changed = x0 - pad - span, True
            if x1 + pad > hi:
                hi, changed = x1 + pad + span, True
            if bottom < ylo:
                ylo, changed = min(bottom, max(bottom - (top - bottom), -0.4 * top)), True
            if top > yhi or top < 0.8 * yhi:
                yhi, changed = top, True
            if ptop > pt:
                pt, changed = max(ptop, 1.6 * pt), True
            if not changed:
                return
            wanted = (lo, hi, ylo, yhi, pt)
        elif self._view_close_enough(wanted):
            return                  # a new range repaints the axes: only when it matters
        bottom, top = wanted[2], wanted[3]
        self._view = wanted
        vb.disableAutoRange()
        vb.setRange(xRange=(wanted[0], wanted[1]), yRange=(bottom, top), padding=0)
        self.power_view.disableAutoRange()
        self.power_view.setYRange(bottom / top * wanted[4], wanted[4], padding=0)

    LOG_DECADES = 6.0

    def _fit_log_view(self, vb) -> None:
        """Semilog plot: the data's voltage span; |current| down to at most six decades
        below its largest value (the dip where the current changes sign is cut there)."""
        xs, ys = [], []
        for item in [i.current for i in self.items.values()] + list(self.overlay_items.values()):
            if item.xData is not None and len(item.xData):
                xs.append(item.xData)
                ys.append(item.yData)
        if not xs:
            return
        with np.errstate(all="ignore"):
            x = np.concatenate(xs)
            y = np.concatenate(ys)
            y = y[np.isfinite(y) & (y > 0)]
            if not y.size:
                return
            x0, x1 = np.nanmin(x), np.nanmax(x)
            top = np.log10(y.max()) + 0.15
            bottom = max(np.log10(y.min()), top - 0.15 - self.LOG_DECADES) - 0.15
        pad = 0.03 * (x1 - x0 or 1.0)
        wanted = (x0 - pad, x1 + pad, bottom, top)
        old = getattr(self, "_view", None)
        if old is not None and self.running_sweep:
            # grow only while a sweep runs (doubling the span on the side it grows)
            span = x1 - x0 + 2 * pad
            lo = old[0] if x0 - pad >= old[0] else x0 - pad - span
            hi = old[1] if x1 + pad <= old[1] else x1 + pad + span
            ylo = old[2] if bottom >= old[2] else bottom - 1.0
            yhi = old[3] if top <= old[3] else top + 1.0
            wanted = (lo, hi, ylo, yhi)
            if wanted == old:
                return
        elif old is not None and all(abs(a - b) < 0.02 * max(abs(b), 1e-9) for a, b in
                                     zip(wanted, old)):
            return
        self._view = wanted
        vb.disableAutoRange()
        vb.setRange(xRange=wanted[:2], yRange=wanted[2:], padding=0)

    def _view_close_enough(self, wanted) -> bool:
        """The present range still shows everything wanted and is not more than ~8 % too
        large on any side."""
        old = getattr(self, "_view", None)
        if old is None:
            return False
        xspan = max(old[1] - old[0], 1e-12)
        yspan = max(old[3] - old[2], 1e-12)
        contains = (wanted[0] >= old[0] and wanted[1] <= old[1] and wanted[2] >= old[2]
                    and wanted[3] <= old[3] and wanted[4] <= old[4])
        tight = (wanted[0] - old[0] < 0.08 * xspan and old[1] - wanted[1] < 0.08 * xspan
                 and wanted[2] - old[2] < 0.08 * yspan and old[3] - wanted[3] < 0.08 * yspan
                 and old[4] - wanted[4] < 0.08 * old[4])
        return contains and tight

    def _sync_power_view(self) -> None:
        if self.power_view is None:
            return
        vb = self.getPlotItem().getViewBox()
        self.power_view.setGeometry(vb.sceneBoundingRect())
        self.power_view.linkedViewChanged(vb, self.power_view.XAxis)

    def resizeEvent(self, event) -> None:  # noqa: N802 - Qt name
        super().resizeEvent(event)
        label = self.__dict__.get("_placeholder")     # pyqtgraph resizes during __init__
        if label is not None:
            label.setGeometry(0, 0, self.width(), self.height())

    def _empty_view(self) -> None:
        """A tidy default range while the plot has no data."""
        vb = self.getPlotItem().getViewBox()
        vb.disableAutoRange()
        if self.log_y:
            vb.setRange(xRange=(-0.3, 0.8), yRange=(-4, 2), padding=0)   # log10 of mA(/cm2)
        else:
            vb.setRange(xRange=(-0.1, 0.8), yRange=(-10, 50), padding=0)

    def set_axis_labels(self, current_unit: str, power_unit: str, density: bool) -> None:
        pi = self.getPlotItem()
        what = "current density" if density else "current"
        symbol = "J" if density else "I"
        if self.log_y:
            pi.setLabel("left", f"|{symbol}|, {what} ({current_unit})", **LABEL_STYLE)
        else:
            pi.setLabel("left", f"{symbol}, {what} ({current_unit})", **LABEL_STYLE)
            if self.power_view is not None:
                p = "power density" if density else "power"
                pi.setLabel("right", f"P, {p} ({power_unit})", **LABEL_STYLE)

    # ------------------------------------------------------------------ live sweeps
    def clear_sweeps(self) -> None:
        pi = self.getPlotItem()
        for items in self.items.values():
            pi.removeItem(items.current)
            if items.in_legend:
                self.legend.removeItem(items.current)
            if items.power is not None and self.power_view is not None:
                self.power_view.removeItem(items.power)
            if items.fit is not None:
                pi.removeItem(items.fit)
            if items.mpp is not None:
                pi.removeItem(items.mpp)
        self.items.clear()
        self._auto_view = True
        self._view = None
        if self._fit_in_legend:
            self.legend.removeItem(self._fit_sample)
            self._fit_in_legend = False
        if self._power_in_legend:
            self.legend.removeItem(self._power_sample)
            self._power_in_legend = False
        self._update_placeholder()

    def _update_placeholder(self) -> None:
        empty = not self.items and not self.overlay_items
        if self._placeholder.text():
            self._placeholder.setVisible(empty)
        self.legend.setVisible(not empty)
        if empty:
            self._empty_view()

    def add_sweep(self, trace: SweepTrace) -> None:
        colour = palette.sweep_colour(trace.order)
        style, symbol, _ = palette.direction_style(trace.direction)
        markers = (trace.started.points_planned or 0) <= MARKER_LIMIT
        current = pg.PlotDataItem(
            pen=_pen(colour, style, 2.0), symbol=symbol if markers else None, symbolSize=6,
            symbolBrush=pg.mkBrush(colour), symbolPen=None, connect="finite", name=trace.label())
        current.setZValue(10)
        self.getPlotItem().addItem(current)
        self.legend.addItem(current, trace.label())
        self._legend_tail()
        items = _Items(current=current, markers=markers, colour=colour, style=style)
        current.opts["_planned"] = int(trace.started.points_planned or 0)
        self.items[trace.uid] = items
        # The rest (power curve, marker and legend budgets) waits for the next redraws, so
        # that no single frame pays for everything a new sweep needs.
        self.budget_pending = True
        self._update_placeholder()
        self.fit_view()

    def _add_power(self, items: _Items) -> None:
        power = pg.PlotDataItem(pen=_pen(items.colour, "DotLine", 1.5, palette.POWER_ALPHA),
                                connect="finite")
        power.setDownsampling(auto=True, method="peak")
        self.power_view.addItem(power)
        items.power = power
        if not self._power_in_legend:
            self._power_in_legend = True
            self._legend_tail()

    def _legend_tail(self) -> None:
        """Keep "power" and "model fit" after the sweeps in the legend."""
        for shown, sample, name in ((self._power_in_legend, self._power_sample,
                                     "power (right axis)"),
                                    (self._fit_in_legend, self._fit_sample, "model fit")):
            if shown:
                self.legend.removeItem(sample)
                self.legend.addItem(sample, name)

    def keep_within_budgets(self) -> None:
        """Many sweeps on one plot: the oldest lose their markers first (their line keeps
        the direction's style), only the newest are named in the legend (the others are
        drawn thin) and show power. One change per call (each restyles an item), so a
        frame never pays for many; ``budget_pending`` stays set while more are due."""
        self.budget_pending = False
        ordered = list(self.items.values())
        if not ordered:
            return
        markers = sum(len(i.current.xData) if i.current.xData is not None and i.markers else 0
                      for i in ordered[:-1])
        newest = ordered[-1]
        markers += newest.current.opts.get("_planned", 0) if newest.markers else 0
        changes = []
        if markers > MARKER_BUDGET:
            changes += [("markers", i) for i in ordered[:-1] if i.markers][:1]
        changes += [("legend", i) for i in ordered[:-LEGEND_SWEEPS] if i.in_legend][:1]
        changes += [("power", i) for i in ordered[:-POWER_SWEEPS]
                    if i.power is not None and i.power.isVisible()][:1]
        if not changes:
            return
        what, items = changes[0]
        if what == "markers":
            items.current.setSymbol(None)
            items.markers = False
        elif what == "legend":
            self.legend.removeItem(items.current)
            items.in_legend = False
            # thin: a 1-pixel line is several times cheaper to paint than a wider one
            items.current.setPen(_pen(items.colour, items.style, 1.0))
        else:
            items.power.setVisible(False)
        self.budget_pending = len(changes) > 1 or what == "markers"

    def update_sweep(self, trace: SweepTrace) -> None:
        items = self.items.get(trace.uid)
        if items is None:
            return
        x = trace.column("voltage_v")
        y = trace.column("abs_y" if self.log_y else "y")
        if items.markers and len(x) > MARKER_LIMIT:
            items.current.setSymbol(None)
            items.markers = False
        items.current.setData(x, y)
        if items.power is None and self.power_view is not None and len(x) > 1:
            self._add_power(items)
            return                       # its data next frame: one new item per frame
        if items.power is not None:
            items.power.setData(x, trace.column("p"))

    def show_fit(self, trace: SweepTrace, current_scale: float) -> None:
        items = self.items.get(trace.uid)
        if items is None:
            return
        curve = trace.model_curve(current_scale)
        if curve is None:
            return
        pi = self.getPlotItem()
        if items.fit is None:
            items.fit = pg.PlotDataItem(pen=_pen(palette.FIT_COLOUR, "SolidLine", 1.5),
                                        connect="finite")
            items.fit.setZValue(20)
            pi.addItem(items.fit)
            if not self._fit_in_legend:
                self._fit_in_legend = True
                self._legend_tail()
        items.fit.setData(*curve)
        figures = (trace.analysis or {}).get("data_figures") or {}
        vmp, imp = figures.get("vmp_v"), figures.get("imp_a")
        if not self.log_y and vmp is not None and imp is not None:
            if items.mpp is None:
                items.mpp = pg.ScatterPlotItem(symbol="star", size=16, pen=pg.mkPen("#000000"),
                                               brush=pg.mkBrush(palette.OKABE_ITO["yellow"]))
                items.mpp.setZValue(30)
                pi.addItem(items.mpp)
            items.mpp.setData([float(vmp)], [float(imp) * current_scale])

    # ------------------------------------------------------------------ earlier sweeps
    def set_overlays(self, curves: Sequence[OverlayCurve], density: bool) -> list[str]:
        """Replace the overlays; returns the keys that could not be shown in these units."""
        pi = self.getPlotItem()
        for item in self.overlay_items.values():
            pi.removeItem(item)
            self.legend.removeItem(item)
        self.overlay_items.clear()
        skipped = []
        for k, c in enumerate(curves):
            if density and not (c.area_cm2 and c.area_cm2 > 0):
                skipped.append(c.key)
                continue
            scale = 1e3 / c.area_cm2 if density else 1e3
            y = np.asarray(c.current_a, dtype=float) * scale
            if self.log_y:
                y = np.abs(y)
                y[y == 0.0] = np.nan
            style, _, _ = palette.direction_style(c.direction)
            item = pg.PlotDataItem(c.voltage_v, y, connect="finite",
                                   pen=_pen(palette.overlay_colour(k), "DotLine" if style ==
                                            "SolidLine" else "DashDotLine", 1.5, 200))
            item.setZValue(5)
            pi.addItem(item)
            self.legend.addItem(item, c.label)
            self.overlay_items[c.key] = item
        self._update_placeholder()
        self.fit_view()
        return skipped


class TrackingPlot(CurvePlot):
    """Holds and MPP tracking against time: power on the left axis (markers and line),
    terminal voltage on the right (thin dashed line, the same colour) — at open circuit the
    power is zero and the voltage is the story."""

    def __init__(self, stats: FrameStats, parent: QWidget | None = None):
        super().__init__(stats, with_power=True, placeholder="holds and MPP tracking appear here",
                         parent=parent)
        pi = self.getPlotItem()
        pi.setLabel("bottom", "time since the run started (s)", **LABEL_STYLE)
        pi.setLabel("right", "V, voltage (V)", **LABEL_STYLE)
        self._power_sample = pg.PlotDataItem(pen=_pen("#606060", "DashLine", 1.0))

    def set_axis_labels(self, current_unit: str, power_unit: str, density: bool) -> None:
        p = "power density" if density else "power"
        self.getPlotItem().setLabel("left", f"P, {p} ({power_unit})", **LABEL_STYLE)

    def fit_view(self) -> None:
        if not (self.items or self.overlay_items):
            return
        vb = self.getPlotItem().getViewBox()
        vb.enableAutoRange()
        self.power_view.enableAutoRange(axis=pg.ViewBox.YAxis)   # x follows the link

    def _legend_tail(self) -> None:
        if self._power_in_legend:
            self.legend.removeItem(self._power_sample)
            self.legend.addItem(self._power_sample, "voltage (right axis)")

    def _add_power(self, items: _Items) -> None:
        volts = pg.PlotDataItem(pen=_pen(items.colour, "DashLine", 1.0, palette.POWER_ALPHA),
                                connect="finite")
        volts.setDownsampling(auto=True, method="peak")
        self.power_view.addItem(volts)
        items.power = volts
        if not self._power_in_legend:
            self._power_in_legend = True
            self._legend_tail()

    def update_sweep(self, trace: SweepTrace) -> None:
        items = self.items.get(trace.uid)
        if items is None:
            return
        if items.markers and len(trace.buffer) > MARKER_LIMIT:
            items.current.setSymbol(None)
            items.markers = False
        t = trace.column("t_s")
        items.current.setData(t, trace.column("p"))
        if items.power is None and len(t) > 1:
            self._add_power(items)
        if items.power is not None:
            items.power.setData(t, trace.column("voltage_v"))
        self.fit_view()


class PlotArea(QWidget):
    """The three plots, fed from a :class:`RunModel` on the window's redraw timer."""

    def __init__(self, stats: FrameStats | None = None, parent: QWidget | None = None):
        super().__init__(parent)
        self.stats = stats or FrameStats()
        self.light_plot = CurvePlot(self.stats, with_power=True,
                                    placeholder="illuminated I-V curves appear here as they are measured")
        self.dark_plot = CurvePlot(self.stats, log_y=True,
                                   placeholder="dark I-V curves appear here (log scale)")
        self.tracking_plot = TrackingPlot(self.stats)
        self.light_plot.setObjectName("plot-light")
        self.dark_plot.setObjectName("plot-dark")
        self.tracking_plot.setObjectName("plot-tracking")
        split = QSplitter(Qt.Orientation.Vertical)
        split.addWidget(self.light_plot)
        split.addWidget(self.dark_plot)
        split.setStretchFactor(0, 3)
        split.setStretchFactor(1, 2)
        self.tabs = QTabWidget()
        self.tabs.addTab(split, "I-V curves")
        self.tabs.addTab(self.tracking_plot, "Hold / MPP tracking")
        layout = QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addWidget(self.tabs)
        self.density = False
        self.set_units(False)

    def plots(self) -> tuple[CurvePlot, CurvePlot, TrackingPlot]:
        return self.light_plot, self.dark_plot, self.tracking_plot

    def set_units(self, density: bool) -> None:
        self.density = density
        cu = "mA/cm²" if density else "mA"
        pu = "mW/cm²" if density else "mW"
        for p in self.plots():
            p.set_axis_labels(cu, pu, density)

    def plot_for(self, trace: SweepTrace) -> CurvePlot:
        if not trace.is_iv:
            return self.tracking_plot
        return self.light_plot if trace.light else self.dark_plot

    def redraw(self, model: RunModel, changes) -> None:
        """Apply ``changes`` (from :meth:`RunModel.take_changes`)."""
        if changes.new_run:
            for p in self.plots():
                p.clear_sweeps()
            if model.density != self.density:
                self.set_units(model.density)
        for trace in changes.added:
            plot = self.plot_for(trace)
            plot.add_sweep(trace)
            if not trace.is_iv and self.tabs.currentIndex() != 1:
                self.tabs.setCurrentIndex(1)
            elif trace.is_iv and self.tabs.currentIndex() != 0:
                self.tabs.setCurrentIndex(0)
        for trace in changes.added + changes.grown:
            self.plot_for(trace).update_sweep(trace)
        if not changes.added:
            for p in self.plots():
                if p.budget_pending:
                    p.keep_within_budgets()
                    break                   # one plot per frame
        for trace in changes.analysed:
            if trace.is_iv:
                self.plot_for(trace).show_fit(trace, model.current_scale)
        if changes.new_run or changes.added or changes.grown or changes.analysed:
            current = model.current
            running = current is not None and current.finished is None and current.is_iv
            self.light_plot.running_sweep = bool(running and current.light)
            self.dark_plot.running_sweep = bool(running and not current.light)
            self.light_plot.fit_view()
            self.dark_plot.fit_view()
