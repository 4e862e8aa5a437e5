"""Explicit single-diode kernels (Lambert W via Wright omega); see ``single_diode``.

Inputs are validated float arrays that broadcast together; ``g`` is the shunt
conductance 1/Rsh [S] (0 for no shunt), ``a = n*Ns*Vt`` [V].
"""
from __future__ import annotations

import numpy as np
from scipy.special import wrightomega

from tracer.model._checks import scaled_expm1


def _current_lambert(v, iph, i0, a, rs, g):
    """Lambert W current for Rs > 0 (see module docstring)."""
    s = 1.0 + rs * g
    inv_as = 1.0 / (a * s)
    x = (v + rs * (iph + i0)) * inv_as + np.log(rs * i0 * inv_as)
    w = wrightomega(x)
    return (iph + i0) / s - v * (g / s) - (a / rs) * w


def _current_ideal(v, iph, i0, a, g):
    """Explicit current for Rs = 0."""
    return iph - scaled_expm1(i0, v / a) - v * g


def sd_current(v, iph, i0, a, rs, g):
    """Single-diode terminal current [A] at terminal voltage ``v`` [V]."""
    positive = np.greater(rs, 0)
    if positive.all():
        return _current_lambert(v, iph, i0, a, rs, g)
    if not positive.any():
        return _current_ideal(v, iph, i0, a, g)
    rs_safe = np.where(positive, rs, 1.0)
    return np.where(positive, _current_lambert(v, iph, i0, a, rs_safe, g),
                    _current_ideal(v, iph, i0, a, g))


def sd_voltage(i, iph, i0, a, rs, g):
    """Single-diode terminal voltage [V] at terminal current ``i`` [A].

    With ``rs = 0`` this is the junction voltage that carries ``i``.
    """
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        # ideal shunt (Gsh = 0): V = a*ln(1 + (Iph - I)/I0) - I*Rs
        ratio = (iph - i) / i0
        vd_ideal = np.where(ratio > -1.0, a * np.log1p(ratio), -np.inf)
        vd_ideal = np.where(np.isnan(ratio), np.nan, vd_ideal)
        if np.all(g == 0):
            vd = vd_ideal
        else:
            ag = a * g
            c_over_g = (iph + i0 - i) / g
            log_ratio = np.log(ag / i0)
            y = c_over_g / a - log_ratio
            w = wrightomega(y)
            # two exact forms of the same value; each is used where its terms are smaller
            # (rounding error ~ eps * largest term): the plain one, c/G - a*W, for small
            # c/G; the log one, a*(ln W + ln(a*G/I0)), where c/G and a*W nearly cancel
            log_w = np.where(y > 0.0, np.log(w), y - w)  # y - W = ln W, exact
            vd_log = a * (log_w + log_ratio)
            vd_plain = c_over_g - a * w
            plain_better = (np.maximum(np.abs(c_over_g), a * w)
                            < a * np.maximum(np.abs(log_w), np.abs(log_ratio)))
            vd_shunt = np.where(plain_better, vd_plain, vd_log)
            use_ideal = (g == 0) | np.isinf(y)
            vd = np.where(use_ideal, vd_ideal, vd_shunt)
        return vd - i * rs
