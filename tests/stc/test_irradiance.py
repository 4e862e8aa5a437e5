"""Irradiance from a calibrated reference cell."""
from __future__ import annotations

import numpy as np
import pytest

from tracer.stc import effective_irradiance, irradiance_from_reference_cell


def _notes_formula(isc, cv, alpha_rel, t_rc):
    # IEC 60904-2 / IEC 60904-1 practice (from memory):
    # G1 = G_STC*Isc_RC / (CV_RC*(1 + alpha_rel_RC*(T_RC - 25)))
    return 1000.0 * isc / (cv * (1.0 + alpha_rel * (t_rc - 25.0)))


def test_at_calibration_conditions_gives_calibration_irradiance():
    assert irradiance_from_reference_cell(0.12, calibration_isc_a=0.12,
                                          reference_temperature_c=25.0,
                                          alpha_rel_per_k=5e-4) == pytest.approx(1000.0, rel=1e-15)


def test_matches_the_reference_formula_point_by_point():
    isc = np.array([0.100, 0.110, 0.121])
    t = np.array([20.0, 35.0, 50.0])
    got = irradiance_from_reference_cell(isc, calibration_isc_a=0.12, reference_temperature_c=t,
                                         alpha_rel_per_k=5e-4)
    np.testing.assert_allclose(got, _notes_formula(isc, 0.12, 5e-4, t), rtol=1e-14)
    # a warmer cell gives more current for the same light: the correction lowers G
    assert got[1] < 1000.0 * 0.110 / 0.12


def test_effective_irradiance_applies_the_mismatch_factor():
    # ASTM E973 5.2.2 / IEC 60904-7: G_eff = G1*SMM
    assert effective_irradiance(800.0, 1.02) == pytest.approx(816.0, rel=1e-15)


@pytest.mark.parametrize("kwargs", [dict(calibration_isc_a=0.0), dict(calibration_isc_a=-1.0),
                                    dict(calibration_isc_a=float("nan"))])
def test_rejects_bad_calibration(kwargs):
    with pytest.raises(ValueError):
        irradiance_from_reference_cell(0.1, **kwargs)


def test_rejects_bad_mismatch_factor():
    with pytest.raises(ValueError):
        effective_irradiance(1000.0, 0.0)
