"""The live plots' drawing machinery (tracer/gui/plots.py): finished sweeps drawn by cached
layers, the sweep being measured drawn point by point, budgets, blank items made ahead.

What the window shows is checked against pyqtgraph drawing the same items itself (every
item opaque, no layer): the layers must change how often things are drawn, never what is
drawn. The I-V curve fed here is an invented demo shape; nothing physical is claimed.
"""
from __future__ import annotations

import time

import numpy as np
import pytest
from PyQt6.QtGui import QImage
from PyQt6.QtWidgets import QApplication

from tracer import events as ev
from tracer.gui import plots as plots_module
from tracer.gui.plots import LEGEND_SWEEPS, POWER_SWEEPS, FrameStats, FrozenLayer, PlotArea
from tracer.gui.run_model import RunModel

pytestmark = pytest.mark.timeout(120)

RUN = "layers-run"


def _run_started() -> ev.RunStarted:
    return ev.RunStarted(run_uid=RUN, time=time.time(), protocol_name="layers", protocol={},
                         protocol_sha256="", sample={"sample_id": "L", "area_cm2": 1.0,
                                                     "cells_in_series": 1},
                         operator="test", bench={"name": "test"},
                         limits={"voltage_v": 1.0, "current_a": 0.1, "power_w": 0.1,
                                 "reverse_voltage_v": 0.5}, software_version="0")


def _sweep_events(k: int, points: int, *, light: bool = True, reverse: bool | None = None,
                  kind: str = "sweep"):
    """SweepStarted, the points (load convention), SweepFinished of sweep ``k``."""
    reverse = bool(k % 2) if reverse is None else reverse
    uid = f"sweep-{k}"
    yield ev.SweepStarted(run_uid=RUN, sweep_uid=uid, sweep_index=k, step_index=k,
                          step_name=f"s{k}", kind=kind, light=light,
                          direction="reverse" if reverse else "forward", pixel=None,
                          source_mode="voltage", acquisition="point", points_planned=points,
                          four_wire=True, nplc=1.0, settle_s=0.0, compliance=0.1,
                          time=time.time())
    v = np.linspace(-0.1, 0.65, points)
    if reverse:
        v = v[::-1]
    # invented demo curve (generator current ~38 mA, a diode knee near 0.6 V), load convention
    i_load = -(0.038 - 1e-12 * np.expm1(v / 0.0257) - v / 1000.0) if light else \
        1e-12 * np.expm1(v / 0.0257) + v / 1000.0
    for j in range(points):
        yield ev.Point(run_uid=RUN, sweep_uid=uid, seq=j + 1, run_seq=k * points + j + 1,
                       time=time.time(), setpoint=float(v[j]), voltage_v=float(v[j]),
                       current_a=float(i_load[j]), in_compliance=False)
    yield ev.SweepFinished(run_uid=RUN, sweep_uid=uid, status="completed", reason="",
                           points=points, time=time.time())


class Bench:
    """A PlotArea fed like the window feeds it: events into a RunModel, one redraw (and the
    paint that follows) per ``frame_points`` points."""

    def __init__(self, qtbot, width: int = 900, height: int = 700):
        self.area = PlotArea(FrameStats())
        qtbot.addWidget(self.area)
        self.area.resize(width, height)
        self.area.show()
        qtbot.waitExposed(self.area)
        self.model = RunModel()
        self.pending: list = []

    def frame(self) -> None:
        self.model.apply_many(self.pending)
        self.pending = []
        if self.model.dirty:
            self.area.redraw(self.model, self.model.take_changes())
        QApplication.processEvents()

    def feed(self, events, frame_points: int = 66, stop_after: int | None = None) -> None:
        points = 0
        for e in events:
            self.pending.append(e)
            if isinstance(e, ev.Point):
                points += 1
                if points % frame_points == 0:
                    self.frame()
                if stop_after is not None and points >= stop_after:
                    break
        self.frame()

    def settle(self, frames: int = 12) -> None:
        """Quiet frames: the deferred housekeeping (layers, budgets) gets done."""
        for _ in range(frames):
            self.model._changes.status = True          # a frame with nothing new
            self.frame()


def _layers(plot) -> list[FrozenLayer]:
    return [plot._overlay_layer, *plot._sweep_layers()]


def _shown(plot) -> QImage:
    with FrozenLayer.all_exact():
        return plot.grab().toImage()


def _plain(plot) -> QImage:
    """The same plot drawn by pyqtgraph itself: the layers off, their items opaque and
    stacked as the layers stack them (older sweeps below newer ones)."""
    layers = _layers(plot)
    drawn = [(item, layer.zValue() + k * 1e-6) for layer in layers
             for k, item in enumerate(layer.items)]
    kept = [(item, item.zValue()) for item, _ in drawn]
    for item, z in drawn:
        if isinstance(item, plots_module._DataItem):
            item.lazy = False
            item.flush()
        item.setOpacity(1.0)
        item.setZValue(z)
    for layer in layers:
        layer.setVisible(False)
    try:
        return plot.grab().toImage()
    finally:
        for item, z in kept:
            item.setOpacity(0.0)
            item.setZValue(z)
            if isinstance(item, plots_module._DataItem):
                item.lazy = True
        for layer in layers:
            layer.setVisible(True)


