"""Facts of the trade about series and shunt resistance, and closed forms of the ideal cell.

Sources are named beside each check: common practice (how Rs and Rsh shape a curve),
circuit theory (maximum power transfer), and the ideal-diode closed forms derived from
the Shockley equation, evaluated with scipy's principal-branch Lambert W
(``scipy.special.lambertw``), a different routine from the Wright omega we use.
"""
import numpy as np
import pytest
from scipy.special import lambertw

from tracer.model import DoubleDiode, SingleDiode, thermal_voltage

# A 156 mm silicon cell, plausible values (common practice, not a measured device)
CELL = SingleDiode(photocurrent_a=9.0, saturation_current_a=1e-10, ideality=1.2,
                   series_resistance_ohm=0.0, shunt_resistance_ohm=np.inf,
                   temperature_k=298.15, cells_in_series=1)
SERIES_OHM = [0.0, 1e-3, 3e-3, 0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0]


def _straightness(cell):
    """Largest distance of the curve from the Isc-Voc chord, as a fraction of Isc."""
    f = cell.figures()
    v = np.linspace(0.0, f.voc_v, 401)
    chord = f.isc_a * (1.0 - v / f.voc_v)
    return np.max(np.abs(cell.current(v) - chord)) / f.isc_a


def test_series_resistance_leaves_voc_and_lowers_ff_and_pmax():
    # common practice: Rs does not move Voc (no current, no drop across Rs), while FF
    # and Pmax fall monotonically and the curve tends to a straight line as Rs grows
    cells = [CELL.replace(series_resistance_ohm=rs) for rs in SERIES_OHM]
    figs = [c.figures() for c in cells]
    voc = np.array([f.voc_v for f in figs])
    np.testing.assert_allclose(voc, voc[0], rtol=1e-12)
    ff = np.array([f.ff for f in figs])
    pmax = np.array([f.pmax_w for f in figs])
    assert np.all(np.diff(ff) < 0)
    assert np.all(np.diff(pmax) < 0)
    straightness = np.array([_straightness(c) for c in cells])
    assert np.all(np.diff(straightness) < 0)
    assert straightness[-1] < 1e-3
    # a straight line from (0, Isc) to (Voc, 0) has FF = 1/4 (geometry)
    assert ff[-1] == pytest.approx(0.25, abs=1e-3)


def test_very_small_shunt_leaves_almost_no_power():
    # common practice: a shunted cell delivers almost nothing. Circuit theory (maximum
    # power transfer): a current source Iph with a parallel resistor Rsh gives at most
    # Iph^2*Rsh/4, reached at V = Iph*Rsh/2 (here 4.5 mV, where the diode is idle)
    rsh = 1e-3
    ideal = CELL.figures().pmax_w
    shunted = CELL.replace(shunt_resistance_ohm=rsh).figures()
    assert shunted.pmax_w < 0.01 * ideal
    assert shunted.pmax_w == pytest.approx(9.0**2 * rsh / 4.0, rel=1e-6)
    assert shunted.vmp_v == pytest.approx(9.0 * rsh / 2.0, rel=1e-6)


def test_pmax_recovers_ideal_value_as_shunt_grows():
    # common practice: raising Rsh by orders of magnitude brings Pmax back to the
    # no-shunt value
    shunts = 10.0 ** np.arange(-2, 10)
    pmax = np.array([CELL.replace(shunt_resistance_ohm=r).figures().pmax_w for r in shunts])
    ideal = CELL.figures().pmax_w
    assert np.all(np.diff(pmax) > 0)
    assert pmax[-1] == pytest.approx(ideal, rel=1e-8)
    assert pmax[0] < 0.1 * ideal


def test_ideal_cell_closed_forms():
    # Shockley ideal cell (Rs = 0, Rsh = inf), textbook closed forms:
    #   Isc = Iph,  Voc = a*ln(1 + Iph/I0),
    #   dP/dV = 0  ->  Vmp = a*(W(e*(1 + Iph/I0)) - 1)  (principal branch Lambert W)
    a = CELL.ideality * thermal_voltage(CELL.temperature_k)
    ratio = 1.0 + CELL.photocurrent_a / CELL.saturation_current_a
    vmp = a * (lambertw(np.e * ratio).real - 1.0)
    imp = CELL.photocurrent_a - CELL.saturation_current_a * np.expm1(vmp / a)
    f = CELL.figures()
    assert f.isc_a == pytest.approx(CELL.photocurrent_a, rel=1e-14)
    assert f.voc_v == pytest.approx(a * np.log(ratio), rel=1e-13)
    assert f.vmp_v == pytest.approx(vmp, rel=1e-10)
    assert f.pmax_w == pytest.approx(vmp * imp, rel=1e-12)


def test_double_diode_with_no_second_diode_equals_single_diode():
    # definition: the double-diode equation with I02 = 0 is the single-diode equation
    for rs, rsh in [(0.0, np.inf), (0.005, np.inf), (0.005, 50.0), (0.0, 50.0), (2.0, 10.0)]:
        single = CELL.replace(series_resistance_ohm=rs, shunt_resistance_ohm=rsh)
        double = DoubleDiode(photocurrent_a=9.0, saturation_current_1_a=1e-10,
                             saturation_current_2_a=0.0, ideality_1=1.2, ideality_2=2.0,
                             series_resistance_ohm=rs, shunt_resistance_ohm=rsh)
        v = np.linspace(-5.0, 1.0, 601)
        i_single = single.current(v)
        np.testing.assert_allclose(double.current(v), i_single, rtol=1e-11,
                                   atol=1e-12 * 9.0)
        i = np.linspace(-20.0, 9.0, 300)
        np.testing.assert_allclose(double.voltage(i), single.voltage(i), rtol=1e-11,
                                   atol=1e-12)
        fs, fd = single.figures(), double.figures()
        for name in ("isc_a", "voc_v", "pmax_w", "ff"):
            assert getattr(fd, name) == pytest.approx(getattr(fs, name), rel=1e-11), name
        for name in ("vmp_v", "imp_a"):
            assert getattr(fd, name) == pytest.approx(getattr(fs, name), rel=1e-9), name


def test_dark_curve_has_no_power():
    # definition: with Iph = 0 the cell only absorbs power; Isc = Voc = Pmax = 0
    dark = CELL.replace(photocurrent_a=0.0, series_resistance_ohm=0.01,
                        shunt_resistance_ohm=1e3)
    f = dark.figures()
    # zero up to rounding of the Lambert W closed form, far below I0 = 1e-10 A
    assert f.isc_a == pytest.approx(0.0, abs=1e-24)
    assert f.voc_v == pytest.approx(0.0, abs=1e-15)
    assert f.pmax_w == pytest.approx(0.0, abs=1e-30)
    assert np.isnan(f.ff)
    v = np.linspace(-1, 1, 201)
    assert np.all(dark.current(v) * v <= 1e-24)  # absorbs power everywhere
