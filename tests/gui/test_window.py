"""The bench window on the simulated bench (over the wire, through the real drivers).

What the window shows is checked against records outside the window: the logbook (what the
engine stored) and the simulator's true state (``bench.state()``, the test side channel).
"""
from __future__ import annotations

import io
import threading
from argparse import Namespace

import numpy as np
import pytest
from PyQt6.QtCore import Qt

from tracer import events as ev
from tracer.logbook import Logbook

from ._support import protocol_text, wait_finished

pytestmark = pytest.mark.timeout(120)


def _start(qtbot, window, path):
    window.load_protocol(path)
    qtbot.waitUntil(lambda: window.setup.start_button.isEnabled(), timeout=5000)
    qtbot.mouseClick(window.setup.start_button, Qt.MouseButton.LeftButton)
    qtbot.waitUntil(lambda: window.model.run is not None, timeout=10_000)


def _record_threads(engine):
    """Wrap engine.emergency_stop to record which thread calls it."""
    calls = []
    original = engine.emergency_stop

    def wrapped(*args, **kwargs):
        calls.append(threading.current_thread())
        return original(*args, **kwargs)

    engine.emergency_stop = wrapped
    return calls


def test_points_fill_the_plot_as_they_arrive_and_results_when_the_analysis_arrives(
        qtbot, window, sim_app, tmp_path):
    # 60 points, 10 ms settle each: the sweep spans many redraws
    quick_protocol = tmp_path / "gui-paced.yaml"
    quick_protocol.write_text(protocol_text("gui-paced", points=60, settle=0.01))
    plot = window.plots.light_plot
    seen_lengths = []

    def watch(model, changes):          # what the plot held after each redraw during the run
        for items in plot.items.values():
            x = items.current.xData
            seen_lengths.append((model.running, 0 if x is None else len(x)))

    original = window.plots.redraw
    window.plots.redraw = lambda m, c: (original(m, c), watch(m, c))
    _start(qtbot, window, quick_protocol)
    finished = wait_finished(qtbot, window)
    assert finished.status == ev.RUN_COMPLETED, finished.reason

    # the plot grew while the run went: some redraw showed part of the sweep
    partial = [n for running, n in seen_lengths if running and 0 < n < 60]
    assert partial, seen_lengths

    # the plotted data are the logbook's points, in the generator convention, per cm2
    with Logbook(sim_app.logbook_path) as lb:
        (sweep,) = [s for s in lb.sweeps(finished.run_uid) if s.kind == "sweep"]
        points = lb.points(sweep.uid)
        analysis = lb.latest_analysis(sweep.uid).result
    (items,) = plot.items.values()
    x, y = items.current.xData, items.current.yData      # as given (not clipped to view)
    assert len(x) == len(points) == 60
    np.testing.assert_array_equal(x, [p.voltage_v for p in points])
    # generator convention: current out of the cell's + terminal, i.e. minus the SMU's
    # load-convention reading (DESIGN "Sign"); area 0.5 cm2; A -> mA
    np.testing.assert_allclose(y, [-p.current_a * 1e3 / 0.5 for p in points], rtol=1e-12)
    power = items.power.yData
    np.testing.assert_allclose(power, [-p.voltage_v * p.current_a * 1e3 / 0.5 for p in points],
                               rtol=1e-12)
    assert y.max() > 0                 # Isc > 0 under light in the generator convention

    # the fitted model is drawn over the points
    fx, fy = items.fit.xData, items.fit.yData
    assert len(fx) > 10 and np.all(np.isfinite(fy))
    assert fx.min() == pytest.approx(x.min()) and fx.max() == pytest.approx(x.max())

    # results: the verdict and the figures the analysis stored
    verdict = analysis["verdict"]["verdict"]
    assert window.results.verdict.text() == {"keep": "KEEP", "re-measure": "RE-MEASURE"}[verdict]
    figures = next(t for t in window.results.tables if t.title == "Figures of merit")
    isc_row = next(r for r in figures.rows if r[0] == "Isc (mA)")
    assert float(isc_row[1]) == pytest.approx(analysis["data_figures"]["isc_a"] * 1e3, rel=1e-3)
    fits = next(t for t in window.results.tables if t.title.startswith("Fitted parameters"))
    rs_row = next(r for r in fits.rows if r[0].startswith("Rs"))
    assert "±" in rs_row[1]
    # copy: tab-separated text on the clipboard
    qtbot.mouseClick(window.results.copy_button, Qt.MouseButton.LeftButton)
    from PyQt6.QtGui import QGuiApplication
    text = QGuiApplication.clipboard().text()
    assert "Isc (mA)\t" in text and "Figures of merit" in text


def test_emergency_stop_mid_sweep_leaves_the_output_off(qtbot, window, sim_app, slow_protocol):
    calls = _record_threads(sim_app.engine)
    _start(qtbot, window, slow_protocol)
    qtbot.waitUntil(lambda: window.model.points_total >= 5, timeout=15_000)
    assert sim_app.simulator.state()["smu"]["output_on"]          # mid-sweep, output on
    qtbot.mouseClick(window.safety.estop, Qt.MouseButton.LeftButton)
    qtbot.waitUntil(lambda: not sim_app.simulator.state()["smu"]["output_on"], timeout=10_000)
    finished = wait_finished(qtbot, window)
    assert finished.status == ev.RUN_ABORTED
    assert finished.output_verified_off
    assert "emergency" in finished.reason
    state = sim_app.simulator.state()["smu"]
    assert not state["output_on"] and state["level"] == 0.0
    # the instrument I/O of the stop ran off the GUI thread
    assert calls and all(t is not threading.main_thread() for t in calls)
    qtbot.waitUntil(lambda: window.safety.output.text().endswith("OUTPUT OFF"), timeout=5000)
    assert window.setup.start_button.isEnabled()     # a re-measure is one click away