def _difference(a: QImage, b: QImage) -> tuple[int, int]:
    """(pixels that differ by more than 4 of 255 in a channel, pixels of ``b`` that are not
    the white background). A cached picture is blended over the background with
    premultiplied alpha, which may round a soft marker edge differently by a few steps."""
    assert a.size() == b.size()
    pa, pb = _pixels(a), _pixels(b)
    differ = np.abs(pa.astype(int) - pb.astype(int)).max(axis=-1) > 4
    return int(np.count_nonzero(differ)), int(np.count_nonzero((pb != 255).any(axis=-1)))


def _pixels(image: QImage) -> np.ndarray:
    """Height x width x 4 bytes (B, G, R, A)."""
    converted = image.convertToFormat(QImage.Format.Format_ARGB32)    # kept alive while read
    raw = np.frombuffer(converted.constBits().asstring(converted.sizeInBytes()), np.uint8)
    return raw.reshape(converted.height(), converted.bytesPerLine() // 4, 4)[
        :, :converted.width()].copy()


def test_finished_and_growing_sweeps_look_as_pyqtgraph_draws_them(qtbot):
    bench = Bench(qtbot)
    bench.feed([_run_started()])
    events = [e for k in range(12) for e in _sweep_events(k, 120)]
    # stop in the middle of the last sweep: it is being drawn point by point
    bench.feed(events, frame_points=17, stop_after=11 * 120 + 70)
    bench.settle()
    plot = bench.area.light_plot
    assert len(plot.items) == 12
    live = [i for i in plot.items.values() if not i.frozen]
    assert len(live) == 1 and live[0].live_layer.items == [live[0].current]
    assert plot._old_layer.items and plot._recent_layer.items
    shown, plain = _shown(plot), _plain(plot)
    differing, ink = _difference(shown, plain)
    assert ink > 5000
    # the same picture; a dashed or dotted line drawn in pieces may start a dash a pixel
    # away from where one continuous line would, hence a tolerance of 0.2 % of the ink
    assert differing <= 0.002 * ink, (differing, ink)


def test_a_solid_sweep_drawn_point_by_point_is_pixel_identical(qtbot):
    bench = Bench(qtbot)
    bench.feed([_run_started()])
    # dark sweeps, forward only: solid lines, no power curve; stop mid-sweep
    events = [e for k in range(3) for e in _sweep_events(k, 150, light=False, reverse=False)]
    bench.feed(events, frame_points=11, stop_after=2 * 150 + 90)
    bench.settle()
    plot = bench.area.dark_plot
    assert sum(not i.frozen for i in plot.items.values()) == 1
    differing, ink = _difference(_shown(plot), _plain(plot))
    assert ink > 2000 and differing == 0, (differing, ink)


def test_holds_on_the_tracking_plot_look_as_pyqtgraph_draws_them(qtbot):
    bench = Bench(qtbot)
    bench.feed([_run_started()])
    events = [e for k in range(3) for e in _sweep_events(k, 90, kind="hold")]
    bench.feed(events, frame_points=13, stop_after=2 * 90 + 50)   # the last one still going
    bench.settle()
    plot = bench.area.tracking_plot
    assert bench.area.tabs.currentIndex() == 1
    assert len(plot.items) == 3 and sum(not i.frozen for i in plot.items.values()) == 1
    differing, ink = _difference(_shown(plot), _plain(plot))
    assert ink > 2000 and differing <= 0.002 * ink, (differing, ink)


def test_budgets_legend_power_markers_and_thin_old_sweeps(qtbot):
    bench = Bench(qtbot)
    bench.feed([_run_started()])
    bench.feed([e for k in range(12) for e in _sweep_events(k, 60)], frame_points=60)
    bench.settle()
    plot = bench.area.light_plot
    ordered = list(plot.items.values())
    names = [label.text for _, label in plot.legend.items]
    assert names == [t.trace.label() for t in ordered[-LEGEND_SWEEPS:]] + ["power (right axis)"]
    for items in ordered[:-LEGEND_SWEEPS]:
        assert items.old and items.current in plot._old_layer.items
        assert items.current.opts["symbol"] is None
        assert items.current.opts["pen"].widthF() == pytest.approx(1.0)
    for items in ordered[-LEGEND_SWEEPS:]:
        assert not items.old and items.current in plot._recent_layer.items
        assert items.current.opts["symbol"] in ("o", "t")          # 60 points: markers
        assert items.current.opts["pen"].widthF() == pytest.approx(2.0)
    assert [i.power.isVisible() for i in ordered] == \
        [False] * (len(ordered) - POWER_SWEEPS) + [True] * POWER_SWEEPS
    # every sweep still holds all of its data
    assert all(len(i.current.xData) == 60 for i in ordered)


