"""IEC 60891 procedure 3 (interpolation), in its usual interpolation form (from memory, not confirmed against the standard text).

That form is marked there as from memory (not confirmed against the standard text); these
tests check the code does exactly that form: X3 = X1 + a*(X2 - X1) for G, T, I, V with
points paired so that I2 - I1 = Isc2 - Isc1, and a second stage with b for a third curve.
"""
from __future__ import annotations

import numpy as np
import pytest

from tracer.stc import MeasuredCurve, curve_figures, translate_procedure3

pvsystem = pytest.importorskip("pvlib.pvsystem")


def _ideal_curve(il, a=1.6, i0=1e-9):
    """pvlib single diode with Rs = 0, Rsh = inf: V(I) = a*ln((IL - I)/I0 + 1), points at
    the same offsets d = IL - I for every IL (0 and log-spaced 1e-7 ... 4.8 A)."""
    d = np.concatenate([[0.0], np.geomspace(1e-7, 4.8, 400)])
    i = il - d
    v = pvsystem.v_from_i(i, il, i0, 0.0, np.inf, a)
    return np.asarray(v, float), i


def test_two_curves_stage_equation_by_hand():
    # Two curves at one temperature, target on their line: G3 = G1 + a(G2 - G1) gives a = 0.4.
    v1, i1 = _ideal_curve(3.0)
    v2, i2 = _ideal_curve(5.0)
    r = translate_procedure3([MeasuredCurve(v1, i1, 600.0, 25.0), MeasuredCurve(v2, i2, 1000.0, 25.0)],
                             target_irradiance_w_m2=760.0, target_temperature_c=25.0)
    assert r.stage_constants == pytest.approx((0.4,))
    assert r.weights == pytest.approx((0.6, 0.4))
    # I3 = I1 + a(I2 - I1) with I2 - I1 = Isc2 - Isc1, V3 = V1 + a(V2 - V1): at offset d
    # below Isc, V1(d) and V2(d) from each curve
    isc1, isc2 = curve_figures(v1, i1).isc_a, curve_figures(v2, i2).isc_a
    d = 1.0
    v1d = np.interp(isc1 - d, i1[::-1], v1[::-1])
    v2d = np.interp(isc2 - d, i2[::-1], v2[::-1])
    i3 = (isc1 - d) + 0.4 * ((isc2 - d) - (isc1 - d))
    v3 = v1d + 0.4 * (v2d - v1d)
    assert np.interp(i3, r.current_a[::-1], r.voltage_v[::-1]) == pytest.approx(v3, rel=1e-6)


def test_exact_for_an_ideal_diode_between_irradiances():
    # With Rs = 0 and Rsh = inf, V depends on IL - I only, so pairing by Isc - I makes
    # interpolation exact: the result must equal pvlib's curve at the target photocurrent
    # (both curves share their offsets below Isc, so no resampling error enters).
    v1, i1 = _ideal_curve(3.0)
    v2, i2 = _ideal_curve(5.5)
    r = translate_procedure3([MeasuredCurve(v1, i1, 600.0, 25.0), MeasuredCurve(v2, i2, 1100.0, 25.0)],
                             target_irradiance_w_m2=1000.0, target_temperature_c=25.0)
    il_target = 3.0 + (5.5 - 3.0) * (1000 - 600) / (1100 - 600)
    expected = pvsystem.v_from_i(r.current_a, il_target, 1e-9, 0.0, np.inf, 1.6)
    np.testing.assert_allclose(r.voltage_v, expected, rtol=1e-6, atol=1e-9)


def test_three_curves_reach_an_arbitrary_target_with_two_stages():
    curves = [MeasuredCurve(*_ideal_curve(il), g, t)
              for il, g, t in ((3.0, 600.0, 15.0), (5.5, 1100.0, 20.0), (5.0, 1000.0, 50.0))]
    r = translate_procedure3(curves, target_irradiance_w_m2=1000.0, target_temperature_c=25.0)
    a, b = r.stage_constants
    w = np.array(r.weights)
    # barycentric weights of the two-stage scheme: ((1-a)(1-b), a(1-b), b)
    assert w == pytest.approx([(1 - a) * (1 - b), a * (1 - b), b])
    g = sum(wk * c.irradiance_w_m2 for wk, c in zip(w, curves))
    t = sum(wk * c.temperature_c for wk, c in zip(w, curves))
    assert (g, t) == pytest.approx((1000.0, 25.0))
    assert not r.extrapolated


def test_extrapolation_is_reported():
    curves = [MeasuredCurve(*_ideal_curve(il), g, 25.0) for il, g in ((3.0, 600.0), (4.0, 800.0))]
    r = translate_procedure3(curves, target_irradiance_w_m2=1000.0, target_temperature_c=25.0)
    assert r.extrapolated
    assert r.stage_constants[0] == pytest.approx(2.0)


def test_two_curves_off_the_target_line_are_refused():
    curves = [MeasuredCurve(*_ideal_curve(il), g, t) for il, g, t in ((3.0, 600.0, 25.0), (5.0, 1000.0, 50.0))]
    with pytest.raises(ValueError, match="connecting line"):
        translate_procedure3(curves, target_irradiance_w_m2=1000.0, target_temperature_c=25.0)


def test_one_curve_is_refused():
    with pytest.raises(ValueError):
        translate_procedure3([MeasuredCurve(*_ideal_curve(3.0), 600.0, 25.0)])
