"""One parameter set, one unknown: the network's scalar problems in plain Python floats.

The vectorised solvers of :mod:`tracer.model._network` spend most of their time in
per-call overhead when the problem has a single element: the open-circuit voltage of
one parameter set (solved before every current evaluation of a fit), and its Isc and
maximum power point (every ``figures()``). These are the same equations, bracket, start
and safeguarded Newton iteration
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


def _state(x: float, iph: float, i01: float, a1: float, i02: float, a2: float, g: float):
    """I(Vd), D = -dI/dVd and dD/dVd at one junction voltage, as
    :func:`tracer.model._network.junction_state` (same order of operations)."""
    m1, e1 = exp_pair(i01, x / a1)
    current = iph - m1 - x * g
    d1 = e1 / a1
    dd = d1 / a1
    conductance = d1 + g
    if i02 > 0.0:
        m2, e2 = exp_pair(i02, x / a2)
        current = current - m2
        d2 = e2 / a2
        conductance = conductance + d2
        dd = dd + d2 / a2
    return current, conductance, dd


def junction_current(x: float, iph: float, i01: float, a1: float, i02: float, a2: float,
                     g: float) -> float:
    """I(Vd) as :func:`tracer.model._network.junction_current` (same order)."""
    current = iph - x * g
    current = current - exp_pair(i01, x / a1)[0]
    if i02 > 0.0:
        current = current - exp_pair(i02, x / a2)[0]
    return current


def maximum_power_point(iph: float, i01: float, a1: float, i02: float, a2: float, rs: float,
                        g: float, voc: float, atol: float) -> tuple[float, float, float]:
    """(Vmp, Imp, Pmax) of one parameter set: as
    :func:`tracer.model._network.maximum_power_point`."""
    upper = voc
    start = upper - a1 * _log1p(upper / a1)
    if start != start:
        pass
    elif start < 0.0:
        start = 0.0
    elif start > upper:
        start = upper

    def residual(x: float):            # -dP/dVd: increasing through the root
        cur, d, dd = _state(x, iph, i01, a1, i02, a2, g)
        return (x * d - cur * (1.0 + 2.0 * rs * d),
                2.0 * d * (1.0 + rs * d) + dd * (x - 2.0 * cur * rs))

    vd = bracketed_newton(residual, 0.0, upper, start, atol=atol)
    imp = junction_current(vd, iph, i01, a1, i02, a2, g)
    vmp = vd - imp * rs
    return vmp, imp, vmp * imp


def _min(a: float, b: float) -> float:
    """numpy.minimum of two floats (NaN if either is NaN)."""
    if a != a or b != b:
        return math.nan
    return a if a <= b else b


def _lambert_current(v: float, iph: float, i0: float, a: float, rs: float, g: float) -> float:
    """Single-diode current for Rs > 0, as :func:`tracer.model._lambert._current_lambert`."""
    s = 1.0 + rs * g
    inv_as = 1.0 / (a * s)
    x = (v + rs * (iph + i0)) * inv_as + math.log(rs * i0 * inv_as)
    w = float(wrightomega(x))
    return (iph + i0) / s - v * (g / s) - (a / rs) * w


def current_at_voltage(v: float, iph: float, i01: float, a1: float, i02: float, a2: float,
                       rs: float, g: float, voc: float, atol: float) -> float:
    """Terminal current at one terminal voltage of one parameter set with Rs > 0: as
    :func:`tracer.model._network.current_at_voltage`."""
    lower, upper = _min(v, voc), -_min(-v, -voc)
    if v > voc:
        excess = iph + (v - voc) / rs
        bound = a1 * _log1p(excess / i01)
        if i02 > 0.0:
            bound = _min(bound, a2 * _log1p(excess / i02))
        upper = _min(upper, bound)
    start = v + rs * _lambert_current(v, iph, i01, a1, rs, g)
    if i02 > 0.0:
        start = _min(start, v + rs * _lambert_current(v, iph, i02, a2, rs, g))
    if start != start:
        start = upper

    def residual(x: float):            # Vd - Rs*I(Vd) - V: increasing and convex
        current, conductance, _ = _state(x, iph, i01, a1, i02, a2, g)
        return x - rs * current - v, 1.0 + rs * conductance

    vd = bracketed_newton(residual, lower, upper, start, atol=atol)
    return junction_current(vd, iph, i01, a1, i02, a2, g)
