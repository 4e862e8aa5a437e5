"""The shipped protocols load, validate against the documented bench, compile and round-trip;
compilation unrolls pixel loops and fills the snapshot and its hash."""
from __future__ import annotations

import hashlib
import json

import pytest

from tracer import plan as P
from tracer.protocol import (ProtocolError, compile_plan, dump_protocol, load_protocol,
                             protocol_to_dict, summarize)

from protocol_helpers import MINIMAL, PROTOCOLS

EXPECTED = {"dark-then-light.yaml", "hysteresis-forward-reverse.yaml", "six-pixel-substrate.yaml",
            "mpp-tracking.yaml", "mini-module-36.yaml"}


def test_the_expected_examples_are_shipped():
    assert EXPECTED <= {p.name for p in PROTOCOLS}


@pytest.mark.parametrize("path", PROTOCOLS, ids=lambda p: p.name)
def test_example_loads_validates_and_compiles(path, bench):
    protocol = load_protocol(path, bench=bench)
    assert protocol.name == path.stem
    plan = compile_plan(protocol, bench=bench)
    assert isinstance(plan, P.Plan) and plan.steps
    assert plan.limits == protocol.limits
    for field in ("voltage_v", "current_a", "power_w", "reverse_voltage_v"):
        assert getattr(plan.limits, field) <= getattr(bench.hard_limits, field)
    json.dumps(plan.protocol_snapshot)              # plain, JSON-safe
    json.dumps(plan.analysis)
    json.dumps(dict(plan.metadata))
    assert plan.protocol_sha256 == hashlib.sha256(
        dump_protocol(protocol).encode("utf-8")).hexdigest()
    assert plan.protocol_snapshot == protocol_to_dict(protocol)
    for step in plan.steps:
        if isinstance(step, P.SweepStep):
            assert step.points >= 2 and step.compliance <= (
                plan.limits.current_a if step.source_mode == "voltage" else plan.limits.voltage_v)
            assert -plan.limits.reverse_voltage_v <= min(step.start, step.stop)
            assert max(step.start, step.stop) <= plan.limits.voltage_v


@pytest.mark.parametrize("path", PROTOCOLS, ids=lambda p: p.name)
def test_example_round_trips(path):
    protocol = load_protocol(path)
    text = dump_protocol(protocol)
    again = load_protocol(text)
    assert again == protocol
    assert dump_protocol(again) == text          # the canonical form is a fixed point
    assert compile_plan(again).protocol_sha256 == compile_plan(protocol).protocol_sha256


def test_hash_ignores_comments_and_layout_but_not_meaning():
    plain = compile_plan(load_protocol(MINIMAL)).protocol_sha256
    commented = MINIMAL.replace("points: 10", "points: 10   # ten points\n    nplc: 1.0")
    assert compile_plan(load_protocol(commented)).protocol_sha256 == plain
    changed = MINIMAL.replace("points: 10", "points: 11")
    assert compile_plan(load_protocol(changed)).protocol_sha256 != plain


def test_six_pixel_substrate_is_unrolled(bench):
    plan = compile_plan(load_protocol([p for p in PROTOCOLS if p.name ==
                                       "six-pixel-substrate.yaml"][0]), bench=bench)
    selects = [s.pixel for s in plan.steps if isinstance(s, P.SelectPixel)]
    assert selects == [1, 2, 3, 4, 5, 6] * 2
    names = [s.name for s in plan.steps if isinstance(s, P.SweepStep)]
    assert names == [f"light-p{n}" for n in range(1, 7)] + [f"dark-p{n}" for n in range(1, 7)]
    # each SelectPixel is followed by the loop body for that pixel
    for i, step in enumerate(plan.steps):
        if isinstance(step, P.SelectPixel):
            assert plan.steps[i + 1].name.endswith(f"-p{step.pixel}")
    summary = summarize(plan)
    assert summary.pixels == (1, 2, 3, 4, 5, 6) and summary.sweeps == 12


