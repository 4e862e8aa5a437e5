"""A stored run summarised for people (a text table) and for programs (one JSON document).

:func:`run_report` reads the run, its sweeps, the latest analysis of each sweep and the
interlock trips; :func:`format_report` renders it. Both ``tracer logbook show`` and
``tracer run`` use them, so what the terminal says after a run is exactly what the logbook
holds. The analysis results are the dicts of ``tracer.analysis.AnalysisResult.to_dict``;
any field they lack is shown as ``-``.
"""
from __future__ import annotations

import math
import time
from typing import Any, Mapping

from tracer.logbook.store import Logbook, _plain

REPORT_FORMAT = "tracer-run-report/1"

# Fitted parameters shown, in order: key in the fit dict -> (label, unit, scale).
_PARAMETERS = (
    ("photocurrent_a", "Iph", "mA", 1e3),
    ("saturation_current_a", "I0", "A", None),
    ("saturation_current_1_a", "I01", "A", None),
    ("saturation_current_2_a", "I02", "A", None),
    ("ideality", "n", "", 1.0),
    ("ideality_1", "n1", "", 1.0),
    ("ideality_2", "n2", "", 1.0),
    ("series_resistance_ohm", "Rs", "ohm", 1.0),
    ("shunt_resistance_ohm", "Rsh", "ohm", 1.0),
)


def _get(mapping: Any, *keys: str) -> Any:
    for key in keys:
        if not isinstance(mapping, Mapping):
            return None
        mapping = mapping.get(key)
    return mapping


def _num(x: Any) -> float | None:
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        return None
    return float(x) if math.isfinite(x) else None


def sweep_summary(result: Mapping[str, Any] | None) -> dict[str, Any]:
    """The headline numbers of one analysis result (SI units; None where unknown)."""
    if not isinstance(result, Mapping):
        return {}
    figures = result.get("data_figures") or {}
    conditions = result.get("conditions") or {}
    stc = result.get("stc") or {}
    primary = stc.get("primary")
    stc_method = next((m for m in stc.get("methods") or () if m.get("method") == primary), None)
    stc_figures = (stc_method or {}).get("figures") or {}
    fits = {}
    for model, fit in (result.get("fits") or {}).items():
        if not isinstance(fit, Mapping):
            continue
        unc = fit.get("uncertainty") or {}
        params = {key: {"value": _num(fit.get(key)), "uncertainty": _num(unc.get(key))}
                  for key, *_ in _PARAMETERS if key in fit}
        fits[model] = {"parameters": params, "rmse_a": _num(fit.get("rmse_a")),
                       "selection_reason": fit.get("selection_reason")}
    verdict = result.get("verdict") or {}
    return {
        "isc_a": _num(figures.get("isc_a")),
        "voc_v": _num(figures.get("voc_v")),
        "pmax_w": _num(figures.get("pmax_w")),
        "vmp_v": _num(figures.get("vmp_v")),
        "imp_a": _num(figures.get("imp_a")),
        "ff": _num(figures.get("ff")),
        "efficiency": _num(result.get("efficiency")),
        "irradiance_w_m2": _num(conditions.get("irradiance_w_m2")),
        "irradiance_source": conditions.get("irradiance_source"),
        "temperature_c": _num(conditions.get("temperature_c")),
        "fits": fits,
        "fit_errors": dict(result.get("fit_errors") or {}),
        "stc": None if not primary else {
            "method": primary,
            "isc_a": _num(stc_figures.get("isc_a")),
            "voc_v": _num(stc_figures.get("voc_v")),
            "pmax_w": _num(stc.get("pmax_w")) if _num(stc.get("pmax_w")) is not None
            else _num(stc_figures.get("pmax_w")),
            "ff": _num(stc_figures.get("ff")),
            "efficiency": _num(stc.get("efficiency")),
            "pmax_expanded_uncertainty_w": _num(_get(stc, "pmax_budget", "expanded_uncertainty")),
            "coverage_factor": _num(_get(stc, "pmax_budget", "coverage_factor")),
            "target_irradiance_w_m2": _num(_get(stc, "target", "irradiance_w_m2")),
            "target_temperature_c": _num(_get(stc, "target", "temperature_c")),
        },
        "stc_error": result.get("stc_error"),
        "verdict": verdict.get("verdict"),
        "verdict_reasons": [{"code": r.get("code"), "message": r.get("message")}
                            for r in verdict.get("reasons") or () if isinstance(r, Mapping)],
        "errors": list(result.get("errors") or ()),
    }


