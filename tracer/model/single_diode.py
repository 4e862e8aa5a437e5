r"""Single-diode equivalent circuit, solved explicitly with the Lambert W function.

Equation (single-diode model, generator convention, :math:`N_s` cells in series):

.. math::

    I = I_{ph} - I_0 \left[\exp\!\left(\frac{V + I R_s}{n N_s V_t}\right) - 1\right]
        - \frac{V + I R_s}{R_{sh}}

Current from voltage (explicit Lambert W form, :math:`a = n N_s V_t`,
:math:`G_{sh} = 1/R_{sh}`, :math:`s = 1 + R_s G_{sh}`):

.. math::

    I = \frac{I_{ph} + I_0 - V G_{sh}}{s} - \frac{a}{R_s}\,W(e^{x}),\qquad
    x = \ln\frac{R_s I_0}{a s} + \frac{R_s (I_{ph} + I_0) + V}{a s}

Voltage from current (:math:`c = I_{ph} + I_0 - I`):

.. math::

    V = \frac{c}{G_{sh}} - a\,W(e^{y}) - I R_s
      = a\left[\ln W(e^{y}) + \ln\frac{a G_{sh}}{I_0}\right] - I R_s,\qquad
    y = \ln\frac{I_0}{a G_{sh}} + \frac{c}{a G_{sh}}

The second, equal form follows from the identity :math:`y - W(e^y) = \ln W(e^y)`; it is
used where the two large terms of the first (high shunt resistance) would cancel, and
the first where its terms are small (near zero bias), so the rounding error stays at
the level of the result's own size. :math:`W(e^x)` is evaluated as the Wright omega function :math:`\omega(x)`
(``scipy.special.wrightomega``), which never forms :math:`e^x` and so never overflows.

Limits handled analytically: :math:`R_s = 0` gives the explicit ideal-diode current
:math:`I = I_{ph} - I_0 (e^{V/a} - 1) - V G_{sh}` (which can overflow to ``-inf`` only
where the true current exceeds the float range); :math:`R_{sh} = \infty` gives
:math:`V = a \ln(1 + (I_{ph} - I)/I_0) - I R_s` (``-inf`` where
:math:`I \ge I_{ph} + I_0`, which no finite voltage reaches).

References: A. Jain and A. Kapoor, "Exact analytical solutions of the parameters of real
solar cells using Lambert W-function", Sol. Energy Mater. Sol. Cells 81 (2004) 269-277,
doi:10.1016/j.solmat.2003.11.018.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tracer.model._checks import check_parameter
from tracer.model._lambert import sd_current, sd_voltage
from tracer.model._network import make_flat
from tracer.model._base import CheckedParameters
from tracer.model.figures import CurveFigures, figures_from_parts


def _scalar_or_array(a):
    a = np.asarray(a)
    return float(a) if a.ndim == 0 else a


def _check_functional(photocurrent_a, saturation_current_a, n_ns_vt_v,
                      series_resistance_ohm, shunt_resistance_ohm):
    iph = check_parameter("photocurrent_a", photocurrent_a)
    i0 = check_parameter("saturation_current_a", saturation_current_a)
    a = check_parameter("n_ns_vt_v", n_ns_vt_v)
    rs = check_parameter("series_resistance_ohm", series_resistance_ohm)
    rsh = check_parameter("shunt_resistance_ohm", shunt_resistance_ohm)
    return iph, i0, a, rs, 1.0 / rsh


def single_diode_current(voltage_v, photocurrent_a, saturation_current_a, n_ns_vt_v,
                         series_resistance_ohm, shunt_resistance_ohm):
    r"""Terminal current of the single-diode model [A], explicit Lambert W solution.

    All arguments broadcast together (numpy rules), so one call evaluates many voltages,
    many parameter sets, or both.

    Parameters
    ----------
    voltage_v : float or array_like
        Terminal voltage :math:`V` [V].
    photocurrent_a : float or array_like
        Photo-generated current :math:`I_{ph}` [A], ``>= 0`` (0 for a dark curve).
    saturation_current_a : float or array_like
        Diode saturation current :math:`I_0` [A], ``> 0``.
    n_ns_vt_v : float or array_like
        Modified ideality factor :math:`a = n N_s V_t` [V], ``> 0``.
    series_resistance_ohm : float or array_like
        Series resistance :math:`R_s` [ohm], ``>= 0``.
    shunt_resistance_ohm : float or array_like
        Shunt resistance :math:`R_{sh}` [ohm], ``> 0``; ``inf`` for no shunt.

    Returns
    -------
    float or numpy.ndarray
        Current :math:`I` [A], generator convention (positive at short circuit under
        light). A float when every input is a scalar.

    Raises
    ------
    ValueError
        If a parameter is NaN or out of its range (the message names it).
    """
    iph, i0, a, rs, g = _check_functional(photocurrent_a, saturation_current_a, n_ns_vt_v,
                                          series_resistance_ohm, shunt_resistance_ohm)
    v = np.asarray(voltage_v, dtype=float)
    return _scalar_or_array(sd_current(v, iph, i0, a, rs, g))


def single_diode_voltage(current_a, photocurrent_a, saturation_current_a, n_ns_vt_v,
                         series_resistance_ohm, shunt_resistance_ohm):
    r"""Terminal voltage of the single-diode model [V], explicit Lambert W solution.

    Parameters
    ----------
    current_a : float or array_like
        Terminal current :math:`I` [A], generator convention.
    photocurrent_a, saturation_current_a, n_ns_vt_v, series_resistance_ohm, shunt_resistance_ohm
        As in :func:`single_diode_current`.

    Returns
    -------
    float or numpy.ndarray
        Voltage :math:`V` [V]. ``-inf`` where :math:`R_{sh} = \infty` and
        :math:`I \ge I_{ph} + I_0` (no finite voltage drives that current).

    Raises
    ------
    ValueError
        If a parameter is NaN or out of its range.
    """
    iph, i0, a, rs, g = _check_functional(photocurrent_a, saturation_current_a, n_ns_vt_v,
                                          series_resistance_ohm, shunt_resistance_ohm)
    i = np.asarray(current_a, dtype=float)
    return _scalar_or_array(sd_voltage(i, iph, i0, a, rs, g))


def single_diode_figures(photocurrent_a, saturation_current_a, n_ns_vt_v,
                         series_resistance_ohm, shunt_resistance_ohm) -> CurveFigures:
    r"""Isc, Voc, maximum power point and fill factor of the single-diode model.

    :math:`I_{sc} = I(V=0)` and :math:`V_{oc} = V(I=0)` from the Lambert W forms; the
    maximum power point from :math:`dP/dV = 0` solved on :math:`[0, V_{oc}]` (see
    :func:`tracer.model._network.maximum_power_point`), to better than 1e-12 relative in
    voltage and so far better than 1e-9 relative in power.

    Parameters
    ----------
    photocurrent_a, saturation_current_a, n_ns_vt_v, series_resistance_ohm, shunt_resistance_ohm
        As in :func:`single_diode_current`; arrays broadcast together.

    Returns
    -------
    CurveFigures
        Floats for scalar parameters, arrays of the broadcast shape otherwise.
    """
    iph, i0, a, rs, g = _check_functional(photocurrent_a, saturation_current_a, n_ns_vt_v,
                                          series_resistance_ohm, shunt_resistance_ohm)
    shape = np.broadcast_shapes(iph.shape, i0.shape, a.shape, rs.shape, g.shape)
    net = make_flat(shape, iph, i0, a, 0.0, a, rs, g)
    isc = sd_current(0.0, net.photocurrent_a, net.saturation_current_1_a, net.n_ns_vt_1_v,
                   net.series_resistance_ohm, net.shunt_conductance_s)
    voc = np.maximum(sd_voltage(0.0, net.photocurrent_a, net.saturation_current_1_a,
                              net.n_ns_vt_1_v, net.series_resistance_ohm,
                              net.shunt_conductance_s), 0.0)
    return figures_from_parts(shape, isc, voc, net)


@dataclass(frozen=True)
class SingleDiode(CheckedParameters):
    r"""Single-diode equivalent circuit of a cell or of a module of cells in series.

    Immutable; derive a variant with :meth:`replace` (or :func:`dataclasses.replace`),
    which validates again.

    Parameters
    ----------
    photocurrent_a : float
        Photo-generated current :math:`I_{ph}` [A], ``>= 0`` (0 for a dark curve).
    saturation_current_a : float
        Diode saturation current :math:`I_0` [A], ``> 0``.
    ideality : float
        Diode ideality factor :math:`n` [1], ``> 0``.
    series_resistance_ohm : float
        Series resistance :math:`R_s` [ohm], ``>= 0``.
    shunt_resistance_ohm : float
        Shunt resistance :math:`R_{sh}` [ohm], ``> 0``; ``inf`` for no shunt.
    temperature_k : float
        Cell temperature :math:`T` [K], ``> 0``. Default 298.15 K.
    cells_in_series : int
        Number of cells in series :math:`N_s`, ``>= 1``. Default 1.

    Raises
    ------
    ValueError
        On construction, if a parameter is NaN or out of range; the message names the
        parameter, its value and the allowed range.
    """

    photocurrent_a: float
    saturation_current_a: float
    ideality: float
    series_resistance_ohm: float
    shunt_resistance_ohm: float
    temperature_k: float = 298.15
    cells_in_series: int = 1



    @property
    def n_ns_vt_v(self) -> float:
        """Modified ideality factor :math:`a = n N_s V_t` [V]."""
        return self.ideality * self.cells_in_series * self.thermal_voltage_v



    def _args(self):
        return (self.photocurrent_a, self.saturation_current_a, self.n_ns_vt_v,
                self.series_resistance_ohm, self.shunt_resistance_ohm)

    def current(self, voltage_v):
        """Terminal current [A] at ``voltage_v`` [V] (generator convention).

        Array in, array out; a scalar gives a float. See :func:`single_diode_current`.
        """
        return single_diode_current(voltage_v, *self._args())

    def voltage(self, current_a):
        """Terminal voltage [V] at ``current_a`` [A]. See :func:`single_diode_voltage`."""
        return single_diode_voltage(current_a, *self._args())

    def figures(self) -> CurveFigures:
        """Isc, Voc, maximum power point and FF. See :func:`single_diode_figures`."""
        return single_diode_figures(*self._args())

    def curve(self, points: int = 201):
        """Voltages from 0 to Voc [V] (evenly spaced) and their currents [A]."""
        voltage = np.linspace(0.0, max(self.voltage(0.0), 0.0), int(points))
        return voltage, self.current(voltage)
