"""`tracer run` / `tracer demo` on the simulated bench: completion, durability, exit codes.

The simulated bench runs in the process under test (the built-in bench of `tracer run`), or
in this process when a test needs the simulator's harness (fault injection).
"""
from __future__ import annotations

import dataclasses
import io
import json
import os
import re
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tracer import events as ev
from tracer import plan as P
from tracer.app import build_application
from tracer.cli import run_cmd
from tracer.cli.main import main
from tracer.engine import EngineOptions
from tracer.logbook import Logbook, read_sweep_csv
from tracer.protocol import compile_plan, load_protocol

REPO = Path(__file__).resolve().parents[2]
PROTOCOLS = sorted((REPO / "protocols").glob("*.yaml"))
DEMO = REPO / "protocols" / "dark-then-light.yaml"
# The simulator scenario each shipped protocol was written for (default: pilot-substrate).
SCENARIOS = {"mini-module-36": "mini-module-36", "hysteresis-forward-reverse": "hysteretic-cell"}
FAST = EngineOptions(poll_interval_s=0.01, conditions_interval_s=0.05)
POINT_LINE = re.compile(r"^sweep (\d+) \S+: point (\d+)")


def _short(plan: P.Plan) -> P.Plan:
    """The same plan with holds and MPP tracking cut to a fraction of a second and no settle
    waits, so that every shipped protocol runs in seconds (the engine waits in real time)."""
    steps = []
    for s in plan.steps:
        if isinstance(s, P.HoldStep):
            s = dataclasses.replace(s, duration_s=min(s.duration_s, 0.3), interval_s=min(s.interval_s, 0.05))
        elif isinstance(s, P.MpptStep):
            s = dataclasses.replace(s, duration_s=min(s.duration_s, 0.5), interval_s=min(s.interval_s, 0.05))
        elif isinstance(s, P.SweepStep):
            s = dataclasses.replace(s, settle_s=0.0)
        steps.append(s)
    return dataclasses.replace(plan, steps=tuple(steps))


def test_every_shipped_protocol_is_tested():
    assert {p.name for p in PROTOCOLS} >= {"dark-then-light.yaml"}
    assert len(PROTOCOLS) >= 2


@pytest.mark.parametrize("protocol", PROTOCOLS, ids=lambda p: p.stem)
def test_each_shipped_protocol_completes_and_every_published_point_is_logged(protocol, tmp_path):
    logbook = tmp_path / "logbook.sqlite"
    with build_application(None, logbook_path=logbook, time_scale=0.01, seed=0,
                           scenario=SCENARIOS.get(protocol.stem), analyzer=False,
                           engine_options=FAST) as app:
        plan = _short(compile_plan(load_protocol(protocol, bench=app.profile), bench=app.profile))
        seen: list = []
        app.engine.subscribe(seen.append)           # an ordinary subscriber, like the screen
        finished = app.engine.run(plan, operator="test")
        assert app.engine.flush(10.0)
        smu_state = app.simulator.state()["smu"]
    assert finished.status == ev.RUN_COMPLETED, finished.reason
    assert finished.output_verified_off and not smu_state["output_on"]
    published = [e for e in seen if isinstance(e, ev.Point)]
    assert published and len(published) == finished.points
    with Logbook(logbook) as lb:
        assert lb.run(finished.run_uid).status == "completed"
        assert lb.run_points(finished.run_uid) == published      # every field, exactly
        sweeps = lb.sweeps(finished.run_uid)
        assert all(s.status == "completed" for s in sweeps)
        assert sum(s.points_stored for s in sweeps) == len(published)
        assert {i.role for i in lb.run(finished.run_uid).instruments} == {
            "smu", "light", "thermometer", "switch"}


def test_demo_writes_logbook_exports_and_picture(tmp_path, capsys):
    out = tmp_path / "demo"
    code = main(["demo", "--out", str(out), "--time-scale", "0.01"])
    text = capsys.readouterr().out
    assert code == 0, text
    with Logbook(out / "logbook.sqlite") as lb:
        (run,) = lb.list_runs()
        assert run.status == "completed" and run.protocol_name == "dark-then-light"
        sweeps = lb.sweeps(run.uid)
        assert [s.step_name for s in sweeps] == ["dark", "light"]
        analyses = {a.sweep_uid: a.result for a in lb.analyses(run_ref=run.uid)}
        assert set(analyses) == {s.uid for s in sweeps}
        light = analyses[sweeps[1].uid]
        assert light["data_figures"]["isc_a"] > 0      # generator convention: Isc > 0 under light
        run_dir = out / run.uid
        csvs = sorted(run_dir.glob("*.csv"))
        assert len(csvs) == 2 and (run_dir / "curves.png").stat().st_size > 10_000
        for sweep, path in zip(sweeps, csvs):
            assert read_sweep_csv(path).points == lb.points(sweep.uid)
    assert str(out.resolve()) in text and "curves.png" in text and "logbook" in text
    assert "Isc mA" in text and "at STC" in text, text[-3000:]


