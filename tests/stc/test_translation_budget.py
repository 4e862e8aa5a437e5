"""translate_to_stc: methods side by side, their spread, and the GUM budget.

GUM = JCGM 100:2008: rectangular u = a/sqrt(3) (4.3.7), combined u_c = sqrt(sum (c_i u_i)^2)
for uncorrelated inputs (eq. 10), expanded U = k u_c (6.2.1).
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from tracer.fit import fit_curve
from tracer.stc import (
    Procedure1Coefficients,
    UncertaintyInputs,
    translate_to_stc,
)
from tracer.stc.uncertainty import BudgetEntry, UncertaintyBudget, rectangular
from stc_pvlib_oracle import cec_modules, cs5p  # noqa: F401  (pytest fixtures)

# procedure 1 coefficients of the CS5P-220M of the size published with pvlib's IEC 60891 estimators
P1 = Procedure1Coefficients(alpha_a_per_k=0.004526, beta_v_per_k=-0.2420,
                            series_resistance_ohm=1.268, kappa_ohm_per_k=0.00433)
U = UncertaintyInputs(reference_cell_calibration_rel=0.004,   # PTB-level reference cell (notes 2.3)
                      mismatch_rel=0.005, temperature_k=1.0 / math.sqrt(3),
                      current_reading_rel=0.001, voltage_reading_rel=0.001, area_rel=0.002)


@pytest.fixture(scope="module")
def translated(cs5p):
    v, i = cs5p.curve(800, 45)
    fit = fit_curve(v, i, model="single", temperature_k=318.15, cells_in_series=96)
    return translate_to_stc(v, i, irradiance_w_m2=800, temperature_c=45,
                            methods=("procedure1", "procedure2", "diode_model"),
                            procedure1=P1, diode_model=fit.to_model(),
                            alpha_isc_a_per_k=cs5p.alpha_sc, area_cm2=12_000.0, uncertainty=U)


def test_missing_coefficients_fail_one_method_only(translated):
    p2 = translated.method("procedure2")
    assert not p2.ok and "coefficients" in p2.error
    assert translated.method("procedure1").ok and translated.method("diode_model").ok
    assert translated.primary == "procedure1"
    assert translated.spread["methods"] == 2


def test_combined_uncertainty_is_the_root_sum_of_squares(translated):
    b = translated.pmax_budget
    contributions = [abs(e.sensitivity) * e.standard_uncertainty for e in b.entries]
    assert b.combined_standard_uncertainty == pytest.approx(math.sqrt(sum(c * c for c in contributions)))
    assert b.expanded_uncertainty == pytest.approx(2.0 * b.combined_standard_uncertainty)
    names = [e.name for e in b.entries]
    for expected in ("reference cell calibration", "spectral mismatch factor (scales G1)",
                     "device temperature reading", "translation method spread",
                     "model fit (model vs points at measured conditions)", "current reading",
                     "voltage reading"):
        assert expected in names


def test_irradiance_sensitivity_is_about_minus_pmax_over_g(translated):
    # Isc is proportional to G (IEC 60904-10 linearity) and Pmax nearly so: a reading of G1
    # that is 1 % high lowers the translated Pmax by about 1 %; allow 10 %
    entry = next(e for e in translated.pmax_budget.entries if e.name == "reference cell calibration")
    assert entry.sensitivity * 800.0 / translated.pmax_w == pytest.approx(-1.0, abs=0.1)
    assert entry.standard_uncertainty == pytest.approx(0.004 * 800.0)


def test_temperature_sensitivity_is_minus_gamma(translated, cs5p):
    # translating from 45 C, a reading 1 K too high over-corrects by gamma*Pmax: the
    # sensitivity is -dPmax/dT at STC. Oracle: pvlib singlediode Pmax at 24 and 26 C.
    entry = next(e for e in translated.pmax_budget.entries if e.name == "device temperature reading")
    gamma = (cs5p.figures(1000, 26)["p_mp"] - cs5p.figures(1000, 24)["p_mp"]) / 2.0
    assert entry.sensitivity == pytest.approx(-gamma, rel=0.15)


def test_spread_is_a_rectangular_half_range(translated):
    values = [m.figures.pmax_w for m in translated.methods if m.ok]
    half = 0.5 * (max(values) - min(values))
    entry = next(e for e in translated.pmax_budget.entries if e.name == "translation method spread")
    assert entry.standard_uncertainty == pytest.approx(half / math.sqrt(3.0))
    assert entry.distribution == "rectangular"


def test_efficiency_and_its_budget(translated):
    # eta = Pmax/(G_STC*A)
    assert translated.efficiency == pytest.approx(translated.pmax_w / (1000.0 * 1.2))
    eb = translated.efficiency_budget
    rel_p = translated.pmax_budget.relative_combined_standard_uncertainty
    # relative u of eta = sqrt(u_rel(P)^2 + u_rel(A)^2)
    assert eb.relative_combined_standard_uncertainty == pytest.approx(math.hypot(rel_p, 0.002), rel=1e-9)


def test_to_dict_is_strict_json(translated):
    text = json.dumps(translated.to_dict(), allow_nan=False)
    back = json.loads(text)
    assert back["primary"] == "procedure1"
    assert back["pmax_budget"]["method"].startswith("JCGM 100:2008")
    assert "voltage_v" not in back["methods"][0]
    assert len(translated.to_dict(include_curves=True)["methods"][0]["voltage_v"]) > 100


def test_budget_object_by_hand():
    b = UncertaintyBudget("y", "W", 10.0, (
        BudgetEntry("a", "a", 1.0, "1", 0.3, "normal", 2.0, "x"),
        BudgetEntry("b", "b", 1.0, "1", rectangular(0.8 * math.sqrt(3)), "rectangular", 1.0, "x")))
    # sqrt((2*0.3)^2 + 0.8^2) = 1.0
    assert b.combined_standard_uncertainty == pytest.approx(1.0)
    assert b.relative_combined_standard_uncertainty == pytest.approx(0.1)
    shares = [e["share_of_variance"] for e in b.to_dict()["contributions"]]
    assert shares == pytest.approx([0.36, 0.64])


def test_unknown_method_and_bad_conditions_raise(cs5p):
    v, i = cs5p.curve(800, 45)
    with pytest.raises(ValueError):
        translate_to_stc(v, i, irradiance_w_m2=800, temperature_c=45, methods=("procedure9",))
    with pytest.raises(ValueError):
        translate_to_stc(v, i, irradiance_w_m2=-1, temperature_c=45, procedure1=P1)


def test_no_method_available_gives_no_primary(cs5p):
    v, i = cs5p.curve(800, 45)
    r = translate_to_stc(v, i, irradiance_w_m2=800, temperature_c=45,
                         methods=("procedure2", "procedure3", "diode_model"))
    assert r.primary is None and r.pmax_w is None and r.pmax_budget is None
    assert all(not m.ok and m.error for m in r.methods)


def test_a_sensitivity_that_cannot_be_computed_is_left_out_with_a_note(cs5p):
    # the diode model at 25 C needs no alpha, but moving T1 by +-0.5 K for the temperature
    # sensitivity would: that input is left out and said so, the rest of the budget stands
    v, i = cs5p.voltage_grid_curve(800, 25)
    fit = fit_curve(v, i, model="single", temperature_k=298.15, cells_in_series=96)
    r = translate_to_stc(v, i, irradiance_w_m2=800, temperature_c=25, methods=("diode_model",),
                         diode_model=fit.to_model(), uncertainty=U)
    names = [e.name for e in r.pmax_budget.entries]
    assert "device temperature reading" not in names
    assert "reference cell calibration" in names
    assert any("temperature" in n for n in r.pmax_budget.notes)
