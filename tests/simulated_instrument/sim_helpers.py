"""Helpers shared by the simulated-bench tests (a uniquely named module, not a package)."""
from __future__ import annotations

from scipy import constants


def drain_errors(res) -> list[tuple[int, str]]:
    """Every entry of an instrument's error queue, oldest first."""
    out = []
    for _ in range(40):
        code, _, text = res.query("SYST:ERR?").partition(",")
        if int(code) == 0:
            return out
        out.append((int(code), text.strip('"')))
    raise AssertionError("error queue did not empty")


def command(res, message: str) -> None:
    """Send a program message and wait until the instrument has executed it.

    ``write`` returns as soon as the bytes are sent; a test that then looks at another
    connection or at the harness must first know the message was handled.
    """
    assert res.query(f"{message};*OPC?").split(";")[-1] == "1"


def values(reply: str) -> list[float]:
    return [float(x) for x in reply.split(",")]


CELL = dict(photocurrent_a=0.0385, saturation_current_1_a=2.0e-12, ideality_1=1.05,
            saturation_current_2_a=0.0, ideality_2=2.0, series_resistance_ohm=0.45,
            shunt_resistance_ohm=900.0, cells_in_series=1, area_cm2=1.0, bandgap_ev=1.121,
            bandgap_tempco_per_k=-0.0002677, photocurrent_tempco_per_k=0.0005,
            breakdown_voltage_v=-20.0, breakdown_current_a=0.0, breakdown_slope_v=0.3)

SCENARIO = {
    "name": "single-diode-equivalent",
    "light": {"flicker_rel": 0.0, "warmup_drift_rel": 0.0},
    "stage": {"heating_k_per_kw_m2": 0.0, "noise_k": 0.0},
    "substrate": {"cell": CELL, "pixels": [{}]},
}


def desoto(g, t_c):
    """pvlib's (IL, I0, Rs, Rsh, nNsVth) for CELL at (g, t_c); Rsh held constant as in our model."""
    k_over_q = constants.k / constants.e   # CODATA via scipy.constants
    a_ref = CELL["ideality_1"] * CELL["cells_in_series"] * k_over_q * 298.15
    from pvlib import pvsystem

    il, i0, rs, _, nnsvth = pvsystem.calcparams_desoto(
        g, t_c, alpha_sc=CELL["photocurrent_tempco_per_k"] * CELL["photocurrent_a"], a_ref=a_ref,
        I_L_ref=CELL["photocurrent_a"], I_o_ref=CELL["saturation_current_1_a"],
        R_sh_ref=CELL["shunt_resistance_ohm"], R_s=CELL["series_resistance_ohm"],
        EgRef=CELL["bandgap_ev"], dEgdT=CELL["bandgap_tempco_per_k"])
    return float(il), float(i0), float(rs), CELL["shunt_resistance_ohm"], float(nnsvth)
