"""Dark curves: Iph = 0, fitted on ln|I| over the decades they span."""
import numpy as np
import pytest

from tracer.fit import FitError, fit_curve
from tracer.model import DoubleDiode, thermal_voltage

pvlib = pytest.importorskip("pvlib")

V = np.linspace(-0.3, 0.75, 211)
#: A two-diode cell in the dark: diffusion (n1 = 1) and recombination (n2 = 2) currents
#: of the typical orders of magnitude (J01 ~ 1e-12, J02 ~ 1e-8 A per cm2 scale, from
#: memory), 20 mOhm series, 5 kOhm shunt. Invented values for a test device.
TWO_DIODE = DoubleDiode(0.0, 1e-12, 1e-8, 1.0, 2.0, 0.02, 5e3)
#: Relative current noise of 1 % per point (an SMU's accuracy spec across ranges is of
#: this order at low currents, common practice).
RELATIVE_NOISE = 0.01


def _noisy(i, seed):
    rng = np.random.default_rng(seed)
    return i * (1.0 + RELATIVE_NOISE * rng.standard_normal(i.size))


def test_dark_current_sign_and_decades():
    i = TWO_DIODE.current(V)
    assert np.all(i[V > 0] < 0) and np.all(i[V < 0] > 0)  # generator convention
    assert np.log10(np.max(np.abs(i)) / np.min(np.abs(i[V != 0]))) > 6  # many decades


def test_single_diode_dark_recovered_from_pvlib_curve():
    # Oracle: pvlib i_from_v with photocurrent 0. Noise-free: 1e-6 relative.
    vt = thermal_voltage(298.15)
    i = np.asarray(pvlib.pvsystem.i_from_v(V, 0.0, 1e-11, 0.02, 5e3, 1.3 * vt), dtype=float)
    res = fit_curve(V, i, dark=True)
    assert res.parameters["photocurrent_a"] == 0.0
    assert res.uncertainty["photocurrent_a"] == 0.0
    assert res.parameters["saturation_current_a"] == pytest.approx(1e-11, rel=1e-6)
    assert res.parameters["ideality"] == pytest.approx(1.3, rel=1e-6)
    assert res.parameters["series_resistance_ohm"] == pytest.approx(0.02, rel=1e-6)
    assert res.parameters["shunt_resistance_ohm"] == pytest.approx(5e3, rel=1e-6)
    assert res.figures is None and res.to_dict()["figures"] is None
    assert res.rmse_log < 1e-9


def test_double_diode_dark_recovered():
    i = TWO_DIODE.current(V)
    res = fit_curve(V, i, model="double", dark=True)
    truth = TWO_DIODE.parameters()
    for key, value in res.parameters.items():
        if key == "photocurrent_a":
            assert value == 0.0
        else:
            assert value == pytest.approx(truth[key], rel=1e-6), key


def test_dark_fit_weights_every_decade():
    # The fit is on ln|I|: with 1 % relative noise the log residual's RMS is ~0.01 and
    # the small currents near V = 0 are described as well as the large ones; a fit on the
    # current itself would leave the low decades (< 1e-4 of the largest current) free.
    i = _noisy(TWO_DIODE.current(V), seed=1)
    res = fit_curve(V, i, model="double", dark=True)
    assert res.rmse_log == pytest.approx(RELATIVE_NOISE, rel=0.2)
    measured = V != 0.0
    rel = res.residuals_a[measured] / i[measured]
    low = np.abs(i[measured]) < 1e-4 * np.max(np.abs(i))
    assert low.sum() > 20
    assert np.sqrt(np.mean(rel[low] ** 2)) < 3 * RELATIVE_NOISE
    # the same data fitted on the current (light-curve objective): the low decades are
    # left far off
    linear = fit_curve(V, i, model="double", dark=False)
    rel_linear = linear.residuals_a[measured] / i[measured]
    assert np.sqrt(np.mean(rel_linear[low] ** 2)) > 10 * RELATIVE_NOISE


def test_auto_picks_double_on_two_diode_dark_curve():
    i = _noisy(TWO_DIODE.current(V), seed=2)
    res = fit_curve(V, i, model="auto", dark=True)
    assert res.model == "double", res.selection_reason
    truth = TWO_DIODE.parameters()
    for key in ("ideality_1", "ideality_2", "series_resistance_ohm"):
        assert abs(res.parameters[key] - truth[key]) < 4 * res.uncertainty[key], key


def test_auto_picks_single_on_single_diode_dark_curve():
    vt = thermal_voltage(298.15)
    i = np.asarray(pvlib.pvsystem.i_from_v(V, 0.0, 1e-11, 0.02, 5e3, 1.3 * vt), dtype=float)
    res = fit_curve(V, _noisy(i, seed=3), model="auto", dark=True)
    assert res.model == "single", res.selection_reason
    assert "BIC single" in res.selection_reason


def test_dark_curve_in_load_convention_is_refused():
    with pytest.raises(FitError, match="generator convention"):
        fit_curve(V, -TWO_DIODE.current(V), dark=True)
