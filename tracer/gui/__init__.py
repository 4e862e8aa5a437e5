"""The live bench window (PyQt6 + pyqtgraph): `tracer gui`.

    from tracer.gui import BenchWindow, BenchInfo          # Qt
    from tracer.gui.run_model import RunModel              # no Qt: buffers and run state

The window is an engine subscriber: it never imports a driver or pyvisa; the composition
root (``tracer.cli.gui_cmd`` with ``tracer.app``) builds the bench and hands the window
the engine, a description of the bench and, optionally, a probe that reads the output and
interlock state (called only off the GUI thread). See ``tracer/gui/window.py`` for the
threading.

Qt is imported only when a Qt class is asked for, so ``tracer.gui.run_model``,
``results_format`` and ``validation`` work without a display or without Qt.
"""
from __future__ import annotations

from typing import Any

from .bench_info import BenchInfo, InstrumentInfo

__all__ = ["BenchWindow", "BenchInfo", "InstrumentInfo", "EventBridge", "RunModel"]


def __getattr__(name: str) -> Any:
    if name == "BenchWindow":
        from .window import BenchWindow
        return BenchWindow
    if name == "EventBridge":
        from .bridge import EventBridge
        return EventBridge
    if name == "RunModel":
        from .run_model import RunModel
        return RunModel
    raise AttributeError(name)
