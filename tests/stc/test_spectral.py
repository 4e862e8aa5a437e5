"""Reference spectrum table and IEC 60904-7 spectral mismatch factor."""
from __future__ import annotations

import numpy as np
import pytest

from tracer.stc import reference_spectrum_am15g, spectral_mismatch_factor

spectrum = pytest.importorskip("pvlib.spectrum")
pd = pytest.importorskip("pandas")


def test_shipped_am15g_table_equals_pvlib_astm_g173():
    # oracle: pvlib.spectrum.get_reference_spectra() (ASTM G173-03, 'global' column)
    wavelength, irradiance = reference_spectrum_am15g()
    ref = spectrum.get_reference_spectra()
    assert wavelength.size == 2002                      # pvlib data file: 2002 rows, 280-4000 nm
    np.testing.assert_array_equal(wavelength, ref.index.to_numpy(dtype=float))
    np.testing.assert_allclose(irradiance, ref["global"].to_numpy(), rtol=1e-12, atol=0)


def test_shipped_am15g_integral():
    # ASTM G173 global integrates to about 1000.37 W/m2 (pvlib docs)
    wavelength, irradiance = reference_spectrum_am15g()
    assert np.trapezoid(irradiance, wavelength) == pytest.approx(1000.37, abs=0.01)


def test_shipped_table_is_read_only():
    wavelength, irradiance = reference_spectrum_am15g()
    with pytest.raises(ValueError):
        irradiance[0] = 1.0


def _example_sr():
    sr = spectrum.get_example_spectral_response()     # pvlib's c-Si example, A/W
    return sr.index.to_numpy(dtype=float), sr.to_numpy(dtype=float)


def _box(lo, hi, level=1.0, span=(250.0, 1300.0), eps=1e-6):
    """A step function: `level` on [lo, hi], 0 elsewhere on `span`, edges eps wide."""
    w = np.array([span[0], lo - eps, lo, hi, hi + eps, span[1]])
    y = np.array([0.0, 0.0, level, level, 0.0, 0.0])
    return w, y


def test_mismatch_is_one_when_test_spectrum_is_the_reference():
    # IEC 60904-7: SMM = 1 for identical relative spectra
    w, e = reference_spectrum_am15g()
    sr_dut = _example_sr()
    sr_rc = _box(300.0, 1100.0)                 # a different (filtered) reference cell
    result = spectral_mismatch_factor(test_spectrum=(w, 0.9 * e), reference_spectrum=(w, e),
                                      reference_cell_responsivity=sr_rc,
                                      device_responsivity=sr_dut)
    assert result.factor == pytest.approx(1.0, rel=1e-12)


def test_mismatch_is_one_for_identical_responsivities():
    # IEC 60904-7: SMM = 1 for identical relative responsivities
    w, e = reference_spectrum_am15g()
    sr = _example_sr()
    tilted = (w, e * np.linspace(1.5, 0.5, w.size))
    result = spectral_mismatch_factor(test_spectrum=tilted, reference_cell_responsivity=sr,
                                      device_responsivity=(sr[0], 3.0 * sr[1]))
    assert result.factor == pytest.approx(1.0, rel=1e-12)


def test_mismatch_box_spectra_by_hand():
    # Hand computation with the IEC 60904-7 formula:
    # E_ref = 1 on 400-800 nm; E_test = 1 on 400-600 and 2 on 600-800 nm;
    # s_rc = 1 on 400-800 nm; s_dut = 1 on 600-800 nm.
    # ∫E_ref s_rc = 400, ∫E_test s_dut = 400, ∫E_test s_rc = 600, ∫E_ref s_dut = 200
    # SMM = 400*400 / (600*200) = 4/3
    # All tables share the break points (edges eps wide), so the trapezoidal rule on the
    # spectrum's grid is exact up to terms of order eps.
    eps = 1e-6
    w = np.array([250.0, 400 - eps, 400.0, 600 - eps, 600.0, 600 + eps, 800.0, 800 + eps, 1300.0])
    e_test = np.array([0.0, 0.0, 1.0, 1.0, 1.0, 2.0, 2.0, 0.0, 0.0])
    e_ref = np.array([0.0, 0.0, 1.0, 1.0, 1.0, 1.0, 1.0, 0.0, 0.0])
    result = spectral_mismatch_factor(test_spectrum=(w, e_test),
                                      reference_spectrum=(w, e_ref),
                                      reference_cell_responsivity=_box(400.0, 800.0),
                                      device_responsivity=_box(600.0, 800.0))
    assert result.reference_spectrum_reference_cell == pytest.approx(400.0, rel=1e-6)
    assert result.test_spectrum_device == pytest.approx(400.0, rel=1e-6)
    assert result.test_spectrum_reference_cell == pytest.approx(600.0, rel=1e-6)
    assert result.reference_spectrum_device == pytest.approx(200.0, rel=1e-6)
    assert result.factor == pytest.approx(4.0 / 3.0, rel=1e-6)


def test_mismatch_matches_pvlib_for_a_broadband_reference():
    # oracle: pvlib.spectrum.calc_spectral_mismatch_field (ASTM E973 / IEC 60904-7 with a
    # broadband reference device, SMM = UF_test / UF_ref); test spectrum = G173 direct
    ref = spectrum.get_reference_spectra()
    w = ref.index.to_numpy(dtype=float)
    sr_w, sr = _example_sr()
    expected = spectrum.calc_spectral_mismatch_field(pd.Series(sr, index=sr_w), ref["direct"])
    result = spectral_mismatch_factor(
        test_spectrum=(w, ref["direct"].to_numpy()),
        reference_spectrum=(w, ref["global"].to_numpy()),
        reference_cell_responsivity=(np.array([w[0], w[-1]]), np.array([1.0, 1.0])),
        device_responsivity=(sr_w, sr))
    assert result.factor == pytest.approx(float(expected), rel=1e-10)
    assert result.factor != pytest.approx(1.0, abs=1e-3)   # the case is not trivial


def test_mismatch_refuses_a_test_spectrum_that_does_not_cover_the_responsivity():
    # IEC 60904-7: E_meas must cover both sensitivity ranges
    w, e = reference_spectrum_am15g()
    keep = (w >= 400) & (w <= 1000)
    with pytest.raises(ValueError, match="does not cover"):
        spectral_mismatch_factor(test_spectrum=(w[keep], e[keep]),
                                 reference_cell_responsivity=_example_sr(),
                                 device_responsivity=_example_sr())


@pytest.mark.parametrize("bad", [
    (np.array([1.0, 2.0]), np.array([1.0])),
    (np.array([2.0, 1.0]), np.array([1.0, 1.0])),
    (np.array([1.0, 2.0]), np.array([np.nan, 1.0])),
    (np.array([1.0, 2.0]), np.array([-1.0, 1.0])),
    "not a pair",
])
def test_mismatch_rejects_malformed_tables(bad):
    with pytest.raises(ValueError):
        spectral_mismatch_factor(test_spectrum=bad, reference_cell_responsivity=_example_sr(),
                                 device_responsivity=_example_sr())