def test_closing_mid_sweep_switches_the_output_off_first(qtbot, window, sim_app, slow_protocol):
    calls = _record_threads(sim_app.engine)
    _start(qtbot, window, slow_protocol)
    qtbot.waitUntil(lambda: window.model.points_total >= 5, timeout=15_000)
    assert sim_app.simulator.state()["smu"]["output_on"]
    window.close()
    # the close waits for the output to be safe; the GUI thread did not block for it
    qtbot.waitUntil(lambda: not window.isVisible(), timeout=20_000)
    assert not sim_app.simulator.state()["smu"]["output_on"]
    finished = sim_app.engine.wait(5)
    assert finished is not None and finished.status == ev.RUN_ABORTED
    assert finished.output_verified_off
    assert calls and all(t is not threading.main_thread() for t in calls)
    with Logbook(sim_app.logbook_path) as lb:
        assert "closed" in lb.run(finished.run_uid).reason


def test_invalid_protocol_shows_the_check_messages_and_start_cannot_be_pressed(
        qtbot, window, sim_app, quick_protocol, tmp_path):
    window.load_protocol(quick_protocol)
    qtbot.waitUntil(lambda: window.setup.start_button.isEnabled(), timeout=5000)
    bad = quick_protocol.read_text().replace("points: 60", "points: 1").replace(
        "current_a: 0.1", "current_a: 50")
    window.setup.editor.setPlainText(bad)
    assert not window.setup.start_button.isEnabled()        # off while the check is pending
    qtbot.waitUntil(lambda: window.setup.problems.count() >= 2
                    and not window.setup.validation.ok, timeout=5000)
    shown = [window.setup.problems.item(k).text() for k in range(window.setup.problems.count())]

    # `tracer check` on the same text (same file name, same bench) prints the same problems
    from tracer.cli import check_cmd
    bench_file = tmp_path / "bench.yaml"
    sim_app.simulator.write_bench_profile(bench_file)
    checked = tmp_path / "copy" / quick_protocol.name
    checked.parent.mkdir()
    checked.write_text(bad)
    err = io.StringIO()
    code = check_cmd.run(Namespace(protocol=str(checked), bench=str(bench_file), sample=None,
                                   steps=False), out=io.StringIO(), err=err)
    assert code == 2
    printed = [line.strip() for line in err.getvalue().splitlines()[1:]]

    def tail(line):                    # drop the file part (the two copies live apart)
        return line.split(":", 2)[2] if line.count(":") >= 2 else line

    assert [tail(p) for p in printed] == [tail(s) for s in shown]
    assert any("limits.current_a" in s for s in shown) and any("points" in s for s in shown)

    assert not window.setup.start_button.isEnabled()
    qtbot.mouseClick(window.setup.start_button, Qt.MouseButton.LeftButton)
    assert window.start_run() is None                       # refused programmatically too
    qtbot.wait(100)
    assert window.model.run is None and not sim_app.engine.running
    assert "problem" in window.setup.check_title.text()


def test_an_injected_fault_shows_its_cause_in_the_banner_and_status_bar(
        qtbot, window, sim_app, slow_protocol):
    _start(qtbot, window, slow_protocol)
    qtbot.waitUntil(lambda: window.model.points_total >= 5, timeout=15_000)
    sim_app.simulator.inject("interlock")
    finished = wait_finished(qtbot, window)
    assert finished.status == ev.RUN_ABORTED
    with Logbook(sim_app.logbook_path) as lb:
        (trip,) = lb.interlocks(finished.run_uid)
    assert window.banner.isVisible()
    assert trip.cause in window.banner.text and trip.message in window.banner.text
    assert trip.cause in window.status_label.text()
    assert not sim_app.simulator.state()["smu"]["output_on"]
    qtbot.waitUntil(lambda: "INTERLOCK OPEN" in window.safety.interlock.text(), timeout=5000)


def test_the_poller_reads_the_instrument_off_the_gui_thread(qtbot, window, sim_app):
    qtbot.waitUntil(lambda: window.model.link_ok is True, timeout=5000)
    assert window.model.output.on is False and window.model.output.source == "read from the SMU"
    assert window.model.interlock_open is False
    assert window.poller._thread is not threading.main_thread()
    sim_app.simulator.inject("interlock")          # opened with no run going: the poll sees it
    qtbot.waitUntil(lambda: window.model.interlock_open is True, timeout=5000)
    qtbot.waitUntil(lambda: "INTERLOCK OPEN" in window.safety.interlock.text(), timeout=5000)


def test_stop_ends_the_sweep_gracefully_with_the_output_off(qtbot, window, sim_app, slow_protocol):
    _start(qtbot, window, slow_protocol)
    qtbot.waitUntil(lambda: window.model.points_total >= 5, timeout=15_000)
    assert window.setup.stop_button.isEnabled()
    qtbot.mouseClick(window.setup.stop_button, Qt.MouseButton.LeftButton)
    finished = wait_finished(qtbot, window)
    assert finished.status == ev.RUN_ABORTED and "operator" in finished.reason
    assert finished.output_verified_off
    assert not sim_app.simulator.state()["smu"]["output_on"]
    assert finished.points < 400


def test_escape_is_an_emergency_stop_even_with_no_run(qtbot, window, sim_app):
    calls = _record_threads(sim_app.engine)
    window.activateWindow()
    with qtbot.waitSignal(window.emergency_stop_done, timeout=5000) as blocker:
        qtbot.keyClick(window.setup.editor, Qt.Key.Key_Escape)
    assert blocker.args == [True]                           # read back off
    assert calls and calls[0] is not threading.main_thread()
    assert not sim_app.simulator.state()["smu"]["output_on"]
