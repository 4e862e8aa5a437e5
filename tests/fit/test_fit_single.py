"""Single-diode extraction checked against pvlib (CEC table, De Soto translation, i_from_v)."""
import json
import math

import numpy as np
import pytest

from ._curves import cec_curve, cec_modules
from tracer.fit import FitResult, fit_curve
from tracer.model import SingleDiode, thermal_voltage

PARAMETERS = ("photocurrent_a", "saturation_current_a", "ideality",
              "series_resistance_ohm", "shunt_resistance_ohm")

# Oracle: pvlib CEC table -> pvlib.pvsystem.calcparams_desoto -> pvlib.pvsystem.i_from_v.
# 60 modules spread over the whole table, each at a different (G, T) so that the De Soto
# translation (Rsh scaled by 1000/G, I0 by the bandgap law) is exercised too.
MODULE_COUNT = 60
CONDITIONS = [(1000.0, 25.0), (800.0, 45.0), (400.0, 15.0), (1100.0, 60.0), (200.0, 25.0)]


@pytest.fixture(scope="module")
def noise_free_fits():
    out = []
    for k, (name, module) in enumerate(cec_modules(MODULE_COUNT).iterrows()):
        g, t_c = CONDITIONS[k % len(CONDITIONS)]
        v, i, truth, ns, tk = cec_curve(module, irradiance_w_m2=g, temperature_c=t_c)
        out.append((name, truth, fit_curve(v, i, temperature_k=tk, cells_in_series=ns),
                    v, i))
    return out


def test_recovers_cec_modules_noise_free_to_1e_6(noise_free_fits):
    # Source: pvlib's own solver made the curves from the CEC parameters, so an exact
    # extraction returns them. Tolerance 1e-6 relative for every parameter, Rsh
    # included: on these curves (V to 1.01 Voc, 200 points) even Rsh of 3.7e4 ohm
    # (the largest in the set) stays identifiable, so no parameter needs a looser bound.
    assert len(noise_free_fits) >= 50
    failures = []
    for name, truth, res, _, _ in noise_free_fits:
        for key in PARAMETERS:
            err = abs(res.parameters[key] / truth[key] - 1.0)
            if not err <= 1e-6:
                failures.append((name, key, err))
    assert not failures, failures[:5]


def test_noise_free_rmse_is_at_rounding_level(noise_free_fits):
    # The true-current RMSE of an exact recovery is floating-point rounding: below
    # 1e-12 of Isc (pvlib's Lambert W and ours agree to ~1e-15 relative).
    for name, _, res, _, i in noise_free_fits:
        assert res.rmse_a <= 1e-12 * i[0], name


def test_result_object_is_consistent(noise_free_fits):
    name, truth, res, v, i = noise_free_fits[0]
    assert isinstance(res, FitResult)
    assert res.model == "single"
    assert set(res.parameters) == set(PARAMETERS) == set(res.uncertainty)
    model = res.to_model()
    assert isinstance(model, SingleDiode)
    # residuals are measured minus the model solved exactly at the measured voltages
    # (to 1e-12 of Isc: the public parameters n and Rsh are n*Ns*Vt and 1/G rounded once)
    np.testing.assert_allclose(i - model.current(v), res.residuals_a, rtol=0,
                               atol=1e-12 * i[0])
    assert res.rmse_a == pytest.approx(float(np.sqrt(np.mean(res.residuals_a**2))))
    # figures are the model's own
    fig = model.figures()
    assert res.figures.pmax_w == pytest.approx(fig.pmax_w, rel=1e-12)
    assert res.elapsed_s > 0


def test_figures_match_pvlib_singlediode(noise_free_fits):
    # Oracle: pvlib.pvsystem.singlediode on the true parameters; the fitted model's
    # figures agree to 1e-6 relative (parameters are recovered to ~1e-12, pvlib's MPP
    # search converges to ~1e-8).
    from pvlib import pvsystem

    for name, truth, res, _, _ in noise_free_fits[:10]:
        a = truth["ideality"] * res.cells_in_series * thermal_voltage(res.temperature_k)
        ref = pvsystem.singlediode(truth["photocurrent_a"], truth["saturation_current_a"],
                                   truth["series_resistance_ohm"],
                                   truth["shunt_resistance_ohm"], a)
        assert res.figures.isc_a == pytest.approx(float(ref["i_sc"]), rel=1e-6), name
        assert res.figures.voc_v == pytest.approx(float(ref["v_oc"]), rel=1e-6), name
        assert res.figures.pmax_w == pytest.approx(float(ref["p_mp"]), rel=1e-6), name


def test_to_dict_is_strict_json(noise_free_fits):
    res = noise_free_fits[0][2]
    d = res.to_dict()
    text = json.dumps(d, allow_nan=False)
    back = json.loads(text)
    assert back["model"] == "single"
    for key in PARAMETERS:
        assert key in back and key in back["uncertainty"]
    assert set(back["figures"]) == {"isc_a", "voc_v", "imp_a", "vmp_v", "pmax_w", "ff"}
    for key in ("rmse_a", "elapsed_s", "selection_reason"):
        assert key in back


