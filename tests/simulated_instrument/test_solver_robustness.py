"""The simulator's operating-point solver converges in every state the bench can reach, and
an unexpected exception inside the simulator never kills an instrument's connection.

The solver's answers are checked against the circuit equations themselves (the residual at
the returned junction voltage) and against the independent vectorised bisection
(``current_at_voltage``); the absolute physics is checked against pvlib in
test_physics_vs_pvlib.py.
"""
from __future__ import annotations

import math
import socket
import threading

import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

import simulated_instrument
from simulated_instrument.cell_physics import (
    at_conditions, circuit, current_at_voltage, open_circuit_voltage, operating_point, solve_increasing,
)
from simulated_instrument.scenario import load_scenario
from simulated_instrument.server import TcpServer, bind_listeners

from sim_helpers import command, drain_errors

SCENARIOS = ("pilot-substrate", "mini-module-36", "hysteretic-cell")
PIXELS = [(name, i, p) for name in SCENARIOS for i, p in enumerate(load_scenario(name).pixels)]
LEADS_OHM = 2 * 0.15      # the shipped scenarios' two force leads (simulated_instrument/scenario.py)


# ----------------------------------------------------------------- the root finder itself


def _check_root(fn, target, x):
    """x is a root of fn(x) = target to the resolution of float64: the value changes sign
    (or hits the target) within a few ulps around x."""
    assert math.isfinite(x)
    value = fn(x)[0]
    if value == target:
        return
    step = 16 * math.ulp(max(1.0, abs(x)))
    below, above = fn(x - step)[0] - target, fn(x + step)[0] - target
    assert below <= 0.0 <= above, (x, value, below, above)


def test_a_root_far_from_the_guess_is_found():
    # asinh(x) = 700 at x = sinh(700) ~ 5e303: the old Newton with a doubling step cap ran out
    # of iterations ("root search did not converge") long before reaching it.
    fn = lambda x: (math.asinh(x), 1.0 / math.hypot(1.0, x))
    x = solve_increasing(fn, 700.0, 1.0)
    assert math.isclose(x, math.sinh(700.0), rel_tol=1e-12)


def test_a_wrong_slope_never_passes_for_convergence():
    # A slope a million times too large makes every Newton step tiny; the answer must still
    # be the root, confirmed by the bracket rather than by the step size.
    fn = lambda x: (x, 1e6)
    assert math.isclose(solve_increasing(fn, 10.0, 0.0), 10.0, rel_tol=1e-14)
    assert math.isclose(solve_increasing(fn, -3e5, 1e9), -3e5, rel_tol=1e-14)


def test_non_finite_values_far_out_and_useless_slopes_are_handled():
    def fn(x):      # overflows to inf/nan far out, slope sometimes zero or nan
        value = x**3 if abs(x) < 1e100 else (math.inf if x > 0 else math.nan)
        return value, (3 * x * x if abs(x) > 1e-3 else math.nan)
    for target, guess in ((8.0, 0.0), (-8.0, 1e200), (1e-30, -1e200), (0.0, 5.0)):
        x = solve_increasing(fn, target, guess)
        _check_root(fn, target, x)


@settings(max_examples=150, deadline=None)
@given(root=st.floats(-1e12, 1e12), guess=st.floats(-1e300, 1e300), scale=st.floats(1e-6, 1e6))
def test_any_root_from_any_guess(root, guess, scale):
    def fn(x):
        t = math.tanh(x - root)
        return scale * (x - root) + t, scale + (1.0 - t * t)
    x = solve_increasing(fn, 0.0, guess)
    _check_root(fn, 0.0, x)


def test_a_non_finite_target_is_refused():
    with pytest.raises(ValueError):
        solve_increasing(lambda x: (x, 1.0), math.nan, 0.0)


# ----------------------------------------------------------------- the SMU circuit, wide states