def run_report(logbook: Logbook, run_ref: str, *, include_analysis: bool = True) -> dict[str, Any]:
    """One JSON-safe document describing a stored run."""
    run = logbook.run(run_ref)
    sweeps = []
    for sw in logbook.sweeps(run.uid):
        latest = logbook.latest_analysis(sw.uid)
        entry = {
            "uid": sw.uid, "index": sw.sweep_index, "step_index": sw.step_index,
            "step_name": sw.step_name, "kind": sw.kind, "light": sw.light,
            "direction": sw.direction, "pixel": sw.pixel, "points": sw.points_stored,
            "points_planned": sw.points_planned, "status": sw.status, "reason": sw.reason,
            "started_at": sw.started_at, "ended_at": sw.ended_at,
            "summary": sweep_summary(latest.result if latest else None),
        }
        if include_analysis:
            entry["analysis"] = latest.result if latest else None
        sweeps.append(entry)
    return _plain({
        "format": REPORT_FORMAT,
        "logbook": str(logbook.path),
        "run": {
            "uid": run.uid, "protocol_name": run.protocol_name,
            "protocol_sha256": run.protocol_sha256, "sample_id": run.sample_id,
            "sample": run.sample, "operator": run.operator, "bench_name": run.bench_name,
            "software_version": run.software_version, "started_at": run.started_at,
            "ended_at": run.ended_at, "status": run.status, "reason": run.reason,
            "output_verified_off": run.output_verified_off,
            "points": sum(s["points"] for s in sweeps),
        },
        "instruments": [{"role": i.role, "identity": i.identity, "address": i.address,
                         "driver": i.driver} for i in run.instruments],
        "sweeps": sweeps,
        "interlocks": [t.to_dict() for t in logbook.interlocks(run.uid)],
    })


# ----------------------------------------------------------------------------- text
def _fmt(x: Any, scale: float = 1.0, digits: int = 4) -> str:
    x = _num(x)
    if x is None:
        return "-"
    return f"{x * scale:.{digits}g}"


def format_with_uncertainty(value: float | None, uncertainty: float | None, *,
                            scale: float | None = 1.0, unit: str = "") -> str:
    """``value ± u`` with u to two significant digits and the value to the same decimal
    place (common practice, GUM 7.2.6); scientific notation when ``scale`` is None."""
    value = _num(value)
    unit = f" {unit}" if unit else ""
    if value is None:
        return "-"
    u = _num(uncertainty)
    if scale is None:
        if u is None or u == 0:
            return f"{value:.3e}{unit}"
        return f"{value:.3e} ± {u:.2g}{unit}"
    v, uu = value * scale, None if u is None else abs(u * scale)
    if uu is None or uu == 0:
        return f"{v:.6g}{unit}"
    if max(abs(v), uu) >= 1e6 or uu > 10 * abs(v):
        # an undetermined parameter or a huge number: fixed-point digits would mislead
        return f"{v:.4g} ± {uu:.2g}{unit}"
    decimals = max(0, 1 - int(math.floor(math.log10(uu))))
    return f"{v:.{decimals}f} ± {uu:.{decimals}f}{unit}"


def _when(t: float | None) -> str:
    if t is None:
        return "-"
    return time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(t))


