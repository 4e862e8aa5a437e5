"""Live-plot speed of the bench window, offscreen, as figures beside a baseline from the same run.

    QT_QPA_PLATFORM=offscreen .venv/bin/python tests/benchmarks/bench_gui.py [--quick]

A producer thread publishes synthetic engine events — 20,000 points at 2,000 points/s
(quick: 4,000) — on the engine's own event bus (:class:`tracer.engine.bus.EventBus`), which
hands them in batches to the window's :class:`~tracer.gui.bridge.EventBridge`, exactly as a
run does. Two streams: one 20,000-point sweep (an instrument list or a long hold: lines
only) and 400-point sweeps one after another (typical I-V sweeps, drawn with markers).

Figures per stream: frame time (the redraw's ``setData`` work plus the paint that follows
it; median and worst) and the delay from a point's time stamp to the first paint showing it.
Baseline, same run, same stream: a naive redraw that clears the plots and plots every sweep
anew on each tick. Goal (tracer bench): worst frame < 50 ms. Nothing here asserts a time.

On a loaded machine a frame's wall time is mostly the scheduler's (a frame of a few ms of
CPU can wait 100 ms for a core). The replay (``--replay-repeats``, on by default) is the
steady figure: the same events applied in 33 ms portions (66 points), each followed by
the window's redraw and the paint it causes, timed in GUI-thread CPU time; every frame's
figure is its minimum over the repeats, which filters out what other processes cost it.
"""
from __future__ import annotations

import argparse
import os
import sys
import threading
import time
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import numpy as np  # noqa: E402

RATE_PER_S = 2000.0


class _SyntheticEngine:
    """What the window needs of an engine, with events from the real event bus."""

    def __init__(self):
        from tracer.engine.bus import EventBus

        self.bus = EventBus()
        self.running = False

    def subscribe(self, callback, critical=False, *, batch=False):
        return self.bus.subscribe(callback, critical=critical, batch=batch)

    def unsubscribe(self, token):
        self.bus.unsubscribe(token)

    def check(self, plan):
        return None

    def emergency_stop(self, *args, **kwargs):
        return True

    def stop(self):
        pass

    def close(self):
        self.bus.close(2.0)


def _events(total: int, sweep_points: int, run_uid: str = "bench"):
    """(kind, payload) items: ("run"|"sweep"|"points"|"finish"); points in chunks of 2
    (1 ms at 2,000/s)."""
    from tracer import events as ev

    yield ev.RunStarted(run_uid=run_uid, time=time.time(), protocol_name="bench", protocol={},
                        protocol_sha256="", sample={"sample_id": "B", "area_cm2": 1.0,
                                                    "cells_in_series": 1},
                        operator="bench", bench={"name": "synthetic"},
                        limits={"voltage_v": 1.0, "current_a": 0.1, "power_w": 0.1,
                                "reverse_voltage_v": 0.5}, software_version="0")
    sweeps = total // sweep_points
    run_seq = 0
    for k in range(sweeps):
        uid = f"sweep-{k}"
        yield ev.SweepStarted(run_uid=run_uid, sweep_uid=uid, sweep_index=k, step_index=k,
                              step_name=f"s{k}", kind="sweep", light=True,
                              direction="forward" if k % 2 == 0 else "reverse", pixel=None,
                              source_mode="voltage", acquisition="point",
                              points_planned=sweep_points, four_wire=True, nplc=1.0, settle_s=0.0,
                              compliance=0.1, time=time.time())
        v = np.linspace(-0.1, 0.65, sweep_points)
        if k % 2:
            v = v[::-1]
        # a plausible light curve in the load convention (invented demo numbers)
        i_load = -(0.038 - 1e-12 * np.expm1(v / 0.0257) - v / 1000.0)
        for j in range(sweep_points):
            run_seq += 1
            yield ("point", uid, j + 1, run_seq, float(v[j]), float(i_load[j]))
        yield ev.SweepFinished(run_uid=run_uid, sweep_uid=uid, status="completed", reason="",
                               points=sweep_points, time=time.time())


