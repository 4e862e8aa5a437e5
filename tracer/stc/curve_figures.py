"""Figures of merit of a (translated) I-V curve by the ASTM E1036 near-axis method.

Translated points leave the measured voltage grid, so Isc, Voc and Pmax of a corrected
curve are taken from local fits of the points, as ASTM E1036 describes (the reference
notes, section 2.2, give the windows used by ``pvlib.ivtools.utils.astm_e1036``):

- Voc: the point of smallest |I|; if |I| there is at most 0.001*Isc_est its voltage is
  taken, otherwise a straight line V(I) through the 3 smallest-|I| points at I = 0.
- Isc: the point of smallest |V|; if |V| there is at most 0.005*Voc_est its current is
  taken, otherwise a straight line I(V) through the 3 smallest-|V| points at V = 0.
- Pmax: the points within 0.75-1.15 x Imp_est and 0.75-1.15 x Vmp_est around the raw
  maximum of V*I, a 4th-order polynomial P(V) through them, its stationary point of
  largest P inside the window. Imp = Pmax/Vmp, FF = Pmax/(Isc*Voc).

Current in the generator convention (Isc > 0). numpy only; raises ``ValueError`` on a
curve that has no power quadrant or too few points.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from numpy.polynomial import Polynomial

__all__ = ["CurveFigures", "curve_figures"]

VOC_POINTS = 3
ISC_POINTS = 3
MP_FIT_ORDER = 4
MP_CURRENT_WINDOW = (0.75, 1.15)
MP_VOLTAGE_WINDOW = (0.75, 1.15)
_ABSURD = 1e100   # |V| or |I| beyond this is junk, not a curve (keeps V*I finite)


@dataclass(frozen=True)
class CurveFigures:
    """Figures of one curve. ``*_extrapolated``: the curve did not reach that axis."""

    isc_a: float
    voc_v: float
    imp_a: float
    vmp_v: float
    pmax_w: float
    ff: float
    isc_extrapolated: bool = False
    voc_extrapolated: bool = False

    def to_dict(self) -> dict:
        return {k: (bool(v) if isinstance(v, (bool, np.bool_)) else float(v))
                for k, v in asdict(self).items()}


def _clean(voltage_v, current_a) -> tuple[np.ndarray, np.ndarray]:
    v = np.asarray(voltage_v, dtype=float).ravel()
    i = np.asarray(current_a, dtype=float).ravel()
    if v.shape != i.shape:
        raise ValueError(f"voltage and current differ in length ({v.size} vs {i.size})")
    keep = np.isfinite(v) & np.isfinite(i)
    v, i = v[keep], i[keep]
    if v.size < 5:
        raise ValueError(f"too few finite points for curve figures ({v.size} < 5)")
    if max(float(np.max(np.abs(v))), float(np.max(np.abs(i)))) > _ABSURD:
        raise ValueError("voltages or currents beyond any bench range (|x| > 1e100)")
    return v, i


def _line_at_zero(x: np.ndarray, y: np.ndarray, points: int) -> float:
    """Value of y at x = 0 from a straight line through the ``points`` smallest-|x| points."""
    idx = np.argsort(np.abs(x), kind="stable")[:points]
    xs, ys = x[idx], y[idx]
    if np.ptp(xs) == 0.0:
        return float(np.mean(ys))
    slope, intercept = np.polyfit(xs, ys, 1)
    return float(intercept)


def curve_figures(voltage_v, current_a) -> CurveFigures:
    """Isc, Voc, Imp, Vmp, Pmax and FF of a curve (generator convention), ASTM E1036 way."""
    v, i = _clean(voltage_v, current_a)
    p = v * i

    i_min = int(np.argmin(np.abs(i)))
    v_min = int(np.argmin(np.abs(v)))
    voc_est = v[i_min]
    isc_est = i[v_min]
    if isc_est <= 0.0 or voc_est <= 0.0:
        raise ValueError("curve has no power-producing quadrant (Isc or Voc not positive)")

    if abs(i[i_min]) <= 0.001 * isc_est:
        voc = float(voc_est)
    else:
        voc = _line_at_zero(i, v, VOC_POINTS)
    if abs(v[v_min]) <= 0.005 * voc_est:
        isc = float(isc_est)
    else:
        isc = _line_at_zero(v, i, ISC_POINTS)
    voc_extrapolated = not (np.any(i <= 0.0) and np.any(i >= 0.0))
    isc_extrapolated = not (np.any(v <= 0.0) and np.any(v >= 0.0))

    k = int(np.argmax(p))
    if p[k] <= 0.0:
        raise ValueError("curve has no point with positive power")
    v_est, i_est = v[k], i[k]
    window = ((i >= MP_CURRENT_WINDOW[0] * i_est) & (i <= MP_CURRENT_WINDOW[1] * i_est)
              & (v >= MP_VOLTAGE_WINDOW[0] * v_est) & (v <= MP_VOLTAGE_WINDOW[1] * v_est))
    vw, pw = v[window], p[window]
    order = min(MP_FIT_ORDER, np.unique(vw).size - 1)
    vmp, pmax = float(v_est), float(p[k])
    if order >= 2:
        fit = Polynomial.fit(vw, pw, order)
        roots = fit.deriv().roots()
        roots = roots.real[np.abs(roots.imag) < 1e-5]
        roots = roots[(roots > vw.min()) & (roots < vw.max())]
        if roots.size:
            values = fit(roots)
            best = int(np.argmax(values))
            vmp, pmax = float(roots[best]), float(values[best])
    imp = pmax / vmp
    ff = pmax / (voc * isc) if voc > 0.0 and isc > 0.0 else float("nan")
    return CurveFigures(isc_a=isc, voc_v=voc, imp_a=imp, vmp_v=vmp, pmax_w=pmax, ff=ff,
                        isc_extrapolated=isc_extrapolated, voc_extrapolated=voc_extrapolated)
