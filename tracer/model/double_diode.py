r"""Double-diode equivalent circuit, solved by a vectorised safeguarded Newton iteration.

Equation (double-diode model, generator convention, :math:`a_k = n_k N_s V_t`):

.. math::

    I = I_{ph} - I_{01}\left[e^{(V + I R_s)/a_1} - 1\right]
        - I_{02}\left[e^{(V + I R_s)/a_2} - 1\right] - \frac{V + I R_s}{R_{sh}}

The first diode usually stands for diffusion (:math:`n_1` near 1), the second for
recombination in the depletion region (:math:`n_2` near 2). There is no closed form;
the unknown solved for is the junction voltage :math:`V_d = V + I R_s`, which is affine in
:math:`I` for a given :math:`V`, so the residual

.. math::

    h(V_d) = V_d - R_s\,I(V_d) - V

is monotone (and convex) in the current. Each element is bracketed analytically (between
:math:`V` and :math:`V_{oc}`, tightened by a logarithmic bound on the diode currents so no
exponential overflows), then solved by Newton steps that fall back to bisection whenever a
step would leave the bracket or shrink too slowly; the iteration stops when the step is
below 1e-12 relative (or 1e-13 :math:`a` absolute). Voltage from current solves
:math:`I(V_d) = I`, likewise monotone. With :math:`I_{02} = 0` the model is the
single-diode model.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tracer.model import _network
from tracer.model._checks import check_parameter
from tracer.model._base import CheckedParameters
from tracer.model.figures import CurveFigures, figures_from_parts


def _check_functional(photocurrent_a, saturation_current_1_a, saturation_current_2_a,
                      n_ns_vt_1_v, n_ns_vt_2_v, series_resistance_ohm, shunt_resistance_ohm):
    return (check_parameter("photocurrent_a", photocurrent_a),
            check_parameter("saturation_current_1_a", saturation_current_1_a),
            check_parameter("saturation_current_2_a", saturation_current_2_a),
            check_parameter("n_ns_vt_1_v", n_ns_vt_1_v),
            check_parameter("n_ns_vt_2_v", n_ns_vt_2_v),
            check_parameter("series_resistance_ohm", series_resistance_ohm),
            1.0 / check_parameter("shunt_resistance_ohm", shunt_resistance_ohm))


def _network_and_shape(x, params):
    iph, i01, i02, a1, a2, rs, g = params
    shape = np.broadcast_shapes(np.shape(x), *(np.shape(p) for p in params))
    net = _network.make_flat(shape, iph, i01, a1, i02, a2, rs, g)
    return net, shape


def _out(a, shape):
    a = np.reshape(a, shape)
    return float(a) if a.ndim == 0 else a


def double_diode_current(voltage_v, photocurrent_a, saturation_current_1_a,
                         saturation_current_2_a, n_ns_vt_1_v, n_ns_vt_2_v,
                         series_resistance_ohm, shunt_resistance_ohm):
    r"""Terminal current of the double-diode model [A].

    All arguments broadcast together (numpy rules).

    Parameters
    ----------
    voltage_v : float or array_like
        Terminal voltage :math:`V` [V].
    photocurrent_a : float or array_like
        Photo-generated current :math:`I_{ph}` [A], ``>= 0``.
    saturation_current_1_a : float or array_like
        Saturation current of diode 1 :math:`I_{01}` [A], ``> 0``.
    saturation_current_2_a : float or array_like
        Saturation current of diode 2 :math:`I_{02}` [A], ``>= 0``.
    n_ns_vt_1_v, n_ns_vt_2_v : float or array_like
        Modified ideality factors :math:`a_k = n_k N_s V_t` [V], ``> 0``.
    series_resistance_ohm : float or array_like
        Series resistance :math:`R_s` [ohm], ``>= 0``.
    shunt_resistance_ohm : float or array_like
        Shunt resistance :math:`R_{sh}` [ohm], ``> 0``; ``inf`` for no shunt.

    Returns
    -------
    float or numpy.ndarray
        Current [A], generator convention; a float when every input is a scalar.

    Raises
    ------
    ValueError
        If a parameter is NaN or out of its range.
    RuntimeError
        If the Newton iteration fails to converge (not expected on valid input).
    """
    params = _check_functional(photocurrent_a, saturation_current_1_a, saturation_current_2_a,
                               n_ns_vt_1_v, n_ns_vt_2_v, series_resistance_ohm,
                               shunt_resistance_ohm)
    v = np.asarray(voltage_v, dtype=float)
    if all(p.ndim == 0 for p in params):
        # one parameter set for every voltage: shared, not copied per point
        iph, i01, i02, a1, a2, rs, g = params
        net = _network.make_uniform(iph, i01, a1, i02, a2, rs, g)
        voc = _network.open_circuit_voltage(_network.make_single(iph, i01, a1, i02, a2,
                                                                 rs, g))[0]
        return _out(_network.current_at_voltage(v.ravel(), net, voc), v.shape)
    # Voc depends on the parameters only: solve it on their own shape, then broadcast
    param_net, param_shape = _network_and_shape(0.0, params)
    voc = np.reshape(_network.open_circuit_voltage(param_net), param_shape)
    net, shape = _network_and_shape(v, params)
    flat_v = np.broadcast_to(v, shape).ravel()
    flat_voc = np.broadcast_to(voc, shape).ravel()
    return _out(_network.current_at_voltage(flat_v, net, flat_voc), shape)


def double_diode_voltage(current_a, photocurrent_a, saturation_current_1_a,
                         saturation_current_2_a, n_ns_vt_1_v, n_ns_vt_2_v,
                         series_resistance_ohm, shunt_resistance_ohm):
    r"""Terminal voltage of the double-diode model [V].

    Parameters
    ----------
    current_a : float or array_like
        Terminal current :math:`I` [A], generator convention.
    photocurrent_a, saturation_current_1_a, saturation_current_2_a, n_ns_vt_1_v, n_ns_vt_2_v, series_resistance_ohm, shunt_resistance_ohm
        As in :func:`double_diode_current`.

    Returns
    -------
    float or numpy.ndarray
        Voltage [V]; ``-inf`` where :math:`R_{sh} = \infty` and
        :math:`I \ge I_{ph} + I_{01} + I_{02}` (unreachable current).
    """
    params = _check_functional(photocurrent_a, saturation_current_1_a, saturation_current_2_a,
                               n_ns_vt_1_v, n_ns_vt_2_v, series_resistance_ohm,
                               shunt_resistance_ohm)
    i = np.asarray(current_a, dtype=float)
    net, shape = _network_and_shape(i, params)
    flat_i = np.broadcast_to(i, shape).ravel()
    return _out(_network.voltage_at_current(flat_i, net), shape)


def double_diode_figures(photocurrent_a, saturation_current_1_a, saturation_current_2_a,
                         n_ns_vt_1_v, n_ns_vt_2_v, series_resistance_ohm,
                         shunt_resistance_ohm) -> CurveFigures:
    """Isc, Voc, maximum power point and FF of the double-diode model.

    Parameters are as in :func:`double_diode_current` and broadcast together.
    """
    params = _check_functional(photocurrent_a, saturation_current_1_a, saturation_current_2_a,
                               n_ns_vt_1_v, n_ns_vt_2_v, series_resistance_ohm,
                               shunt_resistance_ohm)
    net, shape = _network_and_shape(0.0, params)
    voc = _network.open_circuit_voltage(net)
    isc = _network.current_at_voltage(np.zeros(net.size), net, voc)
    return figures_from_parts(shape, isc, voc, net)


@dataclass(frozen=True)
class DoubleDiode(CheckedParameters):
    r"""Double-diode equivalent circuit of a cell or of a module of cells in series.

    Immutable; derive a variant with :meth:`replace`, which validates again.

    Parameters
    ----------
    photocurrent_a : float
        Photo-generated current :math:`I_{ph}` [A], ``>= 0``.
    saturation_current_1_a : float
        Saturation current of diode 1 :math:`I_{01}` [A], ``> 0``.
    saturation_current_2_a : float
        Saturation current of diode 2 :math:`I_{02}` [A], ``>= 0`` (0 reduces the model to
        the single-diode one).
    ideality_1, ideality_2 : float
        Ideality factors :math:`n_1, n_2` [1], ``> 0``.
    series_resistance_ohm : float
        Series resistance :math:`R_s` [ohm], ``>= 0``.
    shunt_resistance_ohm : float
        Shunt resistance :math:`R_{sh}` [ohm], ``> 0``; ``inf`` for no shunt.
    temperature_k : float
        Cell temperature [K], ``> 0``. Default 298.15 K.
    cells_in_series : int
        Number of cells in series, ``>= 1``. Default 1.

    Raises
    ------
    ValueError
        If a parameter is NaN or out of range (message names parameter, value, range).
    """

    photocurrent_a: float
    saturation_current_1_a: float
    saturation_current_2_a: float
    ideality_1: float
    ideality_2: float
    series_resistance_ohm: float
    shunt_resistance_ohm: float
    temperature_k: float = 298.15
    cells_in_series: int = 1



    @property
    def n_ns_vt_1_v(self) -> float:
        """Modified ideality factor of diode 1, :math:`n_1 N_s V_t` [V]."""
        return self.ideality_1 * self.cells_in_series * self.thermal_voltage_v

    @property
    def n_ns_vt_2_v(self) -> float:
        """Modified ideality factor of diode 2, :math:`n_2 N_s V_t` [V]."""
        return self.ideality_2 * self.cells_in_series * self.thermal_voltage_v



    def _args(self):
        return (self.photocurrent_a, self.saturation_current_1_a, self.saturation_current_2_a,
                self.n_ns_vt_1_v, self.n_ns_vt_2_v, self.series_resistance_ohm,
                self.shunt_resistance_ohm)

    def current(self, voltage_v):
        """Terminal current [A] at ``voltage_v`` [V]. See :func:`double_diode_current`."""
        return double_diode_current(voltage_v, *self._args())

    def voltage(self, current_a):
        """Terminal voltage [V] at ``current_a`` [A]. See :func:`double_diode_voltage`."""
        return double_diode_voltage(current_a, *self._args())

    def figures(self) -> CurveFigures:
        """Isc, Voc, maximum power point and FF. See :func:`double_diode_figures`."""
        return double_diode_figures(*self._args())

    def curve(self, points: int = 201):
        """Voltages from 0 to Voc [V] (evenly spaced) and their currents [A]."""
        voltage = np.linspace(0.0, self.figures().voc_v, int(points))
        return voltage, self.current(voltage)
