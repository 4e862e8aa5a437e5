"""The figures of the performance report: where each comes from, its goal, how it prints.

A :class:`Figure` names the benchmark that measures it, the key of that benchmark's result
that holds the figure, the keys that hold "ours" and the baseline measured in the same run,
and the goal. :func:`evaluate` turns the benchmarks' results into report rows; a figure
whose benchmark failed, is missing or did not report the key gets ``value=None`` and the
reason in ``error``, never a made-up number.
"""
from __future__ import annotations

import math
import operator
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping

_OPS: dict[str, Callable[[float, float], bool]] = {
    "<": operator.lt, "<=": operator.le, ">": operator.gt, ">=": operator.ge,
}


@dataclass(frozen=True)
class Goal:
    """``value <op> threshold`` must hold, e.g. ``Goal("<", 20.0)``."""

    op: str
    threshold: float

    def __post_init__(self) -> None:
        if self.op not in _OPS:
            raise ValueError(f"unknown goal operator {self.op!r}; allowed: {', '.join(_OPS)}")

    def met(self, value: float | None) -> bool | None:
        """True/False, or None when there is no value to judge."""
        if value is None:
            return None
        return bool(_OPS[self.op](value, self.threshold))

    def __str__(self) -> str:
        return f"{self.op} {self.threshold:,g}"


@dataclass(frozen=True)
class Side:
    """One of the "ours" / "baseline" columns: a result key, a scale and a unit."""

    key: str
    unit: str = ""
    scale: float = 1.0          # multiply the stored value by this to get ``unit``
    label: str = ""             # what the baseline is (printed beside the table)

    def read(self, result: Mapping[str, Any]) -> float | None:
        return _finite(result.get(self.key), self.scale)


@dataclass(frozen=True)
class Figure:
    """One row of the report."""

    key: str                    # the JSON key of the figure (and the benchmark's result key)
    benchmark: str              # the benchmark's short name (see tracer.perf.runner.BENCHMARKS)
    label: str                  # what is measured, for a person
    unit: str                   # unit of the figure itself ("" for a ratio)
    goal: Goal | None           # None: shown for information, no goal
    ours: Side | None = None
    baseline: Side | None = None
    ratio_key: str | None = None    # result key of ours/baseline; None: computed if possible
    figure_is_ratio: bool = False   # the figure itself is the ratio column
    source_key: str | None = None   # the benchmark's key for the figure, when not ``key``


@dataclass
class Row:
    """A figure as measured in this run (``value`` None => ``error`` says why)."""

    figure: Figure
    value: float | None = None
    ours: float | None = None
    baseline: float | None = None
    ratio: float | None = None
    error: str | None = None
    met: bool | None = None
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        f = self.figure
        return {
            "key": f.key, "label": f.label, "benchmark": f.benchmark, "unit": f.unit,
            "value": self.value,
            "ours": self.ours, "ours_unit": f.ours.unit if f.ours else None,
            "baseline": self.baseline, "baseline_unit": f.baseline.unit if f.baseline else None,
            "baseline_is": f.baseline.label if f.baseline else None,
            "ratio": self.ratio,
            "goal": None if f.goal is None else str(f.goal),
            "met": self.met, "error": self.error,
        }


