"""Small schema toolkit: typed fields with ranges and choices, and a context that collects
every problem (file, line, key path, bad value, what is allowed) instead of stopping at the
first. Shared by the protocol and the bench-profile loaders."""
from __future__ import annotations

import difflib
import math
import re
from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

from ._yamltree import INVALID, Document, describe, format_path
from .errors import Problem

MISSING = object()
_FLOAT_TEXT = re.compile(r"^[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?$")


def fmt_num(x: float) -> str:
    if isinstance(x, bool):
        return str(x).lower()
    if isinstance(x, int):
        return str(x)
    return f"{x:g}"


class Ctx:
    """Where problems are collected while one document is checked."""

    def __init__(self, doc: Document):
        self.doc = doc
        self.problems: list[Problem] = list(getattr(doc, "build_problems", []))

    @property
    def file(self) -> str:
        return self.doc.file

    def line(self, path: Sequence) -> int | None:
        return self.doc.line_of(tuple(path))

    def add(self, path: Sequence, message: str, *, value: Any = None, allowed: str = "",
            line: int | None = None) -> None:
        self.problems.append(Problem(
            self.doc.file, line if line is not None else self.line(path),
            format_path(tuple(path)), value, allowed, message))


# --------------------------------------------------------------------------- field types
class Kind:
    """A value checker: returns the accepted (normalised) value or INVALID after adding a problem."""

    allowed = ""

    def check(self, ctx: Ctx, path: tuple, value: Any) -> Any:  # pragma: no cover - abstract
        raise NotImplementedError


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


class Number(Kind):
    """A real number in a range; ``integer`` requires a whole number (YAML int)."""

    def __init__(self, lo: float | None = None, hi: float | None = None, *, lo_open: bool = False,
                 hi_open: bool = False, integer: bool = False, unit: str = ""):
        self.lo, self.hi, self.lo_open, self.hi_open = lo, hi, lo_open, hi_open
        self.integer = integer
        self.unit = unit

    @property
    def allowed(self) -> str:
        lo, hi = self.lo, self.hi
        if lo is not None and hi is not None:
            if not self.lo_open and not self.hi_open:
                text = f"{fmt_num(lo)} … {fmt_num(hi)}"
            else:
                text = (f"{fmt_num(lo)} {'<' if self.lo_open else '≤'} x "
                        f"{'<' if self.hi_open else '≤'} {fmt_num(hi)}")
        elif lo is not None:
            text = f"{'>' if self.lo_open else '≥'} {fmt_num(lo)}"
        elif hi is not None:
            text = f"{'<' if self.hi_open else '≤'} {fmt_num(hi)}"
        else:
            text = "a whole number" if self.integer else "a number"
        return text + (f" {self.unit}" if self.unit else "")

    def check(self, ctx: Ctx, path: tuple, value: Any) -> Any:
        if not _is_number(value):
            ctx.add(path, self._type_message(value), value=value, allowed=self.allowed)
            return INVALID
        if self.integer and not isinstance(value, int):
            if float(value).is_integer() and abs(value) < 2**53:
                value = int(value)
            else:
                ctx.add(path, f"{describe(value)} is not a whole number; allowed {self.allowed}",
                        value=value, allowed=self.allowed)
                return INVALID
        if isinstance(value, float) and not math.isfinite(value):
            ctx.add(path, f"{describe(value)} is not a finite number; allowed {self.allowed}",
                    value=value, allowed=self.allowed)
            return INVALID
        if self.lo is not None and (value < self.lo or (self.lo_open and value == self.lo)):
            ctx.add(path, f"{describe(value)} is too small; allowed {self.allowed}",
                    value=value, allowed=self.allowed)
            return INVALID
        if self.hi is not None and (value > self.hi or (self.hi_open and value == self.hi)):
            ctx.add(path, f"{describe(value)} is too large; allowed {self.allowed}",
                    value=value, allowed=self.allowed)
            return INVALID
        if self.integer:
            return int(value)
        try:
            return float(value)
        except OverflowError:  # pragma: no cover - excluded by the range check
            ctx.add(path, f"{describe(value)} is too large", value=value, allowed=self.allowed)
            return INVALID

    def _type_message(self, value: Any) -> str:
        what = "a whole number" if self.integer else "a number"
        if isinstance(value, str) and _FLOAT_TEXT.match(value.strip()):
            return (f"{describe(value)} is text, not {what} (YAML reads a number like 1e3 "
                    f"as text: write 1.0e3); allowed {self.allowed}")
        return f"expected {what}; got {describe(value)}; allowed {self.allowed}"


class Bool(Kind):
    allowed = "true or false"

    def check(self, ctx: Ctx, path: tuple, value: Any) -> Any:
        if isinstance(value, bool):
            return value
        ctx.add(path, f"expected true or false; got {describe(value)}", value=value,
                allowed=self.allowed)
        return INVALID