def _stream(window, engine, total: int, sweep_points: int) -> dict[str, float]:
    """Publish the stream at RATE_PER_S, pumping the Qt event loop meanwhile."""
    from PyQt6.QtWidgets import QApplication

    from tracer import events as ev

    app = QApplication.instance()
    done = threading.Event()

    def produce():
        start = time.perf_counter()
        sent = 0
        for item in _events(total, sweep_points):
            if isinstance(item, tuple):
                _, uid, seq, run_seq, v, i = item
                due = start + sent / RATE_PER_S
                delay = due - time.perf_counter()
                if delay > 0:
                    time.sleep(delay)
                engine.bus.publish(ev.Point(run_uid="bench", sweep_uid=uid, seq=seq, run_seq=run_seq,
                                            time=time.time(), setpoint=v, voltage_v=v, current_a=i,
                                            in_compliance=False))
                sent += 1
            else:
                engine.bus.publish(item)
        engine.bus.publish(ev.RunFinished(run_uid="bench", status="completed", reason="",
                                          time=time.time(), output_verified_off=True, points=sent))
        done.set()

    window.stats.reset()
    producer = threading.Thread(target=produce, name="bench-producer", daemon=True)
    t0 = time.perf_counter()
    producer.start()
    while not (done.is_set() and window.model.finished is not None
               and window.model.finished.run_uid == "bench" and not window.model.dirty):
        app.processEvents()
        time.sleep(0.001)
    for _ in range(20):                      # let the last frame paint
        app.processEvents()
        time.sleep(0.005)
    elapsed = time.perf_counter() - t0
    producer.join(5)
    summary = window.stats.summary()
    summary["worst_parts"] = window.stats.worst(3)
    summary["points"] = float(window.model.points_total)
    summary["seconds"] = elapsed
    return summary


def _naive_redraw(window):
    """Baseline: clear every plot and plot every sweep anew on each redraw."""
    import pyqtgraph as pg

    plot = window.plots.light_plot.getPlotItem()

    def redraw(model, changes):
        plot.clear()
        for trace in model.sweeps.values():
            plot.addItem(pg.PlotDataItem(np.array(trace.column("voltage_v")),
                                         np.array(trace.column("y")), pen="b"))
    return redraw


def _replay(window, total: int, sweep_points: int, frame_points: int = 66) -> list[float]:
    """GUI-thread CPU (ms) of each frame when the stream is applied ``frame_points`` points
    at a time (33 ms at 2,000 points/s), each portion followed by the redraw and its paint."""
    from PyQt6.QtWidgets import QApplication

    from tracer import events as ev

    app = QApplication.instance()
    window.timer.stop()                       # frames come from here, not from the clock
    portions, portion, sent = [], [], 0
    for item in _events(total, sweep_points):
        if isinstance(item, tuple):
            _, uid, seq, run_seq, v, i = item
            portion.append(ev.Point(run_uid="bench", sweep_uid=uid, seq=seq, run_seq=run_seq,
                                    time=time.time(), setpoint=v, voltage_v=v, current_a=i,
                                    in_compliance=False))
            sent += 1
            if sent % frame_points == 0:
                portions.append(portion)
                portion = []
        else:
            portion.append(item)
    portion.append(ev.RunFinished(run_uid="bench", status="completed", reason="",
                                  time=time.time(), output_verified_off=True, points=sent))
    portions.append(portion)
    frames = []
    for portion in portions:
        window._on_events(portion)            # what the event bridge delivers
        c0 = time.thread_time()
        window._redraw()
        app.processEvents()                   # the paint the redraw caused
        frames.append((time.thread_time() - c0) * 1e3)
    return frames


