"""The drivers satisfy the engine's seams (tracer/ports.py) structurally: isinstance on the
runtime-checkable protocols, and every protocol method present with compatible parameters."""
import inspect

import pytest

import drivers
from drivers import (DRIVERS, ScpiChannelSwitch, ScpiLightSource, ScpiSourceMeter,
                     ScpiThermometer, SmuReading)
from drv_fakes import ADDRESS
from tracer import ports

ROLES = [
    (ScpiSourceMeter, ports.SourceMeter, {}),
    (ScpiLightSource, ports.LightSource, {}),
    (ScpiThermometer, ports.Thermometer, {}),
    (ScpiChannelSwitch, ports.ChannelSwitch, {"channels": 3}),
]


@pytest.mark.parametrize("cls, protocol, extra", ROLES)
def test_isinstance_of_the_port(rm, instrument, cls, protocol, extra):
    instrument.answer("OUTP?", "0")
    driver = cls(ADDRESS, resource_manager=rm, timeout_s=0.5, **extra)
    assert isinstance(driver, protocol)
    assert driver.address == ADDRESS and driver.identity == instrument.identity


def _public_methods(protocol):
    return {name: member for name, member in vars(protocol).items()
            if callable(member) and not name.startswith("_")}


@pytest.mark.parametrize("cls, protocol, extra", ROLES)
def test_every_port_method_has_compatible_parameters(cls, protocol, extra):
    for name, member in _public_methods(protocol).items():
        wanted = inspect.signature(member).parameters
        have = inspect.signature(getattr(cls, name)).parameters
        for pname, param in wanted.items():
            assert pname in have, f"{cls.__name__}.{name} lacks parameter {pname}"
            assert have[pname].kind == param.kind, f"{cls.__name__}.{name}({pname}) kind differs"
            if param.default is not inspect.Parameter.empty:
                assert have[pname].default == param.default, f"{cls.__name__}.{name}({pname}) default"
        extra_required = [p for p in have if p not in wanted
                          and have[p].default is inspect.Parameter.empty
                          and have[p].kind not in (inspect.Parameter.VAR_POSITIONAL,
                                                   inspect.Parameter.VAR_KEYWORD)]
        assert not extra_required, f"{cls.__name__}.{name} requires {extra_required}"


def test_reading_is_a_port_reading():
    assert isinstance(SmuReading(0.5, -0.01, False), ports.Reading)


def test_registry_names_the_bench_profile_drivers():
    assert DRIVERS == {"scpi-smu": ScpiSourceMeter, "scpi-light": ScpiLightSource,
                       "scpi-thermometer": ScpiThermometer, "scpi-switch": ScpiChannelSwitch}


def test_every_exception_is_in_the_family():
    for name in drivers.__all__:
        obj = getattr(drivers, name)
        if isinstance(obj, type) and issubclass(obj, Exception):
            assert obj.instrument_error is True
    assert drivers.LinkLostError.link_lost is True
    assert drivers.InstrumentCommandError.link_lost is False


def test_role_classes_hard_code_no_backend():
    for cls in DRIVERS.values():
        param = inspect.signature(cls).parameters["resource_manager"]
        assert param.default is inspect.Parameter.empty
    assert inspect.signature(drivers.ScpiSession).parameters["resource_manager"].default \
        is inspect.Parameter.empty


def test_drivers_never_import_the_application_or_the_simulator():
    import pathlib
    import re
    root = pathlib.Path(drivers.__file__).parent
    for path in root.glob("*.py"):
        text = path.read_text()
        assert not re.search(r"^\s*(from|import)\s+(tracer|simulated_instrument)\b", text, re.M), path
