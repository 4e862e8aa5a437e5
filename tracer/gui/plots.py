"""The live plots: illuminated I-V with power, dark I-V on a log axis, hold/MPP tracking.

Every sweep has its plot items (made ahead, on quiet frames), fed with ``setData`` (the
sweep buffer's own views, see :mod:`tracer.gui.run_model`). Redrawing is driven by the
window's timer; :class:`FrameStats` times each redraw (the ``setData`` work plus the paint
that follows it) and the delay from a point's time stamp to its first paint.

How a frame stays short (see ``tests/benchmarks/bench_gui.py``): Qt never paints the sweep
items themselves; :class:`FrozenLayer` objects do, each into a pixmap the size of the view
that later frames only copy. The sweep being measured has a layer that adds just its new
points and repaints just the region they cover; a finished sweep moves to the layer of the
newest sweeps, and once it is older than the legend shows, thin and without markers, to a
layer that only ever grows. When the view's range changes, one layer per frame is drawn
again; the others show their old picture moved to the new range meanwhile. Housekeeping
(:meth:`CurvePlot.tidy`) is spread over the frames after a sweep starts.

Styles: colours from the Okabe-Ito palette (:mod:`tracer.gui.palette`); forward sweeps
solid with round markers, reverse sweeps dashed with triangles, so the direction does not
rest on colour; the fitted model is a black line over the points.
"""
from __future__ import annotations

import time
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pyqtgraph as pg
from PyQt6.QtCore import QPointF, QRectF, Qt, QTimer
from PyQt6.QtGui import QColor, QFont, QPainter, QPen, QPixmap, QTransform
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
        self.frames_points_out_of_view = 0
        self._open_work_ms: float | None = None
        self._open_paint_ms = 0.0
        self._open_cpu_ms = 0.0
        self._pending_point_time: float | None = None

    def frame(self, work_ms: float, oldest_point_time: float | None, cpu_ms: float = 0.0,
              points_in_view: bool = True) -> None:
        """A redraw. Points that all lie outside the view (a sweep past Voc runs off the
        bottom) are not painted, so they have no point-to-paint delay: counted apart."""
        if oldest_point_time is not None and not points_in_view:
            self.frames_points_out_of_view += 1
            oldest_point_time = None
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
        out: dict[str, float] = {"frames": float(len(self.frames_ms)),
                                 "frames_points_out_of_view": float(self.frames_points_out_of_view)}
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
        self.frames_points_out_of_view = 0
        self.cpu_frames_ms.clear()
        self.parts_ms.clear()
        self.frames_ms.clear()
        self.latencies_ms.clear()
        self._open_work_ms = None
        self._pending_point_time = None


class _ViewBox(pg.ViewBox):
    """pyqtgraph's ViewBox repaints itself whole when an item is added, removed or changes
    its bounds, so as to range automatically; with automatic ranging off (the plots here
    set their ranges themselves) Qt repaints only the region the item covers."""

    def queueUpdateAutoRange(self) -> None:  # noqa: N802 - pyqtgraph name
        if self.state["autoRange"][0] is False and self.state["autoRange"][1] is False:
            return
        super().queueUpdateAutoRange()


class TimedPlotWidget(pg.PlotWidget):
    """A PlotWidget that reports its paint time to a :class:`FrameStats`."""

    def __init__(self, stats: FrameStats, parent: QWidget | None = None):
        super().__init__(parent=parent, background="w", viewBox=_ViewBox())
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


class _Legend(pg.LegendItem):
    """pyqtgraph's legend, with its rows kept in two groups: the sweeps and overlays, then a
    short tail (power, model fit) that stays last. A change lays the existing rows out again
    instead of re-creating them, so adding a sweep makes one label, the tail is never
    rebuilt, and no empty row is left behind when a sweep leaves (pyqtgraph's own legend
    keeps them, and every later change walks them)."""

    def __init__(self, **kwargs):
        super().__init__(**kwargs)
        self._tail: list[tuple[int, object, object]] = []    # (rank, sample, label)
        self._spare_label: pg.LabelItem | None = None

    def make_spare(self) -> bool:
        """Make the label the next entry will take (on a quiet frame); True if made."""
        if self._spare_label is not None:
            return False
        self._spare_label = pg.LabelItem("", color=self.opts["labelTextColor"],
                                         justify="left", size=self.opts["labelTextSize"])
        return True

    def addItem(self, item, name) -> None:  # noqa: N802 - pyqtgraph name
        self._insert(item, name, None)

    def add_tail(self, item, name: str, rank: int) -> None:
        """An entry after all the sweeps, in ``rank`` order."""
        self._insert(item, name, rank)

    def _insert(self, item, name, rank: int | None) -> None:
        label, self._spare_label = self._spare_label, None
        if label is None:
            label = pg.LabelItem(name, color=self.opts["labelTextColor"], justify="left",
                                 size=self.opts["labelTextSize"])
        else:
            label.setText(name)
        sample = item if isinstance(item, self.sampleType) else self.sampleType(item)
        sample.sigClicked.connect(self.sigSampleClicked)
        body = self.items[:len(self.items) - len(self._tail)]
        if rank is None:
            body.append((sample, label))
        else:
            self._tail.append((rank, sample, label))
            self._tail.sort(key=lambda entry: entry[0])
        self.items = body + [(s, lab) for _, s, lab in self._tail]
        self._relayout()

    def removeItem(self, item) -> None:  # noqa: N802 - pyqtgraph name
        for sample, label in self.items:
            if sample.item is item or label.text == item:
                self.items.remove((sample, label))
                self._tail = [t for t in self._tail if t[1] is not sample]
                self._removeItemFromLayout(sample, label)
                self._relayout()
                return

    def clear(self) -> None:
        self._tail = []
        super().clear()

    def _relayout(self) -> None:
        layout = self.layout
        for index in range(layout.count() - 1, -1, -1):
            layout.removeAt(index)
        for row, (sample, label) in enumerate(self.items):
            layout.addItem(sample, row, 0, alignment=Qt.AlignmentFlag.AlignVCenter)
            layout.addItem(label, row, 1)
        self.rowCount = len(self.items)
        self.updateSize()