#: The figures with goals, in the order the report prints them.
FIGURES: tuple[Figure, ...] = (
    Figure("model_eval_ratio", "model",
           "single-diode current, 1,000,000 points (100,000 quick): time ours/pvlib", "",
           Goal("<=", 1.0),
           ours=Side("ours_s", "ms", 1e3), baseline=Side("pvlib_s", "ms", 1e3,
                                                         "pvlib i_from_v (lambertw)"),
           ratio_key="model_eval_ratio", figure_is_ratio=True),
    Figure("fit_single_ms", "fit",
           "single-diode fit, median of 100 (20 quick) noisy 500-point curves", "ms",
           Goal("<", 20.0),
           ours=Side("fit_single_ms", "ms"),
           baseline=Side("baseline_sandia_ms", "ms", 1.0, "pvlib fit_sandia_simple")),
    Figure("fit_double_ms", "fit",
           "double-diode fit, median of 100 (20 quick) noisy 500-point curves", "ms",
           Goal("<", 100.0),
           ours=Side("fit_double_ms", "ms"),
           baseline=Side("baseline_sandia_ms", "ms", 1.0,
                         "pvlib fit_sandia_simple (single-diode)")),
    Figure("fit_single_rmse_ratio_vs_baseline", "fit",
           "single-diode fit RMSE / Isc, median: ours/pvlib", "", Goal("<=", 1.0),
           ours=Side("fit_single_rmse_of_isc", ""),
           baseline=Side("baseline_sandia_rmse_of_isc", "", 1.0, "pvlib fit_sandia_simple"),
           ratio_key="fit_single_rmse_ratio_vs_baseline", figure_is_ratio=True),
    Figure("engine_vs_bare_ratio", "engine",
           "engine point-by-point sweep vs bare pyvisa set-and-measure loop: points/s ratio",
           "", Goal(">=", 0.8),
           ours=Side("engine_point_points_per_s", "points/s"),
           baseline=Side("bare_points_per_s", "points/s", 1.0,
                         "bare pyvisa loop on the same simulated SMU"),
           ratio_key="engine_vs_bare_ratio", figure_is_ratio=True),
    Figure("list_vs_point_ratio", "engine", "engine list sweep vs point-by-point: points/s ratio",
           "", Goal(">=", 5.0),
           ours=Side("engine_list_points_per_s", "points/s"),
           baseline=Side("engine_point_points_per_s", "points/s", 1.0,
                         "the engine's point-by-point sweep"),
           ratio_key="list_vs_point_ratio", figure_is_ratio=True),
    Figure("analysis_latency_ms", "analysis",
           "1,000-point sweep: last point to analysis ready (engine, simulated bench)", "ms",
           Goal("<", 100.0),
           ours=Side("analysis_latency_ms", "ms"),
           baseline=Side("analysis_direct_ms", "ms", 1.0,
                         "the same analyser called directly on the same sweep")),
    Figure("logbook_durable_points_per_s", "logbook",
           "logbook: durable points/s (one commit per point)", "points/s", Goal(">=", 20_000.0),
           ours=Side("logbook_durable_points_per_s", "points/s"),
           baseline=Side("logbook_one_transaction_points_per_s", "points/s", 1.0,
                         "the same points in one transaction"),
           ratio_key="logbook_durable_over_one_transaction"),
    Figure("gui_worst_frame_ms", "gui",
           "live plot, 20,000 points (4,000 quick) at 2,000/s offscreen: worst frame", "ms",
           Goal("<", 50.0),
           ours=Side("gui_worst_frame_ms", "ms"),
           baseline=Side("gui_naive_worst_frame_ms", "ms", 1.0,
                         "a naive redraw (clear and replot every sweep on each tick)")),
)

#: Figures without a goal, printed for information.
INFO_FIGURES: tuple[Figure, ...] = (
    Figure("analysis_single_only_ms", "analysis",
           "the same 1,000 points analysed with the single-diode fit only, no translation",
           "ms", None, ours=Side("analysis_single_only_ms", "ms")),
    Figure("simulator_read_vs_echo_ratio", "simulator",
           "simulated SMU READ? rate / bare TCP echo rate (pyvisa-py)", "", None,
           ours=Side("simulator_read_qps", "queries/s"),
           baseline=Side("echo_qps", "queries/s", 1.0, "pyvisa-py against a bare echo server"),
           ratio_key="read_vs_echo_ratio", figure_is_ratio=True),
    Figure("driver_point_us", "drivers",
           "driver set_level_and_measure (NPLC 0), median", "us", None,
           source_key="set_level_and_measure, NPLC 0 [us]",
           ours=Side("set_level_and_measure, NPLC 0 [us]", "us"),
           baseline=Side("baseline: bare socket *IDN? round trip [us]", "us", 1.0,
                         "bare socket *IDN? round trip")),
)

#: The keys every report carries at its top level (value or null with an error).
REQUIRED_KEYS: tuple[str, ...] = tuple(f.key for f in FIGURES)


def _finite(value: Any, scale: float = 1.0) -> float | None:
    if isinstance(value, bool) or value is None:
        return None
    try:
        x = float(value) * scale
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


def _number(x: float) -> str:
    if x == 0:
        return "0"
    ax = abs(x)
    if ax >= 10_000:
        return f"{x:,.0f}"
    if ax >= 100:
        return f"{x:.0f}"
    if ax >= 1:
        return f"{x:.3g}" if ax < 10 else f"{x:.1f}"
    if ax >= 1e-3:
        return f"{x:.3f}"
    return f"{x:.2e}"


