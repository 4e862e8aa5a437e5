"""A PNG picture of a stored run's curves, drawn off screen with pyqtgraph.

Panels (only those with data): illuminated I-V curves (current in the generator
convention, mA, with each curve's maximum-power point marked), dark I-V curves on a
logarithmic |I| axis, and the time series of hold and MPP-tracking steps (power, mW).

Qt is imported only when a picture is drawn, so the command line works without a display:
when neither ``DISPLAY`` nor ``WAYLAND_DISPLAY`` is set and no platform was chosen, the
Qt platform is set to ``offscreen`` first.
"""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from tracer.conventions import generator_current
from tracer.logbook import Logbook

# Curve colours (RGB), cycled; chosen to stay distinguishable on white.
_PALETTE = ((31, 119, 180), (214, 39, 40), (44, 160, 44), (148, 103, 189), (255, 127, 14),
            (23, 190, 207), (140, 86, 75), (227, 119, 194), (127, 127, 127), (188, 189, 34))


def _ensure_qt_app():
    if not os.environ.get("QT_QPA_PLATFORM") and not (
            os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY")):
        os.environ["QT_QPA_PLATFORM"] = "offscreen"
    from PyQt6 import QtWidgets

    app = QtWidgets.QApplication.instance()
    if app is None:
        app = QtWidgets.QApplication(["tracer-plot"])
    return app


def _label(sweep) -> str:
    text = f"{sweep.sweep_index}: {sweep.step_name}"
    if sweep.direction not in ("none", ""):
        text += f" {sweep.direction}"
    if sweep.pixel is not None:
        text += f" px{sweep.pixel}"
    if sweep.status != "completed":
        text += f" ({sweep.status})"
    return text


def render_run_png(logbook: Logbook, run_ref: str, path: Path | str, *, width: int = 1500,
                   height: int = 560) -> Path:
    """Draw the run's curves into ``path`` (PNG); returns the path written.

    Raises ``RuntimeError`` if Qt cannot draw (no PyQt6, no usable platform)."""
    run = logbook.run(run_ref)
    light, dark, series = [], [], []
    for sw in logbook.sweeps(run.uid):
        pts = logbook.points(sw.uid)
        if not pts:
            continue
        v = np.array([p.voltage_v for p in pts], dtype=float)
        i = generator_current(np.array([p.current_a for p in pts], dtype=float))
        t = np.array([p.time for p in pts], dtype=float)
        if sw.kind == "sweep":
            (light if sw.light else dark).append((sw, v, i))
        else:
            series.append((sw, t - t[0], v * i))

    try:
        _ensure_qt_app()
        import pyqtgraph as pg
        import pyqtgraph.exporters as pg_exporters
        from PyQt6 import QtCore
    except ImportError as exc:  # pragma: no cover - PyQt6 is a dependency
        raise RuntimeError(f"cannot draw the curves: {exc}") from exc

    pg.setConfigOptions(antialias=True, background="w", foreground="k")
    layout = pg.GraphicsLayoutWidget()
    layout.resize(width, height)
    title = f"run {run.uid[:12]}  sample {run.sample_id}  {run.protocol_name}  ({run.status})"
    layout.addLabel(title, row=0, col=0, colspan=3)
    col = 0
    colour = iter(_PALETTE * 10)

    def new_plot(heading: str, x_label: str, y_label: str, *, log_y: bool = False):
        nonlocal col
        plot = layout.addPlot(row=1, col=col, title=heading)
        col += 1
        plot.setLabel("bottom", x_label)
        plot.setLabel("left", y_label)
        for side in ("bottom", "left"):
            plot.getAxis(side).enableAutoSIPrefix(False)   # units are in the labels
        plot.showGrid(x=True, y=True, alpha=0.25)
        plot.addLegend(offset=(10, 10))
        if log_y:
            plot.setLogMode(x=False, y=True)
        return plot

    if light:
        plot = new_plot("illuminated", "voltage [V]", "current [mA] (generator)")
        plot.addLine(y=0, pen=pg.mkPen((160, 160, 160), width=1))
        for sw, v, i in light:
            pen = pg.mkPen(next(colour), width=2)
            order = np.argsort(v, kind="stable")
            plot.plot(v[order], i[order] * 1e3, pen=pen, symbol="o", symbolSize=3,
                      symbolPen=None, symbolBrush=pen.color(), name=_label(sw))
            p = v * i
            finite = np.isfinite(p)
            if finite.any():
                k = int(np.nanargmax(np.where(finite, p, -np.inf)))
                plot.plot([v[k]], [i[k] * 1e3], pen=None, symbol="+", symbolSize=14,
                          symbolPen=pg.mkPen(pen.color(), width=2))
    if dark:
        plot = new_plot("dark", "voltage [V]", "|current| [A]", log_y=True)
        for sw, v, i in dark:
            pen = pg.mkPen(next(colour), width=2)
            a = np.abs(i)
            keep = np.isfinite(a) & (a > 0)
            order = np.argsort(v[keep], kind="stable")
            plot.plot(v[keep][order], a[keep][order], pen=pen, symbol="o", symbolSize=3,
                      symbolPen=None, symbolBrush=pen.color(), name=_label(sw))
    if series:
        plot = new_plot("hold / MPP tracking", "time since start of step [s]", "power [mW]")
        for sw, t, p in series:
            pen = pg.mkPen(next(colour), width=2)
            plot.plot(t, p * 1e3, pen=pen, name=_label(sw))
    if col == 0:
        layout.addLabel("no points were stored for this run", row=1, col=0)

    layout.ci.setContentsMargins(10, 10, 10, 10)
    # Lay the scene out at the picture's size without ever showing a window.
    layout.setSceneRect(QtCore.QRectF(0, 0, width, height))
    layout.ci.setGeometry(QtCore.QRectF(0, 0, width, height))
    exporter = pg_exporters.ImageExporter(layout.ci)
    exporter.parameters()["width"] = width
    exporter.parameters()["height"] = height
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    ok = exporter.export(str(path))
    layout.close()
    layout.deleteLater()
    if ok is False or not path.exists():
        raise RuntimeError(f"Qt could not write the picture {path}")
    return path
