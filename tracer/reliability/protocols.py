"""The protocols the reliability checks run, built here (not shipped examples) so that
their shape is what the checks rely on.

The matrix protocol puts a *quiet* step (a stage-temperature wait: the engine reads only
the thermometer) between the measuring steps, so that the SMU's message count stands
still for a moment at every step boundary. Those plateaus are what the fault matrix
anchors its faults to (see :mod:`tracer.reliability.matrix`).
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml

# Limits of a ~1 cm2 silicon cell (the simulated bench's pilot substrate: Isc ~38 mA,
# Voc ~0.61 V). Compliance is left at the current limit (the protocol default), so that a
# short circuit (the "compliance" fault) trips the run instead of being clamped and flagged.
LIMITS = {"voltage_v": 1.0, "current_a": 0.1, "power_w": 0.1, "reverse_voltage_v": 0.5}

#: Names of the matrix protocol's measuring steps, in order.
POINT_STEP = "points"
MPP_STEP = "track"
LIST_STEP = "list"

POINT_SWEEP_POINTS = 60
LIST_SWEEP_POINTS = 600
MPP_DURATION_S = 1.5
MPP_INTERVAL_S = 0.02


def _quiet_steps() -> list[dict[str, Any]]:
    """~0.8 s in which the SMU hears nothing: a stage wait (25 C +/- 5 K, met at once by a
    stage at 25 C warmed ~1.5 K by the lamp; three settled readings 0.2 s apart) and a
    light set-point at the same 1000 W/m2 (the engine waits for three stable
    reference-cell readings 0.2 s apart)."""
    return [{"kind": "wait-temperature", "target_c": 25.0, "tolerance_c": 5.0, "timeout_s": 5},
            {"kind": "set-light", "shutter": "open", "irradiance_w_m2": 1000}]


def matrix_protocol() -> dict[str, Any]:
    """Point sweep, MPP tracking, list sweep, each followed by a quiet step."""
    return {
        "schema": 1,
        "name": "reliability-matrix",
        "description": "fault matrix: point sweep, MPP tracking and list sweep between quiet steps",
        "sample": {"id": "REL-MATRIX", "area_cm2": 1.0},
        "limits": dict(LIMITS),
        "checks": {"temperature_window_c": [15.0, 40.0], "light_stability_rel": 0.05,
                   "watchdog_s": 3},
        "steps": [
            *_quiet_steps(),
            {"kind": "sweep", "name": POINT_STEP, "light": True,
             "range": {"start_v": -0.1, "stop_v": 0.65}, "points": POINT_SWEEP_POINTS},
            *_quiet_steps(),
            {"kind": "mpp", "name": MPP_STEP, "start_v": 0.5, "duration_s": MPP_DURATION_S,
             "interval_s": MPP_INTERVAL_S, "step_v": 0.005},
            *_quiet_steps(),
            {"kind": "sweep", "name": LIST_STEP, "light": True, "acquisition": "list",
             "range": {"start_v": -0.1, "stop_v": 0.65}, "points": LIST_SWEEP_POINTS},
            *_quiet_steps(),
            {"kind": "set-light", "shutter": "closed"},
        ],
        "analysis": {"models": ["single"]},
    }


def crash_protocol() -> dict[str, Any]:
    """Short enough to run many times: a dark list sweep, a light point sweep, a hold."""
    return {
        "schema": 1,
        "name": "reliability-crash",
        "sample": {"id": "REL-CRASH", "area_cm2": 1.0},
        "limits": dict(LIMITS),
        "checks": {"watchdog_s": 5},
        "steps": [
            {"kind": "set-light", "shutter": "closed"},
            {"kind": "sweep", "name": "dark", "light": False, "acquisition": "list",
             "range": {"start_v": -0.2, "stop_v": 0.6}, "points": 200, "compliance_a": 0.05},
            {"kind": "set-light", "shutter": "open", "irradiance_w_m2": 1000},
            {"kind": "sweep", "name": "light", "light": True,
             "range": {"start_v": -0.1, "stop_v": 0.65}, "points": 80, "compliance_a": 0.06},
            {"kind": "hold", "name": "near-mpp", "light": True, "mode": "bias", "level_v": 0.5,
             "duration_s": 0.6, "interval_s": 0.02, "compliance_a": 0.06},
            {"kind": "set-light", "shutter": "closed"},
        ],
        "analysis": {"models": ["single"]},
    }


def load_protocol(points: int = 80) -> dict[str, Any]:
    """One light point sweep and one list sweep: many points, little waiting."""
    return {
        "schema": 1,
        "name": "reliability-load",
        "sample": {"id": "REL-LOAD", "area_cm2": 1.0},
        "limits": dict(LIMITS),
        "steps": [
            {"kind": "set-light", "shutter": "open", "irradiance_w_m2": 1000},
            {"kind": "sweep", "name": "points", "light": True,
             "range": {"start_v": -0.1, "stop_v": 0.65}, "points": points, "compliance_a": 0.06},
            {"kind": "sweep", "name": "list", "light": True, "acquisition": "list",
             "range": {"start_v": -0.1, "stop_v": 0.65}, "points": 2 * points,
             "compliance_a": 0.06},
            {"kind": "set-light", "shutter": "closed"},
        ],
        "analysis": {"models": ["single"]},
    }


def safety_order_protocol() -> dict[str, Any]:
    """Every way the engine switches an output on: point sweep, list sweep, a Voc hold
    (current source), MPP tracking with its own Voc probe and search sweep."""
    return {
        "schema": 1,
        "name": "reliability-safety-order",
        "sample": {"id": "REL-ORDER", "area_cm2": 1.0},
        "limits": dict(LIMITS),
        "steps": [
            {"kind": "set-light", "shutter": "closed"},
            {"kind": "sweep", "name": "dark", "light": False, "acquisition": "list",
             "range": {"start_v": -0.2, "stop_v": 0.6}, "points": 40, "compliance_a": 0.05},
            {"kind": "set-light", "shutter": "open", "irradiance_w_m2": 1000},
            {"kind": "sweep", "name": "light", "light": True,
             "range": {"start_v": -0.1, "stop_v": 0.65}, "points": 30, "compliance_a": 0.06},
            {"kind": "hold", "name": "voc", "light": True, "mode": "voc", "duration_s": 0.1,
             "interval_s": 0.02, "compliance_v": 0.9},
            {"kind": "mpp", "name": "track", "duration_s": 0.2, "interval_s": 0.02,
             "compliance_a": 0.07},
            {"kind": "set-light", "shutter": "closed"},
        ],
        "analysis": {"models": ["single"]},
    }


def write_protocol(doc: dict[str, Any], path: Path) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    return path
