"""The results of one sweep as tables of text — shared by the results panel and its
"copy" button (tab-separated). No Qt here.

Input: the ``result`` dict of an ``Analysis`` event (``tracer.analysis``: ``data_figures``,
``fits`` with ``uncertainty``, ``stc`` with its ``methods`` and ``primary``, ``verdict``
with ``reasons``). Currents are shown in mA, power in mW, FF and efficiency in %.

Uncertainties are quoted with two significant digits and the value rounded to the same
decimal place (JCGM 100:2008, the GUM, 7.2.6).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

DASH = "–"

METHOD_NAMES = {
    "procedure1": "IEC 60891 proc. 1",
    "procedure2": "IEC 60891 proc. 2",
    "procedure3": "IEC 60891 proc. 3",
    "diode_model": "diode model",
}
METHOD_LONG_NAMES = {
    "procedure1": "IEC 60891 procedure 1",
    "procedure2": "IEC 60891 procedure 2",
    "procedure3": "IEC 60891 procedure 3",
    "diode_model": "diode-model translation (De Soto relations)",
}

MODEL_NAMES = {"single": "single diode", "double": "double diode", "auto": "auto"}

# (result key, shown name, unit, scale, scientific)
FIT_PARAMETERS = (
    ("photocurrent_a", "Iph", "mA", 1e3, False),
    ("saturation_current_a", "I0", "A", 1.0, True),
    ("saturation_current_1_a", "I01", "A", 1.0, True),
    ("saturation_current_2_a", "I02", "A", 1.0, True),
    ("ideality", "n", "", 1.0, False),
    ("ideality_1", "n1", "", 1.0, False),
    ("ideality_2", "n2", "", 1.0, False),
    ("series_resistance_ohm", "Rs", "Ω", 1.0, False),
    ("shunt_resistance_ohm", "Rsh", "Ω", 1.0, False),
)


@dataclass(frozen=True)
class Table:
    title: str
    header: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    notes: tuple[str, ...] = ()          # lines shown (and copied) under the table


def _finite(x: Any) -> float | None:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


def fmt(x: Any, scale: float = 1.0, digits: int = 4) -> str:
    """A number with ``digits`` significant digits (no exponent for everyday sizes)."""
    v = _finite(x)
    if v is None:
        return DASH
    v *= scale
    if v != 0 and (abs(v) >= 1e6 or abs(v) < 1e-3):
        return f"{v:.{digits - 1}e}"
    decimals = max(0, digits - 1 - (int(math.floor(math.log10(abs(v)))) if v else 0))
    return f"{v:.{min(decimals, 9)}f}"


def fmt_pm(value: Any, uncertainty: Any, scale: float = 1.0, scientific: bool = False) -> str:
    """``value ± u``: u to two significant digits, the value to the same decimal place
    (GUM 7.2.6); ``(m ± um)e±XX`` in scientific style."""
    v = _finite(value)
    if v is None:
        return DASH
    v *= scale
    u = _finite(uncertainty)
    if u is None or u <= 0:
        return fmt(v) if not scientific else f"{v:.3e}"
    u = abs(u * scale)
    if scientific or u >= 1e5 or (v != 0 and (abs(v) >= 1e6 or abs(v) < 1e-3)):
        # one exponent for both, that of the larger: a useless fit (u >> |v|) shows as such
        e = int(math.floor(math.log10(max(abs(v), u))))
        m, um = v / 10.0 ** e, u / 10.0 ** e
        d = min(max(0, 1 - int(math.floor(math.log10(um)))), 6)
        return f"({m:.{d}f} ± {um:.{d}f})e{e:+03d}"
    d = min(max(0, 1 - int(math.floor(math.log10(u)))), 9)
    return f"{v:.{d}f} ± {u:.{d}f}"


def _figures_of(mapping: Any) -> Mapping[str, Any]:
    return mapping if isinstance(mapping, Mapping) else {}


def primary_stc(result: Mapping[str, Any]) -> tuple[str | None, Mapping[str, Any]]:
    stc = result.get("stc") or {}
    primary = stc.get("primary")
    for m in stc.get("methods") or ():
        if m.get("method") == primary and m.get("ok"):
            return primary, _figures_of(m.get("figures"))
    return None, {}


def figures_table(result: Mapping[str, Any], fit_name: str | None = None) -> Table | None:
    """Isc, Voc, Pmax, FF, ... from the points, from the chosen fit and at STC."""
    data = _figures_of(result.get("data_figures"))
    fits = result.get("fits") or {}
    if fit_name is None and fits:
        fit_name = "auto" if "auto" in fits else next(iter(fits))
    fit = (fits.get(fit_name) or {}) if fit_name else {}
    fitfig = _figures_of(fit.get("figures"))
    method, stcfig = primary_stc(result)
    if not data and not fitfig and not stcfig:
        return None
    stc = result.get("stc") or {}
    area = _finite((result.get("conditions") or {}).get("area_cm2"))
    header = ("quantity", "measured", "fit", "at STC")
    notes = ["measured: from the points; fit: the "
             + (f"{MODEL_NAMES.get(fit.get('model', fit_name), fit_name)} fit" if fit_name
                else "model fit")
             + (f"; at STC: {METHOD_LONG_NAMES.get(method, method)}" if method else "")]
    rows: list[tuple[str, ...]] = []

    def row(name: str, key: str, scale: float = 1.0):
        rows.append((name, fmt(data.get(key), scale), fmt(fitfig.get(key), scale),
                     fmt(stcfig.get(key), scale)))

    row("Isc (mA)", "isc_a", 1e3)
    if area:
        rows.append(("Jsc (mA/cm²)", fmt(data.get("isc_a"), 1e3 / area),
                     fmt(fitfig.get("isc_a"), 1e3 / area), fmt(stcfig.get("isc_a"), 1e3 / area)))
    row("Voc (V)", "voc_v")
    budget = stc.get("pmax_budget") or {}
    pmax_stc = fmt(stcfig.get("pmax_w"), 1e3)
    if _finite(budget.get("expanded_uncertainty")) and method:
        pmax_stc = fmt_pm(stcfig.get("pmax_w"), budget.get("expanded_uncertainty"), 1e3)
        k = _finite(budget.get("coverage_factor"))
        notes.append(f"± at STC: expanded uncertainty (k = {k:g}, GUM)" if k else
                     "± at STC: expanded uncertainty (GUM)")
    rows.append(("Pmax (mW)", fmt(data.get("pmax_w"), 1e3), fmt(fitfig.get("pmax_w"), 1e3),
                 pmax_stc))
    row("FF (%)", "ff", 100.0)
    row("Vmp (V)", "vmp_v")
    row("Imp (mA)", "imp_a", 1e3)
    eff_budget = stc.get("efficiency_budget") or {}
    eff_stc = fmt(stc.get("efficiency"), 100.0)
    if _finite(eff_budget.get("expanded_uncertainty")) and _finite(stc.get("efficiency")):
        eff_stc = fmt_pm(stc.get("efficiency"), eff_budget.get("expanded_uncertainty"), 100.0)
    rows.append(("efficiency (%)", fmt(result.get("efficiency"), 100.0), DASH, eff_stc))
    return Table("Figures of merit", header, tuple(rows), tuple(notes))


def fit_table(result: Mapping[str, Any]) -> Table | None:
    """Fitted parameters with their standard uncertainties, one column per model."""
    fits = result.get("fits") or {}
    errors = result.get("fit_errors") or {}
    names = list(fits) + [m for m in errors if m not in fits]
    if not names:
        return None
    header = ["parameter"]
    for name in names:
        fit = fits.get(name) or {}
        shown = MODEL_NAMES.get(name, name)
        if name == "auto" and fit.get("model"):
            shown = f"auto: {MODEL_NAMES.get(fit['model'], fit['model'])}"
        header.append(shown)
    rows: list[tuple[str, ...]] = []
    for key, label, unit, scale, sci in FIT_PARAMETERS:
        if not any(key in (fits.get(n) or {}) for n in names):
            continue
        cells = [f"{label} ({unit})" if unit else label]
        for name in names:
            fit = fits.get(name) or {}
            if key not in fit:
                cells.append(DASH)
            elif key == "shunt_resistance_ohm" and fit.get(key) is None:
                cells.append("∞")
            else:
                u = (fit.get("uncertainty") or {}).get(key)
                cells.append(fmt_pm(fit.get(key), u, scale, scientific=sci))
        rows.append(tuple(cells))
    rows.append(tuple(["RMSE (mA)"] + [fmt((fits.get(n) or {}).get("rmse_a"), 1e3)
                                       for n in names]))
    if errors:
        rows.append(tuple(["failed"] + [str(errors.get(n, "")) for n in names]))
    return Table("Fitted parameters (± standard uncertainty)", tuple(header), tuple(rows))


def stc_table(result: Mapping[str, Any]) -> Table | None:
    """The STC values of every translation method, side by side."""
    if result.get("dark"):
        return None
    stc = result.get("stc")
    if not stc:
        err = result.get("stc_error")
        if not err:
            return None
        return Table("At STC", (), (), (f"no translation: {err}",))
    target = stc.get("target") or {}
    title = (f"At STC ({fmt(target.get('irradiance_w_m2'), digits=4)} W/m², "
             f"{fmt(target.get('temperature_c'), digits=3)} °C)")
    header = ("method", "Isc (mA)", "Voc (V)", "Pmax (mW)", "FF (%)")
    rows = []
    notes = []
    for m in stc.get("methods") or ():
        key = m.get("method")
        name = METHOD_NAMES.get(key, str(key))
        long_name = METHOD_LONG_NAMES.get(key, str(key))
        if not m.get("ok"):
            notes.append(f"{long_name}: not applied — {m.get('error') or 'failed'}")
            continue
        f = _figures_of(m.get("figures"))
        if key == stc.get("primary"):
            name += " *"
            notes.insert(0, f"* primary: {long_name}")
        for what in ("isc", "voc"):
            if f.get(f"{what}_extrapolated"):
                notes.append(f"{long_name}: {what.capitalize()} extrapolated beyond the points")
        rows.append((name, fmt(f.get("isc_a"), 1e3), fmt(f.get("voc_v")), fmt(f.get("pmax_w"), 1e3),
                     fmt(f.get("ff"), 100.0)))
    spread = stc.get("spread") or {}
    if not rows:
        return Table(title, (), (), tuple(notes))
    if (spread.get("methods") or 0) > 1:
        rows.append(("half range", fmt(spread.get("isc_a_half_range"), 1e3),
                     fmt(spread.get("voc_v_half_range")), fmt(spread.get("pmax_half_range_w"), 1e3),
                     fmt(spread.get("ff_half_range"), 100.0)))
        notes.append("half range: spread between the methods")
    return Table(title, header, tuple(rows), tuple(notes))


def verdict_of(result: Mapping[str, Any] | None) -> tuple[str | None, list[str]]:
    """("keep" | "re-measure" | None, reasons as sentences)."""
    if not result:
        return None, []
    v = result.get("verdict") or {}
    reasons = [str(r.get("message") or r.get("code")) for r in v.get("reasons") or ()]
    return v.get("verdict"), reasons


def conditions_text(result: Mapping[str, Any]) -> str:
    c = result.get("conditions") or {}
    parts = []
    if result.get("dark"):
        parts.append("dark")
    elif _finite(c.get("irradiance_w_m2")) is not None:
        src = c.get("irradiance_source")
        parts.append(f"G {fmt(c.get('irradiance_w_m2'), digits=4)} W/m²"
                     + (f" ({src})" if src else ""))
    else:
        parts.append("irradiance unknown")
    if _finite(c.get("temperature_c")) is not None:
        parts.append(f"T {fmt(c.get('temperature_c'), digits=4)} °C")
    if _finite(c.get("area_cm2")):
        parts.append(f"{fmt(c.get('area_cm2'), digits=3)} cm²")
    ns = c.get("cells_in_series")
    if ns:
        parts.append(f"{ns} cell{'s' if ns != 1 else ''} in series")
    if c.get("direction"):
        parts.append(str(c["direction"]))
    if c.get("four_wire") is not None:
        parts.append("4-wire" if c.get("four_wire") else "2-wire")
    return " · ".join(p.replace(" ", "\u00a0") if len(p) < 24 else p for p in parts)


def result_tables(result: Mapping[str, Any]) -> list[Table]:
    tables = []
    verdict, reasons = verdict_of(result)
    vrows = [("verdict", (verdict or DASH).upper())]
    vrows += [("reason", r) for r in reasons]
    vrows += [("analysis note", str(e)) for e in result.get("errors") or ()]
    vrows.append(("conditions", conditions_text(result)))
    tables.append(Table("Verdict", ("item", "value"), tuple(vrows)))
    for make in (figures_table, fit_table, stc_table):
        t = make(result)
        if t is not None:
            tables.append(t)
    return tables


def tables_tsv(tables: Sequence[Table], heading: str = "") -> str:
    """Tab-separated text (one table after the other, a blank line between) for pasting
    into a spreadsheet."""
    lines = [heading] if heading else []
    for t in tables:
        if lines:
            lines.append("")
        lines.append(t.title)
        if t.header:
            lines.append("\t".join(t.header))
        lines += ["\t".join(c.replace("\t", " ").replace("\n", " ") for c in row) for row in t.rows]
        lines += [n.replace("\t", " ") for n in t.notes]
    return "\n".join(lines) + "\n"
