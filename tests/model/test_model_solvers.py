"""The double-diode solver and the maximum-power search against independent scipy routes.

References: ``scipy.optimize.brentq`` on the implicit double-diode equation, one point at
a time (an independent bracketing solver), and ``scipy.optimize.minimize_scalar``
(bounded Brent) on ``-V*I(V)`` for the maximum power point.
"""
import numpy as np
import pytest
from scipy.optimize import brentq, minimize_scalar

from tracer.model import DoubleDiode, SingleDiode

DOUBLE_CASES = [
    # silicon-like cell: diffusion diode n1 = 1, recombination diode n2 = 2
    DoubleDiode(photocurrent_a=9.0, saturation_current_1_a=1e-12,
                saturation_current_2_a=1e-8, ideality_1=1.0, ideality_2=2.0,
                series_resistance_ohm=0.004, shunt_resistance_ohm=50.0),
    # 72-cell module, hot
    DoubleDiode(photocurrent_a=6.0, saturation_current_1_a=5e-11,
                saturation_current_2_a=3e-6, ideality_1=1.05, ideality_2=2.2,
                series_resistance_ohm=0.5, shunt_resistance_ohm=300.0,
                temperature_k=338.15, cells_in_series=72),
    # dominant second diode, no shunt, no series resistance
    DoubleDiode(photocurrent_a=0.03, saturation_current_1_a=1e-15,
                saturation_current_2_a=1e-6, ideality_1=0.9, ideality_2=2.8,
                series_resistance_ohm=0.0, shunt_resistance_ohm=np.inf),
    # dark, large series resistance
    DoubleDiode(photocurrent_a=0.0, saturation_current_1_a=1e-13,
                saturation_current_2_a=1e-9, ideality_1=1.0, ideality_2=2.0,
                series_resistance_ohm=20.0, shunt_resistance_ohm=1e4),
]


def _residual(model, v, i):
    """Implicit double-diode equation, I - RHS (decreasing in I)."""
    a1, a2 = model.n_ns_vt_1_v, model.n_ns_vt_2_v
    vd = v + i * model.series_resistance_ohm
    return (model.photocurrent_a - model.saturation_current_1_a * np.expm1(vd / a1)
            - model.saturation_current_2_a * np.expm1(vd / a2)
            - vd / model.shunt_resistance_ohm - i)


def _brentq_current(model, v):
    rs = model.series_resistance_ohm
    if rs == 0:
        return _residual(model, v, 0.0)  # Rs = 0: the equation is explicit, I = RHS(V)
    # bracket: I_hi makes every term negative, I_lo puts the junction in reverse bias
    i_hi = (model.photocurrent_a + model.saturation_current_1_a
            + model.saturation_current_2_a + abs(v) / model.shunt_resistance_ohm + 1.0)
    i_lo = -(abs(v) + 10.0) / rs
    i_hi = min(i_hi, (0.0 - v) / rs + 50 * model.n_ns_vt_2_v / rs)  # keeps exp finite
    return brentq(lambda i: _residual(model, v, i), i_lo, i_hi, xtol=1e-300, rtol=8.9e-16,
                  maxiter=500)


@pytest.mark.parametrize("model", DOUBLE_CASES)
def test_double_diode_current_matches_brentq(model):
    voc = model.figures().voc_v if model.photocurrent_a > 0 else 1.0
    voltages = np.concatenate([np.linspace(-2 * voc, 1.3 * voc, 67), [0.0]])
    ours = model.current(voltages)
    reference = np.array([_brentq_current(model, v) for v in voltages])
    scale = max(model.photocurrent_a, np.max(np.abs(reference)))
    np.testing.assert_allclose(ours, reference, rtol=1e-12, atol=1e-14 * scale)
    # and the residual of the implicit equation itself is at rounding level
    assert np.max(np.abs(_residual(model, voltages, ours))) <= 1e-12 * scale


@pytest.mark.parametrize("model", DOUBLE_CASES)
def test_double_diode_voltage_inverts_current(model):
    # I -> V -> I is the well-conditioned direction (V(I) is steep where I(V) is flat)
    voc = model.figures().voc_v if model.photocurrent_a > 0 else 1.0
    currents = model.current(np.linspace(-2 * voc, 1.3 * voc, 67))
    voltages = model.voltage(currents)
    assert np.all(np.isfinite(voltages))
    scale = max(model.photocurrent_a, np.max(np.abs(currents)))
    np.testing.assert_allclose(model.current(voltages), currents, rtol=1e-11,
                               atol=1e-13 * scale)
    # and V is the root of the implicit equation at the given current
    assert np.max(np.abs(_residual(model, voltages, currents))) <= 1e-11 * scale


CELLS_FOR_MPP = [*DOUBLE_CASES[:3],
                 SingleDiode(photocurrent_a=9.0, saturation_current_a=1e-10, ideality=1.2,
                             series_resistance_ohm=0.003, shunt_resistance_ohm=60.0),
                 SingleDiode(photocurrent_a=8.5, saturation_current_a=3e-10, ideality=1.3,
                             series_resistance_ohm=0.4, shunt_resistance_ohm=250.0,
                             temperature_k=308.15, cells_in_series=60),
                 SingleDiode(photocurrent_a=1e-3, saturation_current_a=1e-18, ideality=1.0,
                             series_resistance_ohm=50.0, shunt_resistance_ohm=1e5,
                             cells_in_series=144)]


@pytest.mark.parametrize("model", CELLS_FOR_MPP)
def test_maximum_power_point_matches_brent_search(model):
    f = model.figures()
    ref = minimize_scalar(lambda v: -v * model.current(v), bounds=(0.0, f.voc_v),
                          method="bounded", options={"xatol": 1e-10 * f.voc_v})
    pmax_ref = -ref.fun
    # required: 1e-9 relative in power; ours is never below the reference optimum
    assert f.pmax_w == pytest.approx(pmax_ref, rel=1e-9)
    assert f.pmax_w >= pmax_ref * (1 - 1e-14)
    # the returned point lies on the curve
    assert f.imp_a == pytest.approx(model.current(f.vmp_v), rel=1e-11)
    assert f.pmax_w == pytest.approx(f.vmp_v * f.imp_a, rel=1e-15)
    # figures by definition
    assert f.isc_a == pytest.approx(model.current(0.0), rel=1e-14)
    assert abs(model.current(f.voc_v)) <= 1e-10 * f.isc_a
    assert f.ff == pytest.approx(f.pmax_w / (f.isc_a * f.voc_v), rel=1e-15)


def test_safeguarded_newton_falls_back_to_bisection():
    # textbook case: plain Newton on arctan(x) - c diverges from far starts (it overshoots
    # further each step); the bracket safeguard must still converge. Reference root:
    # tan(c) from numpy.
    from tracer.model._newton import bracketed_newton

    targets = np.array([0.5, -1.2, 1.5, 0.0])

    def residual(x, idx):
        return np.arctan(x) - targets[idx], 1.0 / (1.0 + x * x)

    lower = np.full(4, -1e3)
    upper = np.full(4, 1e3)
    start = np.array([900.0, -900.0, 50.0, 999.0])
    root = bracketed_newton(residual, lower, upper, start, atol=1e-15)
    np.testing.assert_allclose(root, np.tan(targets), rtol=1e-12, atol=1e-15)
    with pytest.raises(RuntimeError, match="did not converge"):
        bracketed_newton(residual, lower, upper, start, atol=0.0, rtol=0.0, max_iter=3)
