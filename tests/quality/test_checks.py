"""The measures behind the verdict, each against a hand computation or its published form."""
from __future__ import annotations

import numpy as np
import pytest

from tracer.quality import (
    INSTABILITY_CLASS_LIMITS,
    durbin_watson,
    hysteresis_indices,
    runs_test,
    shunt_from_slope,
    temporal_instability,
)
from tracer.model import SingleDiode


def test_temporal_instability_formula():
    # IEC 60904-9 form: (Gmax - Gmin)/(Gmax + Gmin)
    assert temporal_instability([970.0, 1000.0, 1030.0]) == pytest.approx(60.0 / 2000.0)
    with pytest.raises(ValueError):
        temporal_instability([1000.0])


def test_instability_limits_are_the_reference_table():
    # IEC 60904-9 table, LTI column (from memory; A+ unconfirmed)
    assert {k: v[0] for k, v in INSTABILITY_CLASS_LIMITS.items()} == {
        "A+": 0.01, "A": 0.02, "B": 0.05, "C": 0.10}
    assert "unconfirmed" in INSTABILITY_CLASS_LIMITS["A+"][1]


def test_durbin_watson_by_hand():
    # d = sum (e_t - e_{t-1})^2 / sum e_t^2 (Durbin & Watson 1950):
    # e = [1, -1, 1, -1]: diffs [-2, 2, -2] -> 12 / 4 = 3
    assert durbin_watson([1.0, -1.0, 1.0, -1.0]) == pytest.approx(3.0)
    # e = [1, 1, 1, 1]: no change -> 0
    assert durbin_watson([1.0, 1.0, 1.0, 1.0]) == 0.0


def test_durbin_watson_of_white_noise_is_near_two():
    # for independent residuals E[d] ~ 2 (Durbin & Watson 1950); sd ~ 2/sqrt(n)
    e = np.random.default_rng(7).normal(size=4000)
    assert durbin_watson(e) == pytest.approx(2.0, abs=0.15)


def test_runs_test_by_hand():
    # signs + + - - + : runs R = 3, n+ = 3, n- = 2 (Wald & Wolfowitz 1940)
    # mu = 2*3*2/5 + 1 = 3.4; var = (mu-1)(mu-2)/(n-1) = 2.4*1.4/4 = 0.84
    runs, z = runs_test([0.5, 0.2, -0.1, -0.3, 0.4])
    assert runs == 3
    assert z == pytest.approx((3 - 3.4) / np.sqrt(0.84))


def test_runs_test_flags_a_smooth_pattern():
    e = np.sin(np.linspace(0, 4 * np.pi, 500))
    runs, z = runs_test(e)
    assert runs <= 5 and z < -15


def test_shunt_from_slope_recovers_a_linear_shunt():
    # an ideal shunt: I = Iph - V/Rsh exactly in the window (no diode current there)
    v = np.linspace(0.0, 0.3, 30)
    i = 0.04 - v / 250.0
    assert shunt_from_slope(v, i, voc_v=0.6) == pytest.approx(250.0, rel=1e-9)


def _pair():
    reverse = SingleDiode(0.16, 1.6e-11, 1.1, 0.125, 2500.0)
    forward = reverse.replace(series_resistance_ohm=0.6)   # poorer fill factor
    v = np.linspace(-0.05, 0.75, 400)
    return v, forward.current(v), reverse.current(v), forward, reverse


def test_hysteresis_index_against_pvlib_pmax():
    pvsystem = pytest.importorskip("pvlib.pvsystem")
    v, i_fwd, i_rev, fwd, rev = _pair()
    hi = hysteresis_indices(v, i_fwd, v, i_rev)

    def pmax(m):   # oracle: pvlib's single-diode maximum power
        return float(pvsystem.singlediode(m.photocurrent_a, m.saturation_current_a,
                                          m.series_resistance_ohm, m.shunt_resistance_ohm,
                                          m.n_ns_vt_v)["p_mp"])
    expected = (pmax(rev) - pmax(fwd)) / pmax(rev)
    # each Pmax is read from the points with a local polynomial (ASTM E1036 practice), which
    # can be ~0.2 % off the exact maximum (tests/stc/test_curve_figures.py): 0.003 absolute
    assert hi.pmax == pytest.approx(expected, abs=3e-3)
    assert hi.pmax > 0.05          # "normal" hysteresis: reverse scan better
    assert hi.area > 0.0
