"""The simulated bench: a SCPI-over-TCP stand-in for the physical world.

Four instruments on consecutive loopback ports (SMU at the base port, light source base+1,
stage thermometer base+2, channel switch base+3) and a JSON-lines harness control port at
base+4, with a physics-based virtual bench behind them.  It never imports ``tracer``,
``drivers`` or pyvisa; the application meets it only over the wire.

In tests::

    with simulated_instrument.running_bench(scenario="pilot-substrate", time_scale=0.0, seed=0) as bench:
        bench.addresses["smu"]          # 'TCPIP0::127.0.0.1::<port>::SOCKET'
        bench.state()["smu"]["output_on"]
        bench.inject("interlock")       # or bench.inject("stall", after=5)

Standalone: ``python -m simulated_instrument --help`` or ``tracer sim --help``.
"""
from .bench import DRIVERS, ROLES, SimulatedBench, parse_fault, running_bench, visa_address
from .scenario import DEFAULT_SCENARIO, Scenario, ScenarioError, list_scenarios, load_scenario
from .world import FAULT_NAMES, KNOBS

__all__ = [
    "DEFAULT_SCENARIO", "DRIVERS", "FAULT_NAMES", "KNOBS", "ROLES", "Scenario", "ScenarioError",
    "SimulatedBench", "list_scenarios", "load_scenario", "parse_fault", "running_bench", "visa_address",
]