class _DataItem(pg.PlotDataItem):
    """A PlotDataItem that skips pyqtgraph's refresh after a view-range change when the
    refresh would not change the picture.

    pyqtgraph hands every item its data anew (markers rebuilt) on each range change, to
    choose the automatic downsampling again and to clip values far outside the view (its
    dynamic range limit). With dozens of sweeps on a plot that made every range change a
    heavy frame. Here the refresh runs only when the new range asks for another
    downsampling factor than the one in use, or when the clipping applies to the old or the
    new range (the same tests pyqtgraph makes; it clips only data spanning millions of
    view heights)."""

    _shown_for: tuple[QRectF, float] | None = None   # (view rect, view width px) shown for
    #: While a layer draws the item, pyqtgraph's refresh of its curve and markers waits
    #: until the layer is about to draw it (:meth:`flush`): new data and styles cost
    #: nothing until then. ``xData``/``yData`` are always the data given.
    lazy = False
    _refresh_due = False

    def updateItems(self, styleUpdate: bool = True) -> None:  # noqa: N802, N803 - pyqtgraph
        if self.lazy:
            self._refresh_due = True
            return
        self._shown_for = self._view_state()
        super().updateItems(styleUpdate)

    def dataBounds(self, ax, frac=1.0, orthoRange=None):  # noqa: N802, N803 - pyqtgraph
        self.flush()                    # an auto-ranging view asks: its curve must be current
        return super().dataBounds(ax, frac, orthoRange)

    def flush(self) -> None:
        if self._refresh_due:
            self._refresh_due = False
            lazy, self.lazy = self.lazy, False
            try:
                self.updateItems(True)
            finally:
                self.lazy = lazy

    def viewRangeChanged(self, vb=None, ranges=None, changed=None) -> None:  # noqa: N802
        old, new = self._shown_for, self._view_state()
        if (old is not None and new is not None and not self.opts["clipToView"]
                and self._downsampling_for(*old) == self._downsampling_for(*new)
                and not self._clips(old[0]) and not self._clips(new[0])):
            return
        super().viewRangeChanged(vb, ranges, changed)

    def _view_state(self) -> tuple[QRectF, float] | None:
        vb = self.getViewBox()
        return None if vb is None else (QRectF(vb.viewRect()), float(vb.width()))

    def _downsampling_for(self, view: QRectF, width_px: float) -> int | None:
        """The factor pyqtgraph's automatic downsampling picks for this view."""
        if not self.opts["autoDownsample"]:
            return None
        mapped = self._datasetMapped
        if mapped is None:
            return -1                   # not drawn yet: let pyqtgraph decide
        x = mapped.x if mapped.xAllFinite else mapped.x[np.isfinite(mapped.x)]
        ds = 1
        if len(x) > 1 and width_px != 0.0:
            dx = float(x[-1] - x[0]) / (len(x) - 1)
            if dx != 0.0:
                per_px = width_px * self.opts["autoDownsampleFactor"]
                f = max(1.0, abs(view.width() / dx / per_px))
                if np.isfinite(f):
                    ds = int(f)
        return ds

    def _clips(self, view: QRectF) -> bool:
        """Whether pyqtgraph's dynamic range limit clips the data in this view."""
        limit = self.opts["dynamicRangeLimit"]
        mapped = self._datasetMapped
        if limit is None or mapped is None:
            return False
        data = mapped.dataRect()
        if data is None:
            return False
        height = view.height()
        return (height > 0 and not data.bottom() < view.top() and not data.top() > view.bottom()
                and data.height() > 2 * self.opts["dynamicRangeHyst"] * limit * height)


def _copy_style(source: pg.PlotDataItem, target: pg.PlotDataItem) -> None:
    """The line and marker style of ``source`` for ``target`` (applied at its next setData)."""
    for key in ("pen", "symbol", "symbolSize", "symbolBrush", "symbolPen", "connect"):
        target.opts[key] = source.opts[key]


def _sample_style(item: pg.PlotDataItem) -> None:
    """Hand the marker style to the item's marker part now, where a legend sample reads it
    (an item drawn by a layer refreshes its parts only when it is drawn whole)."""
    opts = item.opts
    item.scatter.setPen(opts["symbolPen"], update=False)
    item.scatter.setBrush(opts["symbolBrush"], update=False)
    item.scatter.setSize(opts["symbolSize"], update=False)


def _finite_min(values) -> float:
    finite = [v for v in values if np.isfinite(v)]
    return min(finite) if finite else np.nan


def _finite_max(values) -> float:
    finite = [v for v in values if np.isfinite(v)]
    return max(finite) if finite else np.nan


def _device_length(curve: pg.PlotCurveItem, transform: QTransform) -> float:
    """Length in device pixels of the line a curve item draws (its display data)."""
    x, y = curve.xData, curve.yData
    if x is None or len(x) < 2:
        return 0.0
    dx = np.diff(x) * transform.m11() + np.diff(y) * transform.m21()
    dy = np.diff(x) * transform.m12() + np.diff(y) * transform.m22()
    steps = np.hypot(dx, dy)
    return float(np.sum(steps[np.isfinite(steps)]))


