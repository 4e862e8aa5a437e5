"""The engine benchmark runs and reports its figures (no timing is asserted)."""
import importlib.util
import math
from pathlib import Path

import pytest


@pytest.mark.benchmark
def test_engine_benchmark_quick_run_reports_figures():
    path = Path(__file__).resolve().parents[1] / "benchmarks" / "bench_engine.py"
    spec = importlib.util.spec_from_file_location("bench_engine", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    figures = module.run(quick=True)
    for key in ("bare_points_per_s", "driver_points_per_s", "engine_point_points_per_s",
                "engine_list_points_per_s", "engine_vs_bare_ratio", "list_vs_point_ratio"):
        assert math.isfinite(figures[key]) and figures[key] > 0, key
