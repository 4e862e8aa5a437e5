"""The shipped protocols (protocols/*.yaml) fit the demo devices they are written for: every
voltage sweep's compliance is above the largest current the simulated device draws inside
the sweep's range, and every light sweep goes past open circuit.  Otherwise the demo's
verdict is "re-measure: compliance" whatever the cell (as it was).

Both sides are invented demo numbers (the scenarios and the protocols); the currents come
from the simulator's own device model, whose physics is checked against pvlib in
test_physics_vs_pvlib.py.  The protocols are read as plain YAML (the simulator's tests do
not depend on the application's protocol compiler).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import yaml

from simulated_instrument.cell_physics import at_conditions, current_at_voltage, open_circuit_voltage
from simulated_instrument.scenario import load_scenario

ROOT = Path(__file__).resolve().parents[2]
#: protocol -> the scenario it is written for (pilot-substrate is the simulator's default)
SCENARIO_OF = {"mini-module-36": "mini-module-36", "hysteresis-forward-reverse": "hysteretic-cell"}
PROTOCOLS = sorted((ROOT / "protocols").glob("*.yaml"))
HEADROOM = 0.9          # largest current at most 90 % of the compliance (noise, spread: common practice)


def _sweeps(protocol: dict):
    """(sweep step, pixels it runs on (None = the default one), irradiance W/m2 under light)."""
    irradiance = 1000.0
    for step in protocol["steps"]:
        if step["kind"] == "set-light" and step.get("irradiance_w_m2") is not None:
            irradiance = float(step["irradiance_w_m2"])
        if step["kind"] == "sweep":
            yield step, None, irradiance
        if step["kind"] == "pixel-loop":
            pixels = step["pixels"]
            for inner in step["steps"]:
                if inner["kind"] == "sweep":
                    yield inner, pixels, irradiance


def test_every_shipped_protocol_is_checked():
    assert {p.stem for p in PROTOCOLS} >= {"dark-then-light", "six-pixel-substrate", "mpp-tracking",
                                          "mini-module-36", "hysteresis-forward-reverse"}


@pytest.mark.parametrize("path", PROTOCOLS, ids=lambda p: p.stem)
def test_sweeps_stay_out_of_compliance_and_pass_open_circuit(path):
    protocol = yaml.safe_load(path.read_text(encoding="utf-8"))
    scenario = load_scenario(SCENARIO_OF.get(path.stem, "pilot-substrate"))
    setpoint_c = scenario.settings["stage"]["setpoint_c"]
    window = (protocol.get("checks") or {}).get("temperature_window_c")
    checked = 0
    for step, pixels, irradiance in _sweeps(protocol):
        if step.get("source", "voltage") != "voltage":
            continue
        compliance = float(step.get("compliance_a", protocol["limits"]["current_a"]))
        assert compliance <= protocol["limits"]["current_a"]
        start, stop = float(step["range"]["start_v"]), float(step["range"]["stop_v"])
        if pixels is None:
            indices = [0]                            # no switch step: the first channel
        elif pixels == "all":
            indices = list(range(len(scenario.pixels)))
        else:
            indices = [n - 1 for n in pixels]
        light = bool(step["light"])
        # under light the stage may be anywhere in the protocol's window (the warmest draws
        # most); in the dark it sits at its set-point, give or take 1 K (common practice)
        temperatures_c = list(window) if light and window else [setpoint_c - 1.0, setpoint_c + 1.0]
        voltage_v = np.linspace(start, stop, 201)
        for index in indices:
            cell = scenario.pixels[index]
            # memory states a sweep can meet: anywhere between its ends (a hysteretic cell
            # swept faster than it relaxes); settled (= the cell voltage) for the others
            memories = list(np.linspace(start, stop, 9)) if cell.has_memory else [voltage_v]
            for t_c in temperatures_c:
                c = at_conditions(cell, irradiance if light else 0.0, float(t_c))
                for memory in memories:
                    largest_a = float(np.max(np.abs(current_at_voltage(c, voltage_v, memory))))
                    assert largest_a <= HEADROOM * compliance, (
                        f"{path.name} {step.get('name')}: pixel {index + 1} draws "
                        f"{1e3 * largest_a:.1f} mA at {t_c} C, compliance {1e3 * compliance:g} mA")
                if light:
                    voc = open_circuit_voltage(c, open_circuit_voltage(c))
                    voc = open_circuit_voltage(c, voc)          # with the memory settled there
                    assert stop > voc + 0.02 * cell.cells_in_series, (
                        f"{path.name} {step.get('name')}: ends at {stop} V, Voc {voc:.3f} V")
            checked += 1
    assert checked
