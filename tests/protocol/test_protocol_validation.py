"""Validation rules, and that every problem in a file is reported in one go."""
from __future__ import annotations

import pytest

from tracer.protocol import ProtocolError, load_protocol

from protocol_helpers import MINIMAL

MANY_PROBLEMS = """\
name: many problems
sample:
  id: PLT-0412-A
  area_cm2: -1.0
limits:
  voltage_v: 30.0
  current_a: 0.1
  power_w: 0.1
  reverse_voltage_v: 0.5
  compliance: 0.1
steps:
  - kind: sweep
    light: false
    range: {start_v: -0.2, stop_v: 0.7}
    points: 1
    spacing: logarithmic
  - kind: hold
    light: maybe
    mode: voc
    duration_s: 10
    interval_s: 20
  - kind: sweeep
analysis:
  models: [single, triple]
"""


def test_every_problem_is_reported_at_once(write, bench):
    path = write(MANY_PROBLEMS, name="many.yaml")
    with pytest.raises(ProtocolError) as info:
        load_protocol(path, bench=bench)
    found = {(p.line, p.key) for p in info.value.problems}
    assert found == {
        (4, "sample.area_cm2"),
        (6, "limits.voltage_v"),           # beyond the bench's 25 V
        (10, "limits.compliance"),         # unknown key
        (15, "steps[0].points"),
        (16, "steps[0].spacing"),
        (18, "steps[1].light"),
        (21, "steps[1].interval_s"),       # longer than the duration
        (22, "steps[2].kind"),
        (24, "analysis.models[1]"),
    }
    text = str(info.value)
    assert text.startswith(f"9 problems in protocol {path}:")
    lines = text.splitlines()[1:]
    assert [int(line.split(":")[1]) for line in lines] == sorted(
        int(line.split(":")[1]) for line in lines)  # in file order


def with_step(step_yaml: str, *, before: str = "") -> str:
    """MINIMAL with its step replaced by the given ones (indented list items)."""
    head = MINIMAL.split("steps:")[0]
    return head + "steps:\n" + before + step_yaml


def problem_keys(text, **kw):
    with pytest.raises(ProtocolError) as info:
        load_protocol(text, **kw)
    return {p.key: p for p in info.value.problems}


OPEN = "  - kind: set-light\n    shutter: open\n"
CLOSE = "  - kind: set-light\n    shutter: closed\n"


def test_sweep_range_within_protocol_limits():
    text = with_step("  - kind: sweep\n    light: false\n    range: {start_v: -0.8, stop_v: 1.2}\n"
                     "    points: 5\n")
    probs = problem_keys(text)
    assert "reverse bias beyond limits.reverse_voltage_v 0.5" in probs["steps[0].range.start_v"].message
    assert "beyond limits.voltage_v 1" in probs["steps[0].range.stop_v"].message
    assert probs["steps[0].range.stop_v"].allowed == "-0.5 … 1 V (limits)"


def test_current_source_sweep_uses_amps():
    good = with_step("  - kind: sweep\n    light: false\n    source: current\n"
                     "    range: {start_a: -0.01, stop_a: 0.05}\n    points: 5\n"
                     "    compliance_v: 0.9\n")
    p = load_protocol(good)
    assert (p.steps[0].start, p.steps[0].stop, p.steps[0].compliance) == (-0.01, 0.05, 0.9)
    bad = good.replace("start_a", "start_v").replace("compliance_v: 0.9", "compliance_a: 0.1")
    probs = problem_keys(bad)
    assert "use start_a" in probs["steps[0].range.start_v"].message
    assert "compliance is 'compliance_v'" in probs["steps[0].compliance_a"].message


def test_compliance_beyond_limits_and_default():
    probs = problem_keys(with_step("  - kind: sweep\n    light: false\n"
                                   "    range: {start_v: 0, stop_v: 0.5}\n    points: 5\n"
                                   "    compliance_a: 0.2\n"))
    assert "beyond limits.current_a 0.1" in probs["steps[0].compliance_a"].message
    p = load_protocol(MINIMAL)
    assert p.steps[0].compliance == p.limits.current_a  # default: the protocol's own limit


def test_log_spacing_needs_a_range_not_crossing_zero():
    step = "  - kind: sweep\n    light: false\n    range: {start_v: -0.1, stop_v: 0.7}\n" \
           "    points: 5\n    spacing: log\n"
    assert "same sign" in problem_keys(with_step(step))["steps[0].spacing"].message
    load_protocol(with_step(step.replace("-0.1", "0.01")))


