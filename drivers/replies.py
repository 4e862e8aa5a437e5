"""Strict parsers for SCPI response units (IEEE 488.2 chapter 8 response formats).

Each parser takes one response unit (the text between ``;`` separators) and returns a
Python value, or raises ``MalformedReply`` (or its subclass ``OverflowReading``). The
session turns these into ``ResponseError`` / ``OverRangeError`` with the instrument, the
address and the command named. Nothing here guesses: ``float()`` would accept ``nan``,
``inf``, ``1_0`` or surrounding blanks, so numbers are matched against the 488.2 numeric
response forms first.
"""
from __future__ import annotations

import math
import re

# NR1 / NR2 / NR3 (and the NRf a lenient instrument may answer with).
_NUMBER = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?")
_INTEGER = re.compile(r"[+-]?\d+")
_ERROR_ENTRY = re.compile(r'([+-]?\d+),"((?:[^"]|"")*)"')

# SCPI-99 Vol. 1 section 7.2.1.5: 9.9E37 is +INF (overflow), -9.9E37 NINF, 9.91E37 NaN.
# Any magnitude at or above 9.9E37 is one of these markers, never a measured value.
OVERFLOW_MAGNITUDE = 9.9e37


class MalformedReply(ValueError):
    """A response unit that is not what the command documents."""


class OverflowReading(MalformedReply):
    """A measured value given as the SCPI overflow / NaN marker."""


def real(unit: str) -> float:
    """One ``<NR1|NR2|NR3>`` number, finite. The overflow markers are returned as they
    are (use ``reading`` for measured quantities, which rejects them)."""
    if not _NUMBER.fullmatch(unit):
        raise MalformedReply(f"expected a number, got {unit!r}")
    value = float(unit)
    if not math.isfinite(value):  # e.g. 1E999 overflows the float
        raise MalformedReply(f"number {unit!r} does not fit a float")
    return value


def reading(unit: str) -> float:
    """One measured value; the SCPI overflow markers raise ``OverflowReading``."""
    value = real(unit)
    if abs(value) >= OVERFLOW_MAGNITUDE:
        raise OverflowReading(f"overflow marker {unit!r}: beyond the measure range")
    return value


def integer(unit: str) -> int:
    """One ``<NR1>`` integer."""
    if not _INTEGER.fullmatch(unit):
        raise MalformedReply(f"expected an integer, got {unit!r}")
    return int(unit)


def boolean(unit: str) -> bool:
    """A SCPI boolean response: exactly ``1`` or ``0``."""
    if unit == "1":
        return True
    if unit == "0":
        return False
    raise MalformedReply(f"expected 1 or 0, got {unit!r}")


def word(*allowed: str):
    """Parser for character data that must be one of ``allowed`` (short upper-case form)."""
    def parse(unit: str) -> str:
        if unit not in allowed:
            raise MalformedReply(f"expected one of {', '.join(allowed)}, got {unit!r}")
        return unit
    parse.__name__ = f"word({'|'.join(allowed)})"
    return parse


def reals(count: int | None = None):
    """Parser for a comma-separated list of numbers (overflow markers kept as they are),
    optionally of an exact length."""
    def parse(unit: str) -> list[float]:
        values = [real(field) for field in unit.split(",")]
        if count is not None and len(values) != count:
            raise MalformedReply(f"expected {count} comma-separated numbers, got {len(values)}")
        return values
    return parse


def booleans(count: int):
    """Parser for exactly ``count`` comma-separated ``1``/``0`` fields."""
    def parse(unit: str) -> list[bool]:
        fields = unit.split(",")
        if len(fields) != count:
            raise MalformedReply(f"expected {count} comma-separated 1/0 fields, got {len(fields)}")
        return [boolean(field) for field in fields]
    return parse


def error_entry(unit: str) -> tuple[int, str]:
    """One ``SYSTem:ERRor?`` entry ``<code>,"<text>"`` (doubled quotes inside undone)."""
    match = _ERROR_ENTRY.fullmatch(unit)
    if not match:
        raise MalformedReply(f'expected an error-queue entry <code>,"<text>", got {unit!r}')
    return int(match.group(1)), match.group(2).replace('""', '"')


def split_units(reply: str) -> list[str]:
    """Split a joined reply into its response units at ``;`` outside quoted strings."""
    units, current, quoted = [], [], False
    for char in reply:
        if char == '"':
            quoted = not quoted
        if char == ";" and not quoted:
            units.append("".join(current))
            current = []
        else:
            current.append(char)
    if quoted:
        raise MalformedReply("unbalanced quote in reply")
    units.append("".join(current))
    return units


def nrf(value: float) -> str:
    """Format a number for a program message (``<NRf>``). Refuses NaN and infinities,
    which the instrument would read as the SCPI special values."""
    if not math.isfinite(value):
        raise ValueError(f"refusing to send non-finite number {value!r}")
    return f"{value:.12G}"


def readings(count: int):
    """Parser for exactly ``count`` comma-separated measured values (overflow rejected)."""
    def parse(unit: str) -> list[float]:
        fields = unit.split(",")
        if len(fields) != count:
            raise MalformedReply(f"expected {count} comma-separated readings, got {len(fields)}")
        return [reading(field) for field in fields]
    return parse


def reading_triples(count: int):
    """Parser for ``count`` flattened ``voltage,current,compliance`` triples, given as
    floats (a decoded binary block) or as one comma-separated text unit. Returns a list
    of ``(voltage_v, current_a, in_compliance)``; the flag must be exactly 0 or 1."""
    def parse(values) -> list[tuple[float, float, bool]]:
        if isinstance(values, str):
            values = [real(field) for field in values.split(",")]
        values = [float(v) for v in values]
        if len(values) != 3 * count:
            raise MalformedReply(f"expected {3 * count} values ({count} readings), got {len(values)}")
        triples = []
        for k in range(count):
            voltage, current, flag = values[3 * k:3 * k + 3]
            for name, value in (("voltage", voltage), ("current", current)):
                if not math.isfinite(value):
                    raise MalformedReply(f"reading {k}: {name} is {value!r}")
                if abs(value) >= OVERFLOW_MAGNITUDE:
                    raise OverflowReading(f"reading {k}: {name} is the overflow marker {value:.3E}")
            if flag not in (0.0, 1.0):
                raise MalformedReply(f"reading {k}: compliance flag {flag!r} is not 0 or 1")
            triples.append((voltage, current, flag == 1.0))
        return triples
    return parse