class FrozenLayer(pg.GraphicsObject):
    """Plot items that no longer change, painted once into a pixmap the size of the plot's
    viewport and from then on only copied to the screen.

    A frame then pays for one copy instead of every finished sweep's line and markers. The
    items stay in the plot — they keep their data, style and legend entry — but fully
    transparent, so Qt skips them; the layer calls their own ``paint``, so a frozen sweep
    looks exactly as it did live. The pixmap is redrawn whole when the view's transform or
    size changes, or after :meth:`invalidate` (an item restyled, hidden or removed); an item
    added on top is drawn onto it as it is (``renders`` counts the whole redraws).

    At most one layer is redrawn whole per frame (:meth:`new_frame` starts one): when the
    view moves, the others show their old picture moved and scaled to the new view for a
    frame or two and are redrawn on the next frames, so that one range change does not
    make one long frame. Content changes are always drawn at once; a screenshot
    (:meth:`all_exact`) and an export draw every layer exactly.
    """

    _budget = 1                                 # whole redraws left in this frame
    _waiting: list["FrozenLayer"] = []          # layers showing a moved old picture
    _exact = False
    _tick_due = False

    def __init__(self, z: float, *, deferrable: bool = True):
        super().__init__()
        self.setZValue(z)
        self.deferrable = deferrable
        self.items: list[QGraphicsItem] = []
        self._pixmap: QPixmap | None = None
        self._key: tuple | None = None
        self._transform: QTransform | None = None     # the pixmap's item -> pixel transform
        self._drawn = 0                 # items[:_drawn] are in the pixmap
        self._stale = True
        self.renders = 0
        # growing items (a sweep being measured): their scratch item and points drawn
        self._growing: dict[QGraphicsItem, pg.PlotDataItem] = {}
        self._points_drawn: dict[QGraphicsItem, int] = {}
        self._scratch_from: dict[QGraphicsItem, int] = {}
        self._dash_done: dict[QGraphicsItem, float] = {}   # pixels of line drawn
        self._watching: dict[QGraphicsItem, object] = {}     # item -> its visibility slot
        self.grown_rect: QRectF | None = QRectF()    # see growth_in_view; None: all of it

    # ------------------------------------------------------------------ frames
    @classmethod
    def new_frame(cls) -> None:
        """A new frame: one whole redraw may happen; the layer waiting longest gets it."""
        cls._budget = 1
        while cls._waiting:
            layer = cls._waiting.pop(0)
            try:
                if layer.scene() is not None and layer.items:
                    layer.update()
                    break
            except RuntimeError:        # its window is gone
                continue

    @classmethod
    def _tick(cls) -> None:
        """No frame came (nothing streams, the user moved the view): catch up anyway."""
        cls._tick_due = False
        cls.new_frame()
        if cls._waiting:
            cls._schedule_tick()

    @classmethod
    def _schedule_tick(cls) -> None:
        if not cls._tick_due:
            cls._tick_due = True
            QTimer.singleShot(60, cls._tick)

    @classmethod
    @contextmanager
    def all_exact(cls):
        """Within: every layer drawn exactly (for a screenshot)."""
        cls._exact = True
        try:
            yield
        finally:
            cls._exact = False

    # ------------------------------------------------------------------ contents
    def add(self, item: QGraphicsItem, *, scratch: pg.PlotDataItem | None = None,
            repaint: bool = True) -> None:
        """Draw ``item`` from now on. With ``scratch`` (an empty item of the same plot and
        style) the item grows: after each ``setData`` call :meth:`grow`, and only its new
        points are drawn, through the scratch item, onto the picture — a frame costs the
        new points, and only the screen region they cover is repainted. ``repaint=False``
        when the item is on screen already (handed over from another layer): the picture
        is brought up to date at the next paint, whatever region it covers."""
        if item in self.items:
            return
        item.setOpacity(0.0)            # Qt no longer paints it; this layer does
        if isinstance(item, _DataItem):
            item.lazy = True
        watch = self._watching[item] = lambda: self._visibility_changed(item)
        item.visibleChanged.connect(watch)        # hidden from the legend, or by a budget
        self.items.append(item)
        if scratch is not None:
            scratch.setOpacity(0.0)
            self._growing[item] = scratch
        if repaint:
            self.update()

    def remove(self, item: QGraphicsItem, *, restore: bool = True,
               repaint: bool = True) -> pg.PlotDataItem | None:
        """Stop drawing ``item``; returns its scratch item if it was growing.
        ``repaint=False`` when another layer takes it over."""
        if item not in self.items:
            return None
        self.items.remove(item)
        item.visibleChanged.disconnect(self._watching.pop(item))
        if isinstance(item, _DataItem):
            item.lazy = False
            if restore:
                item.flush()
        if restore:
            item.setOpacity(1.0)
        for state in (self._points_drawn, self._scratch_from, self._dash_done):
            state.pop(item, None)
        if not self.items and self._pixmap is not None and not self._stale:
            self._pixmap.fill(Qt.GlobalColor.transparent)     # empty: nothing to redraw
            self._drawn = 0
            if repaint:
                self.update()
        else:
            self.invalidate(repaint=repaint)
        return self._growing.pop(item, None)

    def clear(self) -> None:
        for item, watch in self._watching.items():
            try:
                item.visibleChanged.disconnect(watch)
            except (TypeError, RuntimeError):
                pass
        self._watching.clear()
        self.items = []
        for state in (self._growing, self._points_drawn, self._scratch_from, self._dash_done):
            state.clear()
        self._pixmap = None
        self.invalidate()

    def grow(self, item: QGraphicsItem) -> None:
        """``item`` has more points: hand the ones not drawn yet (and the last one drawn,
        so that the line joins) to its scratch item, and repaint the region they cover."""
        scratch = self._growing.get(item)
        if scratch is None or item.xData is None:
            return
        n = len(item.xData)
        start = max(self._points_drawn.get(item, 0) - 1, 0)
        if n - start < 1 or self._transform is None:
            self.grown_rect = None
            self.update()
            return
        self._prepare_scratch(scratch, item, start)
        rect = QRectF()
        for part in (scratch.curve, scratch.scatter):
            if part.isVisibleTo(scratch):
                rect = rect.united(part.mapRectToItem(self, part.boundingRect()))
        px, py = self.pixelVectors()
        if px is not None and py is not None:      # a few pixels more: pens and markers
            mx, my = 4 * px.length(), 4 * py.length()
            rect.adjust(-mx, -my, mx, my)
        if self.grown_rect is not None:
            self.grown_rect = self.grown_rect.united(rect)
        self.update(rect)

    def growth_in_view(self) -> bool:
        """Whether the points grown since :meth:`new_frame` lie in the view (so that the
        paint that follows shows them); a sweep past Voc runs off the bottom, by design."""
        rect = self.grown_rect
        if rect is None:
            return True
        view = self.viewRect()
        return not rect.isEmpty() and (view is None or rect.intersects(view))

    def invalidate(self, *args, repaint: bool = True) -> None:
        self._stale = True
        if repaint:
            self.update()

    def _visibility_changed(self, item: QGraphicsItem) -> None:
        """Redrawn whole at the next paint; only the region the item covers changes."""
        self.invalidate(repaint=False)
        rect = item.mapRectToItem(self, item.childrenBoundingRect())
        px, py = self.pixelVectors()
        if rect.isValid() and px is not None and py is not None:
            mx, my = 4 * px.length(), 4 * py.length()
            self.update(rect.adjusted(-mx, -my, mx, my))
        else:
            self.update()

    # ------------------------------------------------------------------ painting
    def viewTransformChanged(self) -> None:  # noqa: N802 - pyqtgraph hook
        super().viewTransformChanged()
        self.prepareGeometryChange()

    def boundingRect(self) -> QRectF:
        rect = self.viewRect()            # the whole view, so that clearing repaints it
        return QRectF() if rect is None else rect

    def paint(self, painter, option, widget=None) -> None:
        if not self.items:
            return
        if widget is None or self._exportOpts is not False:     # an export: draw directly
            self._draw(painter, self.items, option, widget)
            return
        ratio = widget.devicePixelRatioF()
        t = painter.transform()
        key = (t.m11(), t.m12(), t.m21(), t.m22(), t.dx(), t.dy(), widget.width(),
               widget.height(), ratio)
        moved = key != self._key
        if (moved and self.deferrable and not self._stale and self._pixmap is not None
                and not self._exact and FrozenLayer._budget <= 0
                and self._draw_moved(painter, t, option, widget)):
            return
        if self._stale or moved or self._pixmap is None:
            FrozenLayer._budget -= 1
            if self in FrozenLayer._waiting:
                FrozenLayer._waiting.remove(self)
            size = (max(1, round(widget.width() * ratio)), max(1, round(widget.height() * ratio)))
            if self._pixmap is None or (self._pixmap.width(), self._pixmap.height()) != size:
                self._pixmap = QPixmap(*size)
                self._pixmap.setDevicePixelRatio(ratio)
            self._pixmap.fill(Qt.GlobalColor.transparent)
            self._key, self._transform, self._stale, self._drawn = key, QTransform(t), False, 0
            self._points_drawn.clear()          # growing items: drawn again from their start
            self._dash_done.clear()
            self.renders += 1
        if self._drawn < len(self.items) or self._growing:
            # the pixmap's pixels are the viewport's: the same transform draws into it
            canvas = QPainter(self._pixmap)
            try:
                canvas.setTransform(t)
                if self._drawn < len(self.items):
                    # a growing item is drawn by its scratch item, from its first point
                    self._draw(canvas, [item for item in self.items[self._drawn:]
                                        if item not in self._growing], option, widget)
                    self._drawn = len(self.items)
                self._draw_new_points(canvas, option, widget)
            finally:
                canvas.end()
        painter.save()
        painter.resetTransform()
        painter.drawPixmap(QPointF(0.0, 0.0), self._pixmap)
        painter.restore()

    def _draw_moved(self, painter, t: QTransform, option, widget) -> bool:
        """The old picture, moved and scaled to the new view, until a later frame redraws
        it; False if that cannot be done."""
        inverse, ok = self._transform.inverted()
        if not ok:
            return False
        painter.save()
        painter.setTransform(inverse * t)        # old pixels -> data -> new pixels
        painter.drawPixmap(QPointF(0.0, 0.0), self._pixmap)
        painter.restore()
        if self._drawn < len(self.items):        # added since: drawn directly meanwhile
            self._draw(painter, self.items[self._drawn:], option, widget)
        if self not in FrozenLayer._waiting:
            FrozenLayer._waiting.append(self)
        FrozenLayer._schedule_tick()
        return True

    def _prepare_scratch(self, scratch, item, start: int) -> None:
        """The scratch item gets the points from ``start`` on; the first one's marker is
        drawn already (drawn twice, its soft edge would darken)."""
        scratch.setData(item.xData[start:], item.yData[start:])
        if start > 0 and scratch.scatter.data.size:
            scratch.scatter.data["visible"][0] = False
        self._scratch_from[item] = start

    def _draw_new_points(self, canvas, option, widget) -> None:
        for item, scratch in self._growing.items():
            if item.xData is None or not item.isVisible():
                continue
            n = len(item.xData)
            done = self._points_drawn.get(item, 0)
            if done >= n:
                continue
            start = max(done - 1, 0)
            if (self._scratch_from.get(item) != start or scratch.xData is None
                    or len(scratch.xData) != n - start):
                self._prepare_scratch(scratch, item, start)
            # a dashed line goes on where the drawn part stopped, not from a new dash
            pen = scratch.curve.opts["pen"]
            if pen is not None and pen.style() != Qt.PenStyle.SolidLine:
                pen = QPen(pen)
                pen.setDashOffset(self._dash_done.get(item, 0.0) / max(pen.widthF(), 1.0))
                scratch.curve.opts["pen"] = pen
            self._draw(canvas, [scratch], option, widget)
            self._dash_done[item] = (self._dash_done.get(item, 0.0)
                                     + _device_length(scratch.curve, canvas.transform()))
            self._points_drawn[item] = n
            self._scratch_from.pop(item, None)

    def _draw(self, painter, items, option, widget) -> None:
        base = painter.transform()
        for item in items:
            if not item.isVisible():
                continue
            if isinstance(item, _DataItem):
                item.flush()
            parts = ((item.curve, item.scatter) if isinstance(item, pg.PlotDataItem)
                     else (item,))
            for part in parts:
                if part is not item and not part.isVisibleTo(item):
                    continue
                relative, _ = part.itemTransform(self)
                painter.save()
                try:
                    painter.setTransform(relative * base)
                    part.paint(painter, option, widget)
                finally:
                    painter.restore()


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
    trace: SweepTrace
    power: pg.PlotDataItem | None = None
    fit: pg.PlotDataItem | None = None
    mpp: pg.ScatterPlotItem | None = None
    markers: bool = True
    in_legend: bool = True
    colour: str = "#000000"
    style: str = "SolidLine"
    frozen: bool = False            # finished: drawn by a layer, no longer live
    old: bool = False               # beyond the newest LEGEND_SWEEPS: its final style
    fit_frozen: bool = False
    planned_x: tuple[float, float] | None = None  # see CurvePlot._planned_x
    scratch: pg.PlotDataItem | None = None        # draws the new points while live
    power_scratch: pg.PlotDataItem | None = None
    live_layer: "FrozenLayer | None" = None
    live_power_layer: "FrozenLayer | None" = None


