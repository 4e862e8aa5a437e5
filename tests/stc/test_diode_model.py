"""De Soto diode-model translation against pvlib's calcparams_desoto (De Soto et al. 2006,
Solar Energy 80(1):78-88, as implemented in pvlib)."""
from __future__ import annotations

import numpy as np
import pytest

from tracer.fit import fit_curve
from tracer.model import DoubleDiode, SingleDiode, thermal_voltage
from tracer.stc import translate_diode_model
from stc_pvlib_oracle import cec_modules, cs5p  # noqa: F401  (pytest fixtures)

CONDITIONS = [(600, 15), (800, 45), (1100, 60), (700, 35)]


def _model(module, g, t):
    il, i0, rs, rsh, a = module.params(g, t)
    n = a / (module.cells_in_series * thermal_voltage(t + 273.15))
    return SingleDiode(float(il), float(i0), float(n), float(rs), float(rsh), t + 273.15,
                       module.cells_in_series)


@pytest.mark.parametrize("g, t", CONDITIONS)
@pytest.mark.parametrize("target", [(1000, 25), (200, 25), (1000, 70), (850, 40)])
def test_parameters_move_as_pvlib_calcparams_desoto(cec_modules, g, t, target):
    for module in cec_modules:
        moved = translate_diode_model(_model(module, g, t), irradiance_w_m2=g, temperature_c=t,
                                      alpha_isc_a_per_k=module.alpha_sc,
                                      target_irradiance_w_m2=target[0], target_temperature_c=target[1])
        il, i0, rs, rsh, a = module.params(*target)
        assert moved.photocurrent_a == pytest.approx(float(il), rel=1e-12)
        # pvlib uses k = 8.617332e-5 eV/K, the tracer CODATA 8.617333262e-5 eV/K:
        # exponent Eg/kT ~ 45 differs by ~7e-6, hence rel 1e-4 on I0
        assert moved.saturation_current_a == pytest.approx(float(i0), rel=1e-4)
        assert moved.series_resistance_ohm == pytest.approx(float(rs), rel=1e-12)
        assert moved.shunt_resistance_ohm == pytest.approx(float(rsh), rel=1e-12)
        assert moved.n_ns_vt_v == pytest.approx(float(a), rel=1e-9)


@pytest.mark.parametrize("g, t", CONDITIONS)
def test_fit_then_translate_lands_on_pvlib_stc_figures(cs5p, g, t):
    v, i = cs5p.voltage_grid_curve(g, t, points=300)
    fit = fit_curve(v, i, model="single", temperature_k=t + 273.15,
                    cells_in_series=cs5p.cells_in_series)
    moved = translate_diode_model(fit.to_model(), irradiance_w_m2=g, temperature_c=t,
                                  alpha_isc_a_per_k=cs5p.alpha_sc)
    f = moved.figures()
    ref = cs5p.figures(1000, 25)     # pvlib singlediode at STC
    # noise-free data: only fit and solver errors remain (0.05 %)
    assert f.pmax_w == pytest.approx(ref["p_mp"], rel=5e-4)
    assert f.isc_a == pytest.approx(ref["i_sc"], rel=5e-4)
    assert f.voc_v == pytest.approx(ref["v_oc"], rel=5e-4)


def test_double_diode_without_second_diode_moves_like_single():
    single = SingleDiode(0.035, 1e-12, 1.1, 0.5, 2e3, 318.15, 1)
    double = DoubleDiode(0.035, 1e-12, 0.0, 1.1, 2.0, 0.5, 2e3, 318.15, 1)
    kw = dict(irradiance_w_m2=800.0, temperature_c=45.0, alpha_isc_a_per_k=2e-5)
    s = translate_diode_model(single, **kw)
    d = translate_diode_model(double, **kw)
    assert d.saturation_current_1_a == pytest.approx(s.saturation_current_a, rel=1e-14)
    assert d.photocurrent_a == pytest.approx(s.photocurrent_a, rel=1e-14)
    assert d.saturation_current_2_a == 0.0


def test_double_diode_round_trip_returns_the_model():
    # the moves form a group: there and back again is the identity (no outside number needed)
    m = DoubleDiode(0.035, 1e-12, 1e-8, 1.0, 2.0, 0.5, 2e3, 318.15, 1)
    there = translate_diode_model(m, irradiance_w_m2=800.0, temperature_c=45.0,
                                  alpha_isc_a_per_k=2e-5)
    back = translate_diode_model(there, irradiance_w_m2=1000.0, temperature_c=25.0,
                                 alpha_isc_a_per_k=2e-5, target_irradiance_w_m2=800.0,
                                 target_temperature_c=45.0)
    for k, v in m.parameters().items():
        assert getattr(back, k) == pytest.approx(v, rel=1e-10), k


def test_recombination_current_scales_with_the_square_root_law():
    # I02 follows n_i ∝ T^1.5 exp(-Eg/2kT) (from memory, module docstring): at equal T
    # nothing changes, and the log-ratio of I02 is half the diffusion one minus 1.5 ln(T2/T1)
    m = DoubleDiode(0.035, 1e-12, 1e-8, 1.0, 2.0, 0.5, 2e3, 318.15, 1)
    moved = translate_diode_model(m, irradiance_w_m2=800.0, temperature_c=45.0,
                                  alpha_isc_a_per_k=2e-5)
    r1 = np.log(moved.saturation_current_1_a / m.saturation_current_1_a)
    r2 = np.log(moved.saturation_current_2_a / m.saturation_current_2_a)
    t_ratio = np.log(298.15 / 318.15)
    assert r2 == pytest.approx(0.5 * (r1 - 3 * t_ratio) + 1.5 * t_ratio, rel=1e-12)


def test_rejects_bad_input():
    m = SingleDiode(0.035, 1e-12, 1.1, 0.5, 2e3)
    with pytest.raises(ValueError):
        translate_diode_model(m, irradiance_w_m2=0.0, temperature_c=25.0, alpha_isc_a_per_k=0.0)
    with pytest.raises(ValueError):
        translate_diode_model(m, irradiance_w_m2=1000.0, temperature_c=25.0,
                              alpha_isc_a_per_k=float("nan"))
