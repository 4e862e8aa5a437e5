"""Benchmark: from the end of a 1,000-point light sweep to its analysis being ready.

The real path, end to end: the built-in simulated bench (instantaneous time scale), reached
over the wire through the real drivers, the real engine with its critical logbook writer
and the real end-of-sweep analyser (:func:`tracer.app.make_analyzer`). A protocol of one
light sweep of 1,000 points (-0.1 V to 0.65 V, about 1.06 Voc of the simulated cell, all
points inside compliance) with the analysis section of the shipped demo protocol
(single- and double-diode fits, IEC 60891 procedure 1 and the diode-model translation).
The sweep is of pixel 1 of the simulator's default scenario (a one-pixel loop selects it).

``analysis_latency_ms`` is the median, over the runs, of the time between two events as a
critical subscriber sees them (that is, already written to the logbook): the sweep's last
``Point`` and its ``Analysis``. In between: ``SweepFinished``, level 0 and output off,
the hand-over to the analysis thread, the analysis itself and the logbook write.

Baseline, measured in the same run: the same analyser called directly on the same sweep
record in this thread (no engine, no instrument traffic beside it):
``analysis_direct_ms``. Also, for where the time goes, the fit times that the analysis
reports (``analysis_fit_single_ms``, ``analysis_fit_double_ms``) and the analysis with the
single-diode fit alone and no translation, called directly (``analysis_single_only_ms``).

Nothing is asserted on time here: :func:`run` returns the figures, ``tracer bench`` prints
them beside the goal.
"""
from __future__ import annotations

import statistics
import tempfile
import time
from pathlib import Path
from typing import Any

POINTS = 1000

# One light sweep; the analysis section is that of protocols/dark-then-light.yaml, plus the
# series resistance that IEC 60891 procedure 1 needs: the nominal 0.6 ohm of the simulated
# bench's default cell (pilot-substrate scenario, a demo value).
PROTOCOL_YAML = f"""
schema: 1
name: bench-analysis-latency
description: one 1000-point light sweep, analysed as the demo protocol asks
sample: {{id: BENCH-LATENCY, area_cm2: 1.0, cells_in_series: 1}}
limits: {{voltage_v: 1.0, current_a: 0.1, power_w: 0.1, reverse_voltage_v: 0.5}}
steps:
  - kind: set-light
    shutter: open
    irradiance_w_m2: 1000
  - kind: pixel-loop
    pixels: [1]
    steps:
      - kind: sweep
        name: light
        light: true
        range: {{start_v: -0.1, stop_v: 0.65}}
        points: {POINTS}
        spacing: linear
        direction: forward
        settle_s: 0
        nplc: 0.01
        compliance_a: 0.06
analysis:
  models: [single, double]
  translation:
    target_irradiance_w_m2: 1000
    target_temperature_c: 25
    procedures: [1, model]
    procedure_1: {{rs_ohm: 0.6, kappa_ohm_per_k: 0.0}}
  temperature_coefficients:
    alpha_isc: {{value: 0.06, unit: "%/K"}}
    beta_voc: {{value: -2.0, unit: "mV/K"}}
"""


class _Stamps:
    """Critical subscriber: wall-clock stamps of the last Point and of the Analysis."""

    def __init__(self) -> None:
        self.reset()

    def reset(self) -> None:
        self.last_point_s: float | None = None
        self.analysis_s: float | None = None
        self.analysis: Any = None
        self.points = 0

    def __call__(self, event: Any) -> None:
        from tracer import events as ev

        now = time.perf_counter()
        if isinstance(event, ev.Point):
            self.last_point_s = now
            self.points += 1
        elif isinstance(event, ev.Analysis):
            self.analysis_s = now
            self.analysis = event


def _fit_ms(result: dict, model: str) -> float | None:
    fit = (result.get("fits") or {}).get(model) or {}
    elapsed = fit.get("elapsed_s")
    return None if elapsed is None else 1e3 * float(elapsed)