def test_all_pixels_from_the_bench_switch(bench):
    text = MINIMAL.replace("steps:\n", "steps:\n  - kind: pixel-loop\n    pixels: all\n"
                           "    steps:\n      - kind: sweep\n        light: false\n"
                           "        range: {start_v: 0, stop_v: 0.5}\n        points: 3\n")
    protocol = load_protocol(text)
    with pytest.raises(ProtocolError) as info:
        compile_plan(protocol)
    assert "needs sample.pixels or a bench profile" in str(info.value)
    assert info.value.problems[0].key == "steps[0].pixels"
    plan = compile_plan(protocol, bench=bench)
    assert [s.pixel for s in plan.steps if isinstance(s, P.SelectPixel)] == [1, 2, 3, 4, 5, 6]


def test_compiled_steps_carry_every_setting():
    text = MINIMAL.replace("steps:\n", """steps:
  - kind: wait-temperature
    target_c: 30
    tolerance_c: 0.2
    timeout_s: 120
  - kind: set-light
    shutter: open
    irradiance_w_m2: 800
    stability_tolerance_rel: 0.01
    settle_timeout_s: 30
  - kind: sweep
    name: s
    light: true
    source: current
    range: {start_a: 0.04, stop_a: -0.01}
    points: 7
    spacing: linear
    direction: both
    settle_s: 0.02
    nplc: 0.5
    four_wire: false
    repeats: 3
    acquisition: list
    compliance_v: 0.8
  - kind: hold
    name: h
    light: true
    mode: bias
    level_v: 0.45
    duration_s: 12
    interval_s: 0.5
    nplc: 2
    compliance_a: 0.05
  - kind: mpp
    name: m
    duration_s: 30
    interval_s: 0.5
    step_v: 0.002
    start_v: 0.5
    nplc: 0.2
    four_wire: false
    compliance_a: 0.07
  - kind: set-light
    shutter: closed
""")
    plan = compile_plan(load_protocol(text))
    assert plan.steps[:5] == (
        P.WaitTemperature(target_c=30.0, tolerance_c=0.2, timeout_s=120.0),
        P.SetLight(shutter_open=True, irradiance_w_m2=800.0, stability_tolerance_rel=0.01,
                   settle_timeout_s=30.0),
        P.SweepStep(name="s", light=True, start=0.04, stop=-0.01, points=7,
                    source_mode="current", spacing="linear", direction="both", settle_s=0.02,
                    nplc=0.5, four_wire=False, repeats=3, acquisition="list", compliance=0.8),
        P.HoldStep(name="h", light=True, mode="bias", duration_s=12.0, interval_s=0.5,
                   level=0.45, nplc=2.0, four_wire=True, compliance=0.05),
        P.MpptStep(name="m", duration_s=30.0, interval_s=0.5, step_v=0.002, start_v=0.5,
                   nplc=0.2, four_wire=False, compliance=0.07),
    )
    assert plan.steps[5] == P.SetLight(shutter_open=False)
    summary = summarize(plan)
    # 7 points x 2 directions x 3 repeats, the 12 s hold at 0.5 s (25 readings) and 30 s MPP
    # tracking at 0.5 s (61 readings) and the final dark sweep of 10 points
    assert summary.planned_points == 7 * 2 * 3 + 25 + 61 + 10


def test_analysis_settings_in_si():
    path = [p for p in PROTOCOLS if p.name == "mini-module-36.yaml"][0]
    analysis = compile_plan(load_protocol(path)).analysis
    # 0.0225 mA/K = 2.25e-5 A/K and -72 mV/K = -0.072 V/K (SI prefixes m = 1e-3)
    assert analysis["temperature_coefficients"] == pytest.approx(
        {"alpha_isc_a_per_k": 2.25e-5, "beta_voc_v_per_k": -0.072})
    assert analysis["reference_cell_source"] == "protocol"
    assert analysis["reference_cell"]["calibration_isc_a"] == 0.1185
    assert analysis["translation"]["procedures"] == [1, 2]
    assert analysis["models"] == ["single", "double"]


