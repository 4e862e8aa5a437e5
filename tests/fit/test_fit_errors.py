"""Bad input to fit_curve raises FitError (a ValueError) with a clear message."""
import numpy as np
import pytest

from tracer.fit import FitError, fit_curve

V = np.linspace(0.0, 0.7, 40)
I = 5.0 - 1e-9 * np.expm1(V / 0.03)


def test_fit_error_is_a_value_error():
    assert issubclass(FitError, ValueError)


@pytest.mark.parametrize("v, i, kwargs, match", [
    (np.where(V == V[3], np.nan, V), I, {}, "NaN or infinite .*index 3"),
    (V, np.where(V == V[5], np.inf, I), {}, "NaN or infinite"),
    (V[:5], I[:5], {}, "at least 6 points"),
    (V[:7], I[:7], {"model": "double"}, "at least 8 points"),
    (np.full(20, 0.3), I[:20], {}, "same voltage"),
    (np.repeat(V[:3], 4), np.repeat(I[:3], 4), {}, "distinct voltages"),
    (V, I[:-1], {}, "voltage has 40 points but current has 39"),
    (V.reshape(4, 10), I.reshape(4, 10), {}, "one-dimensional"),
    (["a"] * 40, I, {}, "must be numbers"),
    (V, np.zeros_like(V), {}, "all currents are zero"),
    (V, I, {"model": "triple"}, "model must be one of"),
    (V, I, {"loss": "cauchy"}, "loss must be one of"),
    (V, I, {"temperature_k": -5.0}, "temperature_k"),
    (V, I, {"temperature_k": float("nan")}, "temperature_k"),
    (V, I, {"cells_in_series": 0}, "cells_in_series"),
    (V, I, {"cells_in_series": 2.5}, "cells_in_series"),
])
def test_bad_input_is_refused(v, i, kwargs, match):
    with pytest.raises(FitError, match=match):
        fit_curve(v, i, **kwargs)


def test_auto_with_too_few_points_for_two_diodes_keeps_single():
    res = fit_curve(V[::6], I[::6], model="auto")  # 7 points: 5 + 1 < 7 < 7 + 1
    assert res.model == "single"
    assert "too few" in res.selection_reason


def test_light_curve_in_load_convention_is_refused():
    with pytest.raises(FitError, match="generator convention"):
        fit_curve(V, -I)
    # current rising with voltage, though partly positive
    with pytest.raises(FitError, match="rises with the voltage"):
        fit_curve(V, -I + 6.0)
