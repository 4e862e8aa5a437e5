"""tracer.analysis.analyze_sweep: the end-of-sweep call of the engine."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings as hyp_settings, strategies as st

from tracer.analysis import (
    AnalysisSettings,
    PairedSweep,
    ReferenceCell,
    SweepContext,
    analyze_sweep,
)
from tracer.model import DoubleDiode, SingleDiode
from tracer.stc import MeasuredCurve, Procedure1Coefficients

# a 2 cm x 2 cm lab cell (values as in test_verdict.py; invented for the test)
CELL = SingleDiode(0.16, 1.6e-11, 1.1, 0.125, 2500.0, 298.15, 1)
V = np.linspace(-0.05, 0.72, 300)
SETTINGS = AnalysisSettings(
    models=("single",), stc_methods=("procedure1", "diode_model"),
    procedure1=Procedure1Coefficients(8e-5, -2.1e-3, 0.15, 0.0), alpha_isc_a_per_k=8e-5,
    usual_series_resistance_ohm=0.15,
    reference_cell=ReferenceCell(calibration_isc_a=0.12, calibration_uncertainty_rel=0.005,
                                 temperature_coefficient_per_k=5e-4))


def strict_json(result):
    return json.loads(json.dumps(result.to_dict(), allow_nan=False))


def test_figures_efficiency_and_stc_of_a_light_curve():
    pvsystem = pytest.importorskip("pvlib.pvsystem")
    i = CELL.current(V)
    r = analyze_sweep(V, i, dark=False, temperature_c=25.0, irradiance_w_m2=1000.0, area_cm2=4.0,
                      settings=SETTINGS, context=SweepContext())
    ref = pvsystem.singlediode(0.16, 1.6e-11, 0.125, 2500.0, CELL.n_ns_vt_v)   # oracle
    assert r.data_figures["pmax_w"] == pytest.approx(float(ref["p_mp"]), rel=2e-3)
    assert r.data_figures["voc_v"] == pytest.approx(float(ref["v_oc"]), rel=1e-4)
    # efficiency = Pmax/(G*A) at the measured conditions
    assert r.efficiency == pytest.approx(r.data_figures["pmax_w"] / (1000.0 * 4e-4), rel=1e-12)
    fit = r.fit("single")
    assert fit.parameters["series_resistance_ohm"] == pytest.approx(0.125, rel=1e-3)
    # at STC already: every method returns the curve's own Pmax
    assert r.stc.primary == "procedure1"
    for m in r.stc.methods:
        assert m.figures.pmax_w == pytest.approx(float(ref["p_mp"]), rel=2e-3)
    assert r.stc.efficiency == pytest.approx(r.stc.pmax_w / (1000.0 * 4e-4))
    names = [e.name for e in r.stc.pmax_budget.entries]
    assert "reference cell calibration" in names     # taken from settings.reference_cell
    d = strict_json(r)
    assert d["verdict"]["verdict"] in ("keep", "re-measure")
    assert set(d["data_figures"]) == {"isc_a", "voc_v", "imp_a", "vmp_v", "pmax_w", "ff"}


def test_irradiance_from_the_reference_cell_readings():
    # G = 1000 * Isc_rc / (Isc_cal * (1 + alpha_rc*(T_rc - 25)))
    ctx = SweepContext(reference_isc_readings_a=[0.0959, 0.0961], reference_temperature_c=35.0)
    r = analyze_sweep(V, CELL.current(V), dark=False, temperature_c=25.0, settings=SETTINGS,
                      context=ctx)
    expected = 1000.0 * 0.096 / (0.12 * (1 + 5e-4 * 10.0))
    assert r.conditions["irradiance_w_m2"] == pytest.approx(expected, rel=1e-12)
    assert r.conditions["irradiance_source"] == "reference cell"


def test_mismatch_factor_scales_the_irradiance():
    s = AnalysisSettings(**{**SETTINGS.__dict__, "spectral_mismatch_factor": 1.02})
    r = analyze_sweep(V, CELL.current(V), dark=False, temperature_c=25.0, irradiance_w_m2=800.0,
                      settings=s)
    assert r.conditions["effective_irradiance_w_m2"] == pytest.approx(816.0)
    assert r.stc.measured_irradiance_w_m2 == pytest.approx(816.0)


def test_dark_curve_is_fitted_and_not_translated():
    dark = DoubleDiode(0.0, 1e-12, 1e-8, 1.0, 2.0, 0.2, 5e3, 298.15, 1)
    v = np.linspace(-0.2, 0.65, 200)
    i = dark.current(v)
    r = analyze_sweep(v, i, dark=True, temperature_c=25.0, settings=AnalysisSettings(models=("double",)))
    assert r.fit("double") is not None and r.stc is None
    assert "dark" in r.stc_error
    assert not any(c in r.verdict.codes() for c in ("no-power-quadrant", "voc-not-reached"))
    strict_json(r)


def test_procedure3_runs_with_companion_curves():
    g_t = [(600.0, 20.0), (1100.0, 25.0), (900.0, 45.0)]
    companions = []
    for g, t in g_t:
        m = CELL.replace(photocurrent_a=0.16 * g / 1000.0, temperature_k=t + 273.15)
        v = np.linspace(-0.05, 0.8, 300)
        companions.append(MeasuredCurve(v, m.current(v), g, t))
    s = AnalysisSettings(**{**SETTINGS.__dict__, "stc_methods": ("procedure3",)})
    m = CELL.replace(photocurrent_a=0.128, temperature_k=303.15)
    v = np.linspace(-0.05, 0.8, 300)
    r = analyze_sweep(v, m.current(v), dark=False, temperature_c=30.0, irradiance_w_m2=800.0,
                      settings=s, context=SweepContext(companion_curves=tuple(companions)))
    assert r.stc.primary == "procedure3", r.stc.to_dict()


def test_settings_from_mapping():
    s = AnalysisSettings.from_mapping({
        "models": ["single", "auto"], "stc_methods": "procedure1",
        "procedure1": {"alpha_a_per_k": 1e-4, "beta_v_per_k": -2e-3},
        "quality": {"instability_class": "B", "mpp_window": [0.8, 1.1]},
        "reference_cell": {"calibration_isc_a": 0.12},
        "usual_series_resistance_ohm": 1.0})
    assert s.models == ("single", "auto") and s.stc_methods == ("procedure1",)
    assert s.quality.instability_class == "B" and s.quality.mpp_window == (0.8, 1.1)
    assert s.procedure1.alpha_a_per_k == 1e-4
    for bad in ({"model": ["single"]}, {"models": ["triple"]}, {"procedure1": {"alpha": 1}},
                {"quality": {"instability_class": "Z"}}, {"target_irradiance_w_m2": -5}):
        with pytest.raises(ValueError):
            AnalysisSettings.from_mapping(bad)


JUNK = [
    ([], []),
    ([1.0, 2.0, 3.0], [1.0, 2.0]),
    (np.full(50, np.nan), np.zeros(50)),
    (np.linspace(0, 1, 50), np.zeros(50)),
    (np.zeros(50), np.linspace(0, 1, 50)),
    ("abc", None),
    (V, -CELL.current(V)),
    (V, CELL.current(V) * 1e30),
    (V, np.where(V > 0.3, np.inf, CELL.current(V))),
    (np.ones(5), np.ones(5)),
]


@pytest.mark.parametrize("v, i", JUNK)
@pytest.mark.parametrize("dark", [False, True])
def test_never_raises_on_junk(v, i, dark):
    ctx = SweepContext(irradiance_readings_w_m2=["x", None], temperature_readings_c=[],
                       compliance_flags=[True], paired_sweep=PairedSweep([1, 2], [3], "reverse"),
                       companion_curves=())
    r = analyze_sweep(v, i, dark=dark, temperature_c=float("nan"), irradiance_w_m2="bright",
                      area_cm2=-3, cells_in_series=0, settings=SETTINGS, context=ctx)
    d = strict_json(r)
    assert d["verdict"]["verdict"] == "re-measure"
    assert d["errors"]


def test_never_raises_on_wrong_settings_types():
    r = analyze_sweep(V, CELL.current(V), dark=False, temperature_c=25.0, settings="nonsense",
                      context=42)
    strict_json(r)
    assert any("settings" in e for e in r.errors)


@pytest.mark.filterwarnings("ignore:.*poorly conditioned")   # junk makes numpy's polyfit warn
@hyp_settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(n=st.integers(0, 60),
       data=st.data(),
       dark=st.booleans(),
       temperature=st.one_of(st.none(), st.floats(allow_nan=True, allow_infinity=True)),
       irradiance=st.one_of(st.none(), st.floats(allow_nan=True, allow_infinity=True)))
def test_never_raises_on_random_input(n, data, dark, temperature, irradiance):
    floats = st.floats(allow_nan=True, allow_infinity=True, width=64)
    v = data.draw(st.lists(floats, min_size=n, max_size=n))
    i = data.draw(st.lists(floats, min_size=n, max_size=n))
    r = analyze_sweep(v, i, dark=dark, temperature_c=temperature, irradiance_w_m2=irradiance,
                      area_cm2=1.0, settings=SETTINGS)
    d = strict_json(r)
    assert d["verdict"]["verdict"] in ("keep", "re-measure")
    assert math.isfinite(d["elapsed_s"])
