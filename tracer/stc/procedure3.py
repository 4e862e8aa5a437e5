"""IEC 60891 procedure 3: interpolation between measured curves, no coefficients.

Form written from memory, *not confirmed
against the standard text*; this module implements exactly that form and says so in its
results::

    G3 = G1 + a*(G2 - G1)   T3 = T1 + a*(T2 - T1)   I3 = I1 + a*(I2 - I1)   V3 = V1 + a*(V2 - V1)

0 <= a <= 1 interpolates, otherwise it extrapolates. Points of the two curves are paired so
that ``I2 - I1 = Isc2 - Isc1`` (equal distance below each curve's Isc). Two curves reach
only targets on the line joining their (G, T); an arbitrary target needs a third curve and a
second constant b applied in a second stage (curve 4 = stage 1 result, then
``X = X4 + b*(X3 - X4)``). Both stages are linear with the same pairing, so the result is
the barycentric combination of the three curves with weights ``((1-a)(1-b), a(1-b), b)``.

With more than three curves the module picks the pair (on the target's line) or triangle
that interpolates with the most local set of curves; if none interpolates, the set that
extrapolates least, and the result says ``extrapolated=True`` (extrapolation can distort
the curve significantly: Xu et al. 2023, doi:10.1002/pip.3702).
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from tracer.stc.curve_figures import curve_figures
from tracer.stc.iec60891 import MeasuredCurve

__all__ = ["InterpolationResult", "translate_procedure3"]

# Tolerances for "the target lies on the line of two curves" and "three curves are
# collinear": of the order of the reading uncertainties of irradiance and temperature
# (IEC 60904-1 asks temperature to +-1 C, from memory). Common practice.
IRRADIANCE_TOLERANCE_W_M2 = 10.0
TEMPERATURE_TOLERANCE_K = 0.5
_EPS = 1e-9


@dataclass(frozen=True)
class InterpolationResult:
    """Interpolated curve and how it was made."""

    voltage_v: np.ndarray
    current_a: np.ndarray
    curves_used: tuple[int, ...]
    weights: tuple[float, ...]
    stage_constants: tuple[float, ...]        # (a,) for two curves, (a, b) for three
    reached_irradiance_w_m2: float
    reached_temperature_c: float
    extrapolated: bool

    def to_dict(self) -> dict:
        return {
            "curves_used": list(self.curves_used),
            "weights": [float(w) for w in self.weights],
            "stage_constants": [float(c) for c in self.stage_constants],
            "reached_irradiance_w_m2": float(self.reached_irradiance_w_m2),
            "reached_temperature_c": float(self.reached_temperature_c),
            "extrapolated": bool(self.extrapolated),
            "points": int(self.voltage_v.size),
        }


def _monotone_v_of_i(v: np.ndarray, i: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(I ascending, V) of a curve made monotone: I non-increasing in V, duplicates merged."""
    order = np.argsort(v, kind="stable")
    v, i = v[order], i[order]
    try:
        from scipy.optimize import isotonic_regression

        i = isotonic_regression(i, increasing=False).x
    except ImportError:  # scipy < 1.12
        i = np.minimum.accumulate(i)
    levels, inverse = np.unique(i, return_inverse=True)
    v_mean = np.bincount(inverse, weights=v) / np.bincount(inverse)
    return levels, v_mean


def _scaled(g: float, t: float) -> np.ndarray:
    return np.array([g / IRRADIANCE_TOLERANCE_W_M2, t / TEMPERATURE_TOLERANCE_K])


def _pair_weights(p1, p2, target):
    """Weights of a pair whose line passes within tolerance of the target, else None."""
    d = p2 - p1
    length2 = float(d @ d)
    if length2 < 1.0:            # the two curves are at the same conditions
        return None
    a = float((target - p1) @ d) / length2
    foot = p1 + a * d
    if np.hypot(*(target - foot)) > 1.0:
        return None
    return np.array([1.0 - a, a])


def _triangle_weights(p1, p2, p3, target):
    m = np.array([[p1[0], p2[0], p3[0]], [p1[1], p2[1], p3[1]], [1.0, 1.0, 1.0]])
    area2 = abs((p2[0] - p1[0]) * (p3[1] - p1[1]) - (p3[0] - p1[0]) * (p2[1] - p1[1]))
    longest = max(np.hypot(*(p2 - p1)), np.hypot(*(p3 - p1)), np.hypot(*(p3 - p2)))
    if longest == 0.0 or area2 / longest < 1.0:   # smallest height below tolerance: collinear
        return None
    return np.linalg.solve(m, np.array([target[0], target[1], 1.0]))


