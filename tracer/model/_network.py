r"""Diode network parametrised by the junction voltage, shared by both diode models.

With the junction (diode) voltage :math:`V_d = V + I R_s` as the free variable, every
quantity of the equivalent circuit is explicit:

.. math::

    I(V_d) = I_{ph} - I_{01}\,(e^{V_d/a_1} - 1) - I_{02}\,(e^{V_d/a_2} - 1) - G_{sh} V_d,
    \qquad V(V_d) = V_d - I(V_d)\,R_s,

with :math:`a_k = n_k N_s V_t` and :math:`G_{sh} = 1/R_{sh}`. The single-diode model is
the case :math:`I_{02} = 0`. :math:`I(V_d)` is concave and decreasing and
:math:`V(V_d)` is increasing, so every problem below has a monotone residual and an
analytic bracket; it is solved with :func:`tracer.model._newton.bracketed_newton`.

Starting points: removing either diode raises :math:`I(V_d)`, so the explicit
single-diode solutions (Lambert W) with diode 1 alone and with diode 2 alone bound the
junction voltage from above. Newton's method on these convex increasing residuals,
started at or above the root, descends monotonically onto it; with one diode dominant
the start is already nearly exact.

All functions here take *flat* float arrays of equal length (already validated and
broadcast) and return flat arrays.
"""
from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np

from tracer.model import _scalar
from tracer.model._checks import scaled_exp_pair
from tracer.model._lambert import sd_current, sd_voltage
from tracer.model._newton import bracketed_newton

#: Absolute tolerance on the junction voltage, as a fraction of the smallest modified
#: ideality factor a = n*Ns*Vt: a step of 1e-13*a changes exp(Vd/a) by 1e-13 relative.
ATOL_PER_A = 1e-13


@dataclass(frozen=True)
class FlatNetwork:
    """Flat, equal-length parameter arrays of a diode network (internal).

    A *uniform* network (:func:`make_uniform`) holds 0-d arrays instead: one parameter
    set shared by every element, broadcast in the arithmetic rather than copied."""

    photocurrent_a: np.ndarray
    saturation_current_1_a: np.ndarray
    n_ns_vt_1_v: np.ndarray
    saturation_current_2_a: np.ndarray
    n_ns_vt_2_v: np.ndarray
    series_resistance_ohm: np.ndarray
    shunt_conductance_s: np.ndarray

    def take(self, index):
        """Sub-network of the elements ``index`` (a slice gives views)."""
        if self.photocurrent_a.ndim == 0 or (isinstance(index, slice)
                                              and index == slice(None)):
            return self
        return FlatNetwork(*(getattr(self, f.name)[index] for f in fields(self)))

    @property
    def size(self) -> int:
        return self.photocurrent_a.size

    def voltage_scale_v(self):
        """Absolute tolerance scale for junction voltages [V]."""
        a2 = np.where(self.saturation_current_2_a > 0, self.n_ns_vt_2_v, np.inf)
        return ATOL_PER_A * np.minimum(self.n_ns_vt_1_v, a2)

    def has_second_diode(self) -> bool:
        cached = self.__dict__.get("_has_second_diode")   # fields are fixed: compute once
        if cached is None:
            cached = bool(np.any(self.saturation_current_2_a > 0))
            self.__dict__["_has_second_diode"] = cached
        return cached


def make_flat(shape, photocurrent_a, saturation_current_1_a, n_ns_vt_1_v,
              saturation_current_2_a, n_ns_vt_2_v, series_resistance_ohm,
              shunt_conductance_s) -> FlatNetwork:
    """Broadcast parameters to ``shape`` and flatten them (contiguous copies)."""
    arrays = [np.ascontiguousarray(np.broadcast_to(np.asarray(p, dtype=float), shape)).ravel()
              for p in (photocurrent_a, saturation_current_1_a, n_ns_vt_1_v,
                        saturation_current_2_a, n_ns_vt_2_v, series_resistance_ohm,
                        shunt_conductance_s)]
    return FlatNetwork(*arrays)


