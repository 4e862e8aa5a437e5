"""What protects the cell when the host dies: the engine sets compliance and over-voltage
protection on the instrument, and loads only finite lists that end at 0, before the output
goes on (docs/reliability.md, "When the host dies").

Read from the simulated SMU's own state after every message it receives (a recorder
wrapped around the simulator's SCPI instrument in this process), not from the drivers.
"""
from __future__ import annotations

import io
import math

import pytest

import simulated_instrument
from tracer.cli import run_cmd
from tracer.reliability import protocols

SENSED = {"VOLT": "CURR", "CURR": "VOLT"}


@pytest.fixture()
def recorded_run(tmp_path):
    doc = protocols.safety_order_protocol()
    protocol = protocols.write_protocol(doc, tmp_path / "order.yaml")
    history: list[dict] = []
    with simulated_instrument.running_bench(time_scale=0.0, seed=3) as bench:
        bench_file = bench.write_bench_profile(tmp_path / "bench.yaml")
        smu = bench.instrument("smu")
        world = bench.world
        original = smu.execute

        def recorder(line, conn):          # called with the bench's lock held
            reply = original(line, conn)
            s = world.smu
            history.append({"message": line, "output_on": s.output_on, "function": s.function,
                            "compliance": dict(s.compliance), "ovp_v": s.ovp_v,
                            "level": dict(s.level), "mode": dict(s.source_mode),
                            "lists": {k: list(v) for k, v in s.lists.items()}})
            return reply

        smu.execute = recorder
        out, err = io.StringIO(), io.StringIO()
        code = run_cmd.execute(protocol, bench_file=bench_file, logbook=tmp_path / "lb.sqlite",
                               out_dir=tmp_path / "out", stdout=out, stderr=err)
        final = bench.state()["smu"]
    assert code == 0, err.getvalue()
    return doc, history, final


def _switch_ons(history):
    return [k for k in range(len(history))
            if history[k]["output_on"] and (k == 0 or not history[k - 1]["output_on"])]


def test_limits_are_on_the_instrument_before_every_output_on(recorded_run):
    doc, history, final = recorded_run
    limits = doc["limits"]
    ons = _switch_ons(history)
    # dark list sweep, light point sweep, Voc hold, MPP: Voc probe, search sweep, tracking
    assert len(ons) >= 6, [history[k]["message"] for k in ons]
    previous_off = 0
    for k in ons:
        h = history[k]
        assert h["message"].strip().upper().startswith("OUTP"), h["message"]
        # over-voltage protection at the protocol's voltage limit
        assert math.isclose(h["ovp_v"], limits["voltage_v"], rel_tol=1e-12)
        # compliance of the clamped quantity within the protocol's limit
        sensed = SENSED[h["function"]]
        limit = limits["current_a"] if sensed == "CURR" else limits["voltage_v"]
        assert 0 < h["compliance"][sensed] <= limit * (1 + 1e-12)
        # the level the output comes on at is within the limits
        level = h["level"][h["function"]]
        assert abs(level) <= (limits["voltage_v"] if h["function"] == "VOLT" else limits["current_a"])
        # both were read back between the previous switch-off and this switch-on
        asked = [x["message"].upper() for x in history[previous_off:k]]
        assert any(f"SENS:{sensed}:PROT?" in m for m in asked), asked[-12:]
        assert any("SOUR:VOLT:PROT?" in m for m in asked), asked[-12:]
        previous_off = k


def test_every_list_loaded_is_finite_and_ends_at_zero(recorded_run):
    doc, history, final = recorded_run
    limits = doc["limits"]
    lists = [h["lists"]["VOLT"] for h in history if h["message"].upper().startswith("SOUR:LIST:VOLT ")]
    assert lists, "the protocol has a list sweep; none was loaded"
    for levels in lists:
        assert 0 < len(levels) <= 10_000
        assert levels[-1] == 0.0
        assert all(abs(v) <= limits["voltage_v"] for v in levels)
    assert final["output_on"] is False
