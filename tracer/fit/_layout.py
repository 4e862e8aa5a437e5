"""Internal parameter vector of the fit and its link to the model's exact solvers.

The polish works on

    theta = [Iph (light curves only), ln I0_1 [, ln I0_2], a_1 [, a_2], Rs, G]

with a_k = n_k * Ns * Vt [V] and G = 1/Rsh [S] (G = 0 is an ideal shunt). The current is
always the model's exact solution at the measured voltage; its derivatives follow from
the implicit diode equation F(I, V, theta) = 0 by implicit differentiation:
dI/dtheta = (dF/dtheta) / (1 + Rs * (sum_k I0_k exp(Vd/a_k)/a_k + G)).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tracer.model import double_diode_current, single_diode_current

#: Cap on exponents: e**300 ~ 1e130 keeps squares and products finite; any
#: physical diode current has an exponent (ln of its ratio to I0) far below it.
_EXP_CAP = 300.0


@dataclass(frozen=True)
class Layout:
    n_diodes: int
    dark: bool

    @property
    def offset(self) -> int:
        return 0 if self.dark else 1

    @property
    def size(self) -> int:
        return self.offset + 2 * self.n_diodes + 2

    @property
    def rs_index(self) -> int:
        return self.offset + 2 * self.n_diodes

    @property
    def g_index(self) -> int:
        return self.rs_index + 1

    def log_i0_indices(self) -> list[int]:
        return [self.offset + k for k in range(self.n_diodes)]

    def a_indices(self) -> list[int]:
        return [self.offset + self.n_diodes + k for k in range(self.n_diodes)]

    def unpack(self, theta):
        iph = 0.0 if self.dark else float(theta[0])
        log_i0 = [float(theta[k]) for k in self.log_i0_indices()]
        a = [float(theta[k]) for k in self.a_indices()]
        return iph, log_i0, a, float(theta[self.rs_index]), float(theta[self.g_index])

    def pack(self, iph, log_i0, a, rs, g) -> np.ndarray:
        head = [] if self.dark else [iph]
        return np.array(head + list(log_i0) + list(a) + [rs, g], dtype=float)


def model_current(layout: Layout, theta, voltage_v):
    """Exact model current [A] at ``voltage_v`` (the tracer.model solvers)."""
    iph, log_i0, a, rs, g = layout.unpack(theta)
    rsh = np.inf if g <= 0.0 else 1.0 / g
    i0 = [np.exp(x) for x in log_i0]
    if layout.n_diodes == 1:
        return np.asarray(single_diode_current(voltage_v, iph, i0[0], a[0], rs, rsh),
                          dtype=float)
    return np.asarray(double_diode_current(voltage_v, iph, i0[0], i0[1], a[0], a[1], rs, rsh),
                      dtype=float)


def current_jacobian(layout: Layout, theta, voltage_v, current_a):
    """dI/dtheta (N, p) at the model current ``current_a`` solved at ``voltage_v``."""
    iph, log_i0, a, rs, g = layout.unpack(theta)
    vd = voltage_v + current_a * rs
    cols = np.empty((voltage_v.size, layout.size))
    conductance = np.full_like(vd, g)
    for k, (li0, ak) in enumerate(zip(log_i0, a)):
        with np.errstate(over="ignore"):
            i0_e = np.exp(np.minimum(li0 + vd / ak, _EXP_CAP))         # I0 exp(Vd/a)
            i0_em1 = np.exp(li0) * np.expm1(np.minimum(vd / ak, _EXP_CAP))  # I0 (exp - 1)
        conductance += i0_e / ak
        cols[:, layout.log_i0_indices()[k]] = -i0_em1
        cols[:, layout.a_indices()[k]] = i0_e * vd / (ak * ak)
    if not layout.dark:
        cols[:, 0] = 1.0
    cols[:, layout.rs_index] = -current_a * conductance
    cols[:, layout.g_index] = -vd
    return cols / (1.0 + rs * conductance)[:, None]


def equation_terms(layout: Layout, theta, voltage_v, current_a):
    """Implicit-equation residual F and its gradient at the *measured* current.

    F = Iph - sum_k I0_k (exp(Vd/a_k) - 1) - Vd*G - I with Vd = V + I*Rs, evaluated at
    the measured (V, I); returns (F, dF/dtheta, 1 + Rs*dD/dVd). Near the optimum
    F / (1 + Rs*dD/dVd) is the model-minus-measured current to first order: a cheap,
    solver-free stand-in for the true residual, used to bring the starting points close
    before the exact polish.
    """
    iph, log_i0, a, rs, g = layout.unpack(theta)
    vd = voltage_v + current_a * rs
    cols = np.empty((voltage_v.size, layout.size))
    conductance = np.full_like(vd, g)
    f = iph - current_a - vd * g
    for k, (li0, ak) in enumerate(zip(log_i0, a)):
        with np.errstate(over="ignore"):
            x = np.minimum(vd / ak, _EXP_CAP)
            i0_e = np.exp(np.minimum(li0 + x, _EXP_CAP))
            i0_em1 = np.exp(li0) * np.expm1(x)
        f = f - i0_em1
        conductance += i0_e / ak
        cols[:, layout.log_i0_indices()[k]] = -i0_em1
        cols[:, layout.a_indices()[k]] = i0_e * vd / (ak * ak)
    if not layout.dark:
        cols[:, 0] = 1.0
    cols[:, layout.rs_index] = -current_a * conductance
    cols[:, layout.g_index] = -vd
    return f, cols, 1.0 + rs * conductance


def first_order_denominator(layout: Layout, theta, voltage_v, current_a):
    """1 + Rs*dD/dVd at (V, I): the third value of :func:`equation_terms`, alone (same
    operations, without forming F and its gradient)."""
    iph, log_i0, a, rs, g = layout.unpack(theta)
    vd = voltage_v + current_a * rs
    conductance = np.full_like(vd, g)
    for li0, ak in zip(log_i0, a):
        with np.errstate(over="ignore"):
            x = np.minimum(vd / ak, _EXP_CAP)
            i0_e = np.exp(np.minimum(li0 + x, _EXP_CAP))
        conductance += i0_e / ak
    return 1.0 + rs * conductance