def run_replay(quick: bool = False, points: int | None = None, repeats: int = 2
               ) -> dict[str, float]:
    """The replay figures (see the module text) for ours and the naive baseline."""
    from PyQt6.QtWidgets import QApplication

    from tracer.gui import BenchInfo
    from tracer.gui.window import BenchWindow

    app = QApplication.instance() or QApplication(["bench_gui"])
    total = points or (4000 if quick else 20_000)
    figures: dict[str, float] = {}
    for label, sweep_points in {"long": total, "sweeps": min(400, total)}.items():
        for variant in ("ours", "naive"):
            runs = []
            for _ in range(max(1, repeats)):
                engine = _SyntheticEngine()
                window = BenchWindow(engine, bench_info=BenchInfo(name="synthetic"))
                window.resize(1600, 1000)
                window.show()
                if variant == "naive":
                    window.plots.redraw = _naive_redraw(window)
                for _ in range(50):
                    app.processEvents()
                    time.sleep(0.002)
                runs.append(_replay(window, total, sweep_points))
                window._close_confirmed = True
                window.close()
                engine.close()
                app.processEvents()
            n = min(len(r) for r in runs)
            frames = np.min([r[:n] for r in runs], axis=0)
            prefix = "replay" if variant == "ours" else "replay_naive"
            tag = "_long_sweep" if label == "long" else "_400pt_sweeps"
            figures[f"{prefix}{tag}_frames"] = float(n)
            figures[f"{prefix}{tag}_median_cpu_ms"] = float(np.median(frames))
            figures[f"{prefix}{tag}_p99_cpu_ms"] = float(np.percentile(frames, 99))
            figures[f"{prefix}{tag}_worst_cpu_ms"] = float(frames.max())
            figures[f"{prefix}{tag}_total_cpu_ms"] = float(frames.sum())
    figures["replay_repeats"] = float(max(1, repeats))
    return figures