class Text(Kind):
    def __init__(self, max_len: int = 200, *, pattern: str | None = None,
                 pattern_help: str = "", min_len: int = 0):
        self.max_len = max_len
        self.min_len = min_len
        self.pattern = re.compile(pattern) if pattern else None
        self.pattern_help = pattern_help

    @property
    def allowed(self) -> str:
        if self.pattern_help:
            return f"{self.pattern_help}, {max(self.min_len, 1)} … {self.max_len} characters"
        return f"text of at most {self.max_len} characters"

    def check(self, ctx: Ctx, path: tuple, value: Any) -> Any:
        if not isinstance(value, str):
            ctx.add(path, f"expected text; got {describe(value)}; allowed {self.allowed}"
                    + (" (quote it)" if _is_number(value) or isinstance(value, bool) else ""),
                    value=value, allowed=self.allowed)
            return INVALID
        if len(value) > self.max_len:
            ctx.add(path, f"text of {len(value)} characters is too long; allowed {self.allowed}",
                    value=value[:40] + "...", allowed=self.allowed)
            return INVALID
        if len(value.strip()) < self.min_len:
            ctx.add(path, f"must not be empty; allowed {self.allowed}", value=value,
                    allowed=self.allowed)
            return INVALID
        if self.pattern is not None and not self.pattern.fullmatch(value):
            ctx.add(path, f"{describe(value)} is not allowed; allowed {self.allowed}",
                    value=value, allowed=self.allowed)
            return INVALID
        return value


class Choice(Kind):
    def __init__(self, options: Sequence[Any], *, bool_hint: str = ""):
        self.options = tuple(options)
        self.bool_hint = bool_hint

    @property
    def allowed(self) -> str:
        return "one of " + ", ".join(str(o) for o in self.options)

    def check(self, ctx: Ctx, path: tuple, value: Any) -> Any:
        if isinstance(value, bool) or not isinstance(value, (str, int)):
            hint = self.bool_hint if isinstance(value, bool) else ""
            ctx.add(path, f"{describe(value)} is not allowed{hint}; allowed {self.allowed}",
                    value=value, allowed=self.allowed)
            return INVALID
        for option in self.options:
            if value == option or (isinstance(option, int) and isinstance(value, str)
                                   and value.strip() == str(option)):
                return option
        msg = f"{describe(value)} is not allowed; allowed {self.allowed}"
        if isinstance(value, str):
            close = difflib.get_close_matches(value, [str(o) for o in self.options], n=1,
                                              cutoff=0.6)
            if close:
                msg = f"{describe(value)} is not allowed; did you mean {close[0]!r}? " \
                      f"allowed {self.allowed}"
        ctx.add(path, msg, value=value, allowed=self.allowed)
        return INVALID


class Custom(Kind):
    def __init__(self, fn: Callable[[Ctx, tuple, Any], Any], allowed: str):
        self.fn = fn
        self.allowed = allowed

    def check(self, ctx: Ctx, path: tuple, value: Any) -> Any:
        return self.fn(ctx, path, value)


@dataclass(frozen=True)
class Field:
    kind: Kind
    required: bool = False
    default: Any = None
    nullable: bool = False      # an explicit null is accepted (and means "none")


ADDRESS_KEYS = {"address", "addresses", "resource", "visa", "visa_address", "instrument",
                "instruments", "port", "host"}


def read_mapping(ctx: Ctx, path: tuple, raw: Any, fields: Mapping[str, Field], *,
                 what: str, extra_help: Mapping[str, str] | None = None,
                 address_message: str | None = None) -> dict[str, Any] | None:
    """Check ``raw`` is a mapping with only ``fields``; return accepted values (INVALID for bad
    ones, defaults filled for missing optional ones). Returns None if ``raw`` is not a mapping."""
    if raw is INVALID:
        return None
    if not isinstance(raw, dict):
        ctx.add(path, f"expected a mapping (key: value lines) for {what}; got {describe(raw)}",
                value=raw, allowed=f"a mapping with keys {', '.join(fields)}")
        return None
    out: dict[str, Any] = {}
    names = list(fields)
    for key, value in raw.items():
        if key not in fields:
            unknown_key(ctx, path + (key,), key, names, what=what, extra_help=extra_help,
                        address_message=address_message)
    for name, spec in fields.items():
        if name in raw:
            value = raw[name]
            if value is None and (spec.nullable or (not spec.required and spec.default is None)):
                out[name] = None
                continue
            if value is None:
                ctx.add(path + (name,), f"must not be empty (null); allowed "
                        f"{spec.kind.allowed}", value=None, allowed=spec.kind.allowed)
                out[name] = INVALID
                continue
            if value is INVALID:
                out[name] = INVALID
                continue
            out[name] = spec.kind.check(ctx, path + (name,), value)
        elif spec.required:
            ctx.add(path, f"missing required key {name!r} in {what}; allowed "
                    f"{spec.kind.allowed}", value=None, allowed=spec.kind.allowed)
            out[name] = INVALID
        else:
            out[name] = spec.default
    return out


def unknown_key(ctx: Ctx, path: tuple, key: Any, names: Sequence[str], *, what: str,
                extra_help: Mapping[str, str] | None = None,
                address_message: str | None = None) -> None:
    allowed = ", ".join(names)
    if address_message and isinstance(key, str) and key.lower() in ADDRESS_KEYS:
        ctx.add(path, address_message, value=key, allowed=allowed)
        return
    if extra_help and key in extra_help:
        ctx.add(path, f"unknown key {key!r} in {what}: {extra_help[key]}", value=key,
                allowed=allowed)
        return
    close = difflib.get_close_matches(str(key), list(names), n=1, cutoff=0.6)
    hint = f" (did you mean {close[0]!r}?)" if close else ""
    ctx.add(path, f"unknown key {key!r} in {what}{hint}; allowed: {allowed}", value=key,
            allowed=allowed)


def ok(*values: Any) -> bool:
    """True when none of the values is INVALID (None counts as valid)."""
    return all(v is not INVALID for v in values)
