"""`tracer fit`: diode-model parameters of a measured curve stored as CSV."""
from __future__ import annotations

import json
import math
import sys

EXIT_OK = 0
EXIT_BAD_INPUT = 2


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "fit",
        help="fit a single- or double-diode model to an I-V curve in a CSV file",
        description="Fit a single- or double-diode equivalent circuit to one I-V curve. "
        "The CSV file needs a header with the columns voltage_v and current_a (other "
        "columns are ignored; lines starting with # are comments).",
    )
    parser.add_argument("file", metavar="FILE.csv", help="CSV file with voltage_v,current_a")
    parser.add_argument("--model", choices=("single", "double", "auto"), default="single",
                        help="equivalent circuit; auto chooses by BIC (default: single)")
    parser.add_argument("--temperature-c", type=float, default=25.0, metavar="T",
                        help="cell temperature [degC] (default: 25)")
    parser.add_argument("--cells-in-series", type=int, default=1, metavar="N",
                        help="cells in series in the device (default: 1)")
    parser.add_argument("--convention", choices=("generator", "load"), default="generator",
                        help="sign of current_a in the file: generator (Isc > 0, default) or "
                        "load (as an SMU reports it)")
    parser.add_argument("--dark", action="store_true",
                        help="dark curve: no photocurrent, fit on log|I|")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.set_defaults(func=run)


def _fail(message: str) -> int:
    print(f"tracer fit: error: {message}", file=sys.stderr)
    return EXIT_BAD_INPUT


def run(args) -> int:
    from tracer.conventions import generator_current
    from tracer.fit import FitError, fit_curve
    from tracer.fit.csvio import read_iv_csv

    if not math.isfinite(args.temperature_c) or args.temperature_c <= -273.15:
        return _fail(f"--temperature-c {args.temperature_c!r} is not a temperature above "
                     "absolute zero")
    if args.cells_in_series < 1:
        return _fail(f"--cells-in-series must be at least 1, got {args.cells_in_series}")
    try:
        voltage, current = read_iv_csv(args.file)
        if args.convention == "load":
            current = generator_current(current)
        result = fit_curve(voltage, current, model=args.model,
                           temperature_k=args.temperature_c + 273.15,
                           cells_in_series=args.cells_in_series, dark=args.dark)
    except FitError as exc:
        return _fail(str(exc))

    if args.json:
        print(json.dumps(result.to_dict(), allow_nan=False))
    else:
        print(format_table(result, args.file))
    return EXIT_OK


_LABELS = {
    "photocurrent_a": ("Iph", "A"),
    "saturation_current_a": ("I0", "A"),
    "saturation_current_1_a": ("I01", "A"),
    "saturation_current_2_a": ("I02", "A"),
    "ideality": ("n", ""),
    "ideality_1": ("n1", ""),
    "ideality_2": ("n2", ""),
    "series_resistance_ohm": ("Rs", "ohm"),
    "shunt_resistance_ohm": ("Rsh", "ohm"),
}
_FIGURE_LABELS = (("isc_a", "Isc", "A"), ("voc_v", "Voc", "V"), ("imp_a", "Imp", "A"),
                  ("vmp_v", "Vmp", "V"), ("pmax_w", "Pmax", "W"), ("ff", "FF", ""))


def _num(x: float) -> str:
    if x is None or not math.isfinite(x):
        return "inf" if x is not None and x > 0 else "n/a"
    return f"{x:.6g}"


def format_table(result, source: str = "") -> str:
    """Readable multi-line summary of a :class:`tracer.fit.FitResult`."""
    kind = "double-diode" if result.model == "double" else "single-diode"
    lines = [f"{kind} fit{' of ' + source if source else ''}"
             f" ({result.n_points} points, T = {result.temperature_k - 273.15:.2f} degC, "
             f"Ns = {result.cells_in_series}{', dark' if result.dark else ''})"]
    for key, value in result.parameters.items():
        label, unit = _LABELS[key]
        sigma = result.uncertainty[key]
        if result.dark and key == "photocurrent_a":
            lines.append(f"  {label:<5} {_num(value):>14}        (fixed, dark curve) {unit}")
            continue
        lines.append(f"  {label:<5} {_num(value):>14} +/- {_num(sigma):<12} {unit}")
    lines.append(f"  RMSE  {_num(result.rmse_a):>13} A")
    if result.rmse_log is not None:
        lines.append(f"  RMS of ln|I| residual {_num(result.rmse_log)}")
    figures = result.figures_dict()
    if figures:
        lines.append("  figures of the fitted model:")
        for key, label, unit in _FIGURE_LABELS:
            lines.append(f"    {label:<5} {_num(figures[key]):>14} {unit}")
    lines.append(f"  {result.selection_reason}")
    for note in result.notes:
        lines.append(f"  note: {note}")
    lines.append(f"  fit time {result.elapsed_s * 1e3:.1f} ms")
    return "\n".join(lines)
