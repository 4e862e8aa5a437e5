"""pvlib oracle for the STC tests: exact single-diode curves of CEC modules.

Imported by the test modules (fixtures ``cec_modules``, ``cs5p``); kept out of a
conftest.py so that no second module named ``conftest`` shadows another folder's.

pvlib (test-only) computes the De Soto parameters (``calcparams_desoto``) of a module from
the CEC library shipped with pvlib (``retrieve_sam('CECMod')``, SAM 2019-03-05) and the curve
itself (``v_from_i``/``i_from_v``, Lambert W). The tracer never imports pvlib.
"""
from __future__ import annotations

import numpy as np
import pytest

pvsystem = pytest.importorskip("pvlib.pvsystem")

MODULE_NAMES = (
    "Canadian_Solar_Inc__CS5P_220M",   # 96 cells, the pvlib test fixture module
    "SunPower_SPR_E20_327",            # 96 cells, low Rs
    "Canadian_Solar_Inc__CS6X_300M",   # 72 cells
)


class PvlibModule:
    """One CEC module and its exact curves at any (G, T)."""

    def __init__(self, name: str, row):
        self.name = name
        self.row = row
        self.cells_in_series = int(row["N_s"])
        self.alpha_sc = float(row["alpha_sc"])

    def params(self, g, t):
        r = self.row
        return pvsystem.calcparams_desoto(g, t, r["alpha_sc"], r["a_ref"], r["I_L_ref"],
                                          r["I_o_ref"], r["R_sh_ref"], r["R_s"])

    def figures(self, g, t) -> dict:
        out = pvsystem.singlediode(*self.params(g, t))
        return {k: float(v) for k, v in out.items()}

    def curve(self, g, t, points=400, past_voc_fraction_of_isc=0.8, v_start=-1.0):
        """Points from v_start up past Voc until I = -fraction*Isc: dense where the curve
        bends (equal steps in current), as a sweep in forward bias gives."""
        il, i0, rs, rsh, a = self.params(g, t)
        i = np.linspace(il, -past_voc_fraction_of_isc * il, points)
        v = pvsystem.v_from_i(i, il, i0, rs, rsh, a)
        v = np.concatenate([np.linspace(v_start, 0.0, 8, endpoint=False), v[v > 0.0]])
        return v, np.asarray(pvsystem.i_from_v(v, il, i0, rs, rsh, a), dtype=float)

    def voltage_grid_curve(self, g, t, points=400):
        """Evenly spaced voltages from -1 V to 1.05 Voc (a plain voltage sweep)."""
        params = self.params(g, t)
        voc = self.figures(g, t)["v_oc"]
        v = np.linspace(-1.0, 1.05 * voc, points)
        return v, np.asarray(pvsystem.i_from_v(v, *params), dtype=float)


@pytest.fixture(scope="session")
def cec_modules():
    table = pvsystem.retrieve_sam("CECMod")
    return [PvlibModule(name, table[name]) for name in MODULE_NAMES]


@pytest.fixture(scope="session")
def cs5p(cec_modules):
    return cec_modules[0]
