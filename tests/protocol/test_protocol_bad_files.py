"""A dozen kinds of bad protocol file: each gives a clear message naming the file, the line
and the key, as a ProtocolError (never another exception)."""
from __future__ import annotations

import os

import pytest
import yaml

from tracer.protocol import MAX_FILE_BYTES, ProtocolError, load_protocol

from protocol_helpers import MINIMAL


@pytest.fixture(autouse=True, params=["libyaml", "pure-python"])
def yaml_parser(request, monkeypatch):
    """Every bad file is tried with both of PyYAML's safe parsers."""
    from tracer.protocol import _yamltree
    if request.param == "libyaml":
        if not hasattr(yaml, "CSafeLoader"):
            pytest.skip("PyYAML built without libyaml")
        monkeypatch.setattr(_yamltree, "LOADER", yaml.CSafeLoader)
    else:
        monkeypatch.setattr(_yamltree, "LOADER", yaml.SafeLoader)
    return request.param


def problems_of(source, **kwargs):
    with pytest.raises(ProtocolError) as info:
        load_protocol(source, **kwargs)
    problems = info.value.problems
    assert problems, "a ProtocolError always lists at least one problem"
    text = str(info.value)
    for p in problems:
        assert str(p) in text  # str() lists every problem
    return problems


def only(problems):
    assert len(problems) == 1, "\n".join(map(str, problems))
    return problems[0]


def test_wrong_type(write):
    path = write(MINIMAL.replace("points: 10", 'points: "many"'))
    p = only(problems_of(path))
    assert (p.file, p.line, p.key) == (str(path), 13, "steps[0].points")
    assert p.value == "many"
    assert "expected a whole number" in p.message and "2 … 10000" in p.allowed
    assert str(p).startswith(f"{path}:13: steps[0].points: ")


def test_number_written_as_text_gets_a_hint(write):
    path = write(MINIMAL.replace("voltage_v: 1.0", "voltage_v: 1e0"))
    p = only(problems_of(path))
    assert p.key == "limits.voltage_v" and "1.0e3" in p.message


def test_out_of_range(write):
    path = write(MINIMAL.replace("points: 10", "points: 20000"))
    p = only(problems_of(path))
    assert (p.line, p.key, p.value) == (13, "steps[0].points", 20000)
    assert p.message == "20000 is too large; allowed 2 … 10000"


def test_one_point_is_too_few_with_the_allowed_range(write):
    path = write(MINIMAL.replace("points: 10", "points: 1"), name="dark-then-light.yaml")
    p = only(problems_of(path))
    assert str(p) == f"{path}:13: steps[0].points: 1 is too small; allowed 2 … 10000"


def test_negative_points(write):
    path = write(MINIMAL.replace("points: 10", "points: -5"))
    p = only(problems_of(path))
    assert (p.line, p.key, p.value) == (13, "steps[0].points", -5)
    assert "too small" in p.message


def test_unknown_key_with_did_you_mean(write):
    path = write(MINIMAL.replace("points: 10", "points: 10\n    nplcs: 2"))
    p = only(problems_of(path))
    assert (p.line, p.key) == (14, "steps[0].nplcs")
    assert "unknown key 'nplcs'" in p.message and "did you mean 'nplc'?" in p.message
    assert "four_wire" in p.allowed


def test_unknown_top_level_key(write):
    path = write(MINIMAL + "sampel: {}\n")
    p = only(problems_of(path))
    assert p.key == "sampel" and p.line == 14 and "did you mean 'sample'?" in p.message


def test_limits_beyond_the_bench(write, bench):
    path = write(MINIMAL.replace("voltage_v: 1.0", "voltage_v: 30.0"))
    p = only(problems_of(path, bench=bench))
    assert (p.line, p.key, p.value) == (5, "limits.voltage_v", 30.0)
    assert "beyond the hard limit 25 of bench 'sim-bench-1'" in p.message
    assert p.allowed == "0 < x ≤ 25"
    load_protocol(path)  # without a bench the bench's limits are not known


def test_empty_file(write):
    path = write("")
    p = only(problems_of(path))
    assert p.file == str(path) and p.line is None and "is empty" in p.message


def test_only_comments(write):
    p = only(problems_of(write("# nothing here\n\n")))
    assert "is empty" in p.message or "holds no protocol" in p.message


def test_not_yaml(write):
    path = write("name: x\nsample: [unclosed\nlimits: {}\n")
    p = only(problems_of(path))
    assert p.file == str(path) and p.line == 3 and "is not valid YAML" in p.message


def test_tab_indentation_is_not_yaml(write):
    p = only(problems_of(write("name: x\nsample:\n\tid: A\n")))
    assert p.line == 3 and "not valid YAML" in p.message


def test_binary_junk_with_nul(write):
    path = write(bytes(range(256)) * 4)
    p = only(problems_of(path))
    assert "not a text file" in p.message and p.file == str(path)


