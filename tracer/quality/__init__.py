"""Keep-or-re-measure verdict of a sweep, with every reason. Pure numpy/scipy, no I/O.

:func:`assess_sweep` takes a :class:`SweepEvidence` and :class:`QualityThresholds` and
returns a :class:`QualityVerdict` (``verdict``, ``reasons``, ``checks``, ``skipped``,
``to_dict()``). The measures it uses are in :mod:`tracer.quality.checks`.
"""
from tracer.quality.checks import (
    INSTABILITY_CLASS_LIMITS,
    HysteresisIndices,
    durbin_watson,
    hysteresis_indices,
    runs_test,
    shunt_from_slope,
    temporal_instability,
)
from tracer.quality.verdict import (
    KEEP,
    REMEASURE,
    CheckOutcome,
    QualityThresholds,
    QualityVerdict,
    Reason,
    SweepEvidence,
    assess_sweep,
)

__all__ = [
    "INSTABILITY_CLASS_LIMITS", "KEEP", "REMEASURE", "CheckOutcome", "HysteresisIndices",
    "QualityThresholds", "QualityVerdict", "Reason", "SweepEvidence", "assess_sweep",
    "durbin_watson", "hysteresis_indices", "runs_test", "shunt_from_slope",
    "temporal_instability",
]
