"""Figures of merit from the measured points alone, against pvlib."""
import numpy as np
import pytest

from tracer.fit import DataFigures, FitError, figures_from_data

from ._curves import cec_modules

pvlib = pytest.importorskip("pvlib")
from pvlib import ivtools, pvsystem  # noqa: E402


def _module_curve(module, points, v_start=-0.02, v_end=1.02):
    il, i0, rs, rsh, a = pvsystem.calcparams_desoto(
        1000.0, 25.0, module.alpha_sc, module.a_ref, module.I_L_ref, module.I_o_ref,
        module.R_sh_ref, module.R_s)
    ref = pvsystem.singlediode(il, i0, rs, rsh, a)
    v = np.linspace(v_start * ref["v_oc"], v_end * ref["v_oc"], points)
    i = np.asarray(pvsystem.i_from_v(v, il, i0, rs, rsh, a), dtype=float)
    return v, i, ref


def test_dense_curves_match_pvlib_singlediode():
    # Oracle: pvlib.pvsystem.singlediode (exact figures of the model that made the curve).
    # 1000 points from -2 % to 102 % of Voc: the near-axis fits give Isc and Voc to 1e-6
    # and the local quartic gives Pmax to 1e-6, Vmp and Imp to 1e-5 (P is flat at its
    # maximum, so Vmp is the least determined figure).
    for _, module in cec_modules(25).iterrows():
        v, i, ref = _module_curve(module, 1000)
        f = figures_from_data(v, i)
        assert isinstance(f, DataFigures)
        assert f.isc_a == pytest.approx(float(ref["i_sc"]), rel=1e-6)
        assert f.voc_v == pytest.approx(float(ref["v_oc"]), rel=1e-6)
        assert f.pmax_w == pytest.approx(float(ref["p_mp"]), rel=1e-6)
        assert f.vmp_v == pytest.approx(float(ref["v_mp"]), rel=1e-5)
        assert f.imp_a == pytest.approx(float(ref["i_mp"]), rel=1e-5)
        ff = float(ref["p_mp"]) / (float(ref["i_sc"]) * float(ref["v_oc"]))
        assert f.ff == pytest.approx(ff, rel=1e-6)


def test_sparse_noisy_curve_close_to_pvlib_astm_e1036():
    # Oracle: pvlib.ivtools.utils.astm_e1036 (the ASTM E1036 procedure) on the same
    # 100-point curve with 0.1 % noise; both estimate the same figures, so they agree
    # within the noise-driven spread (ASTM's Isc uses only the 3 points nearest V = 0, so
    # its own scatter is ~0.1 %: 0.3 % for Isc and Pmax, 0.1 % for Voc), and our Pmax is
    # within 0.3 % of pvlib.pvsystem.singlediode's exact value.
    module = cec_modules(25).iloc[4]
    v, i, ref = _module_curve(module, 100, v_start=0.0, v_end=1.01)
    rng = np.random.default_rng(4)
    i = i + 1e-3 * i[0] * rng.standard_normal(v.size)
    ours = figures_from_data(v, i)
    astm = ivtools.utils.astm_e1036(v, i)
    assert ours.isc_a == pytest.approx(astm["isc"], rel=3e-3)
    assert ours.voc_v == pytest.approx(astm["voc"], rel=1e-3)
    assert ours.pmax_w == pytest.approx(astm["pmp"], rel=3e-3)
    assert ours.pmax_w == pytest.approx(float(ref["p_mp"]), rel=3e-3)


def test_to_dict():
    module = cec_modules(25).iloc[0]
    v, i, _ = _module_curve(module, 300)
    d = figures_from_data(v, i).to_dict()
    assert set(d) == {"isc_a", "voc_v", "imp_a", "vmp_v", "pmax_w", "ff"}


def test_curve_must_cross_both_axes():
    module = cec_modules(25).iloc[0]
    v, i, ref = _module_curve(module, 300)
    with pytest.raises(FitError, match="does not cross I = 0"):
        figures_from_data(v[i > 0.05 * i[0]], i[i > 0.05 * i[0]])
    with pytest.raises(FitError, match="does not cross V = 0"):
        figures_from_data(v[v > 0.05 * ref["v_oc"]], i[v > 0.05 * ref["v_oc"]])
    with pytest.raises(FitError, match="power"):
        figures_from_data(v, -i)  # load convention


@pytest.mark.parametrize("v, i, match", [
    ([0.0, 0.1, np.nan, 0.3, 0.4], [1, 1, 1, 0, -1], "NaN or infinite"),
    ([0.0, 0.1], [1.0, -1.0], "at least"),
    ([0.2] * 6, [1, 0.5, 0, -1, -2, -3], "same voltage"),
])
def test_bad_input(v, i, match):
    with pytest.raises(FitError, match=match):
        figures_from_data(v, i)
