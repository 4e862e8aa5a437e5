"""Bad parameters raise ValueError naming the parameter, its value and the allowed range."""
import dataclasses
import math
import re

import numpy as np
import pytest

from tracer.model import (
    DoubleDiode,
    SingleDiode,
    double_diode_current,
    single_diode_current,
    single_diode_voltage,
)

GOOD_SINGLE = dict(photocurrent_a=9.0, saturation_current_a=1e-10, ideality=1.2,
                   series_resistance_ohm=0.005, shunt_resistance_ohm=100.0,
                   temperature_k=298.15, cells_in_series=1)
GOOD_DOUBLE = dict(photocurrent_a=9.0, saturation_current_1_a=1e-12,
                   saturation_current_2_a=1e-8, ideality_1=1.0, ideality_2=2.0,
                   series_resistance_ohm=0.005, shunt_resistance_ohm=100.0,
                   temperature_k=298.15, cells_in_series=1)

NAN = float("nan")
# (parameter, bad value, text of the allowed range that the message must contain)
SINGLE_CASES = [
    ("photocurrent_a", -0.1, "0 <= photocurrent_a < inf [A]"),
    ("photocurrent_a", NAN, "0 <= photocurrent_a < inf [A]"),
    ("saturation_current_a", -1e-12, "0 < saturation_current_a < inf [A]"),
    ("saturation_current_a", 0.0, "0 < saturation_current_a < inf [A]"),
    ("ideality", 0.0, "0 < ideality < inf [1]"),
    ("ideality", -1.0, "0 < ideality < inf [1]"),
    ("ideality", NAN, "0 < ideality < inf [1]"),
    ("series_resistance_ohm", -0.01, "0 <= series_resistance_ohm < inf [ohm]"),
    ("series_resistance_ohm", math.inf, "0 <= series_resistance_ohm < inf [ohm]"),
    ("shunt_resistance_ohm", 0.0, "0 < shunt_resistance_ohm <= inf [ohm]"),
    ("shunt_resistance_ohm", -5.0, "0 < shunt_resistance_ohm <= inf [ohm]"),
    ("shunt_resistance_ohm", NAN, "0 < shunt_resistance_ohm <= inf [ohm]"),
    ("temperature_k", 0.0, "0 < temperature_k < inf [K]"),
    ("temperature_k", -20.0, "0 < temperature_k < inf [K]"),
    ("cells_in_series", 0, "integer cells_in_series >= 1"),
    ("cells_in_series", 1.5, "integer cells_in_series >= 1"),
    ("cells_in_series", True, "integer cells_in_series >= 1"),
]
DOUBLE_CASES = [
    ("saturation_current_1_a", 0.0, "0 < saturation_current_1_a < inf [A]"),
    ("saturation_current_2_a", -1e-9, "0 <= saturation_current_2_a < inf [A]"),
    ("ideality_1", 0.0, "0 < ideality_1 < inf [1]"),
    ("ideality_2", -2.0, "0 < ideality_2 < inf [1]"),
    ("series_resistance_ohm", -1.0, "0 <= series_resistance_ohm < inf [ohm]"),
    ("photocurrent_a", -1.0, "0 <= photocurrent_a < inf [A]"),
    ("cells_in_series", 0, "integer cells_in_series >= 1"),
]


def _expect_message(name, value, allowed):
    return re.escape(f"{name} = {value!r}") + ".*" + re.escape(allowed)


@pytest.mark.parametrize(("name", "value", "allowed"), SINGLE_CASES)
def test_single_diode_rejects(name, value, allowed):
    with pytest.raises(ValueError, match=_expect_message(name, value, allowed)):
        SingleDiode(**{**GOOD_SINGLE, name: value})


@pytest.mark.parametrize(("name", "value", "allowed"), DOUBLE_CASES)
def test_double_diode_rejects(name, value, allowed):
    with pytest.raises(ValueError, match=_expect_message(name, value, allowed)):
        DoubleDiode(**{**GOOD_DOUBLE, name: value})


def test_replace_validates_again():
    cell = SingleDiode(**GOOD_SINGLE)
    with pytest.raises(ValueError, match="series_resistance_ohm = -1.0"):
        cell.replace(series_resistance_ohm=-1.0)
    with pytest.raises(ValueError, match="ideality = 0.0"):
        dataclasses.replace(cell, ideality=0.0)


def test_functional_forms_reject_bad_values_in_arrays():
    # the first offending element is quoted
    with pytest.raises(ValueError, match=re.escape("n_ns_vt_v = -0.5") + ".*"
                       + re.escape("0 < n_ns_vt_v < inf [V]")):
        single_diode_current(0.1, 9.0, 1e-10, np.array([0.03, -0.5, 0.02]), 0.0, np.inf)
    with pytest.raises(ValueError, match="shunt_resistance_ohm = 0.0"):
        single_diode_voltage(1.0, 9.0, 1e-10, 0.03, 0.0, np.array([1.0, 0.0]))
    with pytest.raises(ValueError, match="saturation_current_2_a = -1e-09"):
        double_diode_current(0.1, 9.0, 1e-12, -1e-9, 0.026, 0.052, 0.0, np.inf)


def test_non_numbers_are_rejected():
    with pytest.raises(ValueError, match="photocurrent_a"):
        SingleDiode(**{**GOOD_SINGLE, "photocurrent_a": "9"})


def test_valid_limits_are_accepted():
    # Rs = 0, Rsh = inf, Iph = 0 (dark) and I02 = 0 are valid models
    SingleDiode(**{**GOOD_SINGLE, "series_resistance_ohm": 0.0,
                   "shunt_resistance_ohm": math.inf, "photocurrent_a": 0.0})
    DoubleDiode(**{**GOOD_DOUBLE, "saturation_current_2_a": 0.0,
                   "series_resistance_ohm": 0.0, "shunt_resistance_ohm": math.inf})
    SingleDiode(**{**GOOD_SINGLE, "cells_in_series": 60.0})  # integral float
