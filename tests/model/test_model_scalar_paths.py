"""One parameter set is solved in plain floats (tracer.model._scalar); a batch of sets by
the vectorised solver. Both must give the same figures and currents, and both must match
an independent solver: ``scipy.optimize.brentq`` on the implicit equation for Voc, Isc
and the current, ``scipy.optimize.minimize_scalar`` (bounded Brent) on -V*I(V) for the
maximum power point.
"""
import numpy as np
import pytest
from scipy.optimize import brentq, minimize_scalar

from tracer.model import (
    DoubleDiode,
    double_diode_current,
    double_diode_figures,
    single_diode_figures,
    thermal_voltage,
)

FIELDS = ("isc_a", "voc_v", "imp_a", "vmp_v", "pmax_w", "ff")


def _random_sets(count, seed):
    """Parameter sets over wide ranges (invented for the test): light and dark, one cell
    and 60, with and without series and shunt resistance, second diode or none."""
    rng = np.random.default_rng(seed)
    vt = thermal_voltage(298.15)
    sets = []
    for _ in range(count):
        ns = int(rng.choice([1, 60]))
        sets.append(dict(
            photocurrent_a=float(rng.choice([0.0, 10 ** rng.uniform(-3, 1)])),
            saturation_current_1_a=float(10 ** rng.uniform(-20, -6)),
            saturation_current_2_a=float(rng.choice([0.0, 10 ** rng.uniform(-12, -3)])),
            n_ns_vt_1_v=float(rng.uniform(0.3, 3.0) * ns * vt),
            n_ns_vt_2_v=float(rng.uniform(0.5, 30.0) * ns * vt),
            series_resistance_ohm=float(rng.choice([0.0, 10 ** rng.uniform(-4, 1)])),
            shunt_resistance_ohm=float(rng.choice([np.inf, 10 ** rng.uniform(-1, 6)]))))
    return sets


def _args(p):
    return (p["photocurrent_a"], p["saturation_current_1_a"], p["saturation_current_2_a"],
            p["n_ns_vt_1_v"], p["n_ns_vt_2_v"], p["series_resistance_ohm"],
            p["shunt_resistance_ohm"])


def _close(a, b, rel, scale=0.0):
    return (np.isnan(a) and np.isnan(b)) or abs(a - b) <= rel * max(abs(b), scale)


def test_one_set_matches_the_batch_solver():
    # the same parameter sets, one at a time (scalar path) and as one batch (vectorised)
    sets = _random_sets(300, seed=11)
    batch = [np.array([p[k] for p in sets]) for k in ("photocurrent_a",
             "saturation_current_1_a", "saturation_current_2_a", "n_ns_vt_1_v",
             "n_ns_vt_2_v", "series_resistance_ohm", "shunt_resistance_ohm")]
    together = double_diode_figures(*batch)
    single_together = single_diode_figures(batch[0], batch[1], batch[3], batch[5], batch[6])
    for k, p in enumerate(sets):
        alone = double_diode_figures(*_args(p))
        single_alone = single_diode_figures(p["photocurrent_a"], p["saturation_current_1_a"],
                                            p["n_ns_vt_1_v"], p["series_resistance_ohm"],
                                            p["shunt_resistance_ohm"])
        for name in FIELDS:
            # rounding only: libm and numpy's exp/log differ in the last bit
            assert _close(getattr(alone, name), getattr(together, name)[k], 1e-13), (p, name)
            assert _close(getattr(single_alone, name), getattr(single_together, name)[k],
                          1e-13), (p, name)


def _brentq_current(p, v):
    a1, a2, rs = p["n_ns_vt_1_v"], p["n_ns_vt_2_v"], p["series_resistance_ohm"]

    def f(i):
        vd = v + i * rs
        return (p["photocurrent_a"] - p["saturation_current_1_a"] * np.expm1(vd / a1)
                - p["saturation_current_2_a"] * np.expm1(vd / a2)
                - vd / p["shunt_resistance_ohm"] - i)

    i_hi = p["photocurrent_a"] + abs(v) / p["shunt_resistance_ohm"] + 1.0
    i_lo = -(abs(v) + 10.0) / rs
    i_hi = min(i_hi, -v / rs + 50.0 * max(a1, a2) / rs)   # keeps exp finite
    return brentq(f, i_lo, i_hi, xtol=1e-300, rtol=8.9e-16, maxiter=500)


@pytest.mark.parametrize("seed", [21, 22])
def test_one_set_matches_brentq_and_brent(seed):
    # lit cells with a second diode and series resistance: the cases the scalar Voc, Isc,
    # current and maximum power point paths take
    for p in _random_sets(40, seed):
        p["photocurrent_a"] = max(p["photocurrent_a"], 1e-3)
        p["saturation_current_2_a"] = max(p["saturation_current_2_a"], 1e-12)
        p["series_resistance_ohm"] = max(p["series_resistance_ohm"], 1e-4)
        f = double_diode_figures(*_args(p))
        model_current = lambda v: double_diode_current(v, *_args(p))  # noqa: E731
        scale = p["photocurrent_a"]
        assert f.isc_a == pytest.approx(_brentq_current(p, 0.0), rel=1e-12, abs=1e-14 * scale)
        assert abs(_brentq_current(p, f.voc_v)) <= 1e-10 * scale
        v = 0.7 * f.voc_v
        assert model_current(v) == pytest.approx(_brentq_current(p, v), rel=1e-11,
                                                 abs=1e-13 * scale)
        ref = minimize_scalar(lambda x: -x * model_current(x), bounds=(0.0, f.voc_v),
                              method="bounded", options={"xatol": 1e-10 * f.voc_v})
        assert f.pmax_w == pytest.approx(-ref.fun, rel=1e-9)
        assert f.pmax_w >= -ref.fun * (1 - 1e-14)


def test_double_diode_class_uses_the_same_paths():
    # the dataclass route (one set) agrees with the functional batch route
    model = DoubleDiode(0.0384, 1.8e-12, 1.56e-8, 1.005, 2.32, 0.592, 1394.0,
                        temperature_k=298.18)
    v = np.linspace(-0.1, 0.65, 101)
    batch = double_diode_current(v, *[np.full(v.size, x) for x in (
        model.photocurrent_a, model.saturation_current_1_a, model.saturation_current_2_a,
        model.n_ns_vt_1_v, model.n_ns_vt_2_v, model.series_resistance_ohm,
        model.shunt_resistance_ohm)])
    np.testing.assert_allclose(model.current(v), batch, rtol=1e-12,
                               atol=1e-14 * model.photocurrent_a)
    # one voltage (the scalar current path) against the same voltage inside the batch
    assert model.current(float(v[60])) == pytest.approx(batch[60], rel=1e-12,
                                                        abs=1e-14 * model.photocurrent_a)