class CurvePlot(TimedPlotWidget):
    """One plot: linear (illuminated, with a power axis on the right) or semilog (dark)."""

    is_voltage_plot = True          # x is the terminal voltage (not so on the tracking plot)

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
        self.legend = _Legend(labelTextSize="9pt", labelTextColor="#202020",
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
        self.tidy_pending = False           # a sweep was added: layers, budgets later
        self.power_view: pg.ViewBox | None = None
        if with_power:
            self.power_view = _ViewBox()
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
        # Sweeps, fits and overlays are drawn by layers (see FrozenLayer), each just below
        # the live items of its kind: overlays 5, sweeps 10, fits 20, stars 30. The sweep
        # being measured has a layer of its own that draws only its new points.
        vb = pi.getViewBox()
        self._overlay_layer = FrozenLayer(4.5)
        self._old_layer = FrozenLayer(9.0)
        self._recent_layer = FrozenLayer(9.5)
        # two, so that a sweep that ends while the next has begun leaves its layer empty
        # (nothing to redraw) rather than taking its pixels out of a shared one
        self._live_layers = [FrozenLayer(10.0 + k * 0.01, deferrable=False) for k in range(2)]
        self._fit_layer = FrozenLayer(19.5)
        for layer in (self._overlay_layer, self._old_layer, self._recent_layer,
                      *self._live_layers, self._fit_layer):
            vb.addItem(layer, ignoreBounds=True)
        self._power_layer: FrozenLayer | None = None
        self._live_power_layers: list[FrozenLayer] = []
        if self.power_view is not None:
            self._power_layer = FrozenLayer(-1.0)
            self._live_power_layers = [FrozenLayer(-0.5 + k * 0.01, deferrable=False)
                                       for k in range(2)]
            for layer in (self._power_layer, *self._live_power_layers):
                self.power_view.addItem(layer, ignoreBounds=True)
        # Empty items made ahead, so that a sweep's first frame does not build them.
        self._blanks: dict[str, list[_DataItem]] = {"current": [], "power": []}
        while self._make_blanks():
            pass

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
        Semilog plot: the voltage span, |current| over at most six decades. While a sweep
        runs the range only grows, in steps, when a point leaves the view; an evenly stepped
        voltage sweep gets the span it will reach at once (:meth:`_planned_x`). A range
        change redraws the axes and the layers, so it is kept rare."""
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
        # the data as given (xData/yData; getData() is clipped to the present view)
        spans = [self._span(i.current) for i in self.items.values()]
        spans += [self._span(i) for i in self.overlay_items.values()]
        spans = [b for b in spans if b is not None]
        if not spans:
            return
        powers = [self._span(i.power) for i in self.items.values() if i.power is not None]
        x0, x1 = _finite_min(b[0] for b in spans), _finite_max(b[1] for b in spans)
        ymin, ymax = _finite_min(b[2] for b in spans), _finite_max(b[3] for b in spans)
        pmax = _finite_max(b[3] for b in powers if b is not None)
        if not (np.isfinite(x0) and np.isfinite(x1) and np.isfinite(ymax)):
            return
        top = 1.12 * ymax if ymax > 0 else 1.0
        # below zero: the curve past Voc down to -35 % of the top, and never less than
        # -25 %, which keeps the bottom-left corner free for the legend
        bottom = min(-0.25 * top, max(ymin, -0.35 * top) - 0.05 * top)
        ptop = 1.12 * pmax if np.isfinite(pmax) and pmax > 0 else 1.0
        planned = self._planned_x() if self.running_sweep else None
        power_bound = 0.0
        if planned is not None:
            # the voltages the sweep will reach, and at most the power they can give (taken
            # when the power axis must grow anyway, so that it grows once)
            x0, x1 = min(x0, planned[0]), max(x1, planned[1])
            if ymax > 0:
                power_bound = 1.12 * max(abs(x0), abs(x1)) * ymax
        pad = 0.03 * (x1 - x0 or 1.0)
        old = getattr(self, "_view", None)
        if old is None:
            ptop = max(ptop, power_bound)      # a first sweep: its power range at once
        wanted = (x0 - pad, x1 + pad, bottom, top, ptop)
        if old is not None and self.running_sweep:
            # A sweep in progress keeps extending its range: grow only when a point leaves
            # the view, doubling the span on the side it grows, so the axes are redrawn a
            # few times per sweep, not per frame (nor per new highest point of a noisy curve).
            lo, hi, ylo, yhi, pt = old
            span = x1 - x0 + 2 * pad
            changed = False
            if x0 < lo:
                lo, changed = x0 - pad - span, True
            if x1 > hi:
                hi, changed = x1 + pad + span, True
            if bottom < ylo - 1e-9 * (yhi - ylo):      # (the margin below is the policy's)
                ylo, changed = min(bottom, max(bottom - (top - bottom), -0.4 * top)), True
            if ymax > yhi or top < 0.8 * yhi:
                yhi, changed = top, True
            if np.isfinite(pmax) and pmax > pt:
                pt, changed = max(ptop, 1.6 * pt, power_bound), True
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
        spans = [self._span(i.current) for i in self.items.values()]
        spans += [self._span(i) for i in self.overlay_items.values()]
        spans = [b for b in spans if b is not None]
        positive = [b for b in spans if np.isfinite(b[4])]
        if not positive:
            return
        x0, x1 = _finite_min(b[0] for b in spans), _finite_max(b[1] for b in spans)
        planned = self._planned_x() if self.running_sweep else None
        if planned is not None:
            x0, x1 = min(x0, planned[0]), max(x1, planned[1])
        top = np.log10(max(b[5] for b in positive)) + 0.15
        bottom = max(np.log10(min(b[4] for b in positive)), top - 0.15 - self.LOG_DECADES) - 0.15
        pad = 0.03 * (x1 - x0 or 1.0)
        wanted = (x0 - pad, x1 + pad, bottom, top)
        old = getattr(self, "_view", None)
        if old is not None and self.running_sweep:
            # grow only while a sweep runs (doubling the span on the side it grows)
            # (when a point leaves the view: the margins of 0.15 decade are the policy's)
            span = x1 - x0 + 2 * pad
            lo = old[0] if x0 >= old[0] else x0 - pad - span
            hi = old[1] if x1 <= old[1] else x1 + pad + span
            ylo = old[2] if bottom + 0.15 >= old[2] else bottom - 1.0
            yhi = old[3] if top - 0.15 <= old[3] else top + 1.0
            wanted = (lo, hi, ylo, yhi)
            if wanted == old:
                return
        elif old is not None and all(abs(a - b) < 0.02 * max(abs(b), 1e-9) for a, b in
                                     zip(wanted, old)):
            return
        self._view = wanted
        vb.disableAutoRange()
        vb.setRange(xRange=wanted[:2], yRange=wanted[2:], padding=0)

    def _planned_x(self) -> tuple[float, float] | None:
        """Where the voltage-sourced sweep being measured will end, when its first set
        points are evenly stepped: the first one plus the step times the planned count. The
        range then takes the whole sweep at once instead of growing in steps (each step
        redraws the axes and every layer). None for a sweep that is not evenly stepped (a
        list, a logarithmic spacing) or is current-sourced, which grows as before."""
        live = [i for i in self.items.values() if i.trace.finished is None]
        if not live:
            return None
        items = live[-1]
        if items.planned_x is not None:
            return items.planned_x
        started = items.trace.started
        planned = int(started.points_planned or 0)
        if started.source_mode != "voltage" or not self.is_voltage_plot:
            return None
        head = items.trace.column("setpoint")[:64]
        if len(head) < 3 or planned <= len(head):
            return None
        steps = np.diff(head)
        step = float(head[-1] - head[0]) / (len(head) - 1)
        if not (np.all(np.isfinite(head)) and step != 0.0
                and np.all(np.abs(steps - step) <= 0.01 * abs(step))):
            return None
        end = float(head[0]) + step * (planned - 1)
        items.planned_x = (min(float(head[0]), end), max(float(head[0]), end))
        return items.planned_x

    def _span(self, item) -> tuple[float, ...] | None:
        """(x min, x max, y min, y max, smallest y > 0, largest y > 0) of an item's data,
        kept until its data change (a finished sweep's never do), so that the range policy
        costs the new points, not every point on the plot, per frame."""
        x, y = item.xData, item.yData
        if x is None or not len(x):
            return None
        cached = getattr(item, "_span_of", None)
        if cached is not None and cached[0] is x:          # setData gives a new array
            return cached[1]
        fx, fy = x[np.isfinite(x)], y[np.isfinite(y)]
        positive = fy[fy > 0]
        span = tuple(float(v) for v in (
            fx.min() if fx.size else np.nan, fx.max() if fx.size else np.nan,
            fy.min() if fy.size else np.nan, fy.max() if fy.size else np.nan,
            positive.min() if positive.size else np.nan,
            positive.max() if positive.size else np.nan))
        item._span_of = (x, span)
        return span

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
        for layer in self._sweep_layers():
            layer.clear()
        for items in self.items.values():
            pi.removeItem(items.current)
            if items.in_legend:
                self.legend.removeItem(items.current)
            if items.scratch is not None:
                self._recycle(items.scratch, "current")
            if items.power_scratch is not None:
                self._recycle(items.power_scratch, "power")
            if items.power is not None and self.power_view is not None:
                self.power_view.removeItem(items.power)
            if items.fit is not None:
                pi.removeItem(items.fit)
            if items.mpp is not None:
                pi.removeItem(items.mpp)
        self.items.clear()
        self.tidy_pending = False
        self._auto_view = True
        self._view = None
        if self._fit_in_legend:
            self.legend.removeItem(self._fit_sample)
            self._fit_in_legend = False
        if self._power_in_legend:
            self.legend.removeItem(self._power_sample)
            self._power_in_legend = False
        self._update_placeholder()

    def _sweep_layers(self) -> list[FrozenLayer]:
        layers = [self._old_layer, self._recent_layer, *self._live_layers, self._fit_layer]
        return layers + ([self._power_layer, *self._live_power_layers]
                         if self._power_layer is not None else [])

    @staticmethod
    def _free_live_layer(layers: list[FrozenLayer]) -> FrozenLayer:
        """A live layer for a new sweep: the one not drawing the last sweep. (They are not
        restacked: a z change repaints the whole view. For the frame or two until the last
        sweep moves on, the new one may lie under it where they cross.)"""
        return next((layer for layer in layers if not layer.items), layers[-1])

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
        current = self._blank("current")
        current.opts["name"] = trace.label()
        current.setPen(_pen(colour, style, 2.0))
        current.setSymbolBrush(pg.mkBrush(colour))
        current.setSymbol(symbol if markers else None)
        _sample_style(current)
        scratch = self._blank("current")
        _copy_style(current, scratch)
        live = self._free_live_layer(self._live_layers)
        live.add(current, scratch=scratch, repaint=False)     # its points: see update_sweep
        self.legend.addItem(current, trace.label())
        items = _Items(current=current, trace=trace, markers=markers, colour=colour, style=style,
                       scratch=scratch, live_layer=live)
        current.opts["_planned"] = int(trace.started.points_planned or 0)
        self.items[trace.uid] = items
        # The rest (power curve, layers, budgets) waits for the next redraws, so that no
        # single frame pays for everything a new sweep needs.
        self.tidy_pending = True
        self._update_placeholder()          # the range follows at the end of the redraw

    BLANKS = 2              # of each kind: a sweep takes two (its item and its scratch)

    def _blank(self, kind: str) -> _DataItem:
        """An empty item already in its plot: one made ahead on a quiet frame (see
        :meth:`tidy`) or given back, else a new one."""
        spare = self._blanks[kind]
        return spare.pop() if spare else self._make_blank(kind)

    def _recycle(self, item: _DataItem, kind: str) -> None:
        """A scratch item back to the spares (or out of the plot if enough are spare)."""
        item.clear()
        if len(self._blanks[kind]) < self.BLANKS:
            self._blanks[kind].append(item)
        elif kind == "current":
            self.getPlotItem().removeItem(item)
        else:
            self.power_view.removeItem(item)

    def _make_blank(self, kind: str) -> _DataItem:
        item = _DataItem(connect="finite")
        if kind == "current":
            item.setSymbolSize(6)
            item.setSymbolPen(None)
            item.setZValue(10)
            self.getPlotItem().addItem(item)   # takes the plot's log mode and downsampling
        else:
            item.setDownsampling(auto=True, method="peak")
            self.power_view.addItem(item)
        return item

    def _make_blanks(self) -> bool:
        """Make one missing blank item; True if one was made."""
        for kind in ("current", "power") if self.power_view is not None else ("current",):
            if len(self._blanks[kind]) < self.BLANKS:
                self._blanks[kind].append(self._make_blank(kind))
                return True
        return False

    def _add_power(self, items: _Items) -> None:
        self._start_power(items, _pen(items.colour, "DotLine", 1.5, palette.POWER_ALPHA))

    def _start_power(self, items: _Items, pen: QPen) -> None:
        power = self._blank("power")
        power.setPen(pen)
        scratch = self._blank("power")
        _copy_style(power, scratch)
        items.live_power_layer = self._free_live_layer(self._live_power_layers)
        items.live_power_layer.add(power, scratch=scratch, repaint=False)
        items.power, items.power_scratch = power, scratch
        self._power_in_tail()

    POWER_NAME = "power (right axis)"

    def _power_in_tail(self) -> None:
        """"power" and "model fit" stay after the sweeps in the legend."""
        if not self._power_in_legend:
            self._power_in_legend = True
            self.legend.add_tail(self._power_sample, self.POWER_NAME, 0)

    def _layer_of(self, items: _Items) -> FrozenLayer:
        return self._old_layer if items.old else self._recent_layer

    def tidy(self) -> None:
        """Housekeeping after a sweep was added, one kind of step per call, so that no
        frame pays for many (``tidy_pending`` stays set while more are due):

        1. finished sweeps, and fits, go into the layers (drawn once, then only copied);
        2. sweeps beyond the newest LEGEND_SWEEPS leave the legend,
        3. then take their final style — a thin line without markers or power — and move
           to the old layer, which only ever grows on top (so the many old sweeps are never
           redrawn as a sweep ends; only the few recent ones are);
        4. the newest sweeps keep their markers up to MARKER_BUDGET markers per plot;
        5. only the newest POWER_SWEEPS show their power curve;
        6. the empty items (and legend label) the next sweep will take are made.
        """
        self.tidy_pending = False
        ordered = list(self.items.values())
        if not ordered:
            return
        done = [i for i in ordered if not i.frozen and i.trace.finished is not None]
        fits = [i for i in ordered if not i.fit_frozen and i.fit is not None]
        if done or fits:
            for items in done:
                items.frozen = True
                self._settle(items)
            for items in fits:
                items.fit_frozen = True
                self._fit_layer.add(items.fit)
                if items.mpp is not None:
                    self._fit_layer.add(items.mpp)
            self.tidy_pending = True
            return
        unnamed = [i for i in ordered[:-LEGEND_SWEEPS] if i.in_legend]
        if unnamed:
            for items in unnamed:
                self.legend.removeItem(items.current)
                items.in_legend = False
            self.tidy_pending = True
            return
        retire = [i for i in ordered[:-LEGEND_SWEEPS] if not i.old]
        if retire:
            for items in retire:
                items.current.setSymbol(None)
                items.markers = False
                # thin: old sweeps step back behind the newest ones
                items.current.setPen(_pen(items.colour, items.style, 1.0))
                if items.frozen:
                    self._recent_layer.remove(items.current, restore=False)
                    self._old_layer.add(items.current)
                items.old = True
            self.tidy_pending = True
            return
        stripped = False
        count = 0
        for items in reversed(ordered):
            if not items.markers:
                continue
            x = items.current.xData
            count += max(0 if x is None else len(x), 0 if items.frozen
                         else items.current.opts.get("_planned", 0))
            if count > MARKER_BUDGET and items is not ordered[-1]:
                items.current.setSymbol(None)
                items.markers = False
                stripped = True
                if items.frozen:
                    self._layer_of(items).invalidate()
        if stripped:
            self.tidy_pending = True
            return
        hidden = False
        for items in ordered[:-POWER_SWEEPS]:
            if items.power is not None and items.power.isVisible():
                items.power.setVisible(False)      # a frozen one: its layer hears it
                hidden = True
        if hidden:
            self.tidy_pending = True
            return
        made = self.legend.make_spare()
        while self._make_blanks():
            made = True
        self.tidy_pending = made

    def update_sweep(self, trace: SweepTrace) -> None:
        items = self.items.get(trace.uid)
        if items is None:
            return
        x = trace.column("voltage_v")
        if not self._set_data(items, x, trace.column("abs_y" if self.log_y else "y")):
            return
        if items.power is None and self.power_view is not None and len(x) > 1:
            self._add_power(items)
        if items.power is not None:
            self._set_power(items, x, trace.column("p"))

    def _set_data(self, items: _Items, x: np.ndarray, y: np.ndarray) -> bool:
        """New points of a sweep; False if there are none."""
        if items.current.xData is not None and len(items.current.xData) == len(x):
            return False                 # nothing new (e.g. the sweep's end was announced)
        layer = self._layer_of(items) if items.frozen else items.live_layer
        if items.markers and len(x) > MARKER_LIMIT:
            for item in (items.current, items.scratch):
                if item is not None:
                    item.setSymbol(None)
            items.markers = False
            layer.invalidate()
        items.current.setData(x, y)
        if items.frozen:
            layer.invalidate()
        else:
            layer.grow(items.current)
        return True

    def _set_power(self, items: _Items, x: np.ndarray, y: np.ndarray) -> None:
        items.power.setData(x, y)
        if items.frozen:
            self._power_layer.invalidate()
        else:
            items.live_power_layer.grow(items.power)

    def _settle(self, items: _Items) -> None:
        """A finished sweep: out of the live layers into those of finished sweeps; its
        scratch items go back to the spares."""
        # the same pixels, drawn by another layer: no repaint now (see FrozenLayer.add)
        scratch = items.live_layer.remove(items.current, restore=False, repaint=False)
        if scratch is not None:
            self._recycle(scratch, "current")
        items.scratch = None
        self._layer_of(items).add(items.current, repaint=False)
        if items.power is not None and self._power_layer is not None:
            scratch = items.live_power_layer.remove(items.power, restore=False, repaint=False)
            if scratch is not None:
                self._recycle(scratch, "power")
            items.power_scratch = None
            self._power_layer.add(items.power, repaint=False)

    def show_fit(self, trace: SweepTrace, current_scale: float) -> None:
        items = self.items.get(trace.uid)
        if items is None:
            return
        curve = trace.model_curve(current_scale)
        if curve is None:
            return
        pi = self.getPlotItem()
        if items.fit is None:
            items.fit = _DataItem(pen=_pen(palette.FIT_COLOUR, "SolidLine", 1.5),
                                  connect="finite")
            items.fit.setZValue(20)
            pi.addItem(items.fit)
            if not self._fit_in_legend:
                self._fit_in_legend = True
                self.legend.add_tail(self._fit_sample, "model fit", 1)
        items.fit.setData(*curve)
        figures = (trace.analysis or {}).get("data_figures") or {}
        vmp, imp = figures.get("vmp_v"), figures.get("imp_a")
        if not self.log_y and vmp is not None and imp is not None:
            if items.mpp is None:
                items.mpp = pg.ScatterPlotItem(symbol="star", size=16, pen=pg.mkPen("#000000"),
                                               brush=pg.mkBrush(palette.OKABE_ITO["yellow"]))
                items.mpp.setZValue(30)
                pi.addItem(items.mpp)
                if items.fit_frozen:
                    self._fit_layer.add(items.mpp)
            items.mpp.setData([float(vmp)], [float(imp) * current_scale])
        if items.fit_frozen:
            self._fit_layer.invalidate()      # a new analysis of a sweep already drawn
        else:
            self.tidy_pending = True

    # ------------------------------------------------------------------ earlier sweeps
    def set_overlays(self, curves: Sequence[OverlayCurve], density: bool) -> list[str]:
        """Replace the overlays; returns the keys that could not be shown in these units."""
        pi = self.getPlotItem()
        self._overlay_layer.clear()
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
            item = _DataItem(c.voltage_v, y, connect="finite",
                                   pen=_pen(palette.overlay_colour(k), "DotLine" if style ==
                                            "SolidLine" else "DashDotLine", 1.5, 200))
            item.setZValue(5)
            pi.addItem(item)
            self.legend.addItem(item, c.label)
            self.overlay_items[c.key] = item
            self._overlay_layer.add(item)         # they never change: drawn once
        self._update_placeholder()
        self.fit_view()
        return skipped


class TrackingPlot(CurvePlot):
    """Holds and MPP tracking against time: power on the left axis (markers and line),
    terminal voltage on the right (thin dashed line, the same colour) — at open circuit the
    power is zero and the voltage is the story."""

    is_voltage_plot = False

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

    POWER_NAME = "voltage (right axis)"

    def _add_power(self, items: _Items) -> None:
        self._start_power(items, _pen(items.colour, "DashLine", 1.0, palette.POWER_ALPHA))

    def update_sweep(self, trace: SweepTrace) -> None:
        items = self.items.get(trace.uid)
        if items is None:
            return
        t = trace.column("t_s")
        if not self._set_data(items, t, trace.column("p")):
            return
        if items.power is None and len(t) > 1:
            self._add_power(items)
        if items.power is not None:
            self._set_power(items, t, trace.column("voltage_v"))
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
        self.points_in_view = True
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
        """Apply ``changes`` (from :meth:`RunModel.take_changes`). ``points_in_view`` then
        says whether the new points (if any) lie in view, i.e. will be painted."""
        FrozenLayer.new_frame()
        live = [layer for p in self.plots() for layer in p._live_layers + p._live_power_layers]
        for layer in live:
            layer.grown_rect = QRectF()
        ranges = [p.getPlotItem().getViewBox().viewRange() for p in self.plots()]
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
                if p.tidy_pending:
                    p.tidy()
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
        moved = ranges != [p.getPlotItem().getViewBox().viewRange() for p in self.plots()]
        self.points_in_view = (changes.new_run or bool(changes.added) or moved
                               or any(layer.growth_in_view() for layer in live))
