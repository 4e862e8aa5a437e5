"""Benchmark: single-diode current on 1,000,000 points, ours against pvlib's Lambert W.

Run as ``python tests/benchmarks/bench_model.py`` (``--quick`` for a short run). Prints
the times and their ratio; the goal is a ratio of at most 1 (ours no slower than pvlib),
measured against pvlib in the same run on the same machine. Not a timed test: nothing
here asserts a duration.
"""
from __future__ import annotations

import argparse
import sys
import time

import numpy as np


def _best_time(func, repeats):
    best = np.inf
    result = None
    for _ in range(repeats):
        start = time.perf_counter()
        result = func()
        best = min(best, time.perf_counter() - start)
    return best, result


def run(quick: bool = False) -> dict:
    """Time ours and pvlib's single-diode current on the same points and parameters.

    Parameters
    ----------
    quick : bool
        Use 100,000 points and one repetition instead of 1,000,000 points and the best
        of five.

    Returns
    -------
    dict
        ``points``, ``ours_s`` and ``pvlib_s`` (best wall time [s]),
        ``model_eval_ratio`` (ours / pvlib), ``max_abs_diff_a`` (largest difference of
        the two results [A]), ``double_diode_s`` (our double-diode solver on the same
        points with a second diode, for information).
    """
    import pvlib

    from tracer.model import (
        double_diode_current,
        single_diode_current,
        single_diode_figures,
        thermal_voltage,
    )

    points = 100_000 if quick else 1_000_000
    repeats = 1 if quick else 5
    # a 60-cell module at 45 C (plausible values, invented for the benchmark)
    photocurrent_a, saturation_current_a = 9.0, 2e-10
    series_resistance_ohm, shunt_resistance_ohm = 0.35, 400.0
    n_ns_vt_v = 1.1 * 60 * thermal_voltage(318.15)
    args = (photocurrent_a, saturation_current_a, n_ns_vt_v, series_resistance_ohm,
            shunt_resistance_ohm)
    voc_v = single_diode_figures(*args).voc_v
    voltage_v = np.linspace(-0.2 * voc_v, 1.1 * voc_v, points)

    def ours():
        return single_diode_current(voltage_v, *args)

    def reference():
        return pvlib.pvsystem.i_from_v(voltage_v, photocurrent_a, saturation_current_a,
                                       series_resistance_ohm, shunt_resistance_ohm,
                                       n_ns_vt_v, method="lambertw")

    ours(), reference()  # warm-up (imports, caches)
    ours_s = np.inf
    pvlib_s = np.inf
    for _ in range(repeats):  # interleaved, so both see the same machine load
        t, current_ours = _best_time(ours, 1)
        ours_s = min(ours_s, t)
        t, current_ref = _best_time(reference, 1)
        pvlib_s = min(pvlib_s, t)
    double_s, _ = _best_time(
        lambda: double_diode_current(voltage_v, photocurrent_a, saturation_current_a, 1e-7,
                                     n_ns_vt_v, 2 * n_ns_vt_v, series_resistance_ohm,
                                     shunt_resistance_ohm), 1)
    return {
        "points": points,
        "ours_s": float(ours_s),
        "pvlib_s": float(pvlib_s),
        "model_eval_ratio": float(ours_s / pvlib_s),
        "max_abs_diff_a": float(np.max(np.abs(current_ours - current_ref))),
        "double_diode_s": float(double_s),
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="100k points, one repetition")
    result = run(quick=parser.parse_args(argv).quick)
    n = result["points"]
    print(f"single-diode current, {n:,} points")
    print(f"  ours  (Wright omega, log space): {result['ours_s'] * 1e3:9.1f} ms")
    print(f"  pvlib (i_from_v, lambertw):      {result['pvlib_s'] * 1e3:9.1f} ms")
    print(f"  ratio ours/pvlib:                {result['model_eval_ratio']:9.3f}"
          "   (goal <= 1)")
    print(f"  largest difference:              {result['max_abs_diff_a']:9.2e} A")
    print(f"double-diode current (ours, Newton), same points: "
          f"{result['double_diode_s'] * 1e3:.1f} ms")
    return 0


if __name__ == "__main__":
    sys.exit(main())
