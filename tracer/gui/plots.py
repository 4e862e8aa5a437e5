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

import math
import time
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import pyqtgraph as pg
from PyQt6.QtCore import Qt
from PyQt6.QtGui import QColor, QFont, QPen
from PyQt6.QtWidgets import QLabel, QSplitter, QTabWidget, QVBoxLayout, QWidget

from . import palette
from .run_model import RunModel, SweepTrace

MARKER_LIMIT = 400          # points per sweep up to which markers are drawn
LABEL_STYLE = {"color": "#202020", "font-size": "10pt"}


class FrameStats:
    """Frame times (redraw work + the paint that follows it) and point-to-paint latency."""

    def __init__(self, keep: int = 100_000):
        self.keep = keep
        self.frames_ms: list[float] = []
        self.latencies_ms: list[float] = []
        self._open_work_ms: float | None = None
        self._open_paint_ms = 0.0
        self._pending_point_time: float | None = None

    def frame(self, work_ms: float, oldest_point_time: float | None) -> None:
        self._close()
        self._open_work_ms = work_ms
        self._open_paint_ms = 0.0
        if oldest_point_time is not None and (self._pending_point_time is None
                                              or oldest_point_time < self._pending_point_time):
            self._pending_point_time = oldest_point_time

    def paint(self, ms: float) -> None:
        if self._open_work_ms is not None:
            self._open_paint_ms += ms
        if self._pending_point_time is not None:
            self._append(self.latencies_ms, (time.time() - self._pending_point_time) * 1e3)
            self._pending_point_time = None

    def _close(self) -> None:
        if self._open_work_ms is not None:
            self._append(self.frames_ms, self._open_work_ms + self._open_paint_ms)
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
        if self.latencies_ms:
            lat = np.asarray(self.latencies_ms)
            out.update(median_latency_ms=float(np.median(lat)), worst_latency_ms=float(lat.max()))
        return out

    def reset(self) -> None:
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
        t0 = time.perf_counter()
        super().paintEvent(event)
        self._stats.paint((time.perf_counter() - t0) * 1e3)


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


class CurvePlot(TimedPlotWidget):
    """One plot: linear (illuminated, with a power axis on the right) or semilog (dark)."""

    def __init__(self, stats: FrameStats, *, log_y: bool = False, with_power: bool = False,
                 placeholder: str = "", parent: QWidget | None = None):
        super().__init__(stats, parent)
        self.log_y = log_y
        pi = self.getPlotItem()
        pi.showGrid(x=True, y=True, alpha=0.25)
        pi.setMenuEnabled(False)
        pi.setDownsampling(auto=True, mode="peak")
        pi.setClipToView(True)
        for name in ("left", "bottom", "right"):
            ax = pi.getAxis(name)
            ax.setPen(pg.mkPen("#404040"))
            ax.setTextPen(pg.mkPen("#202020"))
            ax.setTickFont(QFont(self.font().family(), 9))
            ax.enableAutoSIPrefix(False)        # units are in the labels; no "(x0.001)"
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
        self.power_view: pg.ViewBox | None = None
        if with_power:
            self.power_view = pg.ViewBox()
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
        if self.log_y or self.power_view is None:
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
        bottom = min(0.0, max(ymin, -0.35 * top)) - 0.05 * top
        pad = 0.03 * (x1 - x0 or 1.0)
        vb.disableAutoRange()
        vb.setRange(xRange=(x0 - pad, x1 + pad), yRange=(bottom, top), padding=0)
        ptop = 1.12 * pmax if np.isfinite(pmax) and pmax > 0 else 1.0
        self.power_view.disableAutoRange()
        self.power_view.setYRange(bottom / top * ptop, ptop, padding=0)

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
            self.legend.removeItem(items.current)
            if items.power is not None and self.power_view is not None:
                self.power_view.removeItem(items.power)
            if items.fit is not None:
                pi.removeItem(items.fit)
            if items.mpp is not None:
                pi.removeItem(items.mpp)
        self.items.clear()
        self._auto_view = True
        if self._fit_in_legend:
            self.legend.removeItem("model fit")
            self._fit_in_legend = False
        if self._power_in_legend:
            self.legend.removeItem("power (right axis)")
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
        items = _Items(current=current, markers=markers)
        if self.power_view is not None:
            power = pg.PlotDataItem(pen=_pen(colour, "DotLine", 1.5, palette.POWER_ALPHA),
                                    connect="finite")
            self.power_view.addItem(power)
            items.power = power
            if not self._power_in_legend:
                sample = pg.PlotDataItem(pen=_pen("#606060", "DotLine", 1.5))
                self.legend.addItem(sample, "power (right axis)")
                self._power_in_legend = True
        self.items[trace.uid] = items
        self._update_placeholder()
        self.fit_view()

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
                self.legend.addItem(items.fit, "model fit")
                self._fit_in_legend = True
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
    """Holds and MPP tracking: power against time."""

    def __init__(self, stats: FrameStats, parent: QWidget | None = None):
        super().__init__(stats, placeholder="holds and MPP tracking appear here", parent=parent)
        self.getPlotItem().setLabel("bottom", "time since the run started (s)", **LABEL_STYLE)

    def set_axis_labels(self, current_unit: str, power_unit: str, density: bool) -> None:
        p = "power density" if density else "power"
        self.getPlotItem().setLabel("left", f"P, {p} ({power_unit})", **LABEL_STYLE)

    def update_sweep(self, trace: SweepTrace) -> None:
        items = self.items.get(trace.uid)
        if items is None:
            return
        if items.markers and len(trace.buffer) > MARKER_LIMIT:
            items.current.setSymbol(None)
            items.markers = False
        items.current.setData(trace.column("t_s"), trace.column("p"))


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
        for trace in changes.analysed:
            if trace.is_iv:
                self.plot_for(trace).show_fit(trace, model.current_scale)
        if changes.new_run or changes.added or changes.grown or changes.analysed:
            self.light_plot.fit_view()
