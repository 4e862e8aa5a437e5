"""Benchmark: end of sweep -> analysis result for a 1000-point curve (goal: < 100 ms).

Figures printed, nothing asserted on time (DEVELOPERS.md). Baseline measured in the same
run: the single-diode fit alone (``tracer.fit.fit_curve``), the largest part of the work.
Curve: a 2 cm x 2 cm lab cell from tracer.model with 10 uA noise, full evidence (paired
sweep, readings, compliance flags), settings with procedure 1 and the diode model.
"""
from __future__ import annotations

import statistics
import time

import numpy as np
import pytest

from tracer.analysis import AnalysisSettings, PairedSweep, SweepContext, analyze_sweep
from tracer.fit import fit_curve
from tracer.model import SingleDiode
from tracer.stc import Procedure1Coefficients, UncertaintyInputs


def run(repeats: int = 5) -> dict:
    cell = SingleDiode(0.16, 1.6e-11, 1.1, 0.125, 2500.0, 298.15, 1)
    v = np.linspace(-0.05, 0.72, 1000)
    rng = np.random.default_rng(0)
    i = cell.current(v) + rng.normal(0, 1e-5, v.size)
    i_rev = cell.current(v) + rng.normal(0, 1e-5, v.size)
    settings = AnalysisSettings(models=("single",), stc_methods=("procedure1", "diode_model"),
                                procedure1=Procedure1Coefficients(8e-5, -2.1e-3, 0.15, 0.0),
                                alpha_isc_a_per_k=8e-5, usual_series_resistance_ohm=0.15,
                                uncertainty=UncertaintyInputs(reference_cell_calibration_rel=0.005,
                                                              temperature_k=0.5))
    ctx = SweepContext(direction="forward", irradiance_readings_w_m2=np.full(50, 1000.0),
                       temperature_readings_c=np.full(50, 25.0), stage_setpoint_c=25.0,
                       compliance_flags=[False] * v.size,
                       paired_sweep=PairedSweep(v[::-1], i_rev[::-1], "reverse"))
    analysis, baseline = [], []
    for _ in range(repeats):
        t = time.perf_counter()
        fit_curve(v, i, model="single", temperature_k=298.15)
        baseline.append(time.perf_counter() - t)
        t = time.perf_counter()
        result = analyze_sweep(v, i, dark=False, temperature_c=25.0, irradiance_w_m2=1000.0,
                               area_cm2=4.0, settings=settings, context=ctx)
        analysis.append(time.perf_counter() - t)
    return {"analyze_sweep_ms": 1e3 * statistics.median(analysis),
            "baseline_fit_single_ms": 1e3 * statistics.median(baseline),
            "ratio_to_baseline": statistics.median(analysis) / statistics.median(baseline),
            "verdict": result.verdict.verdict}


@pytest.mark.benchmark
def test_analysis_benchmark_prints_figures(capsys):
    figures = run(repeats=3)
    with capsys.disabled():
        print("\nanalysis benchmark (1000 points): " +
              ", ".join(f"{k}={v:.3g}" if isinstance(v, float) else f"{k}={v}" for k, v in figures.items()))
    assert figures["verdict"] == "keep"


if __name__ == "__main__":
    print(run())
