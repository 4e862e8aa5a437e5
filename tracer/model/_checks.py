"""Range checks for model parameters, with messages that name parameter, value and range."""
from __future__ import annotations

import math
import numbers

import numpy as np


def check_range(name, value, *, low, high, low_open, high_open, unit):
    """Return ``value`` as a float array after checking every element lies in a range.

    Parameters
    ----------
    name : str
        Parameter name used in the message, e.g. ``"series_resistance_ohm"``.
    value : float or array_like
        Value(s) to check. NaN is never allowed.
    low, high : float
        Ends of the allowed interval (``high`` may be ``inf``).
    low_open, high_open : bool
        Whether each end is excluded.
    unit : str
        Unit printed after the range, e.g. ``"ohm"``.

    Returns
    -------
    numpy.ndarray
        ``value`` as a float64 array (0-d for a scalar).

    Raises
    ------
    ValueError
        If any element is NaN or outside the interval. The message names the parameter,
        the first offending value and the allowed range.
    """
    if type(value) is float or type(value) is np.float64:  # the common scalar case, fast
        if ((value > low) if low_open else (value >= low)) and \
                ((value < high) if high_open else (value <= high)):
            return np.asarray(value, dtype=float)
    arr = np.asarray(value, dtype=float)
    ok_low = arr > low if low_open else arr >= low
    ok_high = arr < high if high_open else arr <= high
    ok = ok_low & ok_high  # False for NaN
    if not np.all(ok):
        bad = float(arr[~ok].flat[0]) if arr.ndim else float(arr)
        raise ValueError(
            f"{name} = {bad!r} is out of range; allowed: "
            f"{_fmt(low)} {'<' if low_open else '<='} {name} "
            f"{'<' if high_open else '<='} {_fmt(high)} [{unit}]"
        )
    return arr


def check_count(name, value, *, low):
    """Return ``value`` as an int after checking it is an integer ``>= low``.

    Integral floats (``60.0``) are accepted; booleans, fractions and NaN are not.

    Raises
    ------
    ValueError
        Naming the parameter, its value and the allowed range.
    """
    ok = False
    if isinstance(value, bool | np.bool_):
        ok = False
    elif isinstance(value, numbers.Integral):
        ok = int(value) >= low
    elif isinstance(value, numbers.Real):
        f = float(value)
        ok = math.isfinite(f) and f.is_integer() and f >= low
    if not ok:
        raise ValueError(
            f"{name} = {value!r} is out of range; allowed: integer {name} >= {low}"
        )
    return int(value)


def _fmt(x: float) -> str:
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return repr(float(x)).removesuffix(".0") if float(x).is_integer() else repr(float(x))


INF = float("inf")

#: Allowed range of every model parameter: (low, high, low_open, high_open, unit).
PARAMETER_RANGES = {
    "photocurrent_a": (0.0, INF, False, True, "A"),
    "saturation_current_a": (0.0, INF, True, True, "A"),
    "saturation_current_1_a": (0.0, INF, True, True, "A"),
    "saturation_current_2_a": (0.0, INF, False, True, "A"),
    "ideality": (0.0, INF, True, True, "1"),
    "ideality_1": (0.0, INF, True, True, "1"),
    "ideality_2": (0.0, INF, True, True, "1"),
    "n_ns_vt_v": (0.0, INF, True, True, "V"),
    "n_ns_vt_1_v": (0.0, INF, True, True, "V"),
    "n_ns_vt_2_v": (0.0, INF, True, True, "V"),
    "series_resistance_ohm": (0.0, INF, False, True, "ohm"),
    "shunt_resistance_ohm": (0.0, INF, True, False, "ohm"),
    "temperature_k": (0.0, INF, True, True, "K"),
}


def check_parameter(name, value):
    """Check ``value`` against :data:`PARAMETER_RANGES` ``[name]``; return a float array."""
    low, high, low_open, high_open, unit = PARAMETER_RANGES[name]
    return check_range(name, value, low=low, high=high, low_open=low_open,
                       high_open=high_open, unit=unit)


def check_scalar_parameter(name, value) -> float:
    """Like :func:`check_parameter` for one number; returns a Python float."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        arr = np.asarray(value)
        if arr.ndim != 0 or not np.issubdtype(arr.dtype, np.number) or arr.dtype == bool:
            raise ValueError(f"{name} = {value!r} is not a real number")
    return float(check_parameter(name, value))


#: Above this exponent exp() is formed in log space (float64 exp overflows past ~709.78).
_EXP_SAFE = 700.0


def scaled_expm1(scale, x):
    """``scale * (exp(x) - 1)`` without overflowing before the product does.

    ``expm1`` alone overflows at ``x > 709.78`` even when ``scale`` is small enough for the
    product to be representable; there the product is formed in log space.
    ``scale = 0`` gives 0 for every finite ``x``.
    """
    return scaled_exp_pair(scale, x)[0]


def scaled_exp_pair(scale, x):
    """``(scale * (exp(x) - 1), scale * exp(x))``, overflow-safe like :func:`scaled_expm1`."""
    with np.errstate(over="ignore", invalid="ignore"):
        em1 = np.expm1(x)
        minus_one = scale * em1
        full = scale * (em1 + 1.0)
    big = np.greater(x, _EXP_SAFE)
    if big.any():
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            full = np.where(big, np.exp(x + np.log(scale)), full)
            minus_one = np.where(big, full - scale, minus_one)
    return minus_one, full
