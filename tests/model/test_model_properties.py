"""Property tests (hypothesis) over wide parameter ranges.

Properties that follow from the equations themselves: the current falls monotonically
with voltage (the implicit equation's residual is monotone), current and voltage are
inverse functions, and nothing is NaN or overflows over I0 = 1e-20..1e-3 A,
n = 0.8..3, Ns = 1..144 and |V| up to 1000 V.
"""
import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tracer.model import DoubleDiode, SingleDiode

FLOAT_MAX_LOG = np.log(np.finfo(float).max)
SETTINGS = settings(max_examples=60, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow])


def log_uniform(lo_exp, hi_exp):
    return st.floats(lo_exp, hi_exp).map(lambda e: 10.0**e)


photocurrents = st.one_of(st.just(0.0), log_uniform(-6, 1.5))
series = st.one_of(st.just(0.0), log_uniform(-4, 2))
shunts = st.one_of(st.just(np.inf), log_uniform(-1, 8))
idealities = st.floats(0.8, 3.0)
cells = st.integers(1, 144)
temperatures = st.floats(200.0, 400.0)

single_diodes = st.builds(
    SingleDiode, photocurrent_a=photocurrents, saturation_current_a=log_uniform(-20, -3),
    ideality=idealities, series_resistance_ohm=series, shunt_resistance_ohm=shunts,
    temperature_k=temperatures, cells_in_series=cells)

double_diodes = st.builds(
    DoubleDiode, photocurrent_a=photocurrents, saturation_current_1_a=log_uniform(-20, -3),
    saturation_current_2_a=st.one_of(st.just(0.0), log_uniform(-20, -3)),
    ideality_1=idealities, ideality_2=idealities, series_resistance_ohm=series,
    shunt_resistance_ohm=shunts, temperature_k=temperatures, cells_in_series=cells)

VOLTAGES = np.concatenate([np.linspace(-1000.0, 1000.0, 401), np.linspace(-5, 5, 201)])
VOLTAGES.sort()


def _may_overflow(model, v):
    """Where Rs = 0 and the true current is beyond the float range (explicit exp)."""
    if model.series_resistance_ohm > 0:
        return np.zeros(v.shape, dtype=bool)
    if isinstance(model, SingleDiode):
        terms = [(model.saturation_current_a, model.n_ns_vt_v)]
    else:
        terms = [(model.saturation_current_1_a, model.n_ns_vt_1_v),
                 (model.saturation_current_2_a, model.n_ns_vt_2_v)]
    return np.any([np.log(i0) + v / a > FLOAT_MAX_LOG - 1 for i0, a in terms if i0 > 0],
                  axis=0)


def _check_monotone_and_finite(model):
    with np.errstate(over="raise", invalid="raise", divide="raise"):  # none hidden
        try:
            current = model.current(VOLTAGES)
        except FloatingPointError as exc:  # pragma: no cover - reported as failure
            raise AssertionError(f"floating-point error: {exc}") from exc
    assert not np.any(np.isnan(current))
    finite = np.isfinite(current)
    assert np.all(finite | _may_overflow(model, VOLTAGES))
    assert np.all(current[~finite] == -np.inf)
    # non-increasing, up to rounding of values of that size
    c = current[finite]
    slack = 8e-16 * (np.maximum(np.abs(c[:-1]), np.abs(c[1:])) + model.photocurrent_a)
    assert np.all(np.diff(c) <= slack)


def _check_round_trip(model, photocurrent, leak):
    """current(voltage(i)) == i over currents from forward to reverse."""
    scale = photocurrent + leak + 1e-3
    currents = np.concatenate([photocurrent * np.linspace(-1.0, 1.0, 41),
                               -scale * np.logspace(-6, 3, 40),
                               photocurrent + scale * np.logspace(-6, 2, 20)])
    voltages = model.voltage(currents)
    assert not np.any(np.isnan(voltages))
    # -inf only where no finite voltage exists: no shunt and I >= Iph + sum(I0)
    unreachable = voltages == -np.inf
    assert np.all(currents[unreachable] >= photocurrent + leak * (1 - 1e-12))
    if model.shunt_resistance_ohm < np.inf:
        assert not np.any(unreachable)
    ok = np.isfinite(voltages) & (np.abs(voltages) <= 1e6)
    back = model.current(voltages[ok])
    expected = currents[ok]
    tolerance = 1e-9 * (np.abs(expected) + photocurrent + leak)
    assert np.all(np.abs(back - expected) <= tolerance), np.max(
        np.abs(back - expected) / tolerance)


@SETTINGS
@given(single_diodes)
def test_single_diode_current_monotone_and_finite(model):
    _check_monotone_and_finite(model)


@SETTINGS
@given(single_diodes)
def test_single_diode_voltage_inverts_current(model):
    _check_round_trip(model, model.photocurrent_a, model.saturation_current_a)


@SETTINGS
@given(single_diodes)
def test_single_diode_figures_finite_and_ordered(model):
    f = model.figures()
    values = np.array([f.isc_a, f.voc_v, f.imp_a, f.vmp_v, f.pmax_w])
    assert np.all(np.isfinite(values))
    if model.photocurrent_a > 0:
        assert 0 < f.imp_a <= f.isc_a and 0 < f.vmp_v <= f.voc_v
        assert 0 < f.ff < 1


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(double_diodes)
def test_double_diode_current_monotone_and_finite(model):
    _check_monotone_and_finite(model)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(double_diodes)
def test_double_diode_voltage_inverts_current(model):
    _check_round_trip(model, model.photocurrent_a,
                      model.saturation_current_1_a + model.saturation_current_2_a)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(double_diodes)
def test_double_diode_figures_finite_and_ordered(model):
    f = model.figures()
    assert np.all(np.isfinite([f.isc_a, f.voc_v, f.imp_a, f.vmp_v, f.pmax_w]))
    if model.photocurrent_a > 0:
        assert 0 < f.imp_a <= f.isc_a and 0 < f.vmp_v <= f.voc_v
