"""One parameter set, one unknown: the network's scalar problems in plain Python floats.

The vectorised solvers of :mod:`tracer.model._network` spend most of their time in
per-call overhead when the problem has a single element (the open-circuit voltage of
one parameter set, solved before every current evaluation of a fit). These are the
same equations, bracket, start and safeguarded Newton iteration
(:func:`tracer.model._newton.bracketed_newton`) for one element, with ``math`` instead
of numpy: the results agree with the vectorised ones to rounding.
"""
from __future__ import annotations

import math

from scipy.special import wrightomega

from tracer.model._newton import DEFAULT_MAX_ITER, DEFAULT_RTOL

#: As tracer.model._checks._EXP_SAFE: above this exponent exp() is formed in log space.
_EXP_SAFE = 700.0
_INF = math.inf


def _exp(x: float) -> float:
    """exp(x), inf past the float range (numpy's value, without the exception)."""
    try:
        return math.exp(x)
    except OverflowError:
        return _INF


def exp_pair(scale: float, x: float) -> tuple[float, float]:
    """``(scale*(exp(x) - 1), scale*exp(x))``, overflow-safe like
    :func:`tracer.model._checks.scaled_exp_pair` (``scale >= 0``)."""
    if x > _EXP_SAFE:
        full = _exp(x + math.log(scale)) if scale > 0.0 else 0.0
        return full - scale, full
    em1 = math.expm1(x)
    return scale * em1, scale * (em1 + 1.0)


def _ratio(a: float, b: float) -> float:
    """a/b with numpy's results for b = 0 (inf with the sign of a, nan for 0/0)."""
    if b != 0.0:
        return a / b
    if a == 0.0 or a != a:
        return math.nan
    return math.copysign(_INF, a) * (math.copysign(1.0, b))


def bracketed_newton(residual, lower: float, upper: float, start: float, *, atol: float,
                     rtol: float = DEFAULT_RTOL, max_iter: int = DEFAULT_MAX_ITER) -> float:
    """:func:`tracer.model._newton.bracketed_newton` for one element; ``residual(x)``
    returns ``(f, dfdx)`` as floats."""
    lo, hi = float(lower), float(upper)
    x = float(start)
    if x != x:
        pass                            # numpy.clip keeps NaN
    elif x < lo:
        x = lo
    elif x > hi:
        x = hi
    if not hi > lo:
        return x
    step_old = hi - lo
    for _ in range(max_iter):
        f, df = residual(x)
        if f > 0.0:
            hi = x
        elif f < 0.0:
            lo = x
        step = _ratio(f, df)
        x_new = x - step
        tol = rtol * abs(x) + atol
        small = abs(step) <= tol        # False for NaN
        usable = small or (lo < x_new < hi and abs(2.0 * f) <= abs(step_old * df))
        if not usable:
            x_new = 0.5 * (lo + hi)
        done = small or (hi - lo) <= tol
        step_old = abs(x_new - x)
        x = x_new
        if done:
            return x
    raise RuntimeError(f"bracketed Newton did not converge for 1 element(s) in "
                       f"{max_iter} iterations")


def _log1p(x: float) -> float:
    """numpy.log1p's values where math.log1p raises: -inf at -1, nan below."""
    if x > -1.0:
        return math.log1p(x)
    if x == -1.0:
        return -_INF
    return math.nan


def _junction_voltage_alone(iph: float, i0: float, a: float, g: float) -> float:
    """Junction voltage where one diode (and the shunt) carries Iph: the terminal voltage
    of :func:`tracer.model._lambert.sd_voltage` at I = 0 with Rs = 0, same two forms."""
    vd_ideal = a * _log1p(iph / i0)
    if g == 0.0:
        return vd_ideal
    ag = a * g
    c_over_g = (iph + i0) / g
    log_ratio = math.log(ag / i0)
    y = c_over_g / a - log_ratio
    if math.isinf(y):
        return vd_ideal
    w = float(wrightomega(y))
    log_w = math.log(w) if y > 0.0 else y - w
    vd_log = a * (log_w + log_ratio)
    vd_plain = c_over_g - a * w
    plain_better = max(abs(c_over_g), a * w) < a * max(abs(log_w), abs(log_ratio))
    return vd_plain if plain_better else vd_log


def open_circuit_voltage(iph: float, i01: float, a1: float, i02: float, a2: float,
                         g: float, atol: float) -> float:
    """Voc [V] of one parameter set with a second diode (``i02 > 0``): as
    :func:`tracer.model._network.open_circuit_voltage`."""
    upper = min(a1 * _log1p(iph / i01), a2 * _log1p(iph / i02))
    start = min(_junction_voltage_alone(iph, i01, a1, g),
                _junction_voltage_alone(iph, i02, a2, g))

    def residual(x: float):            # -I(Vd): increasing and convex
        m1, e1 = exp_pair(i01, x / a1)
        m2, e2 = exp_pair(i02, x / a2)
        return -(iph - m1 - x * g - m2), e1 / a1 + g + e2 / a2

    return bracketed_newton(residual, 0.0, upper, start, atol=atol)