def format_report(report: Mapping[str, Any]) -> str:
    """The report as text: run header, one table row per sweep, then per-sweep detail."""
    run = report["run"]
    lines = [
        f"Run {run['uid']}  {run['status'].upper()}" + (f": {run['reason']}" if run.get("reason") else ""),
        f"  protocol {run['protocol_name']} (sha256 {str(run['protocol_sha256'])[:12]}), "
        f"sample {run['sample_id']}, operator {run['operator'] or '-'}, bench {run['bench_name'] or '-'}",
        f"  started {_when(run['started_at'])}, ended {_when(run['ended_at'])}, "
        f"{run['points']} points, output verified off: "
        f"{'-' if run.get('output_verified_off') is None else ('yes' if run['output_verified_off'] else 'NO')}",
    ]
    for inst in report.get("instruments") or ():
        lines.append(f"  {inst['role']}: {inst['identity'] or '?'} at {inst['address'] or '?'}")
    header = ("#", "step", "light", "dir", "pixel", "points", "status", "Isc mA", "Voc V",
              "Pmax mW", "FF %", "eff %", "verdict")
    rows = []
    for sw in report.get("sweeps") or ():
        s = sw.get("summary") or {}
        rows.append((str(sw["index"]), sw["step_name"], "light" if sw["light"] else "dark",
                     sw["direction"], "-" if sw["pixel"] is None else str(sw["pixel"]),
                     str(sw["points"]), sw["status"], _fmt(s.get("isc_a"), 1e3),
                     _fmt(s.get("voc_v")), _fmt(s.get("pmax_w"), 1e3), _fmt(s.get("ff"), 100),
                     _fmt(s.get("efficiency"), 100), s.get("verdict") or "-"))
    if rows:
        widths = [max(len(h), *(len(r[k]) for r in rows)) for k, h in enumerate(header)]
        lines.append("")
        lines.append("  ".join(h.ljust(w) for h, w in zip(header, widths)).rstrip())
        for r in rows:
            lines.append("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip())
    for sw in report.get("sweeps") or ():
        s = sw.get("summary") or {}
        detail = []
        if sw.get("reason"):
            detail.append(f"    stopped: {sw['reason']}")
        cond = []
        if s.get("irradiance_w_m2") is not None:
            cond.append(f"G {s['irradiance_w_m2']:.1f} W/m2 ({s.get('irradiance_source') or '?'})")
        if s.get("temperature_c") is not None:
            cond.append(f"T {s['temperature_c']:.2f} C")
        if cond:
            detail.append("    conditions: " + ", ".join(cond))
        for model, fit in (s.get("fits") or {}).items():
            parts = []
            for key, label, unit, scale in _PARAMETERS:
                p = fit["parameters"].get(key)
                if p is None or (key == "photocurrent_a" and not p["value"] and not sw["light"]):
                    continue
                parts.append(f"{label} {format_with_uncertainty(p['value'], p['uncertainty'], scale=scale, unit=unit)}")
            rmse = fit.get("rmse_a")
            if rmse is not None:
                parts.append(f"RMSE {rmse:.2e} A")
            detail.append(f"    {model}-diode fit: " + ", ".join(parts))
        for model, message in (s.get("fit_errors") or {}).items():
            detail.append(f"    {model}-diode fit failed: {message}")
        stc = s.get("stc")
        if stc:
            pm = stc.get("pmax_w")
            u = stc.get("pmax_expanded_uncertainty_w")
            k = stc.get("coverage_factor")
            pmax = format_with_uncertainty(pm, u, scale=1e3, unit="mW") + (
                f" (k={k:g})" if u is not None and k is not None else "")
            detail.append(
                f"    at STC ({_fmt(stc.get('target_irradiance_w_m2'))} W/m2, "
                f"{_fmt(stc.get('target_temperature_c'))} C; {stc['method']}): "
                f"Isc {_fmt(stc.get('isc_a'), 1e3)} mA, Voc {_fmt(stc.get('voc_v'))} V, "
                f"Pmax {pmax}, FF {_fmt(stc.get('ff'), 100)} %, eff {_fmt(stc.get('efficiency'), 100)} %")
        elif s.get("stc_error") and sw["light"]:
            detail.append(f"    no STC values: {s['stc_error']}")
        for reason in s.get("verdict_reasons") or ():
            detail.append(f"    {s.get('verdict')}: {reason['code']}: {reason['message']}")
        if detail:
            lines.append(f"  sweep {sw['index']} ({sw['step_name']}):")
            lines.extend(detail)
    for trip in report.get("interlocks") or ():
        lines.append(f"  INTERLOCK {trip['cause']}: {trip['message']}")
    return "\n".join(lines)
