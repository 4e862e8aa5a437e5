"""History (earlier sweeps from the logbook, overlays, exports that stay in their folder)
and the `tracer gui` command itself, headless."""
from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from PyQt6.QtCore import Qt
from PyQt6.QtGui import QImage

from tracer.gui.history import ExportRefused, target_inside
from tracer.logbook import Logbook, read_sweep_csv

from ._support import protocol_text, wait_finished

ROOT = Path(__file__).resolve().parents[2]
pytestmark = pytest.mark.timeout(120)


def _run_once(qtbot, window, path):
    window.load_protocol(path)
    qtbot.waitUntil(lambda: window.setup.start_button.isEnabled(), timeout=5000)
    run_uid = window.start_run()
    assert run_uid is not None
    return wait_finished(qtbot, window, run_uid=run_uid)


def test_earlier_sweeps_are_listed_overlaid_and_exported(qtbot, window, sim_app, quick_protocol,
                                                         tmp_path):
    first = _run_once(qtbot, window, quick_protocol)
    second = _run_once(qtbot, window, quick_protocol)
    hist = window.history
    assert hist.sample_id == "GUI-TEST-1"
    qtbot.waitUntil(lambda: hist.tree.topLevelItemCount() >= 1, timeout=5000)
    listed = {hist.tree.topLevelItem(k).child(0).data(0, Qt.ItemDataRole.UserRole).run_uid
              for k in range(hist.tree.topLevelItemCount())}
    assert first.run_uid in listed                      # the earlier run
    # tick the earlier sweep: it is laid over the live plot, in this run's units
    top = next(hist.tree.topLevelItem(k) for k in range(hist.tree.topLevelItemCount())
               if hist.tree.topLevelItem(k).child(0).data(0, Qt.ItemDataRole.UserRole).run_uid
               == first.run_uid)
    top.child(0).setCheckState(0, Qt.CheckState.Checked)
    overlay = window.plots.light_plot.overlay_items
    assert len(overlay) == 1
    (item,) = overlay.values()
    with Logbook(sim_app.logbook_path) as lb:
        (sweep,) = [s for s in lb.sweeps(first.run_uid) if s.kind == "sweep"]
        pts = lb.points(sweep.uid)
    # generator convention (minus the load reading), per 0.5 cm2, in mA
    np.testing.assert_allclose(item.yData, [-p.current_a * 1e3 / 0.5 for p in pts], rtol=1e-12)

    # exports land in the chosen folder and nowhere else
    out = tmp_path / "exports"
    out.mkdir()
    (png,) = hist.export_png(out)
    assert png.parent == out.resolve() and QImage(str(png)).width() > 100
    files = hist.export_csv(out)
    assert files and all(Path(f).resolve().is_relative_to(out.resolve()) for f in files)
    csv = read_sweep_csv(next(f for f in files if str(f).endswith(".csv")))
    assert csv.points == pts                            # bit for bit, as stored
    assert second.run_uid != first.run_uid


def test_export_names_cannot_leave_the_folder(tmp_path):
    base = tmp_path / "out"
    base.mkdir()
    for hostile in ("../../etc/passwd.png", "/etc/passwd.png", "..", "a/../../b.csv", "~/x.png"):
        target = target_inside(base, hostile)
        assert target.parent == base.resolve(), hostile
    (base / "link").symlink_to(tmp_path)                 # a planted symlink named like a file
    with pytest.raises(ExportRefused):
        target_inside(base, "link")


def test_an_aborted_run_gives_exit_status_3(qtbot, window, sim_app, quick_protocol):
    # the interlock is open before the run: the engine refuses to switch the output on
    sim_app.simulator.inject("interlock")
    finished = _run_once(qtbot, window, quick_protocol)
    assert finished.status == "aborted" and window.exit_status == 3
    assert window.banner.isVisible() and "interlock" in window.banner.text
    assert not sim_app.simulator.state()["smu"]["output_on"]


def test_tracer_gui_runs_headless_saves_a_screenshot_and_exits_with_the_run_status(tmp_path):
    path = tmp_path / "gui-quick.yaml"
    path.write_text(protocol_text(points=30))
    shot = tmp_path / "shots" / "window.png"
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen")
    out = subprocess.run(
        [sys.executable, "-m", "tracer.cli.main", "gui", "--run", str(path), "--screenshot",
         str(shot), "--quit", "--logbook", str(tmp_path / "lb.sqlite"), "--sim-time-scale",
         "0.01", "--size", "1200x800"],
        cwd=ROOT, env=env, capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    image = QImage(str(shot))
    assert (image.width(), image.height()) == (1200, 800)
    with Logbook(tmp_path / "lb.sqlite") as lb:
        (run,) = lb.list_runs()
        assert run.status == "completed" and run.points == 30


def test_tracer_gui_refuses_a_bad_protocol_before_building_anything(tmp_path):
    path = tmp_path / "bad.yaml"
    path.write_text(protocol_text().replace("points: 60", "points: 1"))
    out = subprocess.run([sys.executable, "-m", "tracer.cli.main", "gui", "--run", str(path),
                          "--quit", "--logbook", str(tmp_path / "lb.sqlite")],
                         cwd=ROOT, env=dict(os.environ, QT_QPA_PLATFORM="offscreen"),
                         capture_output=True, text=True, timeout=60)
    assert out.returncode == 2
    assert "1 problem:" in out.stderr and "steps[1].points" in out.stderr
    assert not (tmp_path / "lb.sqlite").exists()