def _assert_point(c, p, *, mode, level, limit, leads, remote, memory_v):
    v_cell, i_gen = circuit(c, p.junction_voltage_v, memory_v)[:2]
    for value in (p.terminal_voltage_v, p.cell_voltage_v, p.load_current_a, p.junction_voltage_v):
        assert math.isfinite(value)
    assert math.isclose(p.cell_voltage_v, v_cell, rel_tol=1e-12, abs_tol=1e-12)
    assert math.isclose(p.load_current_a, -i_gen, rel_tol=1e-12, abs_tol=1e-15)
    regulated = p.cell_voltage_v if remote else p.terminal_voltage_v
    # current resolution: the junction voltage is solved to 1e-15 V; through the 0.01 ohm
    # fault short that is up to 1e-13 A, far below the 2e-11 A reading noise of the lowest
    # (1 uA) range (simulated_instrument/README.md)
    i_res = 1e-12
    if mode == "VOLT":
        assert abs(p.load_current_a) <= limit * (1 + 1e-9) + i_res
        if p.in_compliance:
            assert math.isclose(abs(p.load_current_a), limit, rel_tol=1e-9, abs_tol=i_res)
        else:
            assert math.isclose(regulated, level, rel_tol=1e-9, abs_tol=1e-9)
    else:
        assert abs(regulated) <= limit * (1 + 1e-9) + 1e-12
        if p.in_compliance:
            assert math.isclose(abs(regulated), limit, rel_tol=1e-9, abs_tol=1e-12)
        else:
            assert math.isclose(p.load_current_a, level, rel_tol=1e-9, abs_tol=i_res)
    # the independent solver (vectorised bisection) agrees on the device's current
    i_bisect = float(current_at_voltage(c, p.cell_voltage_v, memory_v)[0])
    assert math.isclose(-i_bisect, p.load_current_a, rel_tol=1e-7, abs_tol=1e-11)


guesses = st.none() | st.floats(-2.0, 2.0) | st.floats(-1e300, 1e300)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(pixel=st.sampled_from(PIXELS), g=st.floats(0.0, 1500.0), t_c=st.floats(-20.0, 90.0),
       short=st.booleans(), level_v=st.floats(-210.0, 210.0) | st.floats(-1.0, 1.0),
       limit_a=st.floats(1e-9, 3.0) | st.sampled_from([0.01, 0.06, 0.1]), remote=st.booleans(),
       memory_v=st.floats(-30.0, 30.0), guess=guesses)
def test_voltage_source_converges_in_every_state(pixel, g, t_c, short, level_v, limit_a, remote, memory_v, guess):
    c = at_conditions(pixel[2], g, t_c, 0.01 if short else None)
    p = operating_point(c, mode="VOLT", level=level_v, limit=limit_a, lead_resistance_ohm=LEADS_OHM,
                        remote_sense=remote, memory_v=memory_v, guess_v=guess)
    _assert_point(c, p, mode="VOLT", level=level_v, limit=limit_a, leads=LEADS_OHM, remote=remote,
                  memory_v=memory_v)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(pixel=st.sampled_from(PIXELS), g=st.floats(0.0, 1500.0), t_c=st.floats(-20.0, 90.0),
       short=st.booleans(), level_a=st.floats(-3.0, 3.0) | st.floats(-0.05, 0.05),
       limit_v=st.floats(0.0, 210.0) | st.sampled_from([0.9, 20.0]), remote=st.booleans(),
       memory_v=st.floats(-30.0, 30.0), guess=guesses)
def test_current_source_converges_in_every_state(pixel, g, t_c, short, level_a, limit_v, remote, memory_v, guess):
    c = at_conditions(pixel[2], g, t_c, 0.01 if short else None)
    p = operating_point(c, mode="CURR", level=level_a, limit=limit_v, lead_resistance_ohm=LEADS_OHM,
                        remote_sense=remote, memory_v=memory_v, guess_v=guess)
    _assert_point(c, p, mode="CURR", level=level_a, limit=limit_v, leads=LEADS_OHM, remote=remote,
                  memory_v=memory_v)


@settings(max_examples=100, deadline=None)
@given(pixel=st.sampled_from(PIXELS), g=st.floats(0.0, 1500.0), t_c=st.floats(-20.0, 90.0),
       memory_v=st.floats(-30.0, 30.0))
