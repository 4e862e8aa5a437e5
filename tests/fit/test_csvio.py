"""CSV reader for I-V points."""
import numpy as np
import pytest

from tracer.fit import FitError
from tracer.fit.csvio import read_csv_columns, read_iv_csv


def _write(tmp_path, text, name="curve.csv"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_reads_columns_in_any_order_with_comments_and_extras(tmp_path):
    path = _write(tmp_path, "# sweep 1\n\ntime_s, current_a ,voltage_v\n"
                            "0,1.5,0.0\n# mid-sweep note\n1,1.25,0.25\n2,-0.5,0.5\n")
    v, i = read_iv_csv(path)
    np.testing.assert_array_equal(v, [0.0, 0.25, 0.5])
    np.testing.assert_array_equal(i, [1.5, 1.25, -0.5])
    cols = read_csv_columns(path, ["time_s"])
    np.testing.assert_array_equal(cols["time_s"], [0, 1, 2])


@pytest.mark.parametrize("text, match", [
    ("", "empty file"),
    ("# only a comment\n", "empty file"),
    ("voltage_v,current_a\n", "no data rows"),
    ("volts,amps\n0,1\n", "lacks column.*voltage_v, current_a"),
    ("voltage_v,current_a\n0,1\n0.1,abc\n", r":3: current_a is not a number: 'abc'"),
    ("voltage_v,current_a\n0,1\n0.1,nan\n", r":3: current_a is 'nan'"),
    ("voltage_v,current_a\n0,1\n0.1\n", r":3: 1 field\(s\), column current_a is missing"),
    ("voltage_v,current_a\n0,1\n0.1,inf\n", "not a finite number"),
])
def test_malformed_files(tmp_path, text, match):
    with pytest.raises(FitError, match=match):
        read_iv_csv(_write(tmp_path, text))


def test_missing_file_and_directory(tmp_path):
    with pytest.raises(FitError, match="no such file"):
        read_iv_csv(tmp_path / "nope.csv")
    with pytest.raises(FitError, match="directory"):
        read_iv_csv(tmp_path)


def test_binary_file(tmp_path):
    path = tmp_path / "x.csv"
    path.write_bytes(b"\xff\xfe\x00\x81garbage")
    with pytest.raises(FitError, match="not a text file"):
        read_iv_csv(path)


def test_pure_fit_modules_do_not_import_the_reader():
    # Layer rule (DEVELOPERS.md): tracer.fit's numerics do no I/O; only csvio reads files.
    import subprocess
    import sys

    code = ("import sys, tracer.fit; "
            "print('tracer.fit.csvio' in sys.modules, 'csv' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out[0] == "False"
