"""Event streams for logbook tests: runs shaped like the engine's output.

The numbers are arbitrary storage payloads (they only need to be stored and read back
exactly); no physical claim is made or checked with them.
"""
from __future__ import annotations

import math

import pytest

from tracer import events as ev


def make_run(run_uid: str = "run-0001", *, sweeps: int = 2, points: int = 25, t0: float = 1.7e9,
             sample_id: str = "cell-A", finish: bool = True, status: str = "completed") -> list:
    """A run's events in the engine's order. Currents are in the load convention."""
    out: list = [ev.RunStarted(
        run_uid=run_uid, time=t0, protocol_name="dark-then-light",
        protocol={"name": "dark-then-light", "steps": [{"sweep": {"points": points}}]},
        protocol_sha256="ab" * 32,
        sample={"id": sample_id, "area_cm2": 1.0, "cells_in_series": 1, "description": "test"},
        operator="tester",
        bench={"name": "bench-x", "instruments": {
            "smu": {"address": "TCPIP0::127.0.0.1::5025::SOCKET", "identity": "Maker,M1,SN1,1.0",
                    "driver": "scpi-smu"},
            "light": {"address": "TCPIP0::127.0.0.1::5026::SOCKET", "identity": "Maker,L1,SN2,1.0",
                      "driver": "scpi-light"}}},
        limits={"voltage_v": 2.0, "current_a": 0.1, "power_w": 1.0, "reverse_voltage_v": 1.0},
        software_version="0.1.0", metadata={"note": "unit test"})]
    run_seq = 0
    t = t0
    for s in range(sweeps):
        sweep_uid = f"{run_uid}-s{s}"
        light = s % 2 == 1
        out.append(ev.SweepStarted(
            run_uid=run_uid, sweep_uid=sweep_uid, sweep_index=s, step_index=s,
            step_name="light" if light else "dark", kind="sweep", light=light,
            direction="forward", pixel=None, source_mode="voltage", acquisition="point",
            points_planned=points, four_wire=True, nplc=1.0, settle_s=0.0, compliance=0.1,
            time=t, conditions={"irradiance_w_m2": 1000.0 if light else 0.0, "temperature_c": 25.0}))
        for k in range(points):
            run_seq += 1
            t += 0.01
            v = -0.2 + 0.8 * k / max(points - 1, 1)
            i_load = (-0.035 if light else 0.0) + 1e-12 * math.expm1(v / 0.0257)
            out.append(ev.Point(run_uid=run_uid, sweep_uid=sweep_uid, seq=k + 1, run_seq=run_seq,
                                time=t, setpoint=v, voltage_v=v + 1e-6 * k, current_a=i_load,
                                in_compliance=False,
                                irradiance_w_m2=1000.0 + 0.1 * k if light else None,
                                temperature_c=25.0 + 0.001 * k))
        out.append(ev.SweepFinished(run_uid=run_uid, sweep_uid=sweep_uid, status="completed",
                                    reason="", points=points, time=t,
                                    conditions={"temperature_c": 25.0}))
        out.append(ev.Analysis(run_uid=run_uid, sweep_uid=sweep_uid, time=t + 0.001,
                               result={"figures": {"isc_a": 0.035 if light else 0.0}},
                               elapsed_s=0.01))
    if finish:
        out.append(ev.RunFinished(run_uid=run_uid, status=status,
                                  reason="" if status == "completed" else "operator stop",
                                  time=t + 0.1, output_verified_off=True, points=run_seq))
    return out


@pytest.fixture
def lb_path(tmp_path):
    return tmp_path / "logbook.sqlite"


@pytest.fixture
def run_events():
    """``run_events(run_uid, sweeps=, points=, finish=, status=)`` -> list of events."""
    return make_run
