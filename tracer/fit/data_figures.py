"""Figures of merit read from the measured points alone, without a diode model.

Isc and Voc come from low-order fits of the points nearest each axis, the maximum power
point from a local polynomial of P(V) around the highest measured power: the practice of
ASTM E1036 (as transcribed in pvlib's ``ivtools.utils.astm_e1036``) and of IEC 60904-1.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from numpy.polynomial import Polynomial

from tracer.fit._checks import as_curve
from tracer.fit.errors import FitError

# Window half-widths (fractions of the estimated Voc / Isc) for the near-axis fits.
ISC_WINDOW_OF_VOC = 0.10
VOC_WINDOW_OF_ISC = 0.05
# Window around the highest-power point, as fractions of the raw Vmp and Imp: the
# ASTM E1036 defaults (0.75 ... 1.15) are the widest; dense curves use the narrowest of
# the nested windows below that still holds MPP_MIN_POINTS points, which keeps the
# polynomial's bias small where the data allow it.
MPP_WINDOW = (0.75, 1.15)
MPP_NARROW_HALF_WIDTHS = (0.02, 0.05, 0.10)
MPP_POLY_ORDER = 4
MPP_MIN_POINTS = 2 * MPP_POLY_ORDER + 3
MIN_AXIS_POINTS = 3


@dataclass(frozen=True)
class DataFigures:
    """Figures of merit of a measured illuminated curve (generator convention)."""

    isc_a: float
    voc_v: float
    imp_a: float
    vmp_v: float
    pmax_w: float
    ff: float

    def to_dict(self) -> dict[str, float]:
        return {k: float(v) for k, v in asdict(self).items()}


def _nearest(values: np.ndarray, count: int) -> np.ndarray:
    return np.argsort(np.abs(values), kind="stable")[:count]


def _axis_intercept(x: np.ndarray, y: np.ndarray, window: float) -> float:
    """Value of y at x = 0 from a linear (or, with enough points, quadratic) fit of the
    points with |x| <= window; at least the MIN_AXIS_POINTS nearest points are used."""
    sel = np.flatnonzero(np.abs(x) <= window)
    if sel.size < MIN_AXIS_POINTS:
        sel = _nearest(x, MIN_AXIS_POINTS)
    xs, ys = x[sel], y[sel]
    if np.unique(xs).size < 2:
        return float(np.mean(ys))
    degree = 2 if np.unique(xs).size >= 6 else 1
    poly = Polynomial.fit(xs, ys, degree)
    return float(poly(0.0))


def figures_from_data(voltage_v, current_a) -> DataFigures:
    """Isc, Voc, Imp, Vmp, Pmax and FF of a measured illuminated curve.

    ``current_a`` is in the generator convention (positive at short circuit). The curve
    must cross both axes: some points at V <= 0 <= V and some at I <= 0 <= I, otherwise
    an extrapolated Isc or Voc would be reported as measured and :class:`FitError` is
    raised.
    """
    v, i = as_curve(voltage_v, current_a, min_points=MIN_AXIS_POINTS + 1,
                    what="reading figures from data")
    order = np.argsort(v, kind="stable")
    v, i = v[order], i[order]
    if not (v[0] <= 0.0 <= v[-1]):
        raise FitError(
            f"the curve does not cross V = 0 (voltages span {v[0]:g} .. {v[-1]:g} V); "
            "Isc would be an extrapolation"
        )
    if not (i.min() <= 0.0 <= i.max()):
        raise FitError(
            f"the curve does not cross I = 0 (currents span {i.min():g} .. {i.max():g} A); "
            "Voc would be an extrapolation"
        )
    power = v * i
    if not np.any((power > 0.0) & (v > 0.0)):
        raise FitError(
            "no point delivers power (V > 0 and I > 0 in the generator convention): "
            "a dark curve, or a curve in the load convention"
        )

    # Rough axis crossings, used only to size the windows.
    isc_rough = float(i[np.argmin(np.abs(v))])
    crossing = np.flatnonzero((i[:-1] > 0.0) & (i[1:] <= 0.0) & (v[1:] > 0.0))
    if crossing.size:
        k = int(crossing[0])
        voc_rough = float(v[k] + (v[k + 1] - v[k]) * i[k] / (i[k] - i[k + 1]))
    else:
        voc_rough = float(v[np.argmin(np.where(v > 0.0, np.abs(i), np.inf))])
    if isc_rough <= 0.0 or voc_rough <= 0.0:
        raise FitError(
            f"the curve has no power quadrant (I(V=0) = {isc_rough:g} A, V(I=0) = {voc_rough:g} V)"
        )

    isc = _axis_intercept(v, i, ISC_WINDOW_OF_VOC * voc_rough)
    near_voc = np.abs(v - voc_rough) <= 0.5 * voc_rough  # keep the Voc fit on one branch
    voc = _axis_intercept(i[near_voc], v[near_voc], VOC_WINDOW_OF_ISC * isc_rough)

    k = int(np.argmax(power))
    vmp_raw, imp_raw = float(v[k]), float(i[k])
    lo, hi = MPP_WINDOW
    sel = np.flatnonzero((v >= lo * vmp_raw) & (v <= hi * vmp_raw)
                         & (i >= lo * imp_raw) & (i <= hi * imp_raw))
    for half in MPP_NARROW_HALF_WIDTHS:
        narrow = sel[np.abs(v[sel] / vmp_raw - 1.0) <= half]
        if np.unique(v[narrow]).size >= MPP_MIN_POINTS:
            sel = narrow
            break
    vmp, pmax = vmp_raw, float(power[k])
    n_distinct = np.unique(v[sel]).size
    if n_distinct >= 3:
        degree = min(MPP_POLY_ORDER, n_distinct - 1)
        poly = Polynomial.fit(v[sel], power[sel], degree)
        roots = poly.deriv().roots()
        roots = roots[np.isreal(roots)].real
        roots = roots[(roots >= v[sel].min()) & (roots <= v[sel].max())]
        if roots.size:
            values = poly(roots)
            j = int(np.argmax(values))
            vmp, pmax = float(roots[j]), float(values[j])
    imp = pmax / vmp
    ff = pmax / (isc * voc)
    return DataFigures(isc_a=isc, voc_v=voc, imp_a=imp, vmp_v=vmp, pmax_w=pmax, ff=ff)
