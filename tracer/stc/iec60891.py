"""IEC 60891 procedures 1 and 2: point-by-point translation of a measured I-V curve.

Equations as implemented in Sandia PV_LIB for MATLAB
(``pvl_translate_IV_curve_IEC60891_1.m`` / ``_2.m``), which cites IEC 60891 Ed.2 (2009).
Subscript 1 = measured, 2 = target; currents in the generator convention.

Procedure 1 (absolute coefficients)::

    I2 = I1 + Isc1*(G2/G1 - 1) + alpha*(T2 - T1)
    V2 = V1 - Rs*(I2 - I1) - kappa*I2*(T2 - T1) + beta*(T2 - T1)

Procedure 2 (relative coefficients)::

    I2 = I1*(1 + alpha_rel*(T2 - T1))*G2/G1
    V2 = V1 + Voc1*(beta_rel*(T2 - T1) + a*ln(G2/G1)) - Rs'*(I2 - I1) - kappa'*I2*(T2 - T1)

alpha [A/K], beta [V/K], Rs [ohm], kappa [ohm/K]; alpha_rel, beta_rel [1/K], a [-],
Rs' [ohm], kappa' [ohm/K]. Procedure 2's Rs' and kappa' are not interchangeable with
procedure 1's. Rs here is a translation parameter, not the single-diode Rs. ``G1`` may be
an array (irradiance read per point, allowed since Ed.2); temperatures in C (only
differences enter).

Procedure 4 (Ed.3, single curve, c-Si) is not implemented: its equations could not be
confirmed against the standard text.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

__all__ = [
    "MeasuredCurve",
    "Procedure1Coefficients",
    "Procedure2Coefficients",
    "translate_procedure1",
    "translate_procedure2",
]


@dataclass(frozen=True)
class MeasuredCurve:
    """One measured curve with the conditions it was measured at (generator convention).

    ``irradiance_w_m2`` is the irradiance the device saw (already multiplied by the
    spectral mismatch factor when one applies); ``temperature_c`` the device temperature.
    """

    voltage_v: np.ndarray
    current_a: np.ndarray
    irradiance_w_m2: float
    temperature_c: float

    def __post_init__(self):
        v = np.asarray(self.voltage_v, dtype=float).ravel()
        i = np.asarray(self.current_a, dtype=float).ravel()
        if v.shape != i.shape:
            raise ValueError(f"voltage and current differ in length ({v.size} vs {i.size})")
        keep = np.isfinite(v) & np.isfinite(i)
        if keep.sum() < 5:
            raise ValueError("a measured curve needs at least 5 finite points")
        g = _finite("irradiance", self.irradiance_w_m2)
        if g <= 0.0:
            raise ValueError(f"irradiance must be > 0 W/m^2, got {g!r}")
        object.__setattr__(self, "voltage_v", v[keep])
        object.__setattr__(self, "current_a", i[keep])
        object.__setattr__(self, "irradiance_w_m2", g)
        object.__setattr__(self, "temperature_c", _finite("temperature", self.temperature_c))


def _finite(name: str, value: float) -> float:
    value = float(value)
    if not np.isfinite(value):
        raise ValueError(f"{name} must be finite, got {value!r}")
    return value


@dataclass(frozen=True)
class Procedure1Coefficients:
    """IEC 60891 procedure 1 coefficients (absolute)."""

    alpha_a_per_k: float = 0.0
    beta_v_per_k: float = 0.0
    series_resistance_ohm: float = 0.0
    kappa_ohm_per_k: float = 0.0

    def __post_init__(self):
        for k, v in asdict(self).items():
            _finite(k, v)

    def to_dict(self) -> dict:
        return {k: float(v) for k, v in asdict(self).items()}


@dataclass(frozen=True)
class Procedure2Coefficients:
    """IEC 60891 procedure 2 coefficients (relative; ``irradiance_factor`` is ``a``)."""

    alpha_rel_per_k: float = 0.0
    beta_rel_per_k: float = 0.0
    irradiance_factor: float = 0.0
    series_resistance_ohm: float = 0.0
    kappa_ohm_per_k: float = 0.0

    def __post_init__(self):
        for k, v in asdict(self).items():
            _finite(k, v)

    def to_dict(self) -> dict:
        return {k: float(v) for k, v in asdict(self).items()}


def _arrays(voltage_v, current_a) -> tuple[np.ndarray, np.ndarray]:
    v = np.asarray(voltage_v, dtype=float)
    i = np.asarray(current_a, dtype=float)
    if v.shape != i.shape:
        raise ValueError(f"voltage and current differ in shape ({v.shape} vs {i.shape})")
    return v, i


def _irradiance(name: str, g) -> np.ndarray:
    g = np.asarray(g, dtype=float)
    if not np.all(np.isfinite(g)) or np.any(g <= 0.0):
        raise ValueError(f"{name} must be finite and > 0 W/m^2")
    return g


def translate_procedure1(voltage_v, current_a, *, irradiance_w_m2, temperature_c: float,
                         isc_a: float, coefficients: Procedure1Coefficients,
                         target_irradiance_w_m2: float = 1000.0,
                         target_temperature_c: float = 25.0) -> tuple[np.ndarray, np.ndarray]:
    """Translate (V1, I1) measured at (G1, T1) to (G2, T2) with IEC 60891 procedure 1.

    ``isc_a`` is the measured curve's short-circuit current Isc1. Returns ``(V2, I2)``.
    """
    v1, i1 = _arrays(voltage_v, current_a)
    g1 = _irradiance("measured irradiance", irradiance_w_m2)
    g2 = float(_irradiance("target irradiance", target_irradiance_w_m2))
    dt = _finite("target temperature", target_temperature_c) - _finite("temperature", temperature_c)
    isc1 = _finite("Isc1", isc_a)
    c = coefficients
    i2 = i1 + isc1 * (g2 / g1 - 1.0) + c.alpha_a_per_k * dt
    v2 = (v1 - c.series_resistance_ohm * (i2 - i1) - c.kappa_ohm_per_k * i2 * dt
          + c.beta_v_per_k * dt)
    return v2, i2


def translate_procedure2(voltage_v, current_a, *, irradiance_w_m2, temperature_c: float,
                         voc_v: float, coefficients: Procedure2Coefficients,
                         target_irradiance_w_m2: float = 1000.0,
                         target_temperature_c: float = 25.0) -> tuple[np.ndarray, np.ndarray]:
    """Translate (V1, I1) measured at (G1, T1) to (G2, T2) with IEC 60891 procedure 2.

    ``voc_v`` is the measured curve's open-circuit voltage Voc1. Returns ``(V2, I2)``.
    """
    v1, i1 = _arrays(voltage_v, current_a)
    g1 = _irradiance("measured irradiance", irradiance_w_m2)
    g2 = float(_irradiance("target irradiance", target_irradiance_w_m2))
    dt = _finite("target temperature", target_temperature_c) - _finite("temperature", temperature_c)
    voc1 = _finite("Voc1", voc_v)
    c = coefficients
    i2 = i1 * (1.0 + c.alpha_rel_per_k * dt) * g2 / g1
    v2 = (v1 + voc1 * (c.beta_rel_per_k * dt + c.irradiance_factor * np.log(g2 / g1))
          - c.series_resistance_ohm * (i2 - i1) - c.kappa_ohm_per_k * i2 * dt)
    return v2, i2
