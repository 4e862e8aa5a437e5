"""Fixtures for the bench window tests: the built-in simulated bench in this process
(reached over the wire through the real drivers, as `tracer gui` does), a window on it, and
small protocols that run in a second or two."""
from __future__ import annotations

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from pathlib import Path  # noqa: E402

import pytest  # noqa: E402

from tracer.engine import EngineOptions  # noqa: E402

FAST = EngineOptions(poll_interval_s=0.01, conditions_interval_s=0.05, analysis_timeout_s=30.0)

from ._support import protocol_text  # noqa: E402


@pytest.fixture
def quick_protocol(tmp_path) -> Path:
    path = tmp_path / "gui-quick.yaml"
    path.write_text(protocol_text(), encoding="utf-8")
    return path


@pytest.fixture
def slow_protocol(tmp_path) -> Path:
    """Long enough (400 points, 10 ms settle: several seconds) to act in the middle."""
    path = tmp_path / "gui-slow.yaml"
    path.write_text(protocol_text("gui-slow", points=400, settle=0.01), encoding="utf-8")
    return path


@pytest.fixture
def sim_app(tmp_path):
    from tracer.app import build_application

    app = build_application(None, logbook_path=tmp_path / "logbook.sqlite", time_scale=0.01,
                            seed=3, engine_options=FAST)
    try:
        yield app
    finally:
        app.close()


@pytest.fixture
def window(qtbot, sim_app, tmp_path):
    from tracer.cli.gui_cmd import open_window

    w = open_window(sim_app, operator="tester", poll_interval_s=0.1, debounce_ms=40,
                    protocols_dir=tmp_path)
    qtbot.addWidget(w)
    w.resize(1400, 900)
    w.show()
    try:
        yield w
    finally:
        if sim_app.engine.running:
            sim_app.engine.emergency_stop("test-teardown", "test ended")
            sim_app.engine.wait(10)
        w._close_confirmed = True
        w.close()
