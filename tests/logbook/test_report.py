"""The run report: numbers shown with their uncertainty, summaries of analysis results."""
from __future__ import annotations

import pytest

from tracer.logbook.report import format_with_uncertainty, sweep_summary


@pytest.mark.parametrize("value,u,scale,unit,text", [
    # JCGM 100:2008 (GUM) 7.2.6: the uncertainty with at most two significant digits, the
    # value rounded to the same decimal place.
    (1.0165, 0.0028, 1.0, "", "1.0165 ± 0.0028"),
    (0.038358, 0.000014, 1e3, "mA", "38.358 ± 0.014 mA"),
    (1372.196, 0.093, 1.0, "ohm", "1372.196 ± 0.093 ohm"),
    (2.4e-12, 1.6e-13, None, "A", "2.400e-12 ± 1.6e-13 A"),
    (0.5, None, 1.0, "ohm", "0.5 ohm"),
    (None, 0.1, 1.0, "", "-"),
    # an undetermined parameter is not dressed in fixed-point digits
    (2.0, 4.4e31, 1.0, "", "2 ± 4.4e+31"),
])
def test_value_with_uncertainty(value, u, scale, unit, text):
    assert format_with_uncertainty(value, u, scale=scale, unit=unit) == text


def test_summary_of_an_analysis_result_and_of_nothing():
    result = {
        "data_figures": {"isc_a": 0.038, "voc_v": 0.61, "pmax_w": 0.0183, "ff": 0.79},
        "efficiency": 0.183, "conditions": {"irradiance_w_m2": 1000.0, "temperature_c": 25.1},
        "fits": {"single": {"photocurrent_a": 0.038, "ideality": 1.02, "rmse_a": 5e-5,
                            "uncertainty": {"photocurrent_a": 1e-5, "ideality": 0.003}}},
        "stc": {"primary": "diode_model", "pmax_w": 0.0184,
                "methods": [{"method": "diode_model", "figures": {"isc_a": 0.0379, "ff": 0.788}}],
                "pmax_budget": {"expanded_uncertainty": 0.0004, "coverage_factor": 2.0}},
        "verdict": {"verdict": "keep", "reasons": []},
    }
    s = sweep_summary(result)
    assert (s["isc_a"], s["voc_v"], s["ff"], s["efficiency"]) == (0.038, 0.61, 0.79, 0.183)
    assert s["fits"]["single"]["parameters"]["ideality"] == {"value": 1.02, "uncertainty": 0.003}
    assert s["stc"]["method"] == "diode_model" and s["stc"]["pmax_w"] == 0.0184
    assert s["stc"]["pmax_expanded_uncertainty_w"] == 0.0004 and s["verdict"] == "keep"
    assert sweep_summary(None) == {} and sweep_summary({"ok": False, "error": "x"})["isc_a"] is None
