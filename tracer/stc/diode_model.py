"""Diode-model translation: move fitted equivalent-circuit parameters to other conditions.

Relations of De Soto, Klein & Beckman, "Improvement and validation of a model for
photovoltaic array performance", Solar Energy 80(1) (2006) 78-88,
doi:10.1016/j.solener.2005.06.010, written as in pvlib ``calcparams_desoto`` (reference
notes 5.3), referenced to (G_ref, T_ref) = (1000 W/m^2, 25 C)::

    Iph(G, T) = G/G_ref * (Iph_ref + alpha_isc*(T - T_ref))
    I0(T)     = I0_ref * (T/T_ref)^3 * exp(Eg_ref/(k*T_ref) - Eg(T)/(k*T))      [T in K]
    Eg(T)     = Eg_ref * (1 + dEg/dT*(T - T_ref)),  Eg_ref = 1.121 eV, dEg/dT = -0.0002677 /K
    Rsh(G)    = Rsh_ref * G_ref/G
    n, Rs     constant (so n*Ns*kT/q grows in proportion to T)

A fit at the measured (G1, T1) is first moved back to the reference and then out to the
target, so the result is the exact De Soto model at the target whatever the reference.
``alpha_isc`` [A/K] is the Isc temperature coefficient at G_ref.

For a double-diode fit, I01 follows the De Soto I0 relation (it is n_i^2-like, ∝ T^3
exp(-Eg/kT)); I02 follows n_i ∝ T^(3/2) exp(-Eg/(2kT)) — the usual textbook scaling of a
recombination current, from memory, not part of De Soto's paper.
"""
from __future__ import annotations

import numpy as np
from scipy import constants

from tracer.model import DoubleDiode, SingleDiode

__all__ = ["translate_diode_model", "BANDGAP_EV", "BANDGAP_TEMPERATURE_COEFFICIENT_PER_K"]

BANDGAP_EV = 1.121                              # De Soto et al. 2006 (c-Si), as pvlib EgRef
BANDGAP_TEMPERATURE_COEFFICIENT_PER_K = -0.0002677   # ibid., pvlib dEgdT
_K_EV = constants.k / constants.e               # Boltzmann constant [eV/K], CODATA
_ZERO_C_K = constants.zero_Celsius


def _bandgap_ev(t_k, eg_ref, deg_dt, t_ref_k):
    return eg_ref * (1.0 + deg_dt * (t_k - t_ref_k))


def translate_diode_model(model: SingleDiode | DoubleDiode, *, irradiance_w_m2: float,
                          temperature_c: float, alpha_isc_a_per_k: float,
                          target_irradiance_w_m2: float = 1000.0,
                          target_temperature_c: float = 25.0,
                          bandgap_ev: float = BANDGAP_EV,
                          bandgap_temperature_coefficient_per_k: float =
                          BANDGAP_TEMPERATURE_COEFFICIENT_PER_K,
                          reference_irradiance_w_m2: float = 1000.0,
                          reference_temperature_c: float = 25.0) -> SingleDiode | DoubleDiode:
    """The model's parameters moved from (G1, T1) = (``irradiance_w_m2``, ``temperature_c``)
    to the target conditions with the De Soto relations. Raises ``ValueError``."""
    g1, g2 = float(irradiance_w_m2), float(target_irradiance_w_m2)
    g_ref = float(reference_irradiance_w_m2)
    for name, g in (("irradiance", g1), ("target irradiance", g2), ("reference irradiance", g_ref)):
        if not np.isfinite(g) or g <= 0.0:
            raise ValueError(f"{name} must be finite and > 0 W/m^2, got {g!r}")
    alpha = float(alpha_isc_a_per_k)
    if not np.isfinite(alpha):
        raise ValueError("alpha_isc must be finite")
    t1 = float(temperature_c) + _ZERO_C_K
    t2 = float(target_temperature_c) + _ZERO_C_K
    t_ref = float(reference_temperature_c) + _ZERO_C_K
    if not (t1 > 0.0 and t2 > 0.0 and np.isfinite(t1) and np.isfinite(t2)):
        raise ValueError("temperatures must be finite and above absolute zero")

    iph_ref = model.photocurrent_a * g_ref / g1 - alpha * (t1 - t_ref)
    iph2 = g2 / g_ref * (iph_ref + alpha * (t2 - t_ref))
    if iph2 < 0.0:
        raise ValueError("the translated photocurrent is negative (check alpha_isc)")
    eg1 = _bandgap_ev(t1, bandgap_ev, bandgap_temperature_coefficient_per_k, t_ref)
    eg2 = _bandgap_ev(t2, bandgap_ev, bandgap_temperature_coefficient_per_k, t_ref)
    diffusion_factor = (t2 / t1) ** 3 * np.exp(eg1 / (_K_EV * t1) - eg2 / (_K_EV * t2))
    recombination_factor = (t2 / t1) ** 1.5 * np.exp(eg1 / (2 * _K_EV * t1) - eg2 / (2 * _K_EV * t2))
    rsh2 = model.shunt_resistance_ohm * g1 / g2
    common = dict(photocurrent_a=float(iph2), shunt_resistance_ohm=float(rsh2),
                  temperature_k=float(t2))
    if isinstance(model, SingleDiode):
        return model.replace(saturation_current_a=float(model.saturation_current_a * diffusion_factor),
                             **common)
    if isinstance(model, DoubleDiode):
        return model.replace(
            saturation_current_1_a=float(model.saturation_current_1_a * diffusion_factor),
            saturation_current_2_a=float(model.saturation_current_2_a * recombination_factor),
            **common)
    raise TypeError(f"expected a SingleDiode or DoubleDiode, got {type(model).__name__}")