def test_dense_near_voc_rules():
    step = "  - kind: sweep\n    light: true\n    range: {start_v: 0, stop_v: 0.7}\n" \
           "    points: 50\n    spacing: dense-near-voc\n    voc_estimate_v: 0.9\n"
    assert "outside the sweep range" in \
        problem_keys(with_step(step, before=OPEN))["steps[1].voc_estimate_v"].message
    assert "for light sweeps" in problem_keys(
        with_step(step.replace("light: true", "light: false").replace(
            "    voc_estimate_v: 0.9\n", "")))["steps[0].spacing"].message
    assert "only used with spacing dense-near-voc" in problem_keys(
        with_step(step.replace("dense-near-voc", "linear"), before=OPEN)
    )["steps[1].voc_estimate_v"].message


def test_start_equals_stop():
    step = "  - kind: sweep\n    light: false\n    range: {start_v: 0.3, stop_v: 0.3}\n" \
           "    points: 5\n"
    assert "two different levels" in problem_keys(with_step(step))["steps[0].range"].message


def test_light_steps_need_an_open_shutter():
    light = "  - kind: sweep\n    light: true\n    range: {start_v: 0, stop_v: 0.7}\n" \
            "    points: 5\n"
    dark = light.replace("light: true", "light: false")
    probs = problem_keys(with_step(light))
    assert "no set-light step opens the shutter" in probs["steps[0]"].message
    probs = problem_keys(with_step(OPEN + light + CLOSE + light))
    assert "closed by steps[2]" in probs["steps[3]"].message
    probs = problem_keys(with_step(OPEN + light + dark))
    assert "dark step with the shutter open (opened by steps[0])" in probs["steps[2]"].message
    load_protocol(with_step(dark + OPEN + light + CLOSE + dark))


def test_light_state_wraps_around_a_pixel_loop():
    loop = ("  - kind: pixel-loop\n    pixels: [1, 2]\n    steps:\n"
            "      - kind: sweep\n        light: false\n        range: {start_v: 0, stop_v: 0.7}\n"
            "        points: 5\n"
            "      - kind: set-light\n        shutter: open\n"
            "      - kind: mpp\n        duration_s: 10\n        interval_s: 1\n")
    probs = problem_keys(with_step(loop))
    # the second pixel's dark sweep would run with the shutter the first left open
    assert "dark step with the shutter open" in probs["steps[0].steps[0]"].message


def test_hold_rules():
    hold = ("  - kind: hold\n    light: false\n    mode: bias\n    duration_s: 5\n"
            "    interval_s: 0.5\n")
    probs = problem_keys(with_step(hold))
    assert "missing required key 'level_v' for mode bias" in probs["steps[0]"].message
    load_protocol(with_step(hold + "    level_v: -0.3\n"))
    assert "reverse bias" in problem_keys(
        with_step(hold + "    level_v: -0.6\n"))["steps[0].level_v"].message
    voc = hold.replace("mode: bias", "mode: voc") + "    level_v: 0.2\n    compliance_a: 0.1\n"
    probs = problem_keys(with_step(voc))
    assert "only used with mode bias" in probs["steps[0].level_v"].message
    assert "compliance is 'compliance_v'" in probs["steps[0].compliance_a"].message


def test_interval_shorter_than_one_reading():
    hold = ("  - kind: hold\n    light: false\n    mode: isc\n    duration_s: 5\n"
            "    interval_s: 0.1\n    nplc: 10\n")
    # 10 power-line cycles at 50 Hz last 0.2 s (1 PLC = 1/50 s, by definition of NPLC)
    p = problem_keys(with_step(hold))["steps[0].interval_s"]
    assert "shorter than one reading at nplc 10 (0.2 s" in p.message


def test_mpp_rules():
    mpp = "  - kind: mpp\n    duration_s: 60\n    interval_s: 1\n    start_v: 1.5\n    light: true\n"
    probs = problem_keys(with_step(mpp, before=OPEN))
    assert "beyond limits.voltage_v" in probs["steps[1].start_v"].message
    assert "always runs under light" in probs["steps[1].light"].message


def test_pixel_loop_rules(bench):
    loop = ("  - kind: pixel-loop\n    pixels: {pixels}\n    steps:\n"
            "      - kind: sweep\n        light: false\n        range: {{start_v: 0, stop_v: 0.7}}\n"
            "        points: 5\n")
    assert load_protocol(with_step(loop.format(pixels="[2, 4]"))).steps[0].pixels == (2, 4)
    assert "listed twice" in problem_keys(with_step(loop.format(pixels="[1, 1]")))[
        "steps[0].pixels[1]"].message
    assert "beyond the 6 channels" in problem_keys(
        with_step(loop.format(pixels="[1, 7]")), bench=bench)["steps[0].pixels"].message
    nested = loop.format(pixels="all") + "      - kind: pixel-loop\n        pixels: all\n" \
                                         "        steps: []\n"
    assert "cannot be nested" in problem_keys(with_step(nested))["steps[0].steps[1].kind"].message
    empty = "  - kind: pixel-loop\n    pixels: all\n    steps: []\n"
    assert "a list of 1 … 200 steps" in problem_keys(with_step(empty))["steps[0].steps"].message


