"""The virtual cell against pvlib's single-diode solution.

The simulator solves the implicit diode equation by a bracketed root search; pvlib
(``pvlib.pvsystem.i_from_v`` / ``v_from_i``, Lambert W) is the independent oracle, and
``pvlib.pvsystem.calcparams_desoto`` the oracle for the irradiance and temperature laws
(De Soto et al. 2006). The cell is configured single-diode-equivalent: I02 = 0, no breakdown
current, no memory branch. The photocurrent tempco is relative in our scenario, absolute
(``alpha_sc``) in pvlib: alpha_sc = tempco * Iph_ref.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

import simulated_instrument
from simulated_instrument.cell_physics import CellParameters, at_conditions, current_at_voltage, operating_point
from sim_helpers import CELL, SCENARIO, command, desoto

pvsystem = pytest.importorskip("pvlib.pvsystem")


@pytest.mark.parametrize("g, t_c", [(1000.0, 25.0), (400.0, 60.0), (800.0, 5.0)])
def test_irradiance_and_temperature_laws_match_desoto(g, t_c):
    cell = at_conditions(CellParameters(**CELL), g, t_c)
    il, i0, _, _, nnsvth = desoto(g, t_c)
    assert cell.iph == pytest.approx(il, rel=1e-12)
    assert cell.i01 == pytest.approx(i0, rel=1e-5)       # pvlib's own k in eV/K differs in the 8th digit
    assert cell.a1 == pytest.approx(nnsvth, rel=1e-7)


@pytest.mark.parametrize("g, t_c", [(1000.0, 25.0), (400.0, 60.0)])
def test_vectorised_solver_matches_lambert_w(g, t_c):
    cell = at_conditions(CellParameters(**CELL), g, t_c)
    il, i0, rs, rsh, a = desoto(g, t_c)
    voc = float(pvsystem.singlediode(il, i0, rs, rsh, a)["v_oc"])
    v = np.linspace(-2.0, 1.05 * voc, 400)
    expected = np.asarray(pvsystem.i_from_v(v, il, i0, rs, rsh, a), dtype=float)
    assert np.max(np.abs(current_at_voltage(cell, v) - expected)) < 1e-12
    # the scalar SMU path: V source, four-wire, no clamp
    for vk, ik in zip(v[::40], expected[::40]):
        p = operating_point(cell, mode="VOLT", level=float(vk), limit=1.0, lead_resistance_ohm=0.3,
                            remote_sense=True)
        assert p.load_current_a == pytest.approx(-ik, abs=1e-12)
    # current source into the cell: pvlib's v_from_i
    for i_gen in (0.0, 0.5 * il, -0.01):
        p = operating_point(cell, mode="CURR", level=-i_gen, limit=20.0, lead_resistance_ohm=0.3,
                            remote_sense=True)
        assert p.cell_voltage_v == pytest.approx(float(pvsystem.v_from_i(i_gen, il, i0, rs, rsh, a)), abs=1e-10)


def _configure_conditions(bench, light, thermo, g, t_c):
    command(thermo, f"SOUR:TEMP {t_c}")
    light.write(f"SOUR:IRR {g};:OUTP ON")
    assert light.query("*OPC?") == "1"
    bench.advance(900.0)                                  # 30 stage time constants
    state = bench.state()
    return state["light"]["irradiance_w_m2"], state["stage"]["temperature_c"]


@pytest.mark.parametrize("g_set, t_set", [(1000.0, 25.0), (500.0, 55.0)])
def test_cell_over_the_wire_matches_i_from_v(open_resource, g_set, t_set):
    with simulated_instrument.running_bench(SCENARIO, time_scale=0.0, seed=1) as bench:
        smu = open_resource(bench.addresses["smu"])
        light = open_resource(bench.addresses["light"])
        thermo = open_resource(bench.addresses["thermometer"])
        switch = open_resource(bench.addresses["switch"])
        command(switch, "ROUT:CLOS (@1)")
        g, t_c = _configure_conditions(bench, light, thermo, g_set, t_set)
        assert g == pytest.approx(g_set, rel=1e-6)
        assert t_c == pytest.approx(t_set, abs=1e-3)
        assert float(thermo.query("MEAS:TEMP?")) == pytest.approx(t_c, abs=1e-6)   # noise set to 0

        il, i0, rs, rsh, a = desoto(g, t_c)
        voc = float(pvsystem.singlediode(il, i0, rs, rsh, a)["v_oc"])
        v_set = np.round(np.linspace(-0.3, 1.02 * voc, 60), 6)
        nplc, i_range = 10, 0.1
        smu.write(f"SENS:REM ON;:SENS:CURR:PROT 0.2;:SENS:CURR:RANG:AUTO OFF;:SENS:CURR:RANG {i_range};"
                  f":SENS:CURR:NPLC {nplc};:SOUR:LIST:VOLT {','.join(str(x) for x in v_set)},0;"
                  f":TRIG:COUN {len(v_set) + 1};:SOUR:VOLT:MODE LIST;:OUTP ON;:INIT")
        assert smu.query("*OPC?") == "1"
        smu.write("FORM REAL,64")
        data = np.array(smu.query_binary_values(f"TRAC:DATA? 0,{len(v_set)}", datatype="d",
                                                is_big_endian=True)).reshape(-1, 3)
        assert smu.query("SYST:ERR?") == '0,"No error"'
        expected_load = -np.asarray(pvsystem.i_from_v(v_set, il, i0, rs, rsh, a), dtype=float)
        # reading noise of the scenario: 2e-5 of the range at NPLC 1, / sqrt(NPLC)
        sigma_i = 2e-5 * i_range / math.sqrt(nplc)
        assert np.max(np.abs(data[:, 1] - expected_load)) < 6 * sigma_i
        sigma_v = 2e-5 * 2.0 / math.sqrt(nplc)            # worst case: the 2 V range
        assert np.max(np.abs(data[:, 0] - v_set)) < 6 * sigma_v
        assert not data[:, 2].any()