def test_json_output_is_one_document(tmp_path, capsys):
    code = run_cmd.execute(DEMO, logbook=tmp_path / "lb.sqlite", out_dir=tmp_path / "out",
                           as_json=True, time_scale=0.01, engine_options=FAST,
                           sample="PLT-TEST-9", operator="ana")
    captured = capsys.readouterr()
    doc = json.loads(captured.out)
    assert code == 0 and doc["exit_status"] == 0
    assert doc["run"]["status"] == "completed"
    assert doc["run"]["sample_id"] == "PLT-TEST-9" and doc["run"]["operator"] == "ana"
    assert [s["step_name"] for s in doc["sweeps"]] == ["dark", "light"]
    light = doc["sweeps"][1]["summary"]
    assert light["isc_a"] > 0 and light["voc_v"] > 0 and light["verdict"] in ("keep", "re-measure")
    assert any(fit["parameters"] for fit in light["fits"].values())
    assert Path(doc["picture"]).exists() and len(doc["exports"]["files"]) == 2
    assert "point" in captured.err          # progress went to stderr


# ----------------------------------------------------------------------------- exit codes
def _sim_profile(tmp_path, **hard_limits) -> Path:
    """A bench profile naming loopback ports where nothing listens (never connected to)."""
    limits = {"voltage_v": 25.0, "current_a": 1.0, "power_w": 10.0, "reverse_voltage_v": 2.0}
    limits.update(hard_limits)
    text = ("bench:\n  name: paper-bench\n  instruments:\n"
            "    smu: {address: 'TCPIP0::127.0.0.1::9::SOCKET', driver: scpi-smu, timeout_s: 1}\n"
            "    light: {address: 'TCPIP0::127.0.0.1::9::SOCKET', driver: scpi-light}\n"
            "    thermometer: {address: 'TCPIP0::127.0.0.1::9::SOCKET', driver: scpi-thermometer}\n"
            "  hard_limits: " + json.dumps(limits) + "\n")
    path = tmp_path / "bench.yaml"
    path.write_text(text)
    return path


def test_bad_protocol_exits_2_naming_the_line(tmp_path, capsys):
    bad = tmp_path / "bad.yaml"
    bad.write_text(DEMO.read_text().replace("points: 106", "points: -3"))
    assert main(["run", str(bad), "--logbook", str(tmp_path / "lb.sqlite")]) == 2
    err = capsys.readouterr().err
    assert "bad.yaml:" in err and "points" in err
    assert not (tmp_path / "lb.sqlite").exists()       # nothing was started


def test_bad_bench_file_exits_2(tmp_path, capsys):
    bench = tmp_path / "bench.yaml"
    bench.write_text("bench:\n  name: x\n  instruments: {}\n")
    assert main(["run", str(DEMO), "--bench", str(bench), "--logbook", str(tmp_path / "lb.sqlite")]) == 2
    assert "bench.yaml" in capsys.readouterr().err


def test_protocol_beyond_the_bench_hard_limits_exits_2_before_touching_anything(tmp_path, capsys):
    bench = _sim_profile(tmp_path, current_a=0.01)    # the demo protocol asks for 0.1 A
    assert main(["run", str(DEMO), "--bench", str(bench), "--logbook", str(tmp_path / "lb.sqlite")]) == 2
    assert "current_a" in capsys.readouterr().err


def test_unreachable_instrument_exits_1(tmp_path, capsys):
    bench = _sim_profile(tmp_path)
    assert main(["run", str(DEMO), "--bench", str(bench), "--logbook", str(tmp_path / "lb.sqlite")]) == 1
    assert "cannot reach the smu" in capsys.readouterr().err


def test_an_interlock_opening_mid_sweep_exits_3_with_the_reason(tmp_path, capsys):
    seen = {}

    def open_interlock_soon(app, run_uid):
        seen["sim"] = app.simulator
        app.simulator.inject("interlock", after=60)

    code = run_cmd.execute(DEMO, logbook=tmp_path / "lb.sqlite", out_dir=tmp_path / "out",
                           time_scale=0.01, engine_options=FAST, on_started=open_interlock_soon)
    captured = capsys.readouterr()
    assert code == 3
    assert "run aborted: interlock" in captured.err
    state = seen["sim"].state()
    assert state["smu"]["output_on"] is False
    with Logbook(tmp_path / "lb.sqlite") as lb:
        run = lb.run("latest")
        assert run.status == "aborted" and run.reason.startswith("interlock")
        assert run.output_verified_off is True
        assert lb.interlocks(run.uid)[0].cause.startswith("interlock")
        assert lb.sweeps(run.uid)[-1].status == "aborted"