def test_hiding_a_finished_sweep_from_the_legend_takes_it_off_the_picture(qtbot):
    bench = Bench(qtbot)
    bench.feed([_run_started()])
    bench.feed([e for k in range(3) for e in _sweep_events(k, 80)], frame_points=40)
    bench.settle()
    plot = bench.area.light_plot
    first = next(iter(plot.items.values()))
    assert first.frozen
    before = _shown(plot)
    sample = next(s for s, _ in plot.legend.items if s.item is first.current)
    sample.item.setVisible(False)           # what a click on the legend sample does
    hidden = _shown(plot)
    assert _difference(hidden, before)[0] > 100
    differing, ink = _difference(hidden, _plain(plot))
    assert ink > 5000 and differing == 0, (differing, ink)


def test_a_range_change_does_not_rebuild_finished_sweeps(qtbot, monkeypatch):
    bench = Bench(qtbot)
    bench.feed([_run_started()])
    bench.feed([e for k in range(20) for e in _sweep_events(k, 100)], frame_points=50)
    bench.settle()
    plot = bench.area.light_plot
    refreshed = []
    original = plots_module.pg.PlotDataItem.updateItems
    monkeypatch.setattr(plots_module.pg.PlotDataItem, "updateItems",
                        lambda self, *a, **k: (refreshed.append(self), original(self, *a, **k)))
    vb = plot.getPlotItem().getViewBox()
    (x0, x1), (y0, y1) = vb.viewRange()
    vb.setRange(xRange=(x0 - 0.01, x1 + 0.01), yRange=(y0 - 1, y1 + 1), padding=0)
    QApplication.processEvents()
    # pyqtgraph would hand all 20 sweeps (and their power curves) their data again
    assert refreshed == []


def test_zooming_into_a_long_sweep_draws_it_finer(qtbot):
    bench = Bench(qtbot)
    bench.feed([_run_started()])
    bench.feed(list(_sweep_events(0, 20_000)), frame_points=2000)
    bench.settle()
    plot = bench.area.light_plot
    (items,) = plot.items.values()
    item = items.current
    item.lazy = False
    item.flush()
    coarse = len(item.curve.xData)
    assert coarse < 20_000                           # downsampled to the plot's width
    vb = plot.getPlotItem().getViewBox()
    vb.setRange(xRange=(0.1, 0.12), padding=0)       # a fiftieth of the sweep
    QApplication.processEvents()
    item.flush()
    assert len(item.curve.xData) > coarse            # chosen again for the new range


def test_a_sweep_starts_on_items_made_ahead(qtbot, monkeypatch):
    bench = Bench(qtbot)
    bench.feed([_run_started()])
    bench.feed(list(_sweep_events(0, 60)), frame_points=30)
    bench.settle()
    made = []
    original = plots_module._DataItem.__init__
    monkeypatch.setattr(plots_module._DataItem, "__init__",
                        lambda self, *a, **k: (made.append(self), original(self, *a, **k))[1])
    events = list(_sweep_events(1, 60))
    bench.feed(events[:2])                           # the start and the first point
    assert made == []                                # its items (and scratch items) were ready
    items = bench.area.light_plot.items["sweep-1"]
    assert len(items.current.xData) == 1 and items.live_layer.items == [items.current]


def test_screenshots_draw_every_layer_exactly_after_a_range_change(qtbot):
    bench = Bench(qtbot)
    bench.feed([_run_started()])
    bench.feed([e for k in range(6) for e in _sweep_events(k, 80)], frame_points=40)
    bench.settle()
    plot = bench.area.light_plot
    vb = plot.getPlotItem().getViewBox()
    (x0, x1), (y0, y1) = vb.viewRange()
    FrozenLayer.new_frame()
    vb.setRange(xRange=(x0, x1 + 0.2), yRange=(y0, y1 + 10), padding=0)
    QApplication.processEvents()                     # some layers show a moved picture
    assert FrozenLayer._waiting
    differing, ink = _difference(_shown(plot), _plain(plot))
    assert ink > 5000 and differing == 0, (differing, ink)


def _range_changes_during(bench, events, frame_points: int) -> list[int]:
    """Range changes of the light plot in each frame while ``events`` are fed."""
    vb = bench.area.light_plot.getPlotItem().getViewBox()
    counts = []
    vb.sigRangeChanged.connect(lambda *a: counts.__setitem__(-1, counts[-1] + 1))
    points = 0
    for e in events:
        bench.pending.append(e)
        if isinstance(e, ev.Point):
            points += 1
            if points % frame_points == 0:
                counts.append(0)
                bench.frame()
    return counts


