"""The model benchmark runs and reports finite figures (no timing is asserted)."""
import importlib.util
import math
from pathlib import Path

import pytest


def _load_bench():
    path = Path(__file__).with_name("bench_model.py")
    spec = importlib.util.spec_from_file_location("bench_model", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.mark.benchmark
def test_model_benchmark_quick_run_reports_figures():
    pytest.importorskip("pvlib")
    result = _load_bench().run(quick=True)
    for key in ("ours_s", "pvlib_s", "model_eval_ratio"):
        assert key in result
        assert math.isfinite(result[key]) and result[key] > 0
    # both codes computed the same curve (pvlib is the oracle, see tests/model)
    assert result["max_abs_diff_a"] < 1e-9
