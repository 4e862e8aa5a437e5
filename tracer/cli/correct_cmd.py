"""``tracer correct``: translate measured I-V curves (CSV) to other conditions, usually STC.

::

    tracer correct FILE.csv [MORE.csv ...] --procedure 1|2|3|model
        --irradiance-w-m2 G [--irradiance-w-m2 G2 ...]   one value for all files, or one per file
        --temperature-c T [--temperature-c T2 ...]       (in file order)
        [procedure 1]  --alpha-a-per-k --beta-v-per-k --series-resistance-ohm --kappa-ohm-per-k
        [procedure 2]  --alpha-rel-per-k --beta-rel-per-k --irradiance-factor
                       --series-resistance-ohm --kappa-ohm-per-k   (Rs', kappa' of procedure 2)
        [model]        --alpha-a-per-k (or --alpha-rel-per-k) --model single|double|auto
                       --bandgap-ev --cells-in-series
        [--target-irradiance-w-m2 1000] [--target-temperature-c 25] [--out FILE.csv] [--json]

CSV files: a header naming ``voltage_v`` and ``current_a`` (generator convention, Isc > 0,
as the logbook exports them); ``#`` lines are comments. When ``--irradiance-w-m2`` or
``--temperature-c`` is not given, the mean of the file's ``irradiance_w_m2`` /
``temperature_c`` column is used if it has one.

Procedures 1, 2 and model translate each file on its own and print one set of figures per
file; procedure 3 interpolates one curve from all the files (two on a line through the
target, three or more otherwise). A coefficient whose term vanishes (same temperature, or
same irradiance) may be left out; kappa defaults to 0 with a note. ``--out`` writes the
translated curve (one result only) as ``voltage_v,current_a``.

Exit status 0 on success, 2 for malformed input (one line on stderr, no traceback).
"""
from __future__ import annotations

import argparse
import json
import math
import os
import sys

import numpy as np

EXIT_OK = 0
EXIT_USAGE = 2
FIGURE_KEYS = ("isc_a", "voc_v", "imp_a", "vmp_v", "pmax_w", "ff")
PROCEDURES = ("1", "2", "3", "model")


class CorrectError(Exception):
    """Malformed input: reported as one line, exit status 2."""


