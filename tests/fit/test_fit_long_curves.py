"""Long sweeps (1,000 points): the grids screen 200 of the points, every later stage uses
all of them. The result must be the optimum over every point.

Oracles: pvlib (CEC table, calcparams_desoto, i_from_v) for single-diode curves;
tracer.model.DoubleDiode for two-diode curves (itself checked against scipy brentq in
test_fit_double.test_generator_matches_brentq); and, for noisy curves, an independent
least-squares fit over every point: ``scipy.optimize.least_squares`` on pvlib's
``i_from_v`` model, started at the true parameters.
"""
import math

import numpy as np
import pytest
from scipy.optimize import least_squares

from tracer.fit import fit_curve
from tracer.fit._grid import SCREEN_POINTS, screen_subset
from tracer.model import DoubleDiode

from ._curves import cec_curve, cec_modules

pvlib = pytest.importorskip("pvlib")

POINTS = 1000
SINGLE = ("photocurrent_a", "saturation_current_a", "ideality", "series_resistance_ohm",
          "shunt_resistance_ohm")
DOUBLE = ("photocurrent_a", "saturation_current_1_a", "saturation_current_2_a", "ideality_1",
          "ideality_2", "series_resistance_ohm", "shunt_resistance_ohm")


def test_screen_subset_spreads_over_the_curve():
    rng = np.random.default_rng(3)
    v = rng.permutation(np.linspace(-0.1, 0.7, POINTS))       # sweep order does not matter
    sub = screen_subset(v, SCREEN_POINTS)
    assert sub.size == SCREEN_POINTS and np.unique(sub).size == sub.size
    ranks = np.argsort(np.argsort(v))[sub]                     # voltage rank of each kept point
    ranks.sort()
    assert ranks[0] == 0 and ranks[-1] == POINTS - 1           # both ends kept
    gaps = np.diff(ranks)
    assert gaps.max() - gaps.min() <= 1                        # evenly spread
    assert screen_subset(v[:SCREEN_POINTS], SCREEN_POINTS) is None


@pytest.mark.parametrize("index", [0, 4, 8])
def test_long_single_diode_curve_recovered_to_1e_6(index):
    # noise-free pvlib curve of 1,000 points: every parameter back to 1e-6 relative
    module = cec_modules(12).iloc[index]
    v, i, truth, ns, tk = cec_curve(module, points=POINTS)
    res = fit_curve(v, i, temperature_k=tk, cells_in_series=ns)
    for key in SINGLE:
        assert res.parameters[key] == pytest.approx(truth[key], rel=1e-6), key


@pytest.mark.parametrize("index", [1, 5])
def test_long_double_diode_curve_recovered_to_1e_6(index):
    _, _, truth, ns, tk = cec_curve(cec_modules(12).iloc[index])
    iph, i01 = truth["photocurrent_a"], truth["saturation_current_a"]
    # a recombination diode carrying about 20 % of Iph at Voc (invented for the test)
    model = DoubleDiode(iph, i01, 0.2 * math.sqrt(iph * i01), truth["ideality"], 2.0,
                        truth["series_resistance_ohm"], truth["shunt_resistance_ohm"],
                        temperature_k=tk, cells_in_series=ns)
    v = np.linspace(0.0, 1.01 * model.voltage(0.0), POINTS)
    res = fit_curve(v, model.current(v), model="double", temperature_k=tk,
                    cells_in_series=ns)
    expected = model.parameters()
    for key in DOUBLE:
        assert res.parameters[key] == pytest.approx(expected[key], rel=1e-6), key


def _oracle_fit(v, i, truth, ns, tk):
    """Least squares over every point on pvlib's model, from the true parameters; returns
    its sum of squared current residuals."""
    from pvlib import pvsystem
    from tracer.model import thermal_voltage

    a_true = truth["ideality"] * ns * thermal_voltage(tk)

    def residual(p):
        il, log_i0, rs, log_rsh, a = p
        model = pvsystem.i_from_v(v, il, math.exp(log_i0), rs, math.exp(log_rsh), a)
        return np.asarray(model, dtype=float) - i

    start = [truth["photocurrent_a"], math.log(truth["saturation_current_a"]),
             truth["series_resistance_ohm"], math.log(truth["shunt_resistance_ohm"]), a_true]
    sol = least_squares(residual, start, x_scale="jac", xtol=1e-15, ftol=1e-15, gtol=1e-15,
                        max_nfev=2000)
    return float(sol.fun @ sol.fun)


@pytest.mark.parametrize("index", [2, 6])
def test_long_noisy_curve_reaches_the_optimum_over_every_point(index):
    # 0.1 % of Isc noise (common practice for a bench SMU): our sum of squares over all
    # 1,000 points is that of the independent fit to 1e-9 relative (not larger)
    module = cec_modules(12).iloc[index]
    v, i_true, truth, ns, tk = cec_curve(module, points=POINTS)
    rng = np.random.default_rng(index)
    i = i_true + 1e-3 * i_true[0] * rng.standard_normal(v.size)
    res = fit_curve(v, i, temperature_k=tk, cells_in_series=ns)
    ours = float(np.sum(res.residuals_a ** 2))
    assert ours <= _oracle_fit(v, i, truth, ns, tk) * (1 + 1e-9)
