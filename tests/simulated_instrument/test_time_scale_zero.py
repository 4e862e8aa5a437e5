"""At time scale 0 the simulated clock moves only when something spends time.  A client
waiting for the lamp (or the stage) must still get there: a blocking ``*OPC?`` jumps the
clock until the lamp has settled, and each status poll of an instrument that is settling
spends a small simulated time (``STATUS_POLL_S``), so a polling loop converges.

The lamp follows its set-point exponentially with the scenario's time constant (0.3 s) and
counts as settled within 0.2 % (scenario.py defaults; invented demo values): from 1000 to
800 W/m2 that takes 0.3 s * ln(200 / 1.6) = 1.45 s.
"""
from __future__ import annotations

import math

import pytest

from simulated_instrument.world import STATUS_POLL_S

from sim_helpers import command

LAMP_TAU_S = 0.3
SETTLED_REL = 0.002


def _settle_time_s(from_w_m2, to_w_m2):
    return LAMP_TAU_S * math.log(abs(from_w_m2 - to_w_m2) / (SETTLED_REL * to_w_m2))


def test_blocking_opc_jumps_the_clock_until_the_lamp_has_settled(bench, open_resource):
    light = open_resource(bench.addresses["light"])
    t0 = bench.state()["time_s"]
    light.write("SOUR:IRR 800;:OUTP ON")
    assert int(light.query("STAT:OPER:COND?")) & 2                    # SETTling
    assert light.query("*OPC?") == "1"
    state = bench.state()
    assert state["light"]["settled"] is True
    assert int(light.query("STAT:OPER:COND?")) & 2 == 0
    elapsed = state["time_s"] - t0
    assert _settle_time_s(1000, 800) <= elapsed <= _settle_time_s(1000, 800) + 0.05


@pytest.mark.parametrize("poll", ["STAT:OPER:COND?", "STAT:OPER?", "*STB?", "STAT:QUES:COND?"])
def test_a_polling_client_sees_the_lamp_settle(bench, open_resource, poll):
    light = open_resource(bench.addresses["light"])
    assert light.query("SOUR:IRR 800;:OUTP ON;:OUTP?") == "1"       # synchronous, no *OPC?
    t0 = bench.state()["time_s"]
    needed = math.ceil(_settle_time_s(1000, 800) / STATUS_POLL_S)
    polls = 0
    while not bench.state()["light"]["settled"]:
        light.query(poll)
        polls += 1
        assert polls <= needed + 2, "the lamp never settled for a polling client"
    assert needed - 1 <= polls <= needed + 1
    assert bench.state()["time_s"] - t0 == pytest.approx(polls * STATUS_POLL_S, abs=1e-9)
    assert int(light.query("STAT:OPER:COND?")) & 2 == 0


def test_the_settling_bit_clears_for_a_client_polling_it(bench, open_resource):
    light = open_resource(bench.addresses["light"])
    assert light.query("SOUR:IRR 200;:OUTP ON;:OUTP?") == "1"
    for polls in range(1, 200):
        if int(light.query("STAT:OPER:COND?")) & 2 == 0:
            break
    else:
        pytest.fail("the SETTling bit never cleared")
    assert polls == pytest.approx(_settle_time_s(1000, 200) / STATUS_POLL_S, abs=1.5)


def test_operation_complete_bit_polled_with_esr(bench, open_resource):
    light = open_resource(bench.addresses["light"])
    assert light.query("*CLS;SOUR:IRR 600;:OUTP ON;:OUTP?") == "1"
    light.write("*OPC")
    assert not bench.state()["light"]["settled"]
    for _ in range(100):
        if int(light.query("*ESR?")) & 1:                              # OPC bit
            break
    else:
        pytest.fail("the operation-complete bit never came")
    assert bench.state()["light"]["settled"] is True


def test_polls_spend_no_time_when_nothing_is_settling(bench, open_resource):
    light = open_resource(bench.addresses["light"])
    smu = open_resource(bench.addresses["smu"])
    assert light.query("*OPC?") == "1"
    t0 = bench.state()["time_s"]
    for _ in range(5):
        light.query("STAT:OPER:COND?;*STB?;*ESR?")
        smu.query("STAT:OPER:COND?;:STAT:QUES?;*STB?")
    assert bench.state()["time_s"] == t0


def test_a_polling_client_sees_the_stage_reach_its_set_point(bench, open_resource):
    thermo = open_resource(bench.addresses["thermometer"])
    command(thermo, "SOUR:TEMP 35")
    polls = 0
    while int(thermo.query("STAT:QUES:COND?")) & 16:                  # more than 2 K off
        polls += 1
        assert polls < 2000, "the stage never came within 2 K for a polling client"
    # the stage follows with its 30 s time constant (scenario.py default, invented):
    # within 2 K of a 10 K step after 30 s * ln(10 / 2) = 48 s
    assert bench.state()["time_s"] == pytest.approx(30 * math.log(10 / 2), abs=2 * STATUS_POLL_S)
