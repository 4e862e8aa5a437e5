"""Reading I-V points from a CSV file.

This is the only module of ``tracer.fit`` that touches files; the fitting modules never
import it. Format: a header line naming the columns (``voltage_v`` and ``current_a`` are
required, any other column is ignored), one point per line, lines starting with ``#``
are comments, blank lines are skipped. Numbers use a decimal point.
"""
from __future__ import annotations

import csv
import math
import os
from collections.abc import Sequence

import numpy as np

from tracer.fit.errors import FitError

REQUIRED_COLUMNS = ("voltage_v", "current_a")
MAX_FILE_BYTES = 64 << 20   # 64 MiB: ~400,000 exported points; a curve is far smaller
_SHOWN_CHARS = 40        # a field quoted in a message is cut to this length
_SHOWN_FIELDS = 12       # and a header to this many fields


def _shown(text: str) -> str:
    return text if len(text) <= _SHOWN_CHARS else text[:_SHOWN_CHARS] + f"... ({len(text)} chars)"


def read_csv_columns(path: str | os.PathLike, columns: Sequence[str]) -> dict[str, np.ndarray]:
    """Read the named numeric columns of a CSV file into float arrays.

    Raises :class:`FitError` with a one-line message naming the file (and the line) for a
    missing or unreadable file, one larger than :data:`MAX_FILE_BYTES`, a missing header or column, a field that is not a
    number, a NaN or infinite value, or a file without data rows.
    """
    name = os.fspath(path)
    try:
        with open(name, "rb") as handle:
            raw = handle.read(MAX_FILE_BYTES + 1)      # bounded: /dev/zero, a FIFO, a huge file
        if len(raw) > MAX_FILE_BYTES:
            raise FitError(f"{name}: larger than {MAX_FILE_BYTES} bytes, too large for an I-V "
                           f"curve")
        text_lines = raw.decode("utf-8-sig").splitlines()
    except FileNotFoundError:
        raise FitError(f"{name}: no such file") from None
    except IsADirectoryError:
        raise FitError(f"{name}: is a directory, not a CSV file") from None
    except UnicodeDecodeError:
        raise FitError(f"{name}: not a text file (cannot decode as UTF-8)") from None
    except OSError as exc:
        raise FitError(f"{name}: cannot read ({exc.strerror or exc})") from None

    numbered = [(n, line) for n, line in enumerate(text_lines, start=1)
                if line.strip() and not line.lstrip().startswith("#")]
    if not numbered:
        raise FitError(f"{name}: empty file (no header, no data)")
    header_line_no, header_text = numbered[0]
    header = [field.strip() for field in next(csv.reader([header_text]))]
    missing = [c for c in columns if c not in header]
    if missing:
        raise FitError(
            f"{name}:{header_line_no}: header lacks column(s) {', '.join(missing)} "
            f"(found: {', '.join(_shown(h) for h in header[:_SHOWN_FIELDS]) or 'nothing'}"
            f"{f' and {len(header) - _SHOWN_FIELDS} more' if len(header) > _SHOWN_FIELDS else ''})"
        )
    index = {c: header.index(c) for c in columns}
    values: dict[str, list[float]] = {c: [] for c in columns}
    for line_no, row in zip((n for n, _ in numbered[1:]),
                            csv.reader([t for _, t in numbered[1:]])):
        for column, k in index.items():
            if k >= len(row):
                raise FitError(
                    f"{name}:{line_no}: {len(row)} field(s), column {column} is missing"
                )
            field = row[k].strip()
            try:
                number = float(field)
            except ValueError:
                raise FitError(
                    f"{name}:{line_no}: {column} is not a number: {_shown(field)!r}"
                ) from None
            if not math.isfinite(number):
                raise FitError(f"{name}:{line_no}: {column} is {_shown(field)!r}, not a finite number")
            values[column].append(number)
    if not values[columns[0]]:
        raise FitError(f"{name}: no data rows after the header")
    return {c: np.asarray(v, dtype=float) for c, v in values.items()}


def read_iv_csv(path: str | os.PathLike) -> tuple[np.ndarray, np.ndarray]:
    """Voltage [V] and current [A] columns of an I-V CSV file, as stored (no sign change)."""
    data = read_csv_columns(path, REQUIRED_COLUMNS)
    return data["voltage_v"], data["current_a"]