def test_binary_junk_not_utf8(write):
    p = only(problems_of(write(b"name: x\n\xff\xfe\xfa junk\n")))
    assert "not UTF-8" in p.message and p.line == 2


def test_control_characters(write):
    p = only(problems_of(write("name: x\x07\n")))
    assert "not valid YAML text" in p.message and p.line == 1


def test_missing_required_key(write):
    path = write(MINIMAL.replace("    points: 10\n", ""))
    p = only(problems_of(path))
    assert (p.line, p.key) == (10, "steps[0]")
    assert "missing required key 'points'" in p.message


def test_missing_required_section(write):
    text = MINIMAL.split("limits:")[0] + "steps:" + MINIMAL.split("steps:")[1]
    p = only(problems_of(write(text)))
    assert p.key == "" and p.line == 1 and "missing required section 'limits'" in p.message


def test_duplicate_key(write):
    path = write(MINIMAL.replace("points: 10", "points: 10\n    points: 12"))
    p = only(problems_of(path))
    assert (p.line, p.key) == (14, "steps[0].points")
    assert "duplicate key 'points' (first given at line 13)" in p.message


def test_wrong_enum(write):
    path = write(MINIMAL.replace("points: 10", "points: 10\n    spacing: logarithmic"))
    p = only(problems_of(path))
    assert (p.line, p.key, p.value) == (14, "steps[0].spacing", "logarithmic")
    assert "linear, log, dense-near-voc" in p.allowed


def test_too_large_file(write):
    path = write(MINIMAL + "# " + "x" * MAX_FILE_BYTES + "\n")
    assert os.path.getsize(path) > MAX_FILE_BYTES
    p = only(problems_of(path))
    assert "too large" in p.message and "1 MiB" in p.message


def test_too_large_text():
    p = only(problems_of(MINIMAL + "# " + "x" * MAX_FILE_BYTES + "\n"))
    assert "too large" in p.message


@pytest.mark.parametrize("text, kind", [("- a\n- b\n", "a list"), ("42\n", "a single value"),
                                        ("just text\n", "a single value")])
def test_wrong_top_level_type(write, text, kind):
    p = only(problems_of(write(text)))
    assert "top level must be a mapping" in p.message and kind in p.message and p.line == 1


def test_two_documents(write):
    p = only(problems_of(write(MINIMAL + "---\nname: second\n")))
    assert "not valid YAML" in p.message and p.line == 14


def test_missing_file(tmp_path):
    p = only(problems_of(tmp_path / "nope.yaml"))
    assert "no such file" in p.message


def test_directory(tmp_path):
    p = only(problems_of(tmp_path))
    assert "not a file" in p.message


def test_alias_bomb_is_bounded(write):
    lines = ["a0: &a0 [x, x, x, x, x, x, x, x, x, x]"]
    for i in range(1, 9):
        lines.append(f"a{i}: &a{i} [" + ", ".join([f"*a{i - 1}"] * 10) + "]")
    p = only(problems_of(write("\n".join(lines) + "\n")))
    assert "more than" in p.message and "values" in p.message


def test_recursive_alias(write):
    problems = problems_of(write(MINIMAL + "metadata: &m\n  self: *m\n"))
    assert any("refers to a value that contains it" in p.message for p in problems)


@pytest.mark.parametrize("depth", [60, 1200])
def test_deep_nesting(write, depth):
    problems = problems_of(write("metadata: " + "[" * depth + "]" * depth + "\n"))
    assert any("nest" in p.message for p in problems)


def test_python_tags_are_refused(write):
    problems = problems_of(write(MINIMAL + "metadata: {x: !!python/object:os.system ls}\n"))
    assert any(p.key == "metadata.x" and "cannot be read" in p.message for p in problems)


def test_yes_no_keys_are_explained(write):
    p = only(problems_of(write(MINIMAL + "metadata: {yes: 1}\n")))
    assert "is not text" in p.message and "quote" in p.message


def test_shutter_on_is_explained(write):
    text = MINIMAL.replace("steps:\n", "steps:\n  - kind: set-light\n    shutter: on\n")
    p = only(problems_of(write(text)))
    assert p.key == "steps[0].shutter" and "write open or closed" in p.message


def test_a_protocol_cannot_name_an_address(write):
    text = MINIMAL + ("metadata:\n  smu: TCPIP0::192.0.2.7::5025::SOCKET\n"
                      "address: TCPIP0::127.0.0.1::5025::SOCKET\n")
    problems = problems_of(write(text))
    assert {p.key for p in problems} == {"metadata.smu", "address"}
    assert all("bench profile" in p.message for p in problems)


def test_not_a_source():
    p = only(problems_of(12345))
    assert "expected a file path or YAML text" in p.message
