r"""Equivalent-circuit models of solar cells and modules: numpy and scipy only.

Conventions: SI units, generator convention (the short-circuit current of an
illuminated cell is positive), :math:`N_s` identical cells in series,
:math:`V_t = kT/q` from CODATA (``scipy.constants``).

Models (frozen dataclasses; ``model.replace(**changes)`` gives a validated copy,
``model.parameters()`` the constructor arguments as a dict):

``SingleDiode(photocurrent_a, saturation_current_a, ideality, series_resistance_ohm,
shunt_resistance_ohm, temperature_k=298.15, cells_in_series=1)``
    :math:`I = I_{ph} - I_0 [e^{(V+IR_s)/(n N_s V_t)} - 1] - (V+IR_s)/R_{sh}`,
    solved explicitly with the Lambert W function evaluated in log space
    (``scipy.special.wrightomega``), so it never overflows.

``DoubleDiode(photocurrent_a, saturation_current_1_a, saturation_current_2_a,
ideality_1, ideality_2, series_resistance_ohm, shunt_resistance_ohm,
temperature_k=298.15, cells_in_series=1)``
    Two diodes in parallel, solved by a vectorised safeguarded Newton iteration on an
    analytic bracket.

Both have ``current(voltage_v)``, ``voltage(current_a)``, ``figures()`` (a
:class:`CurveFigures` with ``isc_a, voc_v, imp_a, vmp_v, pmax_w, ff``) and
``curve(points)``. ``series_resistance_ohm=0`` and ``shunt_resistance_ohm=inf`` are
valid; a parameter out of range raises ``ValueError`` naming it, its value and the range.

Vectorised functional forms, for fitters that evaluate many parameter sets at once.
Every argument broadcasts with numpy rules (e.g. parameters of shape ``(k, 1)`` against
voltages of shape ``(m,)`` give ``(k, m)``); :math:`a = n N_s V_t` is passed directly:

- ``single_diode_current(voltage_v, photocurrent_a, saturation_current_a, n_ns_vt_v,
  series_resistance_ohm, shunt_resistance_ohm)`` -> current [A]
- ``single_diode_voltage(current_a, photocurrent_a, saturation_current_a, n_ns_vt_v,
  series_resistance_ohm, shunt_resistance_ohm)`` -> voltage [V]
- ``single_diode_figures(photocurrent_a, saturation_current_a, n_ns_vt_v,
  series_resistance_ohm, shunt_resistance_ohm)`` -> :class:`CurveFigures` of arrays
- ``double_diode_current(voltage_v, photocurrent_a, saturation_current_1_a,
  saturation_current_2_a, n_ns_vt_1_v, n_ns_vt_2_v, series_resistance_ohm,
  shunt_resistance_ohm)`` -> current [A]
- ``double_diode_voltage(current_a, ...same parameters...)`` -> voltage [V]
- ``double_diode_figures(...same parameters...)`` -> :class:`CurveFigures`
- ``thermal_voltage(temperature_k)`` -> :math:`kT/q` [V]

``PARAMETER_RANGES`` lists the allowed range and unit of every parameter name.
"""
from tracer.model._checks import PARAMETER_RANGES
from tracer.model.double_diode import (
    DoubleDiode,
    double_diode_current,
    double_diode_figures,
    double_diode_voltage,
)
from tracer.model.figures import CurveFigures
from tracer.model.single_diode import (
    SingleDiode,
    single_diode_current,
    single_diode_figures,
    single_diode_voltage,
)
from tracer.model.thermal import thermal_voltage

__all__ = [
    "PARAMETER_RANGES",
    "CurveFigures",
    "DoubleDiode",
    "SingleDiode",
    "double_diode_current",
    "double_diode_figures",
    "double_diode_voltage",
    "single_diode_current",
    "single_diode_figures",
    "single_diode_voltage",
    "thermal_voltage",
]