def test_a_fault_on_a_standalone_simulator_through_a_bench_file_exits_3(tmp_path, capsys):
    profile = tmp_path / "bench.yaml"
    sim = subprocess.Popen(
        [sys.executable, "-m", "simulated_instrument", "--time-scale", "0.01", "--seed", "0",
         "--bench-file", str(profile), "--fault", "interlock:150"],
        stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 30
        while not (profile.exists() and profile.stat().st_size):
            assert sim.poll() is None and time.monotonic() < deadline, "simulator did not start"
            time.sleep(0.05)
        code = main(["run", str(DEMO), "--bench", str(profile), "--logbook",
                     str(tmp_path / "lb.sqlite"), "--out", str(tmp_path / "out")])
    finally:
        sim.terminate()
        sim.wait(10)
    assert code == 3
    assert "run aborted: interlock" in capsys.readouterr().err
    with Logbook(tmp_path / "lb.sqlite") as lb:
        run = lb.run("latest")
        assert run.status == "aborted" and run.output_verified_off is True
        assert run.bench["simulated"] is True


# ----------------------------------------------------------------------------- signals
def _spawn(tmp_path, *extra):
    env = {**os.environ, "PYTHONUNBUFFERED": "1", "QT_QPA_PLATFORM": "offscreen"}
    cmd = [sys.executable, "-m", "tracer.cli.main", "run", str(DEMO), "--sim-time-scale", "1",
           "--logbook", str(tmp_path / "lb.sqlite"), "--out", str(tmp_path / "out"), *extra]
    return subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            cwd=tmp_path, env=env)


def _read_points(proc, count, timeout_s=60.0):
    """Read stdout until ``count`` point lines were printed; returns {(sweep, seq)}."""
    printed = set()
    deadline = time.monotonic() + timeout_s
    for line in proc.stdout:
        m = POINT_LINE.match(line)
        if m:
            printed.add((int(m.group(1)), int(m.group(2))))
            if len(printed) >= count:
                return printed
        assert time.monotonic() < deadline, "the run printed too few points"
    raise AssertionError(f"the run ended early: {proc.stderr.read()}")


def _stored(lb, run_uid):
    index = {s.uid: s.sweep_index for s in lb.sweeps(run_uid)}
    return {(index[p.sweep_uid], p.seq) for p in lb.run_points(run_uid)}


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["ctrl-c", "sigterm"])
def test_a_signal_stops_safely_and_exits_130(tmp_path, sig):
    proc = _spawn(tmp_path)
    try:
        printed = _read_points(proc, 15)
        proc.send_signal(sig)
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 130, err
    assert "output is off (verified)" in err
    for line in out.splitlines():
        m = POINT_LINE.match(line)
        if m:
            printed.add((int(m.group(1)), int(m.group(2))))
    with Logbook(tmp_path / "lb.sqlite") as lb:
        run = lb.run("latest")
        assert run.status == "aborted" and "stopped by the operator" in run.reason
        assert run.output_verified_off is True
        assert printed <= _stored(lb, run.uid)


def test_ctrl_c_twice_is_an_emergency_stop(tmp_path):
    proc = _spawn(tmp_path)
    try:
        _read_points(proc, 10)
        proc.send_signal(signal.SIGINT)
        proc.send_signal(signal.SIGINT)
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 130, err
    with Logbook(tmp_path / "lb.sqlite") as lb:
        run = lb.run("latest")
        assert run.status == "aborted" and run.output_verified_off is True


