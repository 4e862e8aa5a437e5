"""Scenario files: which virtual bench and which devices the simulator stands for.

A scenario is a YAML file (our own format, loaded with ``yaml.safe_load``)::

    name: pilot-substrate
    description: free text
    seed: 7                      # draws the pixel-to-pixel spread
    bench:                       # copied into the bench profile the simulator writes
      name: sim-bench-1
      hard_limits: {voltage_v: 25.0, current_a: 1.0, power_w: 10.0, reverse_voltage_v: 2.0}
      instability_class: A
      usual_series_resistance_ohm: 1.0
    smu: {lead_resistance_ohm: 0.15, line_frequency_hz: 50, noise_rel_of_range: 2.0e-5, ...}
    light: {setpoint_w_m2: 1000, lamp_time_constant_s: 0.3, flicker_rel: 0.001, ...}
    reference_cell: {calibration_isc_a: 0.12, temperature_coefficient_per_k: 0.0005, ...}
    stage: {setpoint_c: 25, time_constant_s: 30, ambient_c: 25, heating_k_per_kw_m2: 1.5}
    substrate:
      cell: {photocurrent_a: 0.038, ...}      # CellParameters field names
      spread: {photocurrent_a: 0.01, ...}     # relative standard deviation per field
      pixels:                                 # one entry per pixel: overrides, may be {}
        - {}
        - {series_resistance_ohm: 12.0, label: poor contact}

Every section is optional except ``substrate``; unknown keys are errors that name the file
and the key.  All numbers in the shipped scenarios are invented demo values.
"""
from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from .cell_physics import CellParameters

SCENARIO_DIR = Path(__file__).parent / "scenarios"
DEFAULT_SCENARIO = "pilot-substrate"

DEFAULTS: dict[str, dict[str, Any]] = {
    "bench": {
        "name": "sim-bench-1",
        "hard_limits": {"voltage_v": 25.0, "current_a": 1.0, "power_w": 10.0, "reverse_voltage_v": 2.0},
        "instability_class": "A",
        "usual_series_resistance_ohm": 1.0,
    },
    "smu": {
        "identity": "Kestrel Bench Works,KBW-S2,SIM0001,1.0",
        "lead_resistance_ohm": 0.15,        # each of the two force leads
        "line_frequency_hz": 50.0,
        "noise_rel_of_range": 2.0e-5,       # reading noise (1 sigma) at NPLC 1, per range
        "source_settle_s": 0.0005,
        "interlock_error_code": 301,        # device-specific error queued when the interlock opens
    },
    "light": {
        "identity": "Kestrel Bench Works,KBW-L1,SIM0002,1.0",
        "setpoint_w_m2": 1000.0,
        "lamp_time_constant_s": 0.3,
        "warmup_drift_rel": 0.0,            # relative excess at ignition, decays with warm-up
        "warmup_time_constant_s": 120.0,
        "flicker_rel": 0.001,               # relative 1-sigma fluctuation per reading
        "failure_factor": 0.05,             # what is left after the light-failure fault
        "settled_rel": 0.002,               # |G - set| <= this * set counts as settled
    },
    "reference_cell": {
        "calibration_isc_a": 0.12,
        "calibration_uncertainty_rel": 0.01,
        "temperature_coefficient_per_k": 0.0005,
        "heating_k_per_kw_m2": 5.0,
        "time_constant_s": 60.0,
        "noise_rel": 1.0e-4,
    },
    "stage": {
        "identity": "Kestrel Bench Works,KBW-T1,SIM0003,1.0",
        "setpoint_c": 25.0,
        "time_constant_s": 30.0,
        "ambient_c": 25.0,
        "heating_k_per_kw_m2": 1.5,         # stage offset when lit at 1000 W/m2
        "noise_k": 0.01,
        "runaway_target_c": 180.0,          # the overtemp fault drives the stage here
        "runaway_time_constant_s": 20.0,
    },
    "switch": {
        "identity": "Kestrel Bench Works,KBW-X6,SIM0004,1.0",
        "on_resistance_ohm": 0.0,
    },
}

TOP_LEVEL_KEYS = {"name", "description", "seed", "substrate", *DEFAULTS}
SUBSTRATE_KEYS = {"cell", "spread", "pixels"}


class ScenarioError(ValueError):
    pass


@dataclass
class Scenario:
    name: str
    description: str
    seed: int
    settings: dict[str, dict[str, Any]]
    pixels: list[CellParameters]
    source: str = "<dict>"
    nominal: CellParameters = field(default_factory=CellParameters)

    def section(self, name: str) -> dict[str, Any]:
        return self.settings[name]