def test_open_circuit_voltage_in_every_state(pixel, g, t_c, memory_v):
    c = at_conditions(pixel[2], g, t_c)
    voc = open_circuit_voltage(c, memory_v)
    assert math.isfinite(voc)
    assert abs(float(current_at_voltage(c, voc, memory_v)[0])) <= 1e-9 * max(1.0, c.iph)


def test_a_junction_voltage_guess_far_out_is_not_taken_for_the_answer():
    # the old solver stopped at a 1e100 V guess: there the capped exponential's slope was
    # so large that the Newton step fell below the tolerance
    c = at_conditions(load_scenario("pilot-substrate").pixels[0], 1000.0, 25.0)
    p = operating_point(c, mode="CURR", level=0.0, limit=0.9, lead_resistance_ohm=LEADS_OHM,
                        remote_sense=True, guess_v=1e100)
    _assert_point(c, p, mode="CURR", level=0.0, limit=0.9, leads=LEADS_OHM, remote=True, memory_v=0.0)
    assert 0.5 < p.cell_voltage_v < 0.7


# ----------------------------------------------------------------- the server keeps answering


def test_an_unexpected_exception_queues_an_error_and_the_connection_keeps_answering(bench, open_resource, monkeypatch):
    smu = open_resource(bench.addresses["smu"], timeout_ms=600)
    command(open_resource(bench.addresses["switch"]), "ROUT:CLOS (@1)")
    command(open_resource(bench.addresses["light"]), "OUTP ON")
    command(smu, "SOUR:VOLT 0.3;:SENS:CURR:PROT 0.05;:OUTP ON")
    world = bench.world
    real_measure = world.measure

    def broken_measure():
        raise ArithmeticError("root search did not converge")

    monkeypatch.setattr(world, "measure", broken_measure)
    # a failing query unit gives no response (as every failing query does); the other units
    # of the message still run and answer
    assert smu.query("READ?;*IDN?").startswith("Kestrel Bench Works,")
    assert drain_errors(smu) == [(-300, "Device-specific error;ArithmeticError: root search did not converge")]
    assert int(smu.query("*ESR?")) & 8            # device-dependent error bit (IEEE 488.2 11.5.1)
    monkeypatch.setattr(world, "measure", real_measure)
    voltage_v, current_a = (float(x) for x in smu.query("READ?").split(","))
    assert math.isclose(voltage_v, 0.3, abs_tol=1e-3) and current_a < 0   # lit: the cell delivers
    assert len(bench.connections("smu")) == 1


def test_an_exception_while_bringing_the_world_up_to_date_is_reported(bench, open_resource, monkeypatch):
    smu = open_resource(bench.addresses["smu"], timeout_ms=600)
    world = bench.world
    real = world.advance_to_now
    calls = {"n": 0}

    def fails_once():
        calls["n"] += 1
        if calls["n"] == 1:
            raise RuntimeError("world update failed")
        real()

    monkeypatch.setattr(world, "advance_to_now", fails_once)
    smu.write("SOUR:VOLT 0.1")
    assert drain_errors(smu) == [(-300, "Device-specific error;RuntimeError: world update failed")]
    assert smu.query("*IDN?").startswith("Kestrel Bench Works,")


class _Exploding:
    def __init__(self):
        self.lines = []

    def handle(self, conn, line):
        self.lines.append(line)
        if line == b"boom":
            raise RuntimeError("handler bug")
        conn.send(line.upper() + b"\n")

    def overrun(self, conn):
        pass


def test_the_tcp_server_survives_a_handler_exception():
    listener, = bind_listeners("127.0.0.1", 0, 1)
    handler = _Exploding()
    server = TcpServer()
    server.add_listener("test", listener, handler)
    server.start()
    try:
        with socket.create_connection(listener.getsockname(), timeout=2.0) as sock:
            sock.sendall(b"boom\nping\n")
            assert sock.recv(64) == b"PING\n"
        assert handler.lines == [b"boom", b"ping"]
    finally:
        server.stop()
    assert not [t for t in threading.enumerate() if t.name.startswith("sim-conn-test")]
