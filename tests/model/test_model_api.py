"""Behaviour of the public API: immutability, shapes, broadcasting, limits."""
import dataclasses

import numpy as np
import pytest
from scipy import constants

from tracer.model import (
    CurveFigures,
    DoubleDiode,
    SingleDiode,
    double_diode_current,
    double_diode_figures,
    single_diode_current,
    single_diode_figures,
    single_diode_voltage,
)

MODULE = SingleDiode(photocurrent_a=9.0, saturation_current_a=2e-10, ideality=1.1,
                     series_resistance_ohm=0.35, shunt_resistance_ohm=400.0,
                     temperature_k=318.15, cells_in_series=60)
DOUBLE = DoubleDiode(photocurrent_a=9.0, saturation_current_1_a=1e-12,
                     saturation_current_2_a=1e-7, ideality_1=1.0, ideality_2=2.0,
                     series_resistance_ohm=0.35, shunt_resistance_ohm=400.0,
                     temperature_k=318.15, cells_in_series=60)


@pytest.mark.parametrize("model", [MODULE, DOUBLE])
def test_models_are_frozen_and_replaceable(model):
    with pytest.raises(dataclasses.FrozenInstanceError):
        model.photocurrent_a = 1.0
    changed = model.replace(photocurrent_a=5.0)
    assert changed.photocurrent_a == 5.0 and model.photocurrent_a == 9.0
    assert type(changed)(**changed.parameters()) == changed
    assert list(model.parameters()) == [f.name for f in dataclasses.fields(model)]


def test_parameter_names():
    assert set(MODULE.parameters()) == {
        "photocurrent_a", "saturation_current_a", "ideality", "series_resistance_ohm",
        "shunt_resistance_ohm", "temperature_k", "cells_in_series"}
    assert set(DOUBLE.parameters()) == {
        "photocurrent_a", "saturation_current_1_a", "saturation_current_2_a", "ideality_1",
        "ideality_2", "series_resistance_ohm", "shunt_resistance_ohm", "temperature_k",
        "cells_in_series"}


def test_modified_ideality_uses_codata_thermal_voltage():
    # a = n*Ns*k*T/q with k, q from CODATA via scipy.constants
    expected = 1.1 * 60 * constants.k * 318.15 / constants.e
    assert MODULE.n_ns_vt_v == pytest.approx(expected, rel=1e-15)


@pytest.mark.parametrize("model", [MODULE, DOUBLE])
def test_scalar_in_float_out_and_shapes_kept(model):
    assert isinstance(model.current(1.0), float)
    assert isinstance(model.voltage(1.0), float)
    v = np.linspace(0, 30, 12).reshape(3, 4)
    assert model.current(v).shape == (3, 4)
    assert model.voltage(v / 10).shape == (3, 4)
    f = model.figures()
    assert isinstance(f, CurveFigures)
    assert all(isinstance(getattr(f, k), float) for k in
               ("isc_a", "voc_v", "imp_a", "vmp_v", "pmax_w", "ff"))
    with pytest.raises(dataclasses.FrozenInstanceError):
        f.pmax_w = 0.0
    voltage, current = model.curve(50)
    assert voltage[0] == 0.0 and voltage[-1] == pytest.approx(f.voc_v)
    assert current[0] == pytest.approx(f.isc_a) and abs(current[-1]) < 1e-9 * f.isc_a


def test_functional_forms_broadcast_over_parameter_sets():
    # k parameter sets of shape (k, 1) against m voltages of shape (m,) -> (k, m);
    # each row must equal the scalar-parameter evaluation
    iph = np.array([[1.0], [5.0], [9.0]])
    rs = np.array([[0.0], [0.2], [1.0]])
    v = np.linspace(-2, 40, 25)
    grid = single_diode_current(v, iph, 1e-10, 1.7, rs, 300.0)
    assert grid.shape == (3, 25)
    for row in range(3):
        np.testing.assert_array_equal(
            grid[row], single_diode_current(v, iph[row, 0], 1e-10, 1.7, rs[row, 0], 300.0))
    dd = double_diode_current(v, iph, 1e-12, 1e-7, 1.7, 3.4, rs, 300.0)
    assert dd.shape == (3, 25)
    for row in range(3):
        np.testing.assert_allclose(
            dd[row], double_diode_current(v, iph[row, 0], 1e-12, 1e-7, 1.7, 3.4,
                                          rs[row, 0], 300.0), rtol=1e-13, atol=1e-13)
    figs = single_diode_figures(iph[:, 0], 1e-10, 1.7, rs[:, 0], 300.0)
    assert figs.pmax_w.shape == (3,)
    assert double_diode_figures(iph[:, 0], 1e-12, 1e-7, 1.7, 3.4, rs[:, 0], 300.0
                                ).pmax_w.shape == (3,)


def test_series_resistance_zero_is_the_limit_of_small_series_resistance():
    # the Rs = 0 branch is explicit; it must join the Lambert W branch continuously
    v = np.linspace(-1, 40, 200)
    exact = MODULE.replace(series_resistance_ohm=0.0).current(v)
    near = MODULE.replace(series_resistance_ohm=1e-9).current(v)
    np.testing.assert_allclose(near, exact, rtol=1e-6, atol=1e-9)
    mixed = single_diode_current(v[:, None], 9.0, 2e-10, MODULE.n_ns_vt_v,
                                 np.array([0.0, 1e-9]), 400.0)
    np.testing.assert_array_equal(mixed[:, 0], exact)


def test_infinite_shunt_is_the_limit_of_large_shunt():
    i = np.linspace(-20, 8.99, 200)
    exact = MODULE.replace(shunt_resistance_ohm=np.inf).voltage(i)
    near = MODULE.replace(shunt_resistance_ohm=1e13).voltage(i)
    np.testing.assert_allclose(near, exact, rtol=1e-9)
    # the no-shunt limit is exact and free of NaN for any current
    v = single_diode_voltage(np.array([9.0 + 1e-9, 50.0]), 9.0, 2e-10, 1.0, 0.1, np.inf)
    assert np.all(v == -np.inf)  # no finite voltage drives I >= Iph + I0 without a shunt
    d = DOUBLE.replace(shunt_resistance_ohm=np.inf).voltage(np.array([9.5, 8.0]))
    assert d[0] == -np.inf and np.isfinite(d[1])
