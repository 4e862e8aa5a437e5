"""Garbled and truncated SCPI replies and binary blocks with wrong lengths, against the
source-measure unit driver over real pyvisa-py sockets (``tracer.reliability.fuzz_wire``).

CI: 40 hypothesis cases; ``--run-slow``: 400.
"""
from __future__ import annotations

import time

import pytest
import pyvisa

import simulated_instrument
from drivers import DRIVERS
from drivers.errors import InstrumentError, LinkLostError, ResponseError
from tracer.reliability import fuzz_wire


@pytest.mark.timeout(1800)
def test_spoilt_replies_end_in_a_driver_error_and_the_session_recovers(request):
    count = 400 if request.config.getoption("--run-slow") else 40
    summary = fuzz_wire.fuzz_wire(count, seed=11)
    assert not summary.skipped, summary.skipped
    assert summary.failures == 0, summary.summary()
    assert summary.cases >= count
    assert summary.tampered >= summary.cases     # every case really spoilt a reply


@pytest.fixture()
def tampered_smu():
    with simulated_instrument.running_bench(time_scale=0.0, seed=0) as bench:
        with fuzz_wire.ReplyTamperer(("127.0.0.1", bench.ports["smu"])) as tamperer:
            rm = pyvisa.ResourceManager("@py")
            smu = DRIVERS["scpi-smu"](tamperer.address, resource_manager=rm, timeout_s=0.3)
            smu.configure(source_mode="voltage", compliance=0.05, nplc=0.1, four_wire=True)
            smu.load_list([0.1, 0.2, 0.3], settle_s=0.0)
            smu.output(True)
            smu.start_list()
            try:
                yield smu, tamperer, bench
            finally:
                smu.close()
                rm.close()


def test_the_tamperer_spoils_what_it_is_told_to(tampered_smu):
    # the fuzz above is only meaningful if a spoilt reply does reach the driver
    smu, tamperer, bench = tampered_smu
    tamperer.arm(lambda r: b"2\n")                      # not a SCPI boolean
    with pytest.raises(ResponseError):
        smu.output_is_on()
    assert smu.read_compliance() == 0.05                 # the session resynchronises first
    tamperer.arm(lambda r: b"")                          # no reply at all
    with pytest.raises(LinkLostError):
        smu.read_compliance()
    assert smu.read_compliance() == 0.05
    # a declared block length 8 bytes short: the block is misread, never returned
    def short_block(r: bytes) -> bytes:
        n = int(r[1:2])
        length = int(r[2:2 + n]) - 8
        return b"#" + str(len(str(length))).encode() + str(length).encode() + r[2 + n:]
    tamperer.arm(short_block)
    with pytest.raises(InstrumentError):
        smu.fetch_list(0, 3)
    # and afterwards everything answers again, as the instrument itself says
    assert smu.read_compliance() == 0.05
    assert smu.output_is_on() is bench.state()["smu"]["output_on"]
    assert len(smu.fetch_list(0, 3)) == 3


@pytest.mark.parametrize("call", ["read_compliance", "fetch_list"])
def test_a_connection_closed_while_a_reply_is_awaited_is_noticed_at_once(call):
    # found by the fault matrix (disconnect): pyvisa-py waits out the whole time-out on a
    # closed socket, so the run's watchdog fired first and the cause read "watchdog"
    with simulated_instrument.running_bench(time_scale=0.0, seed=0) as bench:
        with fuzz_wire.ReplyTamperer(("127.0.0.1", bench.ports["smu"])) as tamperer:
            rm = pyvisa.ResourceManager("@py")
            smu = DRIVERS["scpi-smu"](tamperer.address, resource_manager=rm, timeout_s=5.0)
            try:
                smu.configure(source_mode="voltage", compliance=0.05, nplc=0.1, four_wire=True)
                smu.load_list([0.1, 0.2], settle_s=0.0)
                smu.output(True)
                smu.start_list()
                tamperer.arm(lambda r: None)          # the instrument closes instead of replying
                t0 = time.monotonic()
                with pytest.raises(LinkLostError, match="closed by the instrument"):
                    smu.read_compliance() if call == "read_compliance" else smu.fetch_list(0, 2)
                assert time.monotonic() - t0 < 1.0   # a 0.25 s slice, not the 5 s time-out
            finally:
                smu.close()
                rm.close()
