"""The one place where the SMU's load convention becomes the generator convention.

The source-measure unit reports current flowing *into* the cell's positive terminal (load
convention): an illuminated cell at short circuit reads a negative current. Analysis and
display use the generator convention, in which the photocurrent and Isc are positive.
"""
from __future__ import annotations

import numpy as np


def generator_current(load_current_a):
    """Current in the generator convention [A] from a load-convention reading [A]."""
    if isinstance(load_current_a, (int, float)):
        return -float(load_current_a)
    return -np.asarray(load_current_a, dtype=float)


def load_current(generator_current_a):
    """Inverse of :func:`generator_current` (used only to drive a current source)."""
    if isinstance(generator_current_a, (int, float)):
        return -float(generator_current_a)
    return -np.asarray(generator_current_a, dtype=float)