def _finite_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"not a finite number: {text!r}")
    return value


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not an integer: {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be >= 1, got {value}")
    return value


def register(subparsers) -> argparse.ArgumentParser:
    p = subparsers.add_parser(
        "correct", help="translate measured I-V curves to STC (IEC 60891, diode model)",
        description="Translate I-V curves from CSV files to target conditions (default STC, "
        "1000 W/m2 and 25 C) by IEC 60891 procedure 1, 2 or 3 or by a fitted diode model "
        "moved with the De Soto relations. Currents in the generator convention.")
    p.add_argument("files", nargs="+", metavar="FILE.csv", help="measured curve(s)")
    p.add_argument("--procedure", required=True, choices=PROCEDURES,
                   help="IEC 60891 procedure 1, 2 or 3, or 'model' (diode-model translation)")
    p.add_argument("--irradiance-w-m2", action="append", type=_finite_float, metavar="G",
                   help="measured irradiance [W/m2]; once for all files or once per file")
    p.add_argument("--temperature-c", action="append", type=_finite_float, metavar="T",
                   help="measured device temperature [C]; once for all files or once per file")
    p.add_argument("--alpha-a-per-k", type=_finite_float, help="Isc temperature coefficient [A/K] (procedure 1, model)")
    p.add_argument("--beta-v-per-k", type=_finite_float, help="Voc temperature coefficient [V/K] (procedure 1)")
    p.add_argument("--alpha-rel-per-k", type=_finite_float, help="relative Isc temperature coefficient [1/K] (procedure 2, model)")
    p.add_argument("--beta-rel-per-k", type=_finite_float, help="relative Voc temperature coefficient [1/K] (procedure 2)")
    p.add_argument("--irradiance-factor", type=_finite_float, metavar="A",
                   help="procedure 2 Voc irradiance correction factor a [-]")
    p.add_argument("--series-resistance-ohm", type=_finite_float,
                   help="internal series resistance Rs (procedure 1) or Rs' (procedure 2) [ohm]")
    p.add_argument("--kappa-ohm-per-k", type=_finite_float,
                   help="curve correction factor kappa (procedure 1) or kappa' (procedure 2) [ohm/K]; default 0")
    p.add_argument("--model", choices=("single", "double", "auto"), default="single",
                   help="diode model fitted for --procedure model (default single)")
    p.add_argument("--bandgap-ev", type=_finite_float, default=1.121,
                   help="bandgap at 25 C for the De Soto I0 relation [eV] (default 1.121, c-Si)")
    p.add_argument("--target-irradiance-w-m2", type=_finite_float, default=1000.0)
    p.add_argument("--target-temperature-c", type=_finite_float, default=25.0)
    p.add_argument("--cells-in-series", type=_positive_int, default=1)
    p.add_argument("--out", metavar="FILE.csv", help="write the translated curve here")
    p.add_argument("--json", action="store_true", help="print JSON instead of text")

    def one_line_error(message: str):
        sys.stderr.write(f"tracer correct: error: {message}\n")
        raise SystemExit(EXIT_USAGE)

    p.error = one_line_error  # one line, no usage dump
    p.set_defaults(func=run)
    return p


def _read(path: str):
    from tracer.fit.csvio import read_csv_columns, read_iv_csv
    from tracer.fit.errors import FitError

    try:
        v, i = read_iv_csv(path)
    except FitError as exc:
        raise CorrectError(str(exc)) from None
    extra = {}
    for column in ("irradiance_w_m2", "temperature_c"):
        try:
            values = read_csv_columns(path, (column,))[column]
        except FitError:
            continue
        if values.size:
            extra[column] = float(np.mean(values))
    return v, i, extra


def _per_file(name: str, given: list[float] | None, files: list[str], from_files: list[dict],
              column: str) -> list[float]:
    if given:
        if len(given) == 1:
            return given * len(files)
        if len(given) != len(files):
            raise CorrectError(f"--{name} given {len(given)} times for {len(files)} files: "
                               "give it once for all files or once per file, in file order")
        return list(given)
    values = []
    for path, extra in zip(files, from_files):
        if column not in extra:
            raise CorrectError(f"--{name} is needed: {path} has no {column} column")
        values.append(extra[column])
    return values


def _require(args, names: list[str], why: str):
    missing = [n for n in names if getattr(args, n) is None]
    if missing:
        flags = " and ".join("--" + n.replace("_", "-") for n in missing)
        raise CorrectError(f"procedure {args.procedure} {why} needs {flags}")


def _note(args, text: str):
    if not args.json:
        sys.stderr.write(f"note: {text}\n")


def _translate_one(args, path, v, i, g, t):
    from tracer.stc import (
        Procedure1Coefficients,
        Procedure2Coefficients,
        curve_figures,
        translate_procedure1,
        translate_procedure2,
    )

    g2, t2 = args.target_irradiance_w_m2, args.target_temperature_c
    d_t = abs(t2 - t) > 1e-12
    d_g = abs(g2 - g) > 1e-12
    measured = curve_figures(v, i)
    details: dict = {}
    if args.procedure == "1":
        if d_t:
            _require(args, ["alpha_a_per_k", "beta_v_per_k"], f"from {t:g} C to {t2:g} C")
        if d_g or d_t:
            _require(args, ["series_resistance_ohm"], "with a change of conditions")
        if d_t and args.kappa_ohm_per_k is None:
            _note(args, "--kappa-ohm-per-k not given: kappa = 0 used")
        coeffs = Procedure1Coefficients(args.alpha_a_per_k or 0.0, args.beta_v_per_k or 0.0,
                                        args.series_resistance_ohm or 0.0, args.kappa_ohm_per_k or 0.0)
        v2, i2 = translate_procedure1(v, i, irradiance_w_m2=g, temperature_c=t,
                                      isc_a=measured.isc_a, coefficients=coeffs,
                                      target_irradiance_w_m2=g2, target_temperature_c=t2)
        details["coefficients"] = coeffs.to_dict()
        return v2, i2, curve_figures(v2, i2).to_dict(), details
    if args.procedure == "2":
        if d_t:
            _require(args, ["alpha_rel_per_k", "beta_rel_per_k"], f"from {t:g} C to {t2:g} C")
        if d_g:
            _require(args, ["irradiance_factor"], f"from {g:g} W/m2 to {g2:g} W/m2")
        if d_g or d_t:
            _require(args, ["series_resistance_ohm"], "with a change of conditions")
        if d_t and args.kappa_ohm_per_k is None:
            _note(args, "--kappa-ohm-per-k not given: kappa' = 0 used")
        coeffs = Procedure2Coefficients(args.alpha_rel_per_k or 0.0, args.beta_rel_per_k or 0.0,
                                        args.irradiance_factor or 0.0,
                                        args.series_resistance_ohm or 0.0, args.kappa_ohm_per_k or 0.0)
        v2, i2 = translate_procedure2(v, i, irradiance_w_m2=g, temperature_c=t,
                                      voc_v=measured.voc_v, coefficients=coeffs,
                                      target_irradiance_w_m2=g2, target_temperature_c=t2)
        details["coefficients"] = coeffs.to_dict()
        return v2, i2, curve_figures(v2, i2).to_dict(), details
    # diode model
    from tracer.fit import FitError, fit_curve
    from tracer.stc import translate_diode_model

    alpha = args.alpha_a_per_k
    if alpha is None and args.alpha_rel_per_k is not None:
        alpha = args.alpha_rel_per_k * measured.isc_a * 1000.0 / g
    if d_t and alpha is None:
        raise CorrectError(f"procedure model from {t:g} C to {t2:g} C needs --alpha-a-per-k "
                           "or --alpha-rel-per-k")
    try:
        fit = fit_curve(v, i, model=args.model, temperature_k=t + 273.15,
                        cells_in_series=args.cells_in_series)
    except FitError as exc:
        raise CorrectError(f"{path}: fit failed: {exc}") from None
    moved = translate_diode_model(fit.to_model(), irradiance_w_m2=g, temperature_c=t,
                                  alpha_isc_a_per_k=alpha or 0.0, target_irradiance_w_m2=g2,
                                  target_temperature_c=t2, bandgap_ev=args.bandgap_ev)
    f = moved.figures()
    voc = float(f.voc_v)
    v2 = np.linspace(min(float(np.min(v)), 0.0), 1.02 * voc, max(int(v.size), 50))
    i2 = np.asarray(moved.current(v2), dtype=float)
    details["fit"] = fit.to_dict()
    details["translated_parameters"] = {k: float(x) for k, x in moved.parameters().items()}
    return v2, i2, {k: float(getattr(f, k)) for k in FIGURE_KEYS}, details


def _write_curve(path: str, v, i, comment: str):
    try:
        with open(path, "w", encoding="utf-8", newline="") as out:
            out.write(f"# {comment}\n")
            out.write("voltage_v,current_a\n")
            for a, b in zip(v, i):
                out.write(f"{float(a)!r},{float(b)!r}\n")
    except OSError as exc:
        raise CorrectError(f"{path}: cannot write ({exc.strerror or exc})") from None


def _clean_json(x):
    if isinstance(x, float):
        return x if math.isfinite(x) else None
    if isinstance(x, dict):
        return {k: _clean_json(val) for k, val in x.items()}
    if isinstance(x, (list, tuple)):
        return [_clean_json(val) for val in x]
    return x


def run(args) -> int:
    try:
        return _run(args)
    except CorrectError as exc:
        sys.stderr.write(f"tracer correct: error: {exc}\n")
        return EXIT_USAGE
    except ValueError as exc:   # bad numbers in the data or the coefficients
        sys.stderr.write(f"tracer correct: error: {' '.join(str(exc).split())}\n")
        return EXIT_USAGE


def _run(args) -> int:
    files = list(args.files)
    for path in files:
        if not os.path.exists(path):
            raise CorrectError(f"{path}: no such file")
    if args.target_irradiance_w_m2 <= 0:
        raise CorrectError("--target-irradiance-w-m2 must be > 0")
    curves = [_read(path) for path in files]
    irradiances = _per_file("irradiance-w-m2", args.irradiance_w_m2, files,
                            [c[2] for c in curves], "irradiance_w_m2")
    temperatures = _per_file("temperature-c", args.temperature_c, files,
                             [c[2] for c in curves], "temperature_c")
    for path, g in zip(files, irradiances):
        if not g > 0:
            raise CorrectError(f"{path}: irradiance must be > 0 W/m2, got {g:g}")

    target = {"irradiance_w_m2": args.target_irradiance_w_m2,
              "temperature_c": args.target_temperature_c}
    results = []
    if args.procedure == "3":
        from tracer.stc import MeasuredCurve, curve_figures, translate_procedure3

        if len(files) < 2:
            raise CorrectError("procedure 3 needs at least two files (three for an arbitrary target)")
        measured = [MeasuredCurve(v, i, g, t) for (v, i, _), g, t in zip(curves, irradiances, temperatures)]
        r = translate_procedure3(measured, target_irradiance_w_m2=args.target_irradiance_w_m2,
                                 target_temperature_c=args.target_temperature_c)
        details = r.to_dict()
        details["curves_used"] = [files[k] for k in r.curves_used]
        results.append({"files": files, "figures": curve_figures(r.voltage_v, r.current_a).to_dict(),
                        "details": details, "_curve": (r.voltage_v, r.current_a)})
        if r.extrapolated:
            _note(args, "the target lies outside the measured conditions: procedure 3 extrapolates")
    else:
        for path, (v, i, _), g, t in zip(files, curves, irradiances, temperatures):
            v2, i2, figs, details = _translate_one(args, path, v, i, g, t)
            results.append({"files": [path], "irradiance_w_m2": g, "temperature_c": t,
                            "figures": figs, "details": details, "_curve": (v2, i2)})

    if args.out:
        if len(results) != 1:
            raise CorrectError(f"--out writes one curve, but {len(results)} files were translated "
                               "one by one; give one file")
        v2, i2 = results[0]["_curve"]
        _write_curve(args.out, v2, i2,
                     f"translated to {args.target_irradiance_w_m2:g} W/m2, "
                     f"{args.target_temperature_c:g} C by "
                     f"{'the diode model (De Soto)' if args.procedure == 'model' else 'IEC 60891 procedure ' + args.procedure}"
                     f" from {', '.join(os.path.basename(f) for f in results[0]['files'])}; "
                     "current in the generator convention")
    for r in results:
        r.pop("_curve")

    if args.json:
        out = {"procedure": args.procedure, "target": target, "results": results}
        if len(results) == 1:
            out["figures"] = results[0]["figures"]
        print(json.dumps(_clean_json(out), indent=2))
    else:
        for r in results:
            header = ", ".join(r["files"])
            print(f"{header} -> {args.target_irradiance_w_m2:g} W/m2, {args.target_temperature_c:g} C "
                  f"(procedure {args.procedure})")
            for key in FIGURE_KEYS:
                print(f"  {key:7s} {r['figures'][key]:.6g}")
    return EXIT_OK