def run(quick: bool = False, *, runs: int | None = None) -> dict:
    """Run the sweep ``runs`` times (default 3 quick, 10 full) and return the figures.

    Raises ``RuntimeError`` when a run does not complete or its analysis failed (a failed
    analysis is fast and its time would mean nothing)."""
    from tracer.app import build_application
    from tracer.protocol import compile_plan, load_protocol

    runs = runs if runs is not None else (3 if quick else 10)
    if runs < 1:
        raise ValueError("runs must be at least 1")
    latencies_ms: list[float] = []
    analyser_ms: list[float] = []
    records: list[Any] = []
    stamps = _Stamps()
    with tempfile.TemporaryDirectory(prefix="tracer-bench-analysis-") as tmp:
        app = build_application(None, logbook_path=Path(tmp) / "bench.sqlite", time_scale=0.0,
                                seed=0)
        with app:
            analyser = app.engine.analyzer
            if analyser is None:
                raise RuntimeError("the application was built without an analyser")

            def keep_record(record: Any) -> Any:   # the engine's analyser, keeping its input
                records.append(record)
                return analyser(record)

            app.engine.analyzer = keep_record
            app.engine.subscribe(stamps, critical=True)
            plan = compile_plan(load_protocol(PROTOCOL_YAML, source_name="<bench protocol>",
                                              bench=app.profile), bench=app.profile)
            for _ in range(runs):
                stamps.reset()
                app.engine.start(plan, operator="tracer bench")
                finished = app.engine.wait(120.0)
                if finished is None:
                    app.engine.emergency_stop("benchmark run did not finish in 120 s")
                    raise RuntimeError("the benchmark run did not finish within 120 s")
                if finished.status != "completed":
                    raise RuntimeError(f"the benchmark run ended {finished.status}: "
                                       f"{finished.reason}")
                if stamps.analysis is None or stamps.last_point_s is None:
                    raise RuntimeError("the run published no Point or no Analysis event")
                result = dict(stamps.analysis.result)
                problems = [f"{m}: {e}" for m, e in (result.get("fit_errors") or {}).items()]
                if "error" in result or problems or not result.get("fits"):
                    raise RuntimeError("the analysis failed: "
                                       + "; ".join(problems or [str(result.get("error"))]))
                if stamps.points != POINTS:
                    raise RuntimeError(f"the sweep gave {stamps.points} points, not {POINTS}")
                latencies_ms.append(1e3 * (stamps.analysis_s - stamps.last_point_s))
                analyser_ms.append(1e3 * stamps.analysis.elapsed_s)
            last_result = result

            # baseline: the same analyser on the same record, called directly
            record = records[-1]
            direct_ms = []
            for _ in range(runs):
                t0 = time.perf_counter()
                analyser(record)
                direct_ms.append(1e3 * (time.perf_counter() - t0))
            single_only_ms = _single_only_ms(record, runs)

    latency = statistics.median(latencies_ms)
    direct = statistics.median(direct_ms)
    return {
        "points": POINTS,
        "runs": runs,
        "analysis_latency_ms": latency,
        "analysis_latency_ms_max": max(latencies_ms),
        "analysis_direct_ms": direct,
        "analysis_latency_over_direct": latency / direct,
        "analysis_in_engine_ms": statistics.median(analyser_ms),
        "analysis_fit_single_ms": _fit_ms(last_result, "single"),
        "analysis_fit_double_ms": _fit_ms(last_result, "double"),
        "analysis_single_only_ms": single_only_ms,
        "analysis_models": sorted((last_result.get("fits") or {})),
        "analysis_stc_methods": _stc_methods(last_result),
        "analysis_verdict": (last_result.get("verdict") or {}).get("verdict"),
    }


def _stc_methods(result: dict) -> list[str]:
    """The translation methods that gave a result, as the analysis names them."""
    methods = (result.get("stc") or {}).get("methods") or []
    return [str(m.get("method")) for m in methods
            if isinstance(m, dict) and not m.get("error")]


def _single_only_ms(record: Any, runs: int) -> float:
    """The analysis of the same points with the single-diode fit only, no translation."""
    import numpy as np

    from tracer.analysis import AnalysisSettings, analyze_sweep
    from tracer.conventions import generator_current

    v = np.array([p.voltage_v for p in record.points], dtype=float)
    i = generator_current(np.array([p.current_a for p in record.points], dtype=float))
    settings = AnalysisSettings(models=("single",), stc_methods=())
    times = []
    for _ in range(runs):
        t0 = time.perf_counter()
        analyze_sweep(v, i, dark=False, temperature_c=25.0, irradiance_w_m2=1000.0,
                      area_cm2=1.0, settings=settings)
        times.append(1e3 * (time.perf_counter() - t0))
    return statistics.median(times)


if __name__ == "__main__":
    import json
    import sys

    print(json.dumps(run(quick="--quick" in sys.argv), indent=2))
