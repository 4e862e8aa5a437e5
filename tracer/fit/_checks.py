"""Input validation shared by the data-figure and the diode-fit functions."""
from __future__ import annotations

import numpy as np

from tracer.fit.errors import FitError


def as_curve(voltage_v, current_a, *, min_points: int, what: str) -> tuple[np.ndarray, np.ndarray]:
    """Return (V, I) as 1-D float arrays after checking them; raise :class:`FitError`.

    ``min_points`` is the smallest number of points accepted; ``what`` names the
    operation in the messages ("a single-diode fit", ...).
    """
    try:
        v = np.asarray(voltage_v, dtype=float)
        i = np.asarray(current_a, dtype=float)
    except (TypeError, ValueError) as exc:
        raise FitError(f"voltage and current must be numbers: {exc}") from None
    if v.ndim != 1 or i.ndim != 1:
        raise FitError(
            f"voltage and current must be one-dimensional, got shapes {v.shape} and {i.shape}"
        )
    if v.size != i.size:
        raise FitError(f"voltage has {v.size} points but current has {i.size}")
    bad = ~(np.isfinite(v) & np.isfinite(i))
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise FitError(
            f"{int(bad.sum())} point(s) are NaN or infinite (first at index {first}); "
            "remove them before fitting"
        )
    if v.size < min_points:
        raise FitError(
            f"{what} needs at least {min_points} points, got {v.size}"
        )
    if np.ptp(v) <= 0.0:
        raise FitError(
            f"all {v.size} points are at the same voltage ({v[0]:g} V); a curve needs a voltage sweep"
        )
    n_distinct = np.unique(v).size
    if n_distinct < min_points:
        raise FitError(
            f"{what} needs at least {min_points} distinct voltages, got {n_distinct}"
        )
    return v, i
