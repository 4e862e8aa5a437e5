import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))

from drv_fakes import ADDRESS, FakeResourceManager, ScriptedInstrument  # noqa: E402


@pytest.fixture
def instrument():
    return ScriptedInstrument()


@pytest.fixture
def rm(instrument):
    return FakeResourceManager(instrument)


@pytest.fixture
def session(rm):
    from drivers.session import ScpiSession
    return ScpiSession(ADDRESS, timeout_s=0.5, resource_manager=rm)


@pytest.fixture
def smu(instrument, rm):
    """A source-meter on the scripted instrument, output reading back off, voltage mode."""
    from drivers import ScpiSourceMeter
    instrument.answer("OUTP?", "0")
    instrument.answer("SOUR:FUNC:MODE?", "VOLT")
    driver = ScpiSourceMeter(ADDRESS, resource_manager=rm, timeout_s=0.5)
    instrument.log.clear()
    return driver