def run(quick: bool = False, points: int | None = None) -> dict[str, float]:
    from PyQt6.QtWidgets import QApplication

    from tracer.gui import BenchInfo
    from tracer.gui.window import BenchWindow

    app = QApplication.instance() or QApplication(["bench_gui"])
    total = points or (4000 if quick else 20_000)
    figures: dict[str, float] = {"points": float(total), "rate_points_per_s": RATE_PER_S}
    streams = {"long": total, "sweeps": min(400, total)}
    for label, sweep_points in streams.items():
        for variant in ("ours", "naive"):
            engine = _SyntheticEngine()
            window = BenchWindow(engine, bench_info=BenchInfo(name="synthetic"))
            window.resize(1600, 1000)
            window.show()
            if variant == "naive":
                window.plots.redraw = _naive_redraw(window)
            for _ in range(50):                      # first layout and paint: not measured
                app.processEvents()
                time.sleep(0.002)
            s = _stream(window, engine, total, sweep_points)
            prefix = "gui" if variant == "ours" else "gui_naive"
            tag = "_long_sweep" if label == "long" else "_400pt_sweeps"
            figures[f"{prefix}{tag}_median_frame_ms"] = s.get("median_frame_ms", float("nan"))
            figures[f"{prefix}{tag}_worst_frame_ms"] = s.get("worst_frame_ms", float("nan"))
            figures[f"{prefix}{tag}_p99_frame_ms"] = s.get("p99_frame_ms", float("nan"))
            figures[f"{prefix}{tag}_latency_median_ms"] = s.get("median_latency_ms", float("nan"))
            figures[f"{prefix}{tag}_latency_worst_ms"] = s.get("worst_latency_ms", float("nan"))
            figures[f"{prefix}{tag}_frames"] = s.get("frames", 0.0)
            figures[f"{prefix}{tag}_median_frame_cpu_ms"] = s.get("median_frame_cpu_ms", float("nan"))
            figures[f"{prefix}{tag}_worst_frame_cpu_ms"] = s.get("worst_frame_cpu_ms", float("nan"))
            figures[f"{prefix}{tag}_points_shown"] = s["points"]
            figures[f"{prefix}{tag}_frames_points_out_of_view"] = s.get(
                "frames_points_out_of_view", 0.0)
            for k, (work, paint) in enumerate(s["worst_parts"]):
                figures[f"{prefix}{tag}_worst{k + 1}_work_ms"] = work
                figures[f"{prefix}{tag}_worst{k + 1}_paint_ms"] = paint
            window._close_confirmed = True
            window.close()
            engine.close()
            app.processEvents()
    # the headline figures are the worse of the two streams
    for key in ("worst_frame_ms", "median_frame_ms", "p99_frame_ms", "latency_median_ms",
                "latency_worst_ms", "worst_frame_cpu_ms", "median_frame_cpu_ms"):
        for prefix in ("gui", "gui_naive"):
            figures[f"{prefix}_{key}"] = max(figures[f"{prefix}_long_sweep_{key}"],
                                             figures[f"{prefix}_400pt_sweeps_{key}"])
    figures["gui_point_to_display_median_ms"] = figures["gui_latency_median_ms"]
    figures["gui_point_to_display_worst_ms"] = figures["gui_latency_worst_ms"]
    return figures


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="4,000 points instead of 20,000")
    parser.add_argument("--replay-repeats", type=int, default=2, metavar="N",
                        help="repeats of the CPU-time replay (0: no replay; default 2)")
    args = parser.parse_args(argv)
    f = run(quick=args.quick)
    print(f"{int(f['points'])} points at {f['rate_points_per_s']:.0f}/s, offscreen; "
          f"frame = redraw work + paint")
    print(f"{'stream':<28}{'median frame':>14}{'worst frame':>13}{'p99':>9}"
          f"{'latency med':>13}{'latency worst':>15}{'frames':>8}")
    for tag, name in (("_long_sweep", "one 20,000-point sweep" if not args.quick
                       else "one long sweep"),
                      ("_400pt_sweeps", "400-point sweeps, markers")):
        for prefix, who in (("gui", "ours"), ("gui_naive", "baseline: naive")):
            print(f"{who + ', ' + name:<28.28}"
                  f"{f[prefix + tag + '_median_frame_ms']:>11.1f} ms"
                  f"{f[prefix + tag + '_worst_frame_ms']:>10.1f} ms"
                  f"{f[prefix + tag + '_p99_frame_ms']:>6.1f} ms"
                  f"{f[prefix + tag + '_latency_median_ms']:>10.1f} ms"
                  f"{f[prefix + tag + '_latency_worst_ms']:>12.1f} ms"
                  f"{f[prefix + tag + '_frames']:>8.0f}")
    print("GUI-thread CPU time per frame (what the frame costs without other processes): "
          + "; ".join(f"{who} {name}: median {f[p + t + '_median_frame_cpu_ms']:.1f} ms, "
                      f"worst {f[p + t + '_worst_frame_cpu_ms']:.1f} ms"
                      for t, name in (("_long_sweep", "long"), ("_400pt_sweeps", "sweeps"))
                      for p, who in (("gui", "ours"), ("gui_naive", "naive"))))
    print("frames whose new points all lay outside the view (a sweep past Voc runs off the "
          "bottom: nothing to paint, no latency counted): " + ", ".join(
              f"{who} {name} {f[p + t + '_frames_points_out_of_view']:.0f}"
              for t, name in (("_long_sweep", "long"), ("_400pt_sweeps", "sweeps"))
              for p, who in (("gui", "ours"), ("gui_naive", "naive"))))
    print("slowest frames of ours (redraw work + paint): " + "; ".join(
        f"{f.get(f'gui{tag}_worst{k}_work_ms', 0):.0f}+{f.get(f'gui{tag}_worst{k}_paint_ms', 0):.0f}"
        for tag in ("_long_sweep", "_400pt_sweeps") for k in (1, 2, 3)) + " ms")
    print(f"goal: worst frame < 50 ms -> ours {f['gui_worst_frame_ms']:.1f} ms "
          f"({'met' if f['gui_worst_frame_ms'] < 50 else 'NOT met'})")
    if args.replay_repeats > 0:
        r = run_replay(quick=args.quick, repeats=args.replay_repeats)
        print(f"replay, GUI-thread CPU per 33 ms frame, each frame's minimum over "
              f"{int(r['replay_repeats'])} runs (steady under load):")
        print(f"{'stream':<28}{'median':>10}{'p99':>10}{'worst':>10}{'sum':>11}{'frames':>8}")
        for tag, name in (("_long_sweep", "one long sweep"),
                          ("_400pt_sweeps", "400-point sweeps, markers")):
            for prefix, who in (("replay", "ours"), ("replay_naive", "baseline: naive")):
                print(f"{who + ', ' + name:<28.28}"
                      f"{r[prefix + tag + '_median_cpu_ms']:>7.1f} ms"
                      f"{r[prefix + tag + '_p99_cpu_ms']:>7.1f} ms"
                      f"{r[prefix + tag + '_worst_cpu_ms']:>7.1f} ms"
                      f"{r[prefix + tag + '_total_cpu_ms']:>8.0f} ms"
                      f"{r[prefix + tag + '_frames']:>8.0f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