def _choose(points: list[np.ndarray], target: np.ndarray):
    candidates = []
    n = len(points)
    for combo in itertools.combinations(range(n), 2):
        w = _pair_weights(points[combo[0]], points[combo[1]], target)
        if w is not None:
            candidates.append((combo, w))
    for combo in itertools.combinations(range(n), 3):
        w = _triangle_weights(*(points[k] for k in combo), target)
        if w is not None:
            candidates.append((combo, w))
    if not candidates:
        raise ValueError("procedure 3 cannot reach the target: two curves reach only targets on "
                         "their connecting line; give a third curve off that line")

    def key(c):
        combo, w = c
        extrapolation = float(np.max(np.abs(w - np.clip(w, 0.0, 1.0))))
        span = max(float(np.hypot(*(points[k] - target))) for k in combo)
        return (extrapolation > _EPS, extrapolation, span, len(combo))

    return min(candidates, key=key)


def translate_procedure3(curves: Sequence[MeasuredCurve], *,
                         target_irradiance_w_m2: float = 1000.0,
                         target_temperature_c: float = 25.0,
                         isc_a: Sequence[float] | None = None) -> InterpolationResult:
    """Interpolate the curve at (target G, target T) from two or more measured curves.

    ``isc_a`` optionally gives each curve's Isc (else taken from the curve, ASTM E1036 way).
    Raises ``ValueError`` when the target cannot be reached.
    """
    curves = list(curves)
    if len(curves) < 2:
        raise ValueError("procedure 3 needs at least two curves (three for an arbitrary target)")
    for c in curves:
        if not isinstance(c, MeasuredCurve):
            raise TypeError("procedure 3 takes MeasuredCurve objects")
    if isc_a is None:
        isc = [curve_figures(c.voltage_v, c.current_a).isc_a for c in curves]
    else:
        isc = [float(x) for x in isc_a]
        if len(isc) != len(curves):
            raise ValueError("one Isc per curve is needed")
    target = _scaled(float(target_irradiance_w_m2), float(target_temperature_c))
    points = [_scaled(c.irradiance_w_m2, c.temperature_c) for c in curves]
    combo, weights = _choose(points, target)

    used = [curves[k] for k in combo]
    used_isc = np.array([isc[k] for k in combo])
    tables = [_monotone_v_of_i(c.voltage_v, c.current_a) for c in used]
    # offsets below Isc reachable on every used curve
    lo = max(float(s - t[0][-1]) for s, t in zip(used_isc, tables))
    hi = min(float(s - t[0][0]) for s, t in zip(used_isc, tables))
    if not hi > lo:
        raise ValueError("the curves share no current range to pair points over")
    offsets = np.unique(np.concatenate([s - t[0] for s, t in zip(used_isc, tables)]))
    offsets = offsets[(offsets >= lo) & (offsets <= hi)]
    voltage = np.zeros_like(offsets)
    for w, s, (levels, v_of_level) in zip(weights, used_isc, tables):
        voltage += w * np.interp(s - offsets, levels, v_of_level)
    current = float(weights @ used_isc) - offsets
    order = np.argsort(voltage, kind="stable")

    g_reached = float(sum(w * c.irradiance_w_m2 for w, c in zip(weights, used)))
    t_reached = float(sum(w * c.temperature_c for w, c in zip(weights, used)))
    if len(combo) == 2:
        constants = (float(weights[1]),)
    else:
        b = float(weights[2])
        a = float(weights[1] / (1.0 - b)) if abs(1.0 - b) > _EPS else 0.0
        constants = (a, b)
    extrapolated = bool(np.any(weights < -_EPS) or np.any(weights > 1.0 + _EPS))
    return InterpolationResult(voltage_v=voltage[order], current_a=current[order],
                               curves_used=tuple(int(k) for k in combo),
                               weights=tuple(float(w) for w in weights),
                               stage_constants=constants,
                               reached_irradiance_w_m2=g_reached,
                               reached_temperature_c=t_reached, extrapolated=extrapolated)