def test_module_of_identical_cells_gives_the_cell_parameters():
    # 36 identical cells in series: the module curve is the cell curve with V scaled by
    # 36, i.e. n*Ns*Vt, Rs and Rsh all 36 times the cell's (oracle: pvlib i_from_v with
    # nNsVth = n*36*Vt). Fitted with cells_in_series=36 the ideality is the cell's.
    from pvlib import pvsystem

    vt = thermal_voltage(298.15)
    cell = dict(il=5.0, i0=3e-10, rs=0.01, rsh=30.0, n=1.2)
    v_cell = np.linspace(0.0, 0.66, 180)
    i = np.asarray(pvsystem.i_from_v(v_cell, cell["il"], cell["i0"], cell["rs"], cell["rsh"],
                                     cell["n"] * vt), dtype=float)
    as_cell = fit_curve(v_cell, i)
    i_mod = np.asarray(pvsystem.i_from_v(36 * v_cell, cell["il"], cell["i0"], 36 * cell["rs"],
                                         36 * cell["rsh"], 36 * cell["n"] * vt), dtype=float)
    np.testing.assert_allclose(i_mod, i, rtol=1e-10, atol=1e-12)
    as_module = fit_curve(36 * v_cell, i_mod, cells_in_series=36)
    assert as_module.parameters["ideality"] == pytest.approx(cell["n"], rel=1e-6)
    assert as_module.parameters["ideality"] == pytest.approx(as_cell.parameters["ideality"],
                                                             rel=1e-6)
    assert as_module.parameters["series_resistance_ohm"] == pytest.approx(36 * cell["rs"],
                                                                          rel=1e-6)
    assert as_module.parameters["shunt_resistance_ohm"] == pytest.approx(36 * cell["rsh"],
                                                                         rel=1e-6)
    assert as_module.parameters["saturation_current_a"] == pytest.approx(cell["i0"], rel=1e-6)


def test_temperature_sets_the_thermal_voltage():
    # Same curve, temperature doubled in kelvin: kT/q doubles (CODATA via
    # scipy.constants), so the fitted ideality halves and nothing else moves.
    module = cec_modules(MODULE_COUNT).iloc[3]
    v, i, truth, ns, tk = cec_curve(module)
    cold = fit_curve(v, i, temperature_k=tk, cells_in_series=ns)
    hot = fit_curve(v, i, temperature_k=2 * tk, cells_in_series=ns)
    assert hot.parameters["ideality"] == pytest.approx(cold.parameters["ideality"] / 2,
                                                       rel=1e-8)
    assert hot.parameters["photocurrent_a"] == pytest.approx(
        cold.parameters["photocurrent_a"], rel=1e-10)


def test_curve_order_and_ideal_shunt():
    # A cell with no shunt (Rsh = inf) and points given in reverse order: the fit must
    # find G = 1/Rsh = 0 (reported Rsh = inf, its uncertainty inf) or a shunt so large
    # that it carries under 1e-9 of Isc over the curve. Oracle: pvlib i_from_v with
    # resistance_shunt = inf.
    from pvlib import pvsystem

    vt = thermal_voltage(300.0)
    v = np.linspace(0.7, 0.0, 150)
    i = np.asarray(pvsystem.i_from_v(v, 8.0, 2e-11, 0.003, np.inf, 1.05 * vt), dtype=float)
    keep = i > -0.5
    res = fit_curve(v[keep], i[keep], temperature_k=300.0)
    rsh = res.parameters["shunt_resistance_ohm"]
    assert rsh == math.inf or 0.7 / rsh < 1e-9 * 8.0
    assert res.parameters["ideality"] == pytest.approx(1.05, rel=1e-6)
    assert res.parameters["series_resistance_ohm"] == pytest.approx(0.003, rel=1e-6)
    assert json.dumps(res.to_dict(), allow_nan=False)


def test_sweep_stopped_at_half_voc_still_fits_exactly():
    # A sweep aborted at half of Voc (oracle: pvlib i_from_v): the diode is barely
    # visible there, yet the exact parameters are still the global optimum and found.
    from pvlib import pvsystem

    vt = thermal_voltage(298.15)
    v = np.linspace(0.0, 0.35, 50)
    i = np.asarray(pvsystem.i_from_v(v, 9.0, 1e-10, 0.004, 50.0, 1.1 * vt), dtype=float)
    res = fit_curve(v, i)
    assert res.rmse_a < 1e-12 * 9.0
    assert res.parameters["ideality"] == pytest.approx(1.1, rel=1e-6)


def test_wrong_cell_count_is_flagged():
    # A 360-cell string fitted as one cell needs n ~ 400: beyond the search limit, the
    # result says so instead of passing silently.
    from pvlib import pvsystem

    vt = thermal_voltage(298.15)
    v = np.linspace(0.0, 250.0, 300)
    i = np.asarray(pvsystem.i_from_v(v, 9.0, 1e-10, 1.5, 2000.0, 1.1 * 360 * vt), dtype=float)
    assert fit_curve(v, i, cells_in_series=360).notes == ()
    notes = fit_curve(v, i).notes
    assert any("search limit" in n and "cells_in_series" in n for n in notes)
