"""Test curves made by pvlib (the external oracle) from its CEC module table."""
from __future__ import annotations

import numpy as np
import pytest

pvlib = pytest.importorskip("pvlib")
from pvlib import pvsystem  # noqa: E402

from tracer.model import thermal_voltage  # noqa: E402


def cec_modules(count: int):
    """`count` modules spread evenly over pvlib's CEC table (every k-th row)."""
    table = pvsystem.retrieve_sam("CECMod").T
    step = max(1, len(table) // count)
    return table.iloc[::step].iloc[:count]


def cec_curve(module, *, irradiance_w_m2=1000.0, temperature_c=25.0, points=200,
              v_end_of_voc=1.01):
    """Noise-free curve of a CEC module by pvlib: De Soto parameters at (G, T)
    (`pvlib.pvsystem.calcparams_desoto`), current by `pvlib.pvsystem.i_from_v`.

    Returns (voltage_v, current_a, truth) with truth keyed by the tracer.model names.
    """
    il, i0, rs, rsh, a = (float(x) for x in pvsystem.calcparams_desoto(
        irradiance_w_m2, temperature_c, float(module.alpha_sc), float(module.a_ref),
        float(module.I_L_ref), float(module.I_o_ref), float(module.R_sh_ref),
        float(module.R_s)))
    voc = float(pvsystem.singlediode(il, i0, rs, rsh, a)["v_oc"])
    v = np.linspace(0.0, v_end_of_voc * voc, points)
    i = np.asarray(pvsystem.i_from_v(v, il, i0, rs, rsh, a), dtype=float)
    ns = int(module.N_s)
    tk = temperature_c + 273.15
    truth = {
        "photocurrent_a": il,
        "saturation_current_a": i0,
        "ideality": a / (ns * thermal_voltage(tk)),
        "series_resistance_ohm": rs,
        "shunt_resistance_ohm": rsh,
    }
    return v, i, truth, ns, tk