def _merge(base: dict, override: dict, where: str) -> dict:
    out = copy.deepcopy(base)
    for key, value in override.items():
        if key not in base:
            raise ScenarioError(f"{where}: unknown key '{key}' (allowed: {', '.join(sorted(base))})")
        if isinstance(base[key], dict):
            if not isinstance(value, dict):
                raise ScenarioError(f"{where}.{key}: expected a mapping")
            out[key] = _merge(base[key], value, f"{where}.{key}")
        else:
            out[key] = value
    return out


def _cell_fields(data: dict, where: str) -> dict:
    allowed = CellParameters.field_names()
    for key in data:
        if key not in allowed:
            raise ScenarioError(f"{where}: unknown cell parameter '{key}' (allowed: {', '.join(sorted(allowed))})")
    return dict(data)


def scenario_path(name_or_path: str | Path) -> Path:
    p = Path(name_or_path)
    if p.suffix in (".yaml", ".yml") and p.exists():
        return p
    candidate = SCENARIO_DIR / f"{p.stem if p.suffix else p.name}.yaml"
    if candidate.exists():
        return candidate
    if p.exists():
        return p
    raise ScenarioError(f"scenario '{name_or_path}' not found (shipped: {', '.join(list_scenarios())})")


def list_scenarios() -> list[str]:
    return sorted(p.stem for p in SCENARIO_DIR.glob("*.yaml"))


def load_scenario(scenario: "str | Path | dict | Scenario | None" = None) -> Scenario:
    """Load a scenario by shipped name, file path or already-parsed mapping."""
    if isinstance(scenario, Scenario):
        return scenario
    if scenario is None:
        scenario = DEFAULT_SCENARIO
    if isinstance(scenario, dict):
        return build_scenario(scenario, "<dict>")
    path = scenario_path(scenario)
    with open(path, encoding="utf-8") as fh:
        data = yaml.safe_load(fh)
    return build_scenario(data, str(path))


def build_scenario(data: Any, source: str) -> Scenario:
    if not isinstance(data, dict):
        raise ScenarioError(f"{source}: the scenario must be a mapping")
    for key in data:
        if key not in TOP_LEVEL_KEYS:
            raise ScenarioError(f"{source}: unknown key '{key}' (allowed: {', '.join(sorted(TOP_LEVEL_KEYS))})")
    settings = {name: _merge(defaults, data.get(name) or {}, f"{source}: {name}")
                for name, defaults in DEFAULTS.items()}
    substrate = data.get("substrate")
    if not isinstance(substrate, dict):
        raise ScenarioError(f"{source}: 'substrate' (a mapping with cell, spread, pixels) is required")
    for key in substrate:
        if key not in SUBSTRATE_KEYS:
            raise ScenarioError(f"{source}: substrate: unknown key '{key}'")
    nominal = CellParameters(**_cell_fields(substrate.get("cell") or {}, f"{source}: substrate.cell"))
    spread = _cell_fields(substrate.get("spread") or {}, f"{source}: substrate.spread")
    pixels_data = substrate.get("pixels") or [{}]
    if not isinstance(pixels_data, list) or not pixels_data:
        raise ScenarioError(f"{source}: substrate.pixels must be a non-empty list")
    seed = int(data.get("seed", 0))
    rng = np.random.default_rng(seed)
    pixels = []
    for index, override in enumerate(pixels_data, start=1):
        override = _cell_fields(override or {}, f"{source}: substrate.pixels[{index}]")
        values = {}
        for name, rel in spread.items():
            base = getattr(nominal, name)
            if not isinstance(base, (int, float)) or base is None:
                raise ScenarioError(f"{source}: substrate.spread.{name}: not a numeric parameter")
            # log-normal spread keeps every parameter positive (saturation currents, resistances)
            values[name] = float(base) * math.exp(float(rel) * rng.standard_normal())
        values.update(override)
        values.setdefault("label", f"pixel {index}")
        pixels.append(nominal.with_changes(**values))
    for p in pixels:
        _check_cell(p, source)
    return Scenario(name=str(data.get("name", Path(source).stem)), description=str(data.get("description", "")),
                    seed=seed, settings=settings, pixels=pixels, source=source, nominal=nominal)


def _check_cell(p: CellParameters, source: str) -> None:
    positive = ("saturation_current_1_a", "ideality_1", "ideality_2", "shunt_resistance_ohm",
                "area_cm2", "bandgap_ev", "breakdown_slope_v")
    for name in positive:
        if not getattr(p, name) > 0:
            raise ScenarioError(f"{source}: {p.label}: {name} must be > 0")
    for name in ("photocurrent_a", "saturation_current_2_a", "series_resistance_ohm", "breakdown_current_a"):
        if getattr(p, name) < 0:
            raise ScenarioError(f"{source}: {p.label}: {name} must be >= 0")
    if p.cells_in_series < 1:
        raise ScenarioError(f"{source}: {p.label}: cells_in_series must be >= 1")
    if p.breakdown_voltage_v >= 0:
        raise ScenarioError(f"{source}: {p.label}: breakdown_voltage_v must be negative")