def make_single(photocurrent_a, saturation_current_1_a, n_ns_vt_1_v, saturation_current_2_a,
                n_ns_vt_2_v, series_resistance_ohm, shunt_conductance_s) -> FlatNetwork:
    """A network of one element from scalar parameters (as ``make_flat((1,), ...)``)."""
    return FlatNetwork(*(np.array([float(p)])
                         for p in (photocurrent_a, saturation_current_1_a, n_ns_vt_1_v,
                                   saturation_current_2_a, n_ns_vt_2_v, series_resistance_ohm,
                                   shunt_conductance_s)))


def make_uniform(photocurrent_a, saturation_current_1_a, n_ns_vt_1_v, saturation_current_2_a,
                 n_ns_vt_2_v, series_resistance_ohm, shunt_conductance_s) -> FlatNetwork:
    """A uniform network: scalar parameters (0-d arrays) shared by every element."""
    return FlatNetwork(*(np.asarray(p, dtype=float).reshape(())
                         for p in (photocurrent_a, saturation_current_1_a, n_ns_vt_1_v,
                                   saturation_current_2_a, n_ns_vt_2_v, series_resistance_ohm,
                                   shunt_conductance_s)))


def junction_state(vd, net: FlatNetwork, curvature=False):
    r"""Current :math:`I(V_d)` [A], conductance :math:`D = -dI/dV_d` [S] and, if asked,
    :math:`dD/dV_d` [S/V], at junction voltage ``vd`` [V]."""
    a1, a2 = net.n_ns_vt_1_v, net.n_ns_vt_2_v
    m1, e1 = scaled_exp_pair(net.saturation_current_1_a, vd / a1)
    current = net.photocurrent_a - m1 - vd * net.shunt_conductance_s
    with np.errstate(over="ignore"):  # only beyond the float range, where I is -inf too
        d1 = e1 / a1
        dd = d1 / a1
        conductance = d1 + net.shunt_conductance_s
        if net.has_second_diode():
            m2, e2 = scaled_exp_pair(net.saturation_current_2_a, vd / a2)
            current = current - m2
            d2 = e2 / a2
            conductance = conductance + d2
            dd = dd + d2 / a2
    return (current, conductance, dd) if curvature else (current, conductance)


def junction_current(vd, net: FlatNetwork):
    """Terminal current :math:`I(V_d)` [A] (generator convention) at junction voltage [V]."""
    current = net.photocurrent_a - vd * net.shunt_conductance_s
    current = current - scaled_exp_pair(net.saturation_current_1_a, vd / net.n_ns_vt_1_v)[0]
    if net.has_second_diode():
        current = current - scaled_exp_pair(net.saturation_current_2_a,
                                            vd / net.n_ns_vt_2_v)[0]
    return current