def test_an_evenly_stepped_sweep_gets_its_whole_voltage_range_at_once(qtbot):
    bench = Bench(qtbot)
    bench.feed([_run_started()])
    events = list(_sweep_events(0, 400, reverse=False))[:-1]     # still running
    counts = _range_changes_during(bench, events, 40)
    assert sum(counts[1:]) <= 1          # (the current may still grow once, past Voc)
    (lo, hi), _ = bench.area.light_plot.getPlotItem().getViewBox().viewRange()
    # the planned sweep runs from -0.1 V to 0.65 V (the event generator above)
    assert lo <= -0.1 and hi >= 0.65


def test_an_unevenly_stepped_sweep_still_grows_in_steps(qtbot):
    bench = Bench(qtbot)
    bench.feed([_run_started()])
    events = list(_sweep_events(0, 400, reverse=False))[:-1]
    # voltages on a quadratic spacing (steps grow): nothing to extrapolate
    points = [e for e in events if isinstance(e, ev.Point)]
    v = -0.1 + 0.75 * np.linspace(0.0, 1.0, len(points)) ** 2
    events = [events[0]] + [ev.Point(**{**p.__dict__, "voltage_v": float(x), "setpoint": float(x)})
                            for p, x in zip(points, v)]
    counts = _range_changes_during(bench, events, 40)
    assert sum(counts[1:]) >= 2
    (lo, hi), _ = bench.area.light_plot.getPlotItem().getViewBox().viewRange()
    assert lo <= -0.1 and hi >= v[-1]


def test_a_noisy_sweep_does_not_move_the_range_at_every_new_highest_point(qtbot):
    bench = Bench(qtbot)
    bench.feed([_run_started()])
    rng = np.random.default_rng(7)
    events = list(_sweep_events(0, 400, reverse=False))[:-1]
    # measurement noise (invented: 0.2 mV, 50 uA rms) on every point
    events = [events[0]] + [
        ev.Point(**{**p.__dict__, "voltage_v": p.voltage_v + rng.normal(0, 2e-4),
                    "current_a": p.current_a + rng.normal(0, 5e-5)})
        for p in events[1:]]
    counts = _range_changes_during(bench, events, 20)
    # the view grows when a point leaves it: a handful of times, not at each new maximum
    assert sum(counts[1:]) <= 3, counts


def test_earlier_sweeps_laid_over_look_as_pyqtgraph_draws_them(qtbot):
    from tracer.gui.plots import OverlayCurve

    bench = Bench(qtbot)
    bench.feed([_run_started()])
    bench.feed(list(_sweep_events(0, 100)), frame_points=50)
    bench.settle()
    plot = bench.area.light_plot
    v = np.linspace(-0.1, 0.62, 80)
    curves = [OverlayCurve(key=f"old-{k}", label=f"earlier {k}", light=True,
                           direction="forward" if k else "reverse", voltage_v=v,
                           current_a=(0.036 - 0.002 * k) - 1e-12 * np.expm1(v / 0.0257),
                           area_cm2=1.0) for k in range(2)]
    assert plot.set_overlays(curves, density=True) == []
    QApplication.processEvents()
    assert plot._overlay_layer.items == list(plot.overlay_items.values())
    differing, ink = _difference(_shown(plot), _plain(plot))
    assert ink > 5000 and differing <= 0.002 * ink, (differing, ink)


def test_points_below_the_view_are_not_charged_a_paint_delay(qtbot):
    bench = Bench(qtbot)
    bench.feed([_run_started()])
    events = list(_sweep_events(0, 400, reverse=False))[:-1]
    # up to 0.62 V: the curve is in view; the last points (past ~0.636 V, the demo curve's
    # current below -40 % of the top) run off the bottom of the plot, by design
    bench.feed(events[:1 + 385], frame_points=385)
    assert bench.area.points_in_view
    bench.feed(events[1 + 385:1 + 394], frame_points=1000)    # the view's bottom grows once
    (_, _), (bottom, _) = bench.area.light_plot.getPlotItem().getViewBox().viewRange()
    last = events[1 + 394:]
    assert all(-p.current_a * 1e3 < bottom for p in last)     # generator mA/cm2, 1 cm2
    bench.feed(last, frame_points=1000)
    assert not bench.area.points_in_view

    stats = FrameStats()
    now = time.time()
    stats.frame(1.0, now - 0.05, points_in_view=False)
    stats.paint(1.0)
    stats.frame(1.0, now - 0.04, points_in_view=True)
    stats.paint(1.0)
    summary = stats.summary()
    assert summary["frames_points_out_of_view"] == 1 and len(stats.latencies_ms) == 1
    assert 35 <= stats.latencies_ms[0] < 1000
