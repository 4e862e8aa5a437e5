"""Irradiance from a calibrated reference cell (IEC 60904-2 device, IEC 60904-1 practice).

``G = G_cal * Isc_rc / (Isc_rc_cal * (1 + alpha_rel_rc * (T_rc - T_cal)))``

with ``Isc_rc_cal`` the reference cell's short-circuit current at its calibration
irradiance ``G_cal`` (1000 W/m^2) and temperature ``T_cal`` (25 C), ``alpha_rel_rc`` its
relative Isc temperature coefficient [1/K] and ``T_rc`` its temperature during the reading.
The form is the usual one (standard practice, from
memory). Works point by point on arrays, so the irradiance during a sweep can be followed.

The irradiance the device under test really sees, in the sense of its short-circuit current
at the reference spectrum, is ``G * SMM`` (IEC 60904-7, ASTM E973 5.2.2): see
:func:`effective_irradiance`.
"""
from __future__ import annotations

import numpy as np

__all__ = ["irradiance_from_reference_cell", "effective_irradiance"]


def irradiance_from_reference_cell(reference_isc_a, *, calibration_isc_a: float,
                                   reference_temperature_c=25.0,
                                   alpha_rel_per_k: float = 0.0,
                                   calibration_irradiance_w_m2: float = 1000.0,
                                   calibration_temperature_c: float = 25.0):
    """Irradiance [W/m^2] from the reference cell's short-circuit current [A].

    ``reference_isc_a`` and ``reference_temperature_c`` may be arrays (one per reading).
    Returns a float for scalar input, else an array.
    """
    if not np.isfinite(calibration_isc_a) or calibration_isc_a <= 0.0:
        raise ValueError(f"reference cell calibration current must be > 0 A, got {calibration_isc_a!r}")
    if not np.isfinite(calibration_irradiance_w_m2) or calibration_irradiance_w_m2 <= 0.0:
        raise ValueError("calibration irradiance must be > 0 W/m^2")
    isc = np.asarray(reference_isc_a, dtype=float)
    t = np.asarray(reference_temperature_c, dtype=float)
    factor = 1.0 + alpha_rel_per_k * (t - calibration_temperature_c)
    if np.any(factor <= 0.0):
        raise ValueError("temperature correction of the reference cell is not positive")
    g = calibration_irradiance_w_m2 * isc / (calibration_isc_a * factor)
    return float(g) if g.ndim == 0 else g


def effective_irradiance(irradiance_w_m2, mismatch_factor: float = 1.0):
    """Irradiance to translate with: reference-cell irradiance times the mismatch factor.

    IEC 60904-7 / ASTM E973 5.2.2: ``Isc_STC = Isc * (G_STC/G) / SMM``,
    i.e. the device behaves as if it received ``G_eff = G * SMM``.
    """
    if not np.isfinite(mismatch_factor) or mismatch_factor <= 0.0:
        raise ValueError(f"spectral mismatch factor must be > 0, got {mismatch_factor!r}")
    g = np.asarray(irradiance_w_m2, dtype=float) * mismatch_factor
    return float(g) if g.ndim == 0 else g