def evaluate(figure: Figure, outcome: Mapping[str, Any] | None) -> Row:
    """A report row from a benchmark's outcome (``{"result": dict|None, "error": str|None}``)."""
    row = Row(figure)
    if outcome is None:
        row.error = f"benchmark {figure.benchmark!r} was not run"
        return row
    result = outcome.get("result")
    if not isinstance(result, Mapping):
        row.error = outcome.get("error") or f"benchmark {figure.benchmark!r} returned no result"
        return row
    row.ours = figure.ours.read(result) if figure.ours else None
    row.baseline = figure.baseline.read(result) if figure.baseline else None
    if figure.ratio_key is not None:
        row.ratio = _finite(result.get(figure.ratio_key))
    elif row.ours is not None and row.baseline:
        row.ratio = row.ours / row.baseline
    key = figure.ratio_key if figure.figure_is_ratio else (figure.source_key or figure.key)
    raw = result.get(key)
    row.value = _finite(raw)
    if row.value is None:
        if key not in result:
            keys = ", ".join(sorted(map(str, result))) or "none"
            row.error = (f"benchmark {figure.benchmark!r} did not report {key!r} "
                         f"(its keys: {keys})")
        else:
            row.error = f"benchmark {figure.benchmark!r} reported {key!r} = {raw!r}, not a number"
    if outcome.get("error") and row.error is None and row.value is None:
        row.error = outcome["error"]
    row.met = figure.goal.met(row.value) if figure.goal else None
    return row


def format_value(x: float | None, unit: str = "") -> str:
    if x is None:
        return "-"
    text = _number(x)
    return f"{text} {unit}".rstrip() if unit else text


def _met_text(met: bool | None, goal: str | None) -> str:
    if goal is None:
        return "info"
    return "-" if met is None else ("yes" if met else "NO")


def format_report(report: Mapping[str, Any]) -> str:
    """The report as a plain-text table (the same figures as its JSON)."""
    header = ("figure", "ours", "baseline", "ratio", "goal", "met")
    lines: list[tuple[str, ...]] = []
    notes: list[str] = []
    for row in list(report.get("figures", ())) + list(report.get("info_figures", ())):
        if row.get("value") is None:
            lines.append((row["key"], "ERROR", "-", "-", row.get("goal") or "-",
                          _met_text(None, row.get("goal"))))
            notes.append(f"  {row['key']}: {row.get('error') or 'no value'}")
            continue
        ratio = row.get("ratio")
        goal = row.get("goal")
        lines.append((
            row["key"],
            format_value(row.get("ours") if row.get("ours") is not None else row.get("value"),
                         row.get("ours_unit") or row.get("unit") or ""),
            format_value(row.get("baseline"), row.get("baseline_unit") or ""),
            format_value(ratio),
            "-" if goal is None else f"{goal} {row.get('unit') or ''}".rstrip(),
            _met_text(row.get("met"), goal),
        ))
    widths = [max(len(r[k]) for r in [header] + lines) for k in range(len(header))]

    def fmt(r: tuple[str, ...]) -> str:
        first = r[0].ljust(widths[0])
        rest = [r[k].rjust(widths[k]) if k in (1, 2, 3) else r[k].ljust(widths[k])
                for k in range(1, len(r))]
        return "  ".join([first] + rest).rstrip()

    machine = report.get("machine") or {}
    out = [f"{report.get('command', 'tracer bench')}  ({report.get('size')} size)  "
           f"{report.get('date_utc', '')}",
           f"machine: {machine.get('cores')} cores ({machine.get('cpu') or 'cpu unknown'}), "
           f"{machine.get('memory_gib', '?')} GiB, {machine.get('system', '')}, "
           f"Python {machine.get('python', '')}, load average "
           f"{machine.get('load_average_1min_at_start', '?')} at the start",
           "", fmt(header), fmt(tuple("-" * w for w in widths))]
    out += [fmt(r) for r in lines]
    out.append("")
    out.append(f"goals met: {report.get('goals_met')} of {report.get('goals_total')} "
               f"({report.get('goals_measured')} measured); "
               f"total {report.get('total_s') or 0:.0f} s")
    out.append("ratio = ours / baseline, both measured in this run; the goal applies to the "
               "ratio where the figure is one.")
    legend = []
    for row in list(report.get("figures", ())) + list(report.get("info_figures", ())):
        base = row.get("baseline_is")
        legend.append(f"  {row['key']}: {row['label']}" + (f"; baseline: {base}" if base else ""))
    out.append("figures:")
    out += legend
    if notes:
        out.append("errors:")
        out += notes
    return "\n".join(out)