def test_sigkill_mid_sweep_leaves_a_clean_logbook_with_every_printed_point(tmp_path):
    proc = _spawn(tmp_path)
    try:
        printed = _read_points(proc, 40)
        proc.send_signal(signal.SIGKILL)
        proc.wait(30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    path = tmp_path / "lb.sqlite"
    raw = sqlite3.connect(path)
    assert raw.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    raw.close()
    with Logbook(path) as lb:
        run = lb.run("latest")
        assert run.status == "interrupted"
        assert lb.recovery.interrupted_runs == (run.uid,)
        assert printed <= _stored(lb, run.uid)
        assert any(s.status == "interrupted" for s in lb.sweeps(run.uid))


# ----------------------------------------------------------------------------- progress
def _events():
    started = ev.SweepStarted(run_uid="r", sweep_uid="s", sweep_index=0, step_index=1,
                              step_name="light", kind="sweep", light=True, direction="forward",
                              pixel=None, source_mode="voltage", acquisition="point",
                              points_planned=3, four_wire=True, nplc=1.0, settle_s=0.0,
                              compliance=0.1, time=0.0)
    points = [ev.Point(run_uid="r", sweep_uid="s", seq=k, run_seq=k, time=float(k), setpoint=0.1 * k,
                       voltage_v=0.1 * k, current_a=-0.03, in_compliance=False) for k in (1, 2, 3)]
    done = ev.SweepFinished(run_uid="r", sweep_uid="s", status="completed", reason="", points=3,
                            time=4.0)
    return started, points, done


def test_progress_prints_one_plain_line_per_point_when_not_a_terminal():
    started, points, done = _events()
    stream = io.StringIO()
    progress = run_cmd.Progress(stream, live_line=False)
    progress([started, *points, done])
    lines = stream.getvalue().splitlines()
    assert len([ln for ln in lines if POINT_LINE.match(ln)]) == 3
    assert "I +30.000000 mA" in lines[1]          # generator convention: Isc > 0 under light
    assert "\r" not in stream.getvalue()


def test_progress_keeps_one_updating_line_on_a_terminal():
    started, points, done = _events()
    stream = io.StringIO()
    progress = run_cmd.Progress(stream, live_line=True, min_interval_s=0.0)
    progress([started])
    for p in points:
        progress([p])
    text = stream.getvalue()
    assert text.count("\r") >= 3 and text.count("\n") == 1     # only the "started" line
    assert "point 3/3" in text and "output ON" in text
    progress([done])
    progress.close()
    assert stream.getvalue().rstrip().endswith("completed with 3 points")


# ----------------------------------------------------------------------------- composition
def _profile(**kw):
    from types import SimpleNamespace

    ref = SimpleNamespace(calibration_isc_a=0.12, calibration_uncertainty_rel=0.01,
                          temperature_coefficient_per_k=0.0005)
    return SimpleNamespace(reference_cell=ref, usual_series_resistance_ohm=1.0,
                           instability_class="A", **kw)


def test_protocol_analysis_becomes_analysis_settings():
    from types import SimpleNamespace

    from tracer.app import _analysis_settings

    analysis = {
        "models": ["single", "double"],
        "translation": {"target_irradiance_w_m2": 1000.0, "target_temperature_c": 25.0,
                        "procedures": [1, 2, "model"],
                        "procedure_1": {"rs_ohm": 0.5, "kappa_ohm_per_k": 0.001},
                        "procedure_2": {"rs_ohm": 0.4, "kappa_ohm_per_k": 0.0,
                                        "voc_irradiance_factor": 0.05}},
        "temperature_coefficients": {"alpha_isc_per_k": 0.0006, "beta_voc_v_per_k": -0.002},
        "reference_cell": None,
    }
    figures = SimpleNamespace(isc_a=0.038, voc_v=0.61)
    s = _analysis_settings(analysis, _profile(), figures)
    assert s.models == ("single", "double")
    assert s.stc_methods == ("procedure1", "procedure2", "diode_model")
    # IEC 60891 procedure 1 takes absolute coefficients, procedure 2 relative ones; the
    # relative coefficient is the absolute one divided by Isc (or Voc) - by definition.
    assert s.procedure1.alpha_a_per_k == pytest.approx(0.0006 * 0.038, rel=1e-12)
    assert s.procedure1.beta_v_per_k == -0.002
    assert s.procedure1.series_resistance_ohm == 0.5 and s.procedure1.kappa_ohm_per_k == 0.001
    assert s.procedure2.alpha_rel_per_k == 0.0006
    assert s.procedure2.beta_rel_per_k == pytest.approx(-0.002 / 0.61, rel=1e-12)
    assert s.procedure2.irradiance_factor == 0.05
    assert s.alpha_isc_rel_per_k == 0.0006
    # the bench's reference cell when the protocol names none
    assert s.reference_cell.calibration_isc_a == 0.12
    assert s.usual_series_resistance_ohm == 1.0 and s.quality.instability_class == "A"
    # without coefficients for procedure 1, it is still asked for (and reports what it lacks)
    bare = _analysis_settings({"models": ["auto"], "translation": {"procedures": [1]}}, None, None)
    assert bare.stc_methods == ("procedure1",) and bare.procedure1 is None


def test_irradiance_from_the_reference_cell_calibration():
    from tracer.app import _irradiance_function

    g = _irradiance_function(_profile())
    # IEC 60904-2: a reference cell reading its calibration Isc at its calibration
    # temperature sees the calibration irradiance (1000 W/m2); the reading scales linearly
    # and is corrected by its relative temperature coefficient.
    assert g(0.12, 25.0) == pytest.approx(1000.0, rel=1e-12)
    assert g(-0.06, 25.0) == pytest.approx(500.0, rel=1e-12)      # sign of the wiring ignored
    assert g(0.12, 35.0) == pytest.approx(1000.0 / (1 + 0.0005 * 10), rel=1e-12)
    assert _irradiance_function(_no_reference_cell()) is None


def _no_reference_cell():
    from types import SimpleNamespace

    return SimpleNamespace(reference_cell=None)
