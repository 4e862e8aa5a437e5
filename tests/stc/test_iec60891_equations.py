"""IEC 60891 procedures 1 and 2 against the equations of the standard.

Source: IEC 60891 Ed.2 procedures 1 and 2, in the form transcribed
there from Sandia PV_LIB for MATLAB (pvl_translate_IV_curve_IEC60891_1.m / _2.m), which
cite IEC 60891 Ed.2. The expected values below are those equations typed in again here,
term by term, on random inputs.
"""
from __future__ import annotations

import numpy as np
import pytest

from tracer.stc import (
    Procedure1Coefficients,
    Procedure2Coefficients,
    translate_procedure1,
    translate_procedure2,
)

RNG = np.random.default_rng(60891)


def _random_curve(n=50):
    v = np.sort(RNG.uniform(-0.1, 0.7, n))
    i = RNG.uniform(-0.01, 0.04, n)
    return v, i


@pytest.mark.parametrize("trial", range(5))
def test_procedure1_is_the_published_equation(trial):
    v1, i1 = _random_curve()
    g1, t1 = RNG.uniform(500, 1100), RNG.uniform(10, 70)
    g2, t2 = RNG.uniform(800, 1200), RNG.uniform(15, 35)
    isc1 = RNG.uniform(0.02, 0.05)
    alpha, beta = RNG.uniform(1e-5, 3e-5), RNG.uniform(-2.5e-3, -1.5e-3)
    rs, kappa = RNG.uniform(0.1, 2.0), RNG.uniform(0.0, 0.01)
    # I2 = I1 + Isc1*(G2/G1 - 1) + alpha*(T2 - T1)
    # V2 = V1 - Rs*(I2 - I1) - kappa*I2*(T2 - T1) + beta*(T2 - T1)
    i2 = i1 + isc1 * (g2 / g1 - 1) + alpha * (t2 - t1)
    v2 = v1 - rs * (i2 - i1) - kappa * i2 * (t2 - t1) + beta * (t2 - t1)
    got_v, got_i = translate_procedure1(
        v1, i1, irradiance_w_m2=g1, temperature_c=t1, isc_a=isc1,
        coefficients=Procedure1Coefficients(alpha, beta, rs, kappa),
        target_irradiance_w_m2=g2, target_temperature_c=t2)
    np.testing.assert_allclose(got_i, i2, rtol=1e-13, atol=1e-16)
    np.testing.assert_allclose(got_v, v2, rtol=1e-13, atol=1e-15)


@pytest.mark.parametrize("trial", range(5))
def test_procedure2_is_the_published_equation(trial):
    v1, i1 = _random_curve()
    g1, t1 = RNG.uniform(500, 1100), RNG.uniform(10, 70)
    g2, t2 = RNG.uniform(800, 1200), RNG.uniform(15, 35)
    voc1 = RNG.uniform(0.55, 0.7)
    a_rel, b_rel = RNG.uniform(3e-4, 9e-4), RNG.uniform(-4.5e-3, -2.5e-3)
    a, rs, kappa = RNG.uniform(0.03, 0.07), RNG.uniform(0.1, 2.0), RNG.uniform(0.0, 0.01)
    # I2 = I1*(1 + alpha_rel*(T2 - T1))*G2/G1
    # V2 = V1 + Voc1*(beta_rel*(T2 - T1) + a*ln(G2/G1)) - Rs'*(I2 - I1) - kappa'*I2*(T2 - T1)
    i2 = i1 * (1 + a_rel * (t2 - t1)) * g2 / g1
    v2 = v1 + voc1 * (b_rel * (t2 - t1) + a * np.log(g2 / g1)) - rs * (i2 - i1) - kappa * i2 * (t2 - t1)
    got_v, got_i = translate_procedure2(
        v1, i1, irradiance_w_m2=g1, temperature_c=t1, voc_v=voc1,
        coefficients=Procedure2Coefficients(a_rel, b_rel, a, rs, kappa),
        target_irradiance_w_m2=g2, target_temperature_c=t2)
    np.testing.assert_allclose(got_i, i2, rtol=1e-13, atol=1e-16)
    np.testing.assert_allclose(got_v, v2, rtol=1e-13, atol=1e-15)


def test_procedure1_accepts_irradiance_per_point():
    # Ed.2 allows G1 read per point; equation applied point by point
    v1, i1 = _random_curve(10)
    g1 = np.linspace(990.0, 1010.0, 10)
    got_v, got_i = translate_procedure1(v1, i1, irradiance_w_m2=g1, temperature_c=25.0,
                                        isc_a=0.04, coefficients=Procedure1Coefficients(0, 0, 1.0, 0))
    np.testing.assert_allclose(got_i, i1 + 0.04 * (1000.0 / g1 - 1), rtol=1e-13)
    np.testing.assert_allclose(got_v, v1 - 1.0 * (got_i - i1), rtol=1e-13, atol=1e-15)


def test_same_conditions_leave_the_curve_unchanged():
    v1, i1 = _random_curve()
    for fn, kw in ((translate_procedure1, dict(isc_a=0.04, coefficients=Procedure1Coefficients(1e-5, -2e-3, 1.0, 0.01))),
                   (translate_procedure2, dict(voc_v=0.6, coefficients=Procedure2Coefficients(5e-4, -3e-3, 0.05, 1.0, 0.01)))):
        v2, i2 = fn(v1, i1, irradiance_w_m2=1000.0, temperature_c=25.0, **kw)
        np.testing.assert_array_equal(i2, i1)
        np.testing.assert_array_equal(v2, v1)


@pytest.mark.parametrize("g1", [0.0, -5.0, float("nan")])
def test_rejects_non_positive_irradiance(g1):
    with pytest.raises(ValueError):
        translate_procedure1([0.0, 0.5], [0.04, 0.0], irradiance_w_m2=g1, temperature_c=25.0,
                             isc_a=0.04, coefficients=Procedure1Coefficients())


def test_rejects_non_finite_coefficients():
    with pytest.raises(ValueError):
        Procedure1Coefficients(alpha_a_per_k=float("inf"))
    with pytest.raises(ValueError):
        Procedure2Coefficients(irradiance_factor=float("nan"))
