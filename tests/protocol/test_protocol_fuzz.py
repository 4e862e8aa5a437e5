"""Fuzzing of protocol text: random YAML-ish documents and mutations of the shipped examples
never raise anything but ProtocolError; whatever loads also compiles and round-trips.

CI size: 200 examples per property; nightly size (``--run-slow``): 2000+.
"""
from __future__ import annotations

import copy
import string

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tracer.protocol import ProtocolError, compile_plan, dump_protocol, load_protocol

from protocol_helpers import PROTOCOLS

EXAMPLES = [p.read_text(encoding="utf-8") for p in PROTOCOLS]
_LOADER = getattr(yaml, "CSafeLoader", yaml.SafeLoader)
_DUMPER = getattr(yaml, "CSafeDumper", yaml.SafeDumper)
PARSED = [yaml.load(text, Loader=_LOADER) for text in EXAMPLES]
KEYS = ["name", "sample", "id", "limits", "voltage_v", "current_a", "power_w",
        "reverse_voltage_v", "steps", "kind", "sweep", "hold", "mpp", "set-light",
        "wait-temperature", "pixel-loop", "pixels", "light", "range", "start_v", "stop_v",
        "points", "spacing", "direction", "nplc", "mode", "duration_s", "interval_s",
        "shutter", "analysis", "models", "translation", "procedures", "metadata", "checks",
        "level_v", "compliance_a", "compliance_v", "all", "<<"]
TOKENS = KEYS + [": ", "\n", "\n  ", "\n    ", "- ", "[", "]", "{", "}", ", ", "&a ", "*a",
                 "!!binary ", "!!python/name:os.system ", "---\n", "...", "'", '"', "#", "|",
                 ">", "?", "null", "true", "yes", "on", "1e3", ".nan", "-.inf", "0x1F", "1:30",
                 "2024-05-01", "-1", "0", "0.7", "10001", "\t", "\x00", "\x07", "\ufeff", "é"]


def check_never_crashes(text: str | bytes) -> None:
    try:
        protocol = load_protocol(text, source_name="fuzz.yaml")
    except ProtocolError as exc:
        assert exc.problems
        for problem in exc.problems:
            assert problem.file == "fuzz.yaml"
            assert problem.message
            assert problem.line is None or problem.line >= 1
        str(exc)
        return
    try:
        plan = compile_plan(protocol)
    except ProtocolError:
        return  # e.g. "pixels: all" with neither sample.pixels nor a bench
    assert plan.steps
    assert load_protocol(dump_protocol(protocol)) == protocol


yamlish = st.lists(st.sampled_from(TOKENS) | st.text(string.printable, max_size=6),
                   max_size=60).map("".join)


def _mutate(data, draw_value, path_choice):
    """Replace one node of a parsed example by a random value."""
    nodes = []

    def walk(node, parent, key):
        nodes.append((parent, key))
        if isinstance(node, dict):
            for k in list(node):
                walk(node[k], node, k)
        elif isinstance(node, list):
            for i, item in enumerate(node):
                walk(item, node, i)
    walk(data, None, None)
    parent, key = nodes[path_choice % len(nodes)]
    if parent is None:
        return draw_value
    if isinstance(parent, dict) and isinstance(draw_value, str) and draw_value in KEYS \
            and path_choice % 3 == 0:
        parent[draw_value] = parent.pop(key)   # rename a key
    elif path_choice % 7 == 0:
        if isinstance(parent, list):
            parent.pop(key)
        else:
            parent.pop(key, None)              # delete
    else:
        parent[key] = draw_value
    return data


values = st.none() | st.booleans() | st.integers(-10**6, 10**25) | \
    st.floats(allow_nan=True, allow_infinity=True) | st.sampled_from(KEYS) | \
    st.text(max_size=10) | st.lists(st.integers(-3, 70), max_size=4) | \
    st.dictionaries(st.sampled_from(KEYS), st.integers(-2, 3), max_size=3)


@st.composite
def mutated_examples(draw):
    data = copy.deepcopy(draw(st.sampled_from(PARSED)))
    for _ in range(draw(st.integers(1, 4))):
        data = _mutate(data, draw(values), draw(st.integers(0, 10_000)))
    return yaml.dump(data, Dumper=_DUMPER, sort_keys=False, allow_unicode=True)


@st.composite
def text_edits(draw):
    """Character-level damage to an example: cut, duplicate or splice a token in."""
    text = draw(st.sampled_from(EXAMPLES))
    for _ in range(draw(st.integers(1, 3))):
        i = draw(st.integers(0, len(text)))
        j = draw(st.integers(i, min(len(text), i + 40)))
        op = draw(st.sampled_from(["cut", "dup", "insert"]))
        if op == "cut":
            text = text[:i] + text[j:]
        elif op == "dup":
            text = text[:j] + text[i:j] + text[j:]
        else:
            text = text[:i] + draw(st.sampled_from(TOKENS)) + text[i:]
    return text


CI = settings(max_examples=200, deadline=None,
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
NIGHTLY = settings(max_examples=2500, deadline=None,
                   suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


@CI
@given(yamlish)
def test_random_yamlish_text(text):
    check_never_crashes(text)


@CI
@given(st.binary(max_size=200))
def test_random_bytes(data):
    check_never_crashes(data)


@CI
@given(mutated_examples())
def test_mutated_examples(text):
    check_never_crashes(text)


@CI
@given(text_edits())
def test_damaged_example_text(text):
    check_never_crashes(text)


@pytest.mark.slow
@NIGHTLY
@given(yamlish | st.binary(max_size=300).map(bytes) | mutated_examples() | text_edits())
def test_nightly_fuzz(text):
    check_never_crashes(text)
