"""Tables shipped with the tracer, each with a provenance note beside it (``*.md``).

Only this module reads the files, so the pure packages (``tracer.stc``) stay free of I/O.

- ``am15g_astm_g173.csv``: ASTM G173-03 AM1.5 global tilted reference spectrum
  (see ``am15g_astm_g173.md``).
"""
from __future__ import annotations

import functools
import io
from importlib import resources

import numpy as np

__all__ = ["am15g_reference_spectrum"]


@functools.lru_cache(maxsize=1)
def _am15g_table() -> tuple[np.ndarray, np.ndarray]:
    text = resources.files(__name__).joinpath("am15g_astm_g173.csv").read_text("ascii")
    table = np.loadtxt(io.StringIO(text), delimiter=",", comments="#", skiprows=2)
    wavelength_nm = np.ascontiguousarray(table[:, 0])
    irradiance = np.ascontiguousarray(table[:, 1])
    wavelength_nm.setflags(write=False)
    irradiance.setflags(write=False)
    return wavelength_nm, irradiance


def am15g_reference_spectrum() -> tuple[np.ndarray, np.ndarray]:
    """ASTM G173-03 global tilt spectrum: ``(wavelength_nm, spectral_irradiance_w_m2_nm)``.

    Read-only arrays, 2002 rows, 280-4000 nm; integral 1000.37 W/m^2 (trapezoid).
    """
    return _am15g_table()
