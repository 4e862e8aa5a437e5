"""The simulator benchmark runs and reports finite figures (no timing is asserted)."""
import importlib.util
import math
from pathlib import Path

import pytest


@pytest.mark.benchmark
def test_simulator_benchmark_quick_run_reports_figures():
    path = Path(__file__).resolve().parents[1] / "benchmarks" / "bench_simulator.py"
    spec = importlib.util.spec_from_file_location("bench_simulator", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    result = module.run(quick=True)
    for key in ("simulator_read_qps", "simulator_idn_qps", "simulator_raw_read_qps", "echo_qps",
                "read_vs_echo_ratio"):
        assert math.isfinite(result[key]) and result[key] > 0
