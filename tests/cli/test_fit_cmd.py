"""`tracer fit FILE.csv`: JSON or a table; malformed files exit 2 with one line, never a
traceback. Curves by pvlib (i_from_v) so the expected parameters are known."""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from tracer.cli.main import main

pvlib = pytest.importorskip("pvlib")

ROOT = Path(__file__).resolve().parents[2]
#: A cell (invented test values): Iph 9 A, I0 1e-10 A, Rs 4 mOhm, Rsh 50 Ohm, n 1.1.
CELL = dict(photocurrent=9.0, saturation_current=1e-10, resistance_series=0.004,
            resistance_shunt=50.0)
N_IDEAL = 1.1
SINGLE_KEYS = {"photocurrent_a", "saturation_current_a", "ideality", "series_resistance_ohm",
               "shunt_resistance_ohm"}


def _cell_curve(temperature_c=25.0, points=120):
    from tracer.model import thermal_voltage

    vt = thermal_voltage(temperature_c + 273.15)
    v = np.linspace(0.0, 0.72, points)
    i = np.asarray(pvlib.pvsystem.i_from_v(v, nNsVth=N_IDEAL * vt, **CELL), dtype=float)
    return v, i


def _write_curve(path, v, i, header="voltage_v,current_a,temperature_c", extra=True):
    lines = ["# test curve", header]
    for a, b in zip(v, i):
        row = f"{float(a)!r},{float(b)!r}"
        lines.append(row + ",25.0" if extra else row)
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.fixture
def curve_file(tmp_path):
    return _write_curve(tmp_path / "cell.csv", *_cell_curve())


def test_json_output(curve_file, capsys):
    assert main(["fit", str(curve_file), "--json"]) == 0
    out = capsys.readouterr()
    assert out.err == ""
    data = json.loads(out.out)
    assert data["model"] == "single"
    assert SINGLE_KEYS <= set(data)
    assert set(data["uncertainty"]) == SINGLE_KEYS
    assert set(data["figures"]) == {"isc_a", "voc_v", "imp_a", "vmp_v", "pmax_w", "ff"}
    for key in ("rmse_a", "elapsed_s"):
        assert key in data
    # oracle: the pvlib parameters that made the curve
    assert data["ideality"] == pytest.approx(N_IDEAL, rel=1e-6)
    assert data["series_resistance_ohm"] == pytest.approx(0.004, rel=1e-6)
    assert data["shunt_resistance_ohm"] == pytest.approx(50.0, rel=1e-6)


def test_double_json_keys(curve_file, capsys):
    assert main(["fit", str(curve_file), "--json", "--model", "double"]) == 0
    data = json.loads(capsys.readouterr().out)
    keys = {"photocurrent_a", "saturation_current_1_a", "saturation_current_2_a",
            "ideality_1", "ideality_2", "series_resistance_ohm", "shunt_resistance_ohm"}
    assert data["model"] == "double" and keys <= set(data)
    assert set(data["uncertainty"]) == keys


def test_load_convention_and_temperature_and_cells(tmp_path, capsys):
    # The same cell as a 2-cell module measured at 50 degC, stored as an SMU reports it
    # (load convention: current negative at short circuit).
    from tracer.model import thermal_voltage

    vt = thermal_voltage(323.15)
    v = np.linspace(0.0, 2 * 0.68, 150)
    i = np.asarray(pvlib.pvsystem.i_from_v(v, 9.0, 1e-10, 0.008, 100.0, 2 * N_IDEAL * vt),
                   dtype=float)
    path = _write_curve(tmp_path / "load.csv", v, -i, header="voltage_v,current_a",
                        extra=False)
    assert main(["fit", str(path), "--json", "--convention", "load", "--temperature-c", "50",
                 "--cells-in-series", "2"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["ideality"] == pytest.approx(N_IDEAL, rel=1e-6)
    assert data["photocurrent_a"] == pytest.approx(9.0, rel=1e-9)


def test_table_output(curve_file, capsys):
    assert main(["fit", str(curve_file)]) == 0
    out = capsys.readouterr().out
    for label in ("Iph", "I0", "Rs", "Rsh", "RMSE", "Isc", "Voc", "Pmax", "FF", "+/-"):
        assert label in out
    assert " ohm" in out and " A" in out and " W" in out


def test_dark_table(tmp_path, capsys):
    from tracer.model import thermal_voltage

    v = np.linspace(-0.2, 0.7, 100)
    i = np.asarray(pvlib.pvsystem.i_from_v(v, 0.0, 1e-11, 0.02, 5e3,
                                           1.3 * thermal_voltage(298.15)), dtype=float)
    path = _write_curve(tmp_path / "dark.csv", v, i)
    assert main(["fit", str(path), "--dark"]) == 0
    out = capsys.readouterr().out
    assert "dark" in out and "fixed" in out and "ln|I|" in out


@pytest.mark.parametrize("content, match", [
    ("voltage_v,current_a\n0,1\n0.1,abc\n0.2,0.5\n", "not a number"),
    ("voltage_v,current_a\n0,1\n0.1,nan\n0.2,0.5\n", "not a finite number"),
    ("voltage_v,current_a\n0,9\n0.1,8\n0.2,7\n", "at least 6 points"),
    ("voltage_v,current_a\n" + "0.3,1\n" * 10, "same voltage"),
    ("", "empty file"),
    ("volts,amps\n0,1\n", "lacks column"),
])
def test_malformed_files_exit_2(tmp_path, capsys, content, match):
    path = tmp_path / "bad.csv"
    path.write_text(content, encoding="utf-8")
    assert main(["fit", str(path)]) == 2
    out = capsys.readouterr()
    assert out.out == ""
    assert match in out.err
    assert len(out.err.strip().splitlines()) == 1
    assert "Traceback" not in out.err


def test_missing_file_in_a_subprocess(tmp_path):
    # the installed entry point, as a user runs it: one line on stderr, status 2
    result = subprocess.run([sys.executable, "-m", "tracer.cli.main", "fit",
                             str(tmp_path / "missing.csv")], capture_output=True, text=True,
                            cwd=ROOT, timeout=120)
    assert result.returncode == 2
    assert result.stdout == ""
    assert "no such file" in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1
    assert "Traceback" not in result.stderr


def test_bad_options_exit_2(curve_file, capsys):
    assert main(["fit", str(curve_file), "--cells-in-series", "0"]) == 2
    assert "cells-in-series" in capsys.readouterr().err
    assert main(["fit", str(curve_file), "--temperature-c", "-300"]) == 2
    assert "absolute zero" in capsys.readouterr().err
