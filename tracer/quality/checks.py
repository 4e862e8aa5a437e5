"""Measures that the sweep verdict is built from. Pure numpy; each cites its source.

- :func:`hysteresis_indices`: forward/reverse disagreement of a sweep pair.
- :func:`temporal_instability`: (G_max - G_min)/(G_max + G_min), IEC 60904-9 form.
- :func:`durbin_watson`: Durbin & Watson, Biometrika 37 (1950) 409; 38 (1951) 159.
- :func:`runs_test`: Wald & Wolfowitz, Ann. Math. Stat. 11 (1940) 147 (normal approximation).
- :func:`shunt_from_slope`: -1/slope of I(V) near short circuit.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "HysteresisIndices",
    "INSTABILITY_CLASS_LIMITS",
    "hysteresis_indices",
    "temporal_instability",
    "durbin_watson",
    "runs_test",
    "shunt_from_slope",
    "data_figures",
]

# IEC 60904-9 long-term temporal instability limits (instability over the acquisition of a
# whole I-V curve), as fractions. Values from memory (table [M]):
# A/B/C corroborated by simulator manufacturers' pages; A+ from memory only.
INSTABILITY_CLASS_LIMITS = {
    "A+": (0.01, "IEC 60904-9 Ed.3 class A+ long-term instability <= 1 % (from memory, unconfirmed)"),
    "A": (0.02, "IEC 60904-9 class A long-term instability <= 2 % (from memory, "
                "corroborated by manufacturers' pages)"),
    "B": (0.05, "IEC 60904-9 class B long-term instability <= 5 % (from memory, "
                "corroborated by manufacturers' pages)"),
    "C": (0.10, "IEC 60904-9 class C long-term instability <= 10 % (from memory, "
                "corroborated by manufacturers' pages)"),
}


def data_figures(voltage_v, current_a):
    """Figures of measured points: ``tracer.fit.figures_from_data`` when the curve crosses
    both axes, else the extrapolating ASTM E1036 reading of ``tracer.stc.curve_figures``.
    Returns an object with ``isc_a, voc_v, imp_a, vmp_v, pmax_w, ff``; raises ValueError."""
    from tracer.fit.data_figures import figures_from_data
    from tracer.stc.curve_figures import curve_figures

    try:
        return figures_from_data(voltage_v, current_a)
    except ValueError:
        return curve_figures(voltage_v, current_a)


@dataclass(frozen=True)
class HysteresisIndices:
    """Indices of a forward (Isc->Voc, toward +V) / reverse (Voc->Isc) pair; RS - FS over RS.

    ``pmax``: (Pmax_RS - Pmax_FS)/Pmax_RS (the "HI_PCE" form; Habisreutinger, Noel & Snaith,
    ACS Energy Lett. 3 (2018) 2472 — formula from memory).
    ``area``: (∫I_RS dV - ∫I_FS dV)/∫I_RS dV over 0...Voc_RS (formula from memory, ibid.).
    Positive: reverse scan better ("normal" hysteresis); negative: inverted.
    """

    pmax: float
    area: float
    pmax_forward_w: float
    pmax_reverse_w: float

    def to_dict(self) -> dict:
        return {k: float(v) for k, v in self.__dict__.items()}


def hysteresis_indices(forward_v, forward_i, reverse_v, reverse_i) -> HysteresisIndices:
    """Hysteresis indices of a sweep pair (generator convention). Raises ValueError."""
    f = data_figures(forward_v, forward_i)
    r = data_figures(reverse_v, reverse_i)
    if not r.pmax_w > 0.0:
        raise ValueError("reverse sweep delivers no power")
    hi_p = (r.pmax_w - f.pmax_w) / r.pmax_w
    grid = np.linspace(0.0, r.voc_v, 256)

    def area(v, i):
        v = np.asarray(v, float)
        i = np.asarray(i, float)
        order = np.argsort(v, kind="stable")
        return float(np.trapezoid(np.interp(grid, v[order], i[order]), grid))

    a_r = area(reverse_v, reverse_i)
    a_f = area(forward_v, forward_i)
    hi_a = (a_r - a_f) / a_r if a_r != 0.0 else float("nan")
    return HysteresisIndices(pmax=float(hi_p), area=float(hi_a),
                             pmax_forward_w=float(f.pmax_w), pmax_reverse_w=float(r.pmax_w))


def temporal_instability(irradiance_w_m2) -> float:
    """(G_max - G_min)/(G_max + G_min) of the readings, as a fraction (IEC 60904-9 form,
    IEC terms database; from memory). Raises ValueError."""
    g = np.asarray(irradiance_w_m2, dtype=float).ravel()
    g = g[np.isfinite(g)]
    if g.size < 2:
        raise ValueError("instability needs at least two irradiance readings")
    hi, lo = float(g.max()), float(g.min())
    if hi + lo <= 0.0:
        raise ValueError("irradiance readings are not positive")
    return (hi - lo) / (hi + lo)


def durbin_watson(residuals) -> float:
    """Durbin-Watson statistic sum((e_t - e_{t-1})^2)/sum(e_t^2) of ordered residuals.

    About 2 for independent residuals, towards 0 for positively correlated ones.
    """
    e = np.asarray(residuals, dtype=float).ravel()
    e = e[np.isfinite(e)]
    if e.size < 3:
        raise ValueError("Durbin-Watson needs at least 3 residuals")
    denom = float(e @ e)
    if denom == 0.0:
        return float("nan")
    d = np.diff(e)
    return float(d @ d) / denom


def runs_test(residuals) -> tuple[int, float]:
    """Wald-Wolfowitz runs test on the signs of ordered residuals: (runs, z).

    ``z = (R - mu)/sigma`` with ``mu = 2*n+*n-/n + 1`` and
    ``sigma^2 = (mu - 1)*(mu - 2)/(n - 1)``; strongly negative z = too few runs = structure.
    Zero residuals are dropped. Raises ValueError with fewer than 2 of either sign.
    """
    e = np.asarray(residuals, dtype=float).ravel()
    e = e[np.isfinite(e) & (e != 0.0)]
    signs = e > 0.0
    n_pos = int(signs.sum())
    n_neg = int(signs.size - n_pos)
    if n_pos < 2 or n_neg < 2:
        raise ValueError("runs test needs at least two residuals of each sign")
    n = n_pos + n_neg
    runs = int(1 + np.count_nonzero(signs[1:] != signs[:-1]))
    mu = 2.0 * n_pos * n_neg / n + 1.0
    var = (mu - 1.0) * (mu - 2.0) / (n - 1.0)
    z = (runs - mu) / np.sqrt(var) if var > 0.0 else 0.0
    return runs, float(z)


def shunt_from_slope(voltage_v, current_a, voc_v: float, window_of_voc: float = 0.2) -> float:
    """Shunt resistance [ohm] = -1/slope of a line I(V) through the points with
    0 <= V <= window*Voc (the near-short-circuit slope; Rs neglected there: common practice).
    ``inf`` for a flat or rising slope. Raises ValueError with fewer than 3 points."""
    v = np.asarray(voltage_v, dtype=float).ravel()
    i = np.asarray(current_a, dtype=float).ravel()
    sel = (v >= 0.0) & (v <= window_of_voc * voc_v) & np.isfinite(v) & np.isfinite(i)
    if np.count_nonzero(sel) < 3 or np.ptp(v[sel]) == 0.0:
        raise ValueError("too few points near short circuit for a shunt slope")
    slope = float(np.polyfit(v[sel], i[sel], 1)[0])
    return float("inf") if slope >= 0.0 else -1.0 / slope
