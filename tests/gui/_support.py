"""Helpers shared by the bench window tests."""
from __future__ import annotations

_BASE = """\
schema: 1
name: {name}
sample:
  id: {sample}
  area_cm2: 0.5
  cells_in_series: 1
limits:
  voltage_v: 1.0
  current_a: 0.1
  power_w: 0.1
  reverse_voltage_v: 0.5
steps:
  - kind: set-light
    shutter: open
    irradiance_w_m2: 1000
  - kind: sweep
    name: light
    light: true
    range: {{start_v: -0.05, stop_v: 0.64}}
    points: {points}
    direction: forward
    settle_s: {settle}
    nplc: 1
    compliance_a: 0.08
  - kind: set-light
    shutter: closed
analysis:
  models: [single]
  translation:
    procedures: [model]
  temperature_coefficients:
    alpha_isc: {{value: 0.06, unit: "%/K"}}
    beta_voc: {{value: -2.0, unit: "mV/K"}}
"""


def protocol_text(name: str = "gui-quick", *, points: int = 60, settle: float = 0.0,
                  sample: str = "GUI-TEST-1") -> str:
    return _BASE.format(name=name, points=points, settle=settle, sample=sample)


def wait_finished(qtbot, window, timeout=30_000, run_uid=None):
    """Wait until the window has drawn the end of the run (``run_uid``, else the last)."""
    def shown():
        fin = window.model.finished
        return (fin is not None and window._finished_shown == fin.run_uid
                and (run_uid is None or fin.run_uid == run_uid))

    qtbot.waitUntil(shown, timeout=timeout)
    return window.model.finished
