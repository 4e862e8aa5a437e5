"""Thermal voltage kT/q against CODATA constants (scipy.constants)."""
import numpy as np
import pytest
from scipy import constants

from tracer.model import thermal_voltage


def test_room_temperature_value():
    # CODATA via scipy.constants: k = 1.380649e-23 J/K and e = 1.602176634e-19 C are exact
    # SI values, so kT/q at 298.15 K = 25.693 mV (to the 4 digits usually quoted)
    expected = constants.k * 298.15 / constants.e
    assert thermal_voltage(298.15) == pytest.approx(expected, rel=1e-15)
    assert thermal_voltage(298.15) == pytest.approx(25.693e-3, abs=0.5e-6)
    assert isinstance(thermal_voltage(298.15), float)


def test_array_in_array_out_and_linear_in_temperature():
    t = np.array([[250.0, 300.0], [350.0, 400.0]])
    vt = thermal_voltage(t)
    assert vt.shape == t.shape
    # kT/q is proportional to T (CODATA constants via scipy.constants)
    np.testing.assert_allclose(vt, t * constants.k / constants.e, rtol=1e-15)


@pytest.mark.parametrize("bad", [0.0, -1.0, float("nan"), float("inf")])
def test_rejects_non_physical_temperature(bad):
    with pytest.raises(ValueError, match=r"temperature_k = .* 0 < temperature_k < inf \[K\]"):
        thermal_voltage(bad)
