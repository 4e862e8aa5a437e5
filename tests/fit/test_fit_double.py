"""Double-diode extraction.

pvlib has no double-diode model, so the curves come from tracer.model.DoubleDiode; the
generator itself is first checked against an independent solution of the implicit
double-diode equation by scipy.optimize.brentq (test_generator_matches_brentq).
"""
import math

import numpy as np
import pytest
from scipy.optimize import brentq

from tracer.fit import fit_curve
from tracer.model import DoubleDiode, thermal_voltage

from ._curves import cec_curve, cec_modules

KEYS = ("photocurrent_a", "saturation_current_1_a", "saturation_current_2_a", "ideality_1",
        "ideality_2", "series_resistance_ohm", "shunt_resistance_ohm")


def _double_from_cec(module, fraction=0.2):
    """A CEC module (pvlib parameters at STC) with a recombination diode added: n2 = 2
    and I02 = f*sqrt(Iph*I01), which carries about a fraction f of Iph at Voc."""
    _, _, truth, ns, tk = cec_curve(module)
    iph, i01 = truth["photocurrent_a"], truth["saturation_current_a"]
    return DoubleDiode(iph, i01, fraction * math.sqrt(iph * i01), truth["ideality"], 2.0,
                       truth["series_resistance_ohm"], truth["shunt_resistance_ohm"],
                       temperature_k=tk, cells_in_series=ns)


def _brentq_current(model: DoubleDiode, v: float) -> float:
    """Independent solution of I = Iph - I01(e^{(V+IRs)/a1}-1) - I02(e^{(V+IRs)/a2}-1)
    - (V+IRs)/Rsh for I by scipy.optimize.brentq on a bracket (the residual is monotone
    decreasing in I)."""
    vt = thermal_voltage(model.temperature_k) * model.cells_in_series
    a1, a2 = model.ideality_1 * vt, model.ideality_2 * vt
    rs, rsh = model.series_resistance_ohm, model.shunt_resistance_ohm

    def f(i):
        vd = v + i * rs
        return (model.photocurrent_a - model.saturation_current_1_a * math.expm1(vd / a1)
                - model.saturation_current_2_a * math.expm1(vd / a2) - vd / rsh - i)

    lo, hi = -2.0 * model.photocurrent_a - 1.0, model.photocurrent_a + abs(v) / rsh + 1.0
    return brentq(f, lo, hi, xtol=1e-15, rtol=4 * np.finfo(float).eps, maxiter=500)


@pytest.fixture(scope="module")
def double_models():
    return [_double_from_cec(m) for _, m in cec_modules(12).iterrows()]


def test_generator_matches_brentq(double_models):
    # Oracle: scipy.optimize.brentq on the implicit equation, at 7 voltages per model
    # from short circuit to past Voc; agreement to 1e-10 of Isc.
    for model in double_models[:6]:
        voc = model.voltage(0.0)
        for v in np.linspace(0.0, 1.02 * voc, 7):
            assert model.current(v) == pytest.approx(_brentq_current(model, float(v)),
                                                     abs=1e-10 * model.photocurrent_a)


def test_recovers_double_diode_noise_free(double_models):
    # Exact curves of the checked generator: every parameter back to 1e-6 relative.
    for model in double_models:
        v = np.linspace(0.0, 1.01 * model.voltage(0.0), 200)
        res = fit_curve(v, model.current(v), model="double",
                        temperature_k=model.temperature_k,
                        cells_in_series=model.cells_in_series)
        assert res.model == "double"
        truth = model.parameters()
        for key in KEYS:
            assert res.parameters[key] == pytest.approx(truth[key], rel=1e-6), key
        assert res.to_model().__class__ is DoubleDiode


def test_auto_picks_double_on_a_two_diode_curve_and_single_on_a_one_diode_curve():
    # Same noise (0.1 % of Isc) on a clearly two-diode curve (generator above, 20 % of
    # Iph through the second diode at Voc) and on the pvlib single-diode curve of the
    # same module: BIC must prefer the model that made the data.
    module = cec_modules(12).iloc[2]
    two = _double_from_cec(module, fraction=0.2)
    rng = np.random.default_rng(5)
    v = np.linspace(0.0, 1.01 * two.voltage(0.0), 300)
    i2 = two.current(v) + 1e-3 * two.photocurrent_a * rng.standard_normal(v.size)
    res2 = fit_curve(v, i2, model="auto", temperature_k=two.temperature_k,
                     cells_in_series=two.cells_in_series)
    assert res2.model == "double", res2.selection_reason
    assert "BIC" in res2.selection_reason and "double" in res2.selection_reason
    assert res2.information_criteria["double"] < res2.information_criteria["single"]

    v1, i1, truth, ns, tk = cec_curve(module, points=300)
    i1 = i1 + 1e-3 * i1[0] * rng.standard_normal(v1.size)
    res1 = fit_curve(v1, i1, model="auto", temperature_k=tk, cells_in_series=ns)
    assert res1.model == "single", res1.selection_reason
    assert res1.information_criteria["single"] < res1.information_criteria["double"]


def test_noisy_double_within_uncertainty():
    # Noise 0.05 % of Isc on a two-diode curve: each parameter within 4 of its reported
    # standard uncertainties (the uncertainties of a double-diode fit are large, but
    # they must cover the truth).
    model = _double_from_cec(cec_modules(12).iloc[5], fraction=0.3)
    rng = np.random.default_rng(8)
    v = np.linspace(0.0, 1.01 * model.voltage(0.0), 400)
    i = model.current(v) + 5e-4 * model.photocurrent_a * rng.standard_normal(v.size)
    res = fit_curve(v, i, model="double", temperature_k=model.temperature_k,
                    cells_in_series=model.cells_in_series)
    truth = model.parameters()
    for key in KEYS:
        assert abs(res.parameters[key] - truth[key]) <= 4 * res.uncertainty[key], key
    assert res.parameters["ideality_1"] <= res.parameters["ideality_2"]


@pytest.mark.slow
def test_double_uncertainties_are_calibrated():
    # 3 two-diode curves x 25 noise seeds (0.05 % of Isc): the fraction of parameters
    # within 1 and 2 standard uncertainties of the truth is that of a normal
    # distribution, 68.3 % and 95.4 %; accept 0.60-0.78 and 0.90-0.99.
    z = []
    for k in (1, 5, 9):
        model = _double_from_cec(cec_modules(12).iloc[k], fraction=0.3)
        v = np.linspace(0.0, 1.01 * model.voltage(0.0), 300)
        i_true = model.current(v)
        truth = model.parameters()
        for seed in range(25):
            rng = np.random.default_rng(seed)
            i = i_true + 5e-4 * model.photocurrent_a * rng.standard_normal(v.size)
            res = fit_curve(v, i, model="double", temperature_k=model.temperature_k,
                            cells_in_series=model.cells_in_series)
            z.append([abs(res.parameters[key] - truth[key]) / res.uncertainty[key]
                      for key in KEYS])
    z = np.array(z)
    assert 0.60 <= np.mean(z <= 1.0) <= 0.78
    assert 0.90 <= np.mean(z <= 2.0) <= 0.99