def _diode_log_bound(excess_a, net: FlatNetwork):
    """Smallest :math:`a_k \\ln(1 + X / I_{0k})` over the diodes present [V].

    At a junction voltage above this bound the diode currents alone exceed ``excess_a``.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        bound = net.n_ns_vt_1_v * np.log1p(excess_a / net.saturation_current_1_a)
        if net.has_second_diode():
            b2 = np.where(net.saturation_current_2_a > 0,
                          net.n_ns_vt_2_v * np.log1p(excess_a / net.saturation_current_2_a),
                          np.inf)
            bound = np.minimum(bound, b2)
    return bound


def _single_diode_junction_bound(current_a, net: FlatNetwork):
    """Upper bound on the junction voltage carrying ``current_a`` [V] (each diode alone)."""
    g = net.shunt_conductance_s
    bound = sd_voltage(current_a, net.photocurrent_a, net.saturation_current_1_a,
                       net.n_ns_vt_1_v, 0.0, g)
    if net.has_second_diode():
        i02 = net.saturation_current_2_a
        with_2 = i02 > 0
        b2 = sd_voltage(current_a, net.photocurrent_a, np.where(with_2, i02, 1.0),
                        net.n_ns_vt_2_v, 0.0, g)
        bound = np.where(with_2, np.minimum(bound, b2), bound)
    return bound


def open_circuit_voltage(net: FlatNetwork):
    """Voc [V]: the junction voltage where :math:`I(V_d) = 0` (there :math:`V = V_d`)."""
    if net.size == 1 and net.has_second_diode():  # one set: the same iteration in floats
        values = [float(getattr(net, f.name).reshape(-1)[0]) for f in fields(net)]
        iph, i01, a1, i02, a2, _, g = values
        return np.full(net.photocurrent_a.shape, _scalar.open_circuit_voltage(
            iph, i01, a1, i02, a2, g, ATOL_PER_A * min(a1, a2)))
    upper = _diode_log_bound(net.photocurrent_a, net)
    lower = np.zeros_like(upper)
    if not net.has_second_diode():  # single diode: explicit
        return np.clip(_single_diode_junction_bound(0.0, net), lower, upper)
    start = _single_diode_junction_bound(0.0, net)

    def residual(x, idx):  # -I(Vd): increasing and convex
        current, conductance = junction_state(x, net.take(idx))
        return -current, conductance

    return bracketed_newton(residual, lower, upper, start, atol=net.voltage_scale_v())


def current_at_voltage(voltage_v, net: FlatNetwork, voc_v):
    """Terminal current [A] at terminal voltage ``voltage_v`` [V] (flat arrays)."""
    v = voltage_v
    rs = net.series_resistance_ohm
    if (np.size(v) == 1 and net.size == 1 and np.size(voc_v) == 1
            and float(np.reshape(rs, -1)[0]) > 0.0):  # one point, one set: plain floats
        values = [float(getattr(net, f.name).reshape(-1)[0]) for f in fields(net)]
        iph, i01, a1, i02, a2, rs_, g = values
        current = _scalar.current_at_voltage(
            float(np.reshape(v, -1)[0]), iph, i01, a1, i02, a2, rs_, g,
            float(np.reshape(voc_v, -1)[0]), float(net.voltage_scale_v().reshape(-1)[0]))
        return np.full(np.shape(v), current)
    lower = np.minimum(v, voc_v)
    upper = np.maximum(v, voc_v)
    # Above Voc the current is negative, so I01*(exp(Vd/a1)-1) <= Iph - I <= Iph + (V-Voc)/Rs
    with np.errstate(divide="ignore", invalid="ignore"):
        excess = net.photocurrent_a + (v - voc_v) / rs
    forward = (v > voc_v) & (rs > 0)
    upper = np.where(forward, np.minimum(upper, _diode_log_bound(excess, net)), upper)
    ideal = rs == 0  # Vd = V exactly
    lower = np.where(ideal, v, lower)
    upper = np.where(ideal, v, upper)
    # start: junction voltage of each diode alone (explicit), an upper bound on the root
    rs_safe = np.where(ideal, 1.0, rs)
    start = v + rs * sd_current(v, net.photocurrent_a, net.saturation_current_1_a,
                                net.n_ns_vt_1_v, rs_safe, net.shunt_conductance_s)
    if net.has_second_diode():
        i02 = net.saturation_current_2_a
        with_2 = i02 > 0
        start_2 = v + rs * sd_current(v, net.photocurrent_a, np.where(with_2, i02, 1.0),
                                      net.n_ns_vt_2_v, rs_safe, net.shunt_conductance_s)
        start = np.where(with_2, np.minimum(start, start_2), start)
    start = np.where(np.isnan(start), upper, start)

    def residual(x, idx):  # Vd - Rs*I(Vd) - V: increasing and convex
        sub = net.take(idx)
        r = sub.series_resistance_ohm
        current, conductance = junction_state(x, sub)
        return x - r * current - v[idx], 1.0 + r * conductance

    vd = bracketed_newton(residual, lower, upper, start, atol=net.voltage_scale_v())
    return junction_current(vd, net)


def voltage_at_current(current_a, net: FlatNetwork):
    """Terminal voltage [V] at terminal current ``current_a`` [A] (flat arrays).

    Where the shunt is ideal (:math:`G_{sh} = 0`) and the current reaches
    :math:`I_{ph} + I_{01} + I_{02}` or more, no finite voltage exists and ``-inf`` is
    returned (the limit of the model).
    """
    i = current_a
    g = net.shunt_conductance_s
    i01, i02 = net.saturation_current_1_a, net.saturation_current_2_a
    excess = net.photocurrent_a - i
    a_max = np.where(i02 > 0, np.maximum(net.n_ns_vt_1_v, net.n_ns_vt_2_v), net.n_ns_vt_1_v)
    with np.errstate(divide="ignore", invalid="ignore"):
        # reverse-current side (I > Iph): Vd < 0; the shunt alone or the saturated diodes
        # carry the excess at these junction voltages
        by_shunt = np.where(g > 0, excess / g, -np.inf)
        by_diodes = np.where(-excess < i01 + i02,
                             a_max * np.log1p(excess / (i01 + i02)), -np.inf)
        forward_bound = _diode_log_bound(excess, net)
    reverse = excess < 0
    lower = np.where(reverse, np.maximum(by_shunt, by_diodes), 0.0)
    upper = np.where(reverse, 0.0, forward_bound)
    unreachable = ~(lower > -np.inf)
    lower = np.where(unreachable, 0.0, lower)
    upper = np.where(unreachable, 0.0, upper)
    start = _single_diode_junction_bound(i, net)
    start = np.where(np.isnan(start), upper, start)

    def residual(x, idx):  # I - I(Vd): increasing and convex
        current, conductance = junction_state(x, net.take(idx))
        return i[idx] - current, conductance

    vd = bracketed_newton(residual, lower, upper, start, atol=net.voltage_scale_v())
    vd = np.where(unreachable & ~np.isnan(i), -np.inf, vd)
    with np.errstate(invalid="ignore"):
        return vd - i * net.series_resistance_ohm


def maximum_power_point(net: FlatNetwork, voc_v):
    r"""Maximum power point on :math:`0 \le V \le V_{oc}`.

    Solves :math:`dP/dV_d = I (1 + 2 R_s D) - V_d D = 0` (with :math:`P = V I`,
    :math:`D = -dI/dV_d`) for the junction voltage on the bracket :math:`[0, V_{oc}]`;
    :math:`P(V)` is strictly concave there (:math:`I(V)` is concave), so the root is
    unique.

    Returns
    -------
    tuple of numpy.ndarray
        ``(vmp_v, imp_a, pmax_w)``.
    """
    rs = net.series_resistance_ohm
    a1 = net.n_ns_vt_1_v
    if net.size == 1 and np.size(voc_v) == 1:  # one parameter set: plain floats
        values = [float(getattr(net, f.name).reshape(-1)[0]) for f in fields(net)]
        iph, i01, a1_, i02, a2, rs_, g = values
        out = _scalar.maximum_power_point(
            iph, i01, a1_, i02, a2, rs_, g, float(np.reshape(voc_v, -1)[0]),
            float(net.voltage_scale_v().reshape(-1)[0]))
        shape = np.shape(voc_v)
        return tuple(np.full(shape, x) for x in out)
    lower = np.zeros_like(voc_v)
    upper = np.asarray(voc_v, dtype=float)
    # start: ideal-diode estimate Vmp ~ Voc - a*ln(1 + Voc/a) (common practice)
    start = np.clip(upper - a1 * np.log1p(upper / a1), lower, upper)

    def residual(x, idx):  # -dP/dVd: increasing through the root
        sub = net.take(idx)
        r = sub.series_resistance_ohm
        cur, d, dd = junction_state(x, sub, curvature=True)
        f = x * d - cur * (1.0 + 2.0 * r * d)
        df = 2.0 * d * (1.0 + r * d) + dd * (x - 2.0 * cur * r)
        return f, df

    vd = bracketed_newton(residual, lower, upper, start, atol=net.voltage_scale_v())
    imp = junction_current(vd, net)
    vmp = vd - imp * rs
    return vmp, imp, vmp * imp