def test_bench_without_switch_light_or_thermometer(tmp_path, bench):
    import dataclasses
    smu_only = dataclasses.replace(bench, instruments=bench.instruments[:1])
    text = with_step(
        "  - kind: wait-temperature\n    target_c: 25\n" + OPEN +
        "  - kind: pixel-loop\n    pixels: all\n    steps:\n"
        "      - kind: mpp\n        duration_s: 10\n        interval_s: 1\n"
    ).replace("steps:\n", "checks:\n  temperature_window_c: [20, 30]\nsteps:\n", 1)
    probs = problem_keys(text, bench=smu_only)
    assert "has no stage thermometer" in probs["steps[0].kind"].message
    assert "has no light source" in probs["steps[1].kind"].message
    assert "has no pixel switch" in probs["steps[2].pixels"].message
    assert "needs a stage thermometer" in probs["checks.temperature_window_c"].message
    load_protocol(text, bench=bench)


def test_wait_temperature_outside_the_window():
    text = with_step("  - kind: wait-temperature\n    target_c: 40\n" +
                     MINIMAL.split("steps:\n")[1]).replace(
        "steps:\n", "checks:\n  temperature_window_c: [20, 30]\nsteps:\n", 1)
    assert "outside checks.temperature_window_c [20, 30]" in \
        problem_keys(text)["steps[0].target_c"].message


def test_temperature_window_order():
    text = MINIMAL + "checks:\n  temperature_window_c: [30, 20]\n"
    assert "must be below" in problem_keys(text)["checks.temperature_window_c"].message


def test_names_are_unique_and_defaults_are_numbered():
    sweep = "  - kind: sweep\n    light: false\n    range: {start_v: 0, stop_v: 0.5}\n    points: 5\n"
    p = load_protocol(with_step(sweep + sweep + sweep.replace("points: 5", "points: 5\n"
                                                              "    name: dark-sweep-1")))
    assert [s.name for s in p.steps] == ["dark-sweep-2", "dark-sweep-3", "dark-sweep-1"]
    named = sweep + "    name: a\n"
    assert "already used by steps[0]" in problem_keys(with_step(named + named))[
        "steps[1].name"].message


def test_reverse_limit_larger_than_voltage_limit():
    text = MINIMAL.replace("reverse_voltage_v: 0.5", "reverse_voltage_v: 2.0")
    assert "larger than limits.voltage_v" in problem_keys(text)["limits.reverse_voltage_v"].message


def test_analysis_rules():
    base = MINIMAL + "analysis:\n"
    p = load_protocol(base + "  models: auto\n")
    assert p.analysis.models == ("auto",)
    probs = problem_keys(base + "  translation:\n    procedures: [1, 4]\n")
    assert "one of 1, 2, 3, model" in probs["analysis.translation.procedures[1]"].allowed
    probs = problem_keys(base + "  translation:\n    procedures: [2]\n")
    assert "needs temperature_coefficients alpha_isc and beta_voc" in \
        probs["analysis.translation.procedures"].message
    probs = problem_keys(base + "  translation:\n    procedures: [3]\n"
                         "    procedure_1: {rs_ohm: 0.5}\n")
    assert "procedure 1 is not in procedures" in probs["analysis.translation.procedure_1"].message
    probs = problem_keys(base + "  temperature_coefficients:\n"
                         "    alpha_isc: {value: 0.06, unit: '%/C'}\n"
                         "    beta_voc: {value: -2.0, unit: 'V/K'}\n")
    assert "one of A/K, mA/K, 1/K, %/K" in \
        probs["analysis.temperature_coefficients.alpha_isc.unit"].allowed
    assert "implausibly large" in probs["analysis.temperature_coefficients.beta_voc.value"].message


def test_metadata_is_free_but_plain():
    p = load_protocol(MINIMAL + "metadata:\n  when: 2024-05-01\n  tags: [a, b]\n"
                      "  nested: {x: 1.5}\n")
    assert p.metadata == {"when": "2024-05-01", "tags": ("a", "b"), "nested": {"x": 1.5}}
    hash(p)  # a frozen protocol is hashable, metadata included
    assert "not a finite number" in problem_keys(MINIMAL + "metadata: {x: .nan}\n")[
        "metadata.x"].message


def test_merge_keys_and_anchors_are_allowed():
    text = with_step(
        "  - &dark {kind: sweep, light: false, range: {start_v: 0, stop_v: 0.5}, points: 5}\n"
        "  - <<: *dark\n    name: second\n    points: 7\n")
    p = load_protocol(text)
    assert [(s.name, s.points) for s in p.steps] == [("dark-sweep-1", 5), ("second", 7)]
