"""The performance report behind ``tracer bench``: every benchmark in one run, its figures
beside a baseline measured in the same run and the project's goals.

::

    from tracer.perf import run_report, format_report, REQUIRED_KEYS
    report = run_report("quick")          # "full" | "quick"
    print(format_report(report))
    report["analysis_latency_ms"]         # a number, or None with report["errors"][key]

Each benchmark runs in a child process (see :mod:`tracer.perf.runner`); the figures, their
goals and baselines are listed in :mod:`tracer.perf.figures`; the end-of-sweep analysis
latency is measured by :mod:`tracer.perf.analysis_latency`.
"""
from .figures import FIGURES, INFO_FIGURES, REQUIRED_KEYS, Figure, Goal, format_report
from .runner import BENCHMARKS, SIZES, default_benchmark_dir, run_report

__all__ = ["run_report", "format_report", "FIGURES", "INFO_FIGURES", "REQUIRED_KEYS",
           "Figure", "Goal", "BENCHMARKS", "SIZES", "default_benchmark_dir"]
