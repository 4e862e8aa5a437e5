"""The simulator's two root finders agree with each other on random devices and operating
points (the scalar safeguarded Newton of the SMU path and the vectorised bisection), and
the compliance clamp holds; the absolute check against pvlib is in test_physics_vs_pvlib."""
from __future__ import annotations

import math

from hypothesis import given, settings, strategies as st

from simulated_instrument.cell_physics import CellParameters, at_conditions, current_at_voltage, operating_point

cells = st.builds(
    CellParameters,
    photocurrent_a=st.floats(0.0, 0.5),
    saturation_current_1_a=st.floats(1e-16, 1e-8),
    ideality_1=st.floats(0.9, 2.0),
    saturation_current_2_a=st.floats(0.0, 1e-6),
    ideality_2=st.floats(1.5, 3.0),
    series_resistance_ohm=st.floats(0.0, 30.0),
    shunt_resistance_ohm=st.floats(5.0, 1e6),
    cells_in_series=st.integers(1, 60),
    breakdown_voltage_v=st.floats(-80.0, -3.0),
    breakdown_current_a=st.floats(0.0, 1e-2),
    breakdown_slope_v=st.floats(0.1, 3.0),
)


@settings(max_examples=60, deadline=None)
@given(cell=cells, g=st.floats(0.0, 1500.0), t_c=st.floats(-10.0, 90.0),
       level=st.floats(-60.0, 60.0), limit=st.floats(1e-4, 3.0), remote=st.booleans(),
       leads=st.floats(0.0, 2.0))
def test_voltage_source_agrees_with_bisection_and_respects_the_clamp(cell, g, t_c, level, limit, remote, leads):
    c = at_conditions(cell, g, t_c)
    p = operating_point(c, mode="VOLT", level=level, limit=limit, lead_resistance_ohm=leads, remote_sense=remote)
    assert abs(p.load_current_a) <= limit * (1 + 1e-9)
    i_cell = float(current_at_voltage(c, p.cell_voltage_v)[0])
    assert math.isclose(-i_cell, p.load_current_a, rel_tol=1e-8, abs_tol=1e-12)
    assert math.isclose(p.terminal_voltage_v, p.cell_voltage_v + p.load_current_a * leads, rel_tol=1e-12, abs_tol=1e-12)
    regulated = p.cell_voltage_v if remote else p.terminal_voltage_v
    if p.in_compliance:
        # the operating point moved along the device's curve to where |I| is the limit
        assert math.isclose(abs(p.load_current_a), limit, rel_tol=1e-9)
    else:
        assert math.isclose(regulated, level, rel_tol=1e-12, abs_tol=1e-12)


@settings(max_examples=60, deadline=None)
@given(cell=cells, g=st.floats(0.0, 1500.0), t_c=st.floats(-10.0, 90.0),
       level=st.floats(-1.0, 1.0), limit=st.floats(0.5, 200.0), remote=st.booleans())
def test_current_source_agrees_with_bisection_and_respects_the_clamp(cell, g, t_c, level, limit, remote):
    c = at_conditions(cell, g, t_c)
    p = operating_point(c, mode="CURR", level=level, limit=limit, lead_resistance_ohm=0.3, remote_sense=remote)
    regulated = p.cell_voltage_v if remote else p.terminal_voltage_v
    assert abs(regulated) <= limit * (1 + 1e-9)
    i_cell = float(current_at_voltage(c, p.cell_voltage_v)[0])
    assert math.isclose(-i_cell, p.load_current_a, rel_tol=1e-8, abs_tol=1e-12)
    if not p.in_compliance:
        assert math.isclose(p.load_current_a, level, rel_tol=1e-9, abs_tol=1e-12)
    else:
        assert math.isclose(abs(regulated), limit, rel_tol=1e-9)
