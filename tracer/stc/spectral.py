"""Spectral mismatch factor per IEC 60904-7 (Ed.4 2019), orientation as ASTM E973.

::

    SMM = [∫E_ref·s_rc dλ · ∫E_test·s_dut dλ] / [∫E_test·s_rc dλ · ∫E_ref·s_dut dλ]

``E_ref`` the reference spectrum (AM1.5G), ``E_test`` the simulator's spectrum in the test
plane, ``s_rc`` and ``s_dut`` the spectral responsivities of the reference cell and of the
device [A/W, absolute or relative: the factor is a ratio of ratios]. SMM > 1 means the
device gets relatively more of the test spectrum than the reference cell does; the device
then behaves as if it received ``G * SMM`` (see :func:`tracer.stc.effective_irradiance`).

As the 2019 edition asks: each integral runs over the whole
wavelength range of the spectrum it contains; the responsivities are interpolated onto the
spectrum's wavelengths, never the reverse, and are zero outside their own tables; the test
spectrum must cover the range where either responsivity is non-zero. Integrals by the
trapezoidal rule on the spectrum's own grid.

Every spectral quantity is a pair ``(wavelength_nm, values)`` of equal-length 1-D arrays
with strictly increasing wavelengths.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["SpectralMismatch", "spectral_mismatch_factor", "reference_spectrum_am15g"]


def reference_spectrum_am15g() -> tuple[np.ndarray, np.ndarray]:
    """ASTM G173-03 AM1.5 global tilt spectrum ``(wavelength_nm, W/m^2/nm)``, shipped table."""
    from tracer.data import am15g_reference_spectrum

    return am15g_reference_spectrum()


def _pair(name: str, pair) -> tuple[np.ndarray, np.ndarray]:
    try:
        wavelength, values = pair
    except (TypeError, ValueError):
        raise ValueError(f"{name}: expected (wavelength_nm, values)") from None
    w = np.asarray(wavelength, dtype=float).ravel()
    y = np.asarray(values, dtype=float).ravel()
    if w.size != y.size:
        raise ValueError(f"{name}: {w.size} wavelengths but {y.size} values")
    if w.size < 2:
        raise ValueError(f"{name}: needs at least two wavelengths")
    if not (np.all(np.isfinite(w)) and np.all(np.isfinite(y))):
        raise ValueError(f"{name}: contains non-finite numbers")
    if np.any(np.diff(w) <= 0.0):
        raise ValueError(f"{name}: wavelengths must increase strictly")
    if np.any(y < 0.0):
        raise ValueError(f"{name}: negative values")
    return w, y


def _nonzero_range(w: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    nz = np.flatnonzero(y > 0.0)
    if nz.size == 0:
        raise ValueError("a spectral responsivity is zero everywhere")
    lo = w[max(nz[0] - 1, 0)]
    hi = w[min(nz[-1] + 1, w.size - 1)]
    return float(lo), float(hi)


def _weighted_integral(spectrum: tuple[np.ndarray, np.ndarray],
                       responsivity: tuple[np.ndarray, np.ndarray]) -> float:
    ws, es = spectrum
    wr, sr = responsivity
    s_on_grid = np.interp(ws, wr, sr, left=0.0, right=0.0)
    return float(np.trapezoid(es * s_on_grid, ws))


@dataclass(frozen=True)
class SpectralMismatch:
    """The factor and the four integrals it is made of (units of E·s·nm)."""

    factor: float
    reference_spectrum_reference_cell: float
    test_spectrum_device: float
    test_spectrum_reference_cell: float
    reference_spectrum_device: float

    def to_dict(self) -> dict:
        return {k: float(v) for k, v in self.__dict__.items()}


def spectral_mismatch_factor(*, test_spectrum, reference_cell_responsivity,
                             device_responsivity, reference_spectrum=None,
                             require_coverage: bool = True) -> SpectralMismatch:
    """IEC 60904-7 mismatch factor.

    ``reference_spectrum`` defaults to the shipped ASTM G173-03 global table. With
    ``require_coverage`` (the standard's rule) a test spectrum that does not span the
    non-zero range of both responsivities is refused with ``ValueError``.
    """
    e_test = _pair("test spectrum", test_spectrum)
    e_ref = _pair("reference spectrum",
                  reference_spectrum if reference_spectrum is not None else reference_spectrum_am15g())
    s_rc = _pair("reference cell responsivity", reference_cell_responsivity)
    s_dut = _pair("device responsivity", device_responsivity)
    if require_coverage:
        for name, s in (("reference cell", s_rc), ("device", s_dut)):
            lo, hi = _nonzero_range(*s)
            if e_test[0][0] > lo or e_test[0][-1] < hi:
                raise ValueError(
                    f"test spectrum ({e_test[0][0]:g}-{e_test[0][-1]:g} nm) does not cover the "
                    f"{name} responsivity range ({lo:g}-{hi:g} nm), as IEC 60904-7 requires")
    ref_rc = _weighted_integral(e_ref, s_rc)
    test_dut = _weighted_integral(e_test, s_dut)
    test_rc = _weighted_integral(e_test, s_rc)
    ref_dut = _weighted_integral(e_ref, s_dut)
    if min(ref_rc, test_dut, test_rc, ref_dut) <= 0.0:
        raise ValueError("a mismatch integral is zero: spectrum and responsivity do not overlap")
    factor = (ref_rc * test_dut) / (test_rc * ref_dut)
    return SpectralMismatch(factor=factor, reference_spectrum_reference_cell=ref_rc,
                            test_spectrum_device=test_dut, test_spectrum_reference_cell=test_rc,
                            reference_spectrum_device=ref_dut)
