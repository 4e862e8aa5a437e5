"""Thermal voltage of a p-n junction, from CODATA constants."""
from __future__ import annotations

import numpy as np
from scipy import constants

from tracer.model._checks import check_range

#: Boltzmann constant over elementary charge, k/q [V/K] (CODATA, via scipy.constants).
BOLTZMANN_OVER_CHARGE_V_K = constants.k / constants.e


def thermal_voltage(temperature_k):
    r"""Thermal voltage :math:`V_t = k T / q` [V].

    Parameters
    ----------
    temperature_k : float or array_like
        Junction temperature :math:`T` [K], strictly positive and finite.

    Returns
    -------
    float or numpy.ndarray
        :math:`k T / q` [V]: a float for scalar input, an array otherwise
        (25.693 mV at 298.15 K).

    Raises
    ------
    ValueError
        If any temperature is not in (0, inf) K or is NaN.
    """
    t = check_range("temperature_k", temperature_k, low=0.0, high=np.inf,
                    low_open=True, high_open=True, unit="K")
    vt = BOLTZMANN_OVER_CHARGE_V_K * t
    return float(vt) if vt.ndim == 0 else vt
