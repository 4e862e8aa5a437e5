"""Fixtures for the simulated bench, reached over real pyvisa-py sockets."""
from __future__ import annotations

import contextlib

import pytest

import simulated_instrument

pyvisa = pytest.importorskip("pyvisa")


@pytest.fixture(scope="session")
def rm():
    manager = pyvisa.ResourceManager("@py")
    yield manager
    manager.close()


@pytest.fixture
def bench():
    with simulated_instrument.running_bench(time_scale=0.0, seed=0) as b:
        yield b


@pytest.fixture
def open_resource(rm):
    """open_resource(address, timeout_ms=3000) -> pyvisa resource, closed after the test."""
    opened = []

    def _open(address, timeout_ms=3000):
        res = rm.open_resource(address, read_termination="\n", write_termination="\n",
                               timeout=timeout_ms)
        opened.append(res)
        return res

    yield _open
    for res in opened:
        with contextlib.suppress(Exception):
            res.close()


@pytest.fixture
def smu(bench, open_resource):
    return open_resource(bench.addresses["smu"])
