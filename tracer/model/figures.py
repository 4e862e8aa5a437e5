"""Figures of merit of an I-V curve computed on a model: Isc, Voc, MPP, FF."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tracer.model._network import FlatNetwork, maximum_power_point


@dataclass(frozen=True)
class CurveFigures:
    """Figures of merit of a modelled I-V curve (generator convention).

    Fields are floats for a single parameter set, arrays of the broadcast parameter
    shape for the vectorised functions.

    Attributes
    ----------
    isc_a : float or numpy.ndarray
        Short-circuit current :math:`I_{sc} = I(V=0)` [A].
    voc_v : float or numpy.ndarray
        Open-circuit voltage :math:`V_{oc} = V(I=0)` [V].
    imp_a : float or numpy.ndarray
        Current at the maximum power point [A].
    vmp_v : float or numpy.ndarray
        Voltage at the maximum power point [V].
    pmax_w : float or numpy.ndarray
        Maximum power :math:`P_{max} = V_{mp} I_{mp}` [W].
    ff : float or numpy.ndarray
        Fill factor :math:`FF = P_{max} / (I_{sc} V_{oc})` [1]; NaN where
        :math:`I_{sc} V_{oc} = 0` (a dark curve), where it is undefined.
    """

    isc_a: float | np.ndarray
    voc_v: float | np.ndarray
    imp_a: float | np.ndarray
    vmp_v: float | np.ndarray
    pmax_w: float | np.ndarray
    ff: float | np.ndarray


def figures_from_parts(shape, isc_a, voc_v, net: FlatNetwork) -> CurveFigures:
    """Assemble :class:`CurveFigures` from Isc, Voc (flat) and the flat network."""
    vmp, imp, pmax = maximum_power_point(net, voc_v)
    with np.errstate(divide="ignore", invalid="ignore"):
        denominator = isc_a * voc_v
        ff = np.where(denominator > 0, pmax / np.where(denominator > 0, denominator, 1.0),
                      np.nan)

    def out(a):
        a = np.reshape(a, shape)
        return float(a) if a.ndim == 0 else a

    return CurveFigures(isc_a=out(isc_a), voc_v=out(voc_v), imp_a=out(imp), vmp_v=out(vmp),
                        pmax_w=out(pmax), ff=out(ff))