def test_reference_cell_from_the_bench(bench):
    plan = compile_plan(load_protocol(MINIMAL), bench=bench)
    assert plan.analysis["reference_cell_source"] == "bench"
    assert plan.analysis["reference_cell"]["calibration_isc_a"] == 0.12
    assert compile_plan(load_protocol(MINIMAL)).analysis["reference_cell"] is None


def test_sample_overrides():
    protocol = load_protocol(MINIMAL)
    plan = compile_plan(protocol, sample_overrides={"id": "PLT-0999-Z", "area_cm2": 0.5})
    assert plan.sample == P.Sample(sample_id="PLT-0999-Z", area_cm2=0.5, cells_in_series=1)
    assert plan.protocol_sha256 == compile_plan(protocol).protocol_sha256
    with pytest.raises(ProtocolError) as info:
        compile_plan(protocol, sample_overrides={"id": "bad id!", "colour": "red",
                                                 "area_cm2": -2})
    assert {p.key for p in info.value.problems} == {"sample.id", "sample.colour",
                                                    "sample.area_cm2"}


def test_compile_checks_the_bench_again(bench):
    import dataclasses
    from tracer.plan import Limits
    protocol = load_protocol(MINIMAL.replace("voltage_v: 1.0", "voltage_v: 20.0"))
    small = dataclasses.replace(bench, hard_limits=Limits(10.0, 1.0, 10.0, 2.0))
    compile_plan(protocol, bench=bench)
    with pytest.raises(ProtocolError) as info:
        compile_plan(protocol, bench=small)
    p = info.value.problems[0]
    assert (p.key, p.line) == ("limits.voltage_v", 5) and "hard limit 10" in p.message


def test_bench_may_be_given_as_a_path(bench_file):
    protocol = load_protocol(MINIMAL, bench=bench_file)
    assert compile_plan(protocol, bench=str(bench_file)).sample.sample_id == "PLT-0001-A"


def test_protocols_and_plans_are_frozen():
    import dataclasses
    protocol = load_protocol(MINIMAL)
    with pytest.raises(dataclasses.FrozenInstanceError):
        protocol.name = "other"  # type: ignore[misc]
    with pytest.raises(TypeError):
        protocol.metadata["x"] = 1  # type: ignore[index]


def test_the_readme_full_example_is_valid_and_names_every_key(bench):
    import re

    import yaml

    from tracer.protocol.model import STEP_KINDS
    from tracer.protocol.schema import (CHECK_FIELDS, LIMIT_FIELDS, REFERENCE_FIELDS,
                                        SAMPLE_FIELDS, TOP_KEYS, TRANSLATION_FIELDS)
    from protocol_helpers import ROOT
    text = (ROOT / "protocols" / "README.md").read_text(encoding="utf-8")
    block = re.search(r"## A full annotated example.*?```yaml\n(.*?)```", text, re.S).group(1)
    compile_plan(load_protocol(block, bench=bench), bench=bench)
    raw = yaml.safe_load(block)
    assert set(raw) == set(TOP_KEYS)
    assert set(raw["sample"]) == set(SAMPLE_FIELDS)
    assert set(raw["limits"]) == set(LIMIT_FIELDS)
    assert set(raw["checks"]) == set(CHECK_FIELDS)
    assert set(raw["analysis"]["translation"]) == set(TRANSLATION_FIELDS)
    assert set(raw["analysis"]["reference_cell"]) == set(REFERENCE_FIELDS)
    assert {s["kind"] for s in raw["steps"]} == set(STEP_KINDS)
    for key in ("voc_estimate_v", "compliance_v", "start_a", "level_v", "step_v", "start_v",
                "acquisition", "repeats", "four_wire", "settle_timeout_s"):
        assert key in block
