"""The one exception type of the extraction package."""
from __future__ import annotations


class FitError(ValueError):
    """The data cannot be fitted or analysed as given (bad values, too few points, ...).

    The message is a single line meant for the person who recorded the curve.
    """
