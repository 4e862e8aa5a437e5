"""A small, generic SCPI-1999 / IEEE 488.2 command engine.

One :class:`CommandTable` per instrument holds its headers, written in the usual SCPI
notation (``[SOURce:]VOLTage[:LEVel]``, ``OUTPut#`` for a numeric suffix), with typed
parameters.  :class:`ScpiInstrument` adds what every instrument has: the IEEE 488.2 common
commands, the status byte, the standard event status register, the SCPI OPERation and
QUEStionable registers and the error/event queue, and executes whole program messages:

* program units split on ``;`` (outside strings, parentheses and blocks), each run even
  when an earlier one failed (the failure is queued);
* the path rule: a unit after ``;`` is relative to the node above the previous header's last
  keyword, a leading ``:`` returns to the root, common commands leave the path alone;
* long/short mnemonics, optional nodes, case-insensitivity, numeric suffixes (absent = 1);
* numeric parameters with SI multipliers and units, ``MIN|MAX|DEF`` and ``<header>? MIN|MAX``;
* the responses of all query units of one message joined with ``;`` into one reply.

When two commands could match one header, the one listed first in the table wins.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

# --------------------------------------------------------------------------- errors

#: Standard error texts (SCPI-1999 Vol. 2 section 21.8).
ERROR_TEXT: dict[int, str] = {
    0: "No error",
    -100: "Command error",
    -101: "Invalid character",
    -102: "Syntax error",
    -103: "Invalid separator",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -111: "Header separator error",
    -112: "Program mnemonic too long",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -120: "Numeric data error",
    -123: "Exponent too large",
    -124: "Too many digits",
    -131: "Invalid suffix",
    -138: "Suffix not allowed",
    -141: "Invalid character data",
    -144: "Character data too long",
    -200: "Execution error",
    -211: "Trigger ignored",
    -213: "Init ignored",
    -220: "Parameter error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -223: "Too much data",
    -224: "Illegal parameter value",
    -226: "Lists not same length",
    -230: "Data corrupt or stale",
    -240: "Hardware error",
    -300: "Device-specific error",
    -350: "Queue overflow",
    -363: "Input buffer overrun",
    -410: "Query INTERRUPTED",
    -420: "Query UNTERMINATED",
}

ERROR_QUEUE_DEPTH = 16

#: queued when executing a message raises something other than :class:`ScpiError` (a fault
#: of the instrument's own firmware, here of the simulator): SCPI-1999's generic
#: device-specific error, so the client learns of it from the error queue
INTERNAL_ERROR_CODE = -300

# Standard Event Status Register bits (IEEE 488.2 section 11.5.1).
ESR_OPC = 1
ESR_QYE = 4
ESR_DDE = 8
ESR_EXE = 16
ESR_CME = 32
ESR_PON = 128

# Status byte bits (IEEE 488.2 section 11.2, SCPI-1999 Vol. 1).
STB_ERROR_QUEUE = 4
STB_QUES = 8
STB_MAV = 16
STB_ESB = 32
STB_MSS = 64
STB_OPER = 128


class ScpiError(Exception):
    """An error to be queued: standard code plus an optional device-dependent detail."""

    def __init__(self, code: int, detail: str = ""):
        super().__init__(f"{code},{ERROR_TEXT.get(code, 'Error')}" + (f";{detail}" if detail else ""))
        self.code = code
        self.detail = detail


def esr_bit_for(code: int) -> int:
    """The ESR bit an error of this code sets (SCPI-1999 Vol. 2 section 21.8)."""
    if -199 <= code <= -100:
        return ESR_CME
    if -299 <= code <= -200:
        return ESR_EXE
    if -499 <= code <= -400:
        return ESR_QYE
    if -399 <= code <= -300 or code > 0:
        return ESR_DDE
    return 0


class ErrorQueue:
    """FIFO error/event queue; on overflow the last entry becomes -350 (oldest kept)."""

    def __init__(self, depth: int = ERROR_QUEUE_DEPTH):
        self.depth = depth
        self._items: list[tuple[int, str]] = []

    def push(self, code: int, detail: str = "") -> None:
        if len(self._items) < self.depth:
            self._items.append((code, detail))
        elif self._items[-1][0] != -350:
            self._items[-1] = (-350, "")

    def pop(self) -> tuple[int, str]:
        if not self._items:
            return 0, ""
        return self._items.pop(0)

    def clear(self) -> None:
        self._items.clear()

    def __len__(self) -> int:
        return len(self._items)

    def snapshot(self) -> list[tuple[int, str]]:
        return list(self._items)


def format_error(code: int, detail: str = "") -> str:
    text = ERROR_TEXT.get(code, "Device-specific error" if code > 0 else "Error")
    if detail:
        text = f"{text};{detail}"
    text = text[:255].replace('"', '""')
    return f'{code},"{text}"'


# --------------------------------------------------------------------------- status registers


class StatusRegister:
    """A SCPI status register: condition, transition filters, latched event, enable."""

    def __init__(self) -> None:
        self.condition = 0
        self.event = 0
        self.enable = 0
        self.ptr = 0x7FFF
        self.ntr = 0

    def set_condition(self, value: int) -> None:
        value &= 0x7FFF
        rising = value & ~self.condition
        falling = self.condition & ~value
        self.event |= (rising & self.ptr) | (falling & self.ntr)
        self.condition = value

    def read_event(self) -> int:
        value, self.event = self.event, 0
        return value

    @property
    def summary(self) -> bool:
        return bool(self.event & self.enable & 0x7FFF)

    def preset(self) -> None:
        """STATus:PRESet values (SCPI-1999 Vol. 2 section 20.2)."""
        self.enable = 0
        self.ptr = 0x7FFF
        self.ntr = 0


@dataclass
class StatusModel:
    esr: int = ESR_PON
    ese: int = 0
    sre: int = 0
    operation: StatusRegister = field(default_factory=StatusRegister)
    questionable: StatusRegister = field(default_factory=StatusRegister)


# --------------------------------------------------------------------------- lexical helpers

_HEADER_CHARS = set("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789_:*?")
_WHITESPACE = set(chr(c) for c in range(0, 33) if c not in (10,))


def split_units(message: str) -> list[str]:
    """Split a program message on ``;`` outside strings, parentheses and blocks."""
    units: list[str] = []
    start = 0
    depth = 0
    quote = ""
    i = 0
    n = len(message)
    while i < n:
        ch = message[i]
        if quote:
            if ch == quote:
                if i + 1 < n and message[i + 1] == quote:
                    i += 2
                    continue
                quote = ""
        elif ch in "\"'":
            quote = ch
        elif ch == "(":
            depth += 1
        elif ch == ")":
            depth = max(0, depth - 1)
        elif ch == "#" and i + 1 < n and message[i + 1] in "123456789":
            # definite-length block: skip its bytes so that ';' inside does not split
            digits = int(message[i + 1])
            length_text = message[i + 2 : i + 2 + digits]
            if len(length_text) == digits and length_text.isdigit():
                i = i + 2 + digits + int(length_text)
                continue
        elif ch == ";" and depth == 0:
            units.append(message[start:i])
            start = i + 1
        i += 1
    if quote:
        raise ScpiError(-102, "unterminated string")
    units.append(message[start:])
    return units


def split_params(text: str) -> list[str]:
    """Split a parameter string on top-level commas; each item stripped."""
    text = text.strip()
    if not text:
        return []
    items: list[str] = []
    start = 0
    depth = 0
    quote = ""
    for i, ch in enumerate(text):
        if quote:
            if ch == quote:
                quote = ""
        elif ch in "\"'":
            quote = ch
        elif ch == "(":
            depth += 1
        elif ch == ")":
            depth = max(0, depth - 1)
        elif ch == "," and depth == 0:
            items.append(text[start:i].strip())
            start = i + 1
    items.append(text[start:].strip())
    if any(item == "" for item in items):
        raise ScpiError(-102, "empty parameter")
    return items


@dataclass(frozen=True)
class ParsedHeader:
    common: bool
    absolute: bool
    tokens: tuple[tuple[str, int | None], ...]  # (upper-case mnemonic, suffix or None)
    query: bool
    params: str


_WHITESPACE_TEXT = "".join(sorted(_WHITESPACE))
_HEADER_CACHE: dict[str, tuple[bool, bool, tuple, bool]] = {}


def parse_unit(unit: str) -> ParsedHeader | None:
    """Parse one program unit into header tokens and the raw parameter text."""
    text = unit.lstrip(_WHITESPACE_TEXT)
    if not text.strip():
        return None
    i = 0
    while i < len(text) and text[i] in _HEADER_CHARS:
        i += 1
    header = text[:i]
    rest = text[i:]
    if rest and rest[0] not in _WHITESPACE:
        ch = rest[0]
        if ord(ch) > 126 or ord(ch) < 32:
            raise ScpiError(-101, f"character code {ord(ch)} in header")
        raise ScpiError(-111, f"'{ch}' after header")
    params = rest.strip()
    if not header:
        raise ScpiError(-102, "missing header")
    parsed = _HEADER_CACHE.get(header)
    if parsed is None:
        parsed = _parse_header(header)
        if len(_HEADER_CACHE) < 4096:
            _HEADER_CACHE[header] = parsed
    return ParsedHeader(*parsed, params)


def _parse_header(header: str) -> tuple[bool, bool, tuple, bool]:
    query = header.endswith("?")
    core = header[:-1] if query else header
    if "?" in core:
        raise ScpiError(-102, "'?' inside header")
    if core.startswith("*"):
        name = core[1:]
        if not name.isalpha():
            raise ScpiError(-102, f"bad common header {header}")
        return True, True, (("*" + name.upper(), None),), query
    absolute = core.startswith(":")
    if absolute:
        core = core[1:]
    tokens = []
    for part in core.split(":"):
        if not part:
            raise ScpiError(-102, "empty mnemonic")
        if "*" in part:
            raise ScpiError(-102, f"'*' in mnemonic {part}")
        match = _MNEMONIC.match(part)
        if not match:
            raise ScpiError(-102, f"bad mnemonic {part}")
        name, suffix = match.group(1), match.group(2)
        if len(name) > 12:
            raise ScpiError(-112, part)
        tokens.append((name.upper(), int(suffix) if suffix else None))
    return False, absolute, tuple(tokens), query


_MNEMONIC = re.compile(r"^([A-Za-z][A-Za-z0-9_]*?)(\d*)$")


# --------------------------------------------------------------------------- numbers and units

#: SI multipliers of IEEE 488.2 Table 7-2.
MULTIPLIERS = {
    "EX": 1e18, "PE": 1e15, "T": 1e12, "G": 1e9, "MA": 1e6, "K": 1e3,
    "M": 1e-3, "U": 1e-6, "N": 1e-9, "P": 1e-12, "F": 1e-15, "A": 1e-18,
}

_NUMBER_RE = re.compile(
    r"^(?P<sign>[+-]?)(?P<int>\d*)(?:\.(?P<frac>\d*))?"
    r"(?:\s*[eE]\s*(?P<exp>[+-]?\d+))?\s*(?P<suffix>[A-Za-z][A-Za-z0-9/]*)?$"
)


def suffix_multiplier(suffix: str, unit: str | None) -> float:
    """Multiplier of a suffix such as ``MV``, ``MA``, ``US``, ``KOHM`` for ``unit``."""
    s = suffix.upper()
    if unit is None:
        raise ScpiError(-138, suffix)
    u = unit.upper()
    if s == u:
        return 1.0
    if s.endswith(u):
        prefix = s[: -len(u)]
        if prefix == "M" and u in ("OHM", "HZ"):
            return 1e6  # IEEE 488.2: M means mega for ohm and hertz
        if prefix in MULTIPLIERS:
            return MULTIPLIERS[prefix]
    raise ScpiError(-131, suffix)


def parse_number(text: str, unit: str | None = None) -> float:
    """Parse ``<NRf>`` with an optional suffix; raises the matching SCPI error."""
    t = text.strip()
    if t[:1] in "\"'":
        raise ScpiError(-104, "string where a number is expected")
    if t[:2].upper() in ("#H", "#Q", "#B"):
        return float(parse_nondecimal(t))
    if t[:1] == "(":
        raise ScpiError(-104, "list where a number is expected")
    m = _NUMBER_RE.match(t)
    if not m or not (m.group("int") or m.group("frac")):
        if t[:1].isdigit() or t[:1] in "+-.":
            bad = re.match(r"^[+-]?[\d.]+[eE]?[+-]?\d*\s+([+-]?\d)", t)
            if bad:
                raise ScpiError(-103, t)
            raise ScpiError(-120, t)
        raise ScpiError(-104, t)
    digits = (m.group("int") or "") + (m.group("frac") or "")
    if len(digits) > 255:
        raise ScpiError(-124)
    exp = int(m.group("exp")) if m.group("exp") else 0
    if abs(exp) > 32000:
        raise ScpiError(-123)
    mantissa = f"{m.group('sign')}{m.group('int') or '0'}.{m.group('frac') or '0'}"
    try:
        value = float(f"{mantissa}e{exp}")
    except (OverflowError, ValueError):
        raise ScpiError(-120, t) from None
    if m.group("suffix"):
        value *= suffix_multiplier(m.group("suffix"), unit)
    return value


def parse_nondecimal(text: str) -> int:
    base = {"H": 16, "Q": 8, "B": 2}[text[1].upper()]
    try:
        return int(text[2:], base)
    except ValueError:
        raise ScpiError(-120, text) from None


def mnemonic_forms(word: str) -> tuple[str, str]:
    """(short, long) forms of a mnemonic written as ``VOLTage`` (upper case = short form)."""
    short = ""
    for ch in word:
        if ch.isupper() or ch.isdigit():
            short += ch
        else:
            break
    return short.upper(), word.upper()


def matches_mnemonic(token: str, word: str) -> bool:
    short, long_ = mnemonic_forms(word)
    return token == short or token == long_


def format_nr3(value: float) -> str:
    if math.isnan(value):
        return "+9.91000000E+37"
    if math.isinf(value):
        return "+9.90000000E+37" if value > 0 else "-9.90000000E+37"
    return f"{value:+.9E}"


# --------------------------------------------------------------------------- parameter types

MINMAXDEF = {"MIN": "MIN", "MINIMUM": "MIN", "MAX": "MAX", "MAXIMUM": "MAX", "DEF": "DEF", "DEFAULT": "DEF"}

Bound = float | Callable[["Context"], float]


def _bound(value: Bound | None, ctx: "Context") -> float | None:
    if value is None:
        return None
    return value(ctx) if callable(value) else value


class Param:
    """Base class for a parameter type; ``convert`` raises :class:`ScpiError`."""

    def convert(self, text: str, ctx: "Context") -> Any:
        raise NotImplementedError

    def format(self, value: Any) -> str:
        raise NotImplementedError


class Numeric(Param):
    """``<numeric_value>`` with unit suffix, MIN/MAX/DEF and a range check (-222)."""

    def __init__(self, unit: str | None = None, minimum: Bound | None = None,
                 maximum: Bound | None = None, default: Bound | None = None):
        self.unit = unit
        self.minimum = minimum
        self.maximum = maximum
        self.default = default

    def special(self, word: str, ctx: "Context") -> float:
        kind = MINMAXDEF[word]
        value = {"MIN": self.minimum, "MAX": self.maximum, "DEF": self.default}[kind]
        resolved = _bound(value, ctx)
        if resolved is None:
            raise ScpiError(-224, f"{kind} not defined")
        return resolved

    def convert(self, text: str, ctx: "Context") -> float:
        word = text.strip().upper()
        if word in MINMAXDEF:
            return self.special(word, ctx)
        if word and word[0].isalpha():
            raise ScpiError(-104, text)
        value = parse_number(text, self.unit)
        lo, hi = _bound(self.minimum, ctx), _bound(self.maximum, ctx)
        if math.isnan(value) or (lo is not None and value < lo) or (hi is not None and value > hi):
            raise ScpiError(-222, f"{text.strip()} outside [{lo:g}, {hi:g}]" if lo is not None and hi is not None else text.strip())
        return value

    def format(self, value: Any) -> str:
        return format_nr3(float(value))


class Integer(Numeric):
    """An integer setting (``<NR1>`` reply); accepts ``<NRf>`` (rounded) and ``#H/#Q/#B``."""

    def convert(self, text: str, ctx: "Context") -> int:
        word = text.strip().upper()
        if word in MINMAXDEF:
            return int(self.special(word, ctx))
        if word and word[0].isalpha():
            raise ScpiError(-104, text)
        value = parse_number(text, self.unit)
        if math.isnan(value) or math.isinf(value):
            raise ScpiError(-222, text.strip())
        value = int(round(value))
        lo, hi = _bound(self.minimum, ctx), _bound(self.maximum, ctx)
        if (lo is not None and value < lo) or (hi is not None and value > hi):
            raise ScpiError(-222, f"{text.strip()} outside [{lo:g}, {hi:g}]")
        return value

    def format(self, value: Any) -> str:
        return str(int(value))


class Boolean(Param):
    def convert(self, text: str, ctx: "Context") -> bool:
        word = text.strip().upper()
        if word == "ON":
            return True
        if word == "OFF":
            return False
        if word[:1] in "\"'(":
            raise ScpiError(-104, text)
        if word[:1].isalpha():
            raise ScpiError(-141, text)
        return round(parse_number(text, None)) != 0

    def format(self, value: Any) -> str:
        return "1" if value else "0"


class Choice(Param):
    """Character data: one of mnemonics written as ``VOLTage`` (reply: the short form)."""

    def __init__(self, *words: str):
        self.words = words

    def convert(self, text: str, ctx: "Context") -> str:
        word = text.strip()
        if word[:1] in "\"'(#" or word[:1].isdigit() or word[:1] in "+-.":
            raise ScpiError(-104, text)
        if not re.match(r"^[A-Za-z][A-Za-z0-9_]*$", word):
            raise ScpiError(-141, text)
        if len(word) > 12:
            raise ScpiError(-144, text)
        for w in self.words:
            if matches_mnemonic(word.upper(), w):
                return mnemonic_forms(w)[0]
        raise ScpiError(-141, text)

    def format(self, value: Any) -> str:
        return str(value)


class NumericList(Param):
    """All remaining comma-separated parameters as floats (e.g. ``LIST:VOLTage``)."""

    variadic = True

    def __init__(self, unit: str | None, minimum: Bound, maximum: Bound, max_points: int):
        self.item = Numeric(unit, minimum, maximum)
        self.max_points = max_points

    def convert_all(self, items: Sequence[str], ctx: "Context") -> list[float]:
        if len(items) > self.max_points:
            raise ScpiError(-223, f"{len(items)} points > {self.max_points}")
        return [self.item.convert(t, ctx) for t in items]

    def convert(self, text: str, ctx: "Context") -> Any:  # pragma: no cover - variadic
        raise NotImplementedError

    def format(self, value: Any) -> str:
        return ",".join(format_nr3(v) for v in value)


class ChannelList(Param):
    """A channel list ``(@1)``, ``(@1,3)``, ``(@2:4)``; values checked against 1 .. count."""

    def __init__(self, count: Callable[["Context"], int]):
        self.count = count

    def convert(self, text: str, ctx: "Context") -> list[int]:
        t = text.strip()
        if not (t.startswith("(@") and t.endswith(")")):
            raise ScpiError(-220, f"channel list expected, got {t}")
        body = t[2:-1].strip()
        if not body:
            return []
        channels: list[int] = []
        n = self.count(ctx)
        for part in body.split(","):
            part = part.strip()
            try:
                if ":" in part:
                    a, b = (int(x) for x in part.split(":"))
                    step = 1 if b >= a else -1
                    channels.extend(range(a, b + step, step))
                else:
                    channels.append(int(part))
            except ValueError:
                raise ScpiError(-220, f"bad channel '{part}'") from None
        for c in channels:
            if not 1 <= c <= n:
                raise ScpiError(-222, f"channel {c} outside 1..{n}")
        return channels

    def format(self, value: Any) -> str:
        return "(@" + ",".join(str(v) for v in value) + ")"


# --------------------------------------------------------------------------- command table


@dataclass(frozen=True)
class PatternNode:
    short: str
    long: str
    optional: bool
    suffix_max: int  # 0 = no suffix allowed


def parse_pattern(pattern: str) -> tuple[PatternNode, ...]:
    """``[SOURce#1:]VOLTage[:LEVel]`` -> nodes.

    ``#`` marks a node that takes a numeric suffix, ``#N`` one whose suffix may be 1 .. N
    (plain ``#``: 1 .. 9).  An absent suffix means 1.
    """
    nodes: list[PatternNode] = []
    i = 0
    while i < len(pattern):
        ch = pattern[i]
        if ch == ":":
            i += 1
            continue
        optional = ch == "["
        if optional:
            j = pattern.index("]", i)
            word = pattern[i + 1 : j].strip(":")
            i = j + 1
        else:
            j = i
            while j < len(pattern) and pattern[j] not in ":[":
                j += 1
            word = pattern[i:j]
            i = j
        suffix_max = 0
        if "#" in word:
            word, _, top = word.partition("#")
            suffix_max = int(top) if top else 9
        short, long_ = mnemonic_forms(word)
        nodes.append(PatternNode(short, long_, optional, suffix_max))
    return tuple(nodes)


Handler = Callable[..., Any]


@dataclass
class Command:
    pattern: str
    nodes: tuple[PatternNode, ...]
    set: Handler | None = None
    query: Handler | None = None
    params: tuple[Param, ...] = ()
    optional_params: int = 0       # how many trailing set params may be omitted
    query_params: tuple[Param, ...] = ()
    reply: Param | None = None     # formats the query result; None = handler returns text
    minmax: Numeric | None = None  # answers "<header>? MIN|MAX|DEF"


class CommandTable:
    """The command headers of one instrument, matched in the order they were added."""

    def __init__(self) -> None:
        self.commands: list[Command] = []
        self._cache: dict[tuple, tuple[Command, tuple[int, ...]] | None] = {}

    def add(self, pattern: str, *, set: Handler | None = None, query: Handler | None = None,
            params: Sequence[Param] = (), optional_params: int = 0,
            query_params: Sequence[Param] = (), reply: Param | None = None,
            minmax: Numeric | None = None) -> Command:
        cmd = Command(pattern, parse_pattern(pattern), set, query, tuple(params), optional_params,
                      tuple(query_params), reply, minmax)
        self.commands.append(cmd)
        self._cache.clear()
        return cmd

    def setting(self, pattern: str, param: Param, get: Callable[["Context"], Any],
                put: Callable[["Context", Any], None]) -> Command:
        """A setting with a set form and a query form (``?``, and ``? MIN|MAX|DEF``)."""
        return self.add(pattern, set=lambda ctx, v: put(ctx, v), query=lambda ctx: get(ctx),
                        params=(param,), reply=param,
                        minmax=param if isinstance(param, Numeric) else None)

    def resolve(self, tokens: tuple[tuple[str, int | None], ...], query: bool) -> tuple[Command, tuple[int, ...]]:
        key = (tokens, query)
        if key in self._cache:
            hit = self._cache[key]
        else:
            hit = self._resolve(tokens, query)
            self._cache[key] = hit
        if hit is None:
            raise ScpiError(-113, ":".join(t + (str(s) if s is not None else "") for t, s in tokens) + ("?" if query else ""))
        cmd, suffixes = hit
        if any(s < 0 for s in suffixes):
            raise ScpiError(-114)
        return cmd, suffixes

    def _resolve(self, tokens, query):
        suffix_error = None
        for cmd in self.commands:
            if (cmd.query if query else cmd.set) is None:
                continue
            suffixes = _match(cmd.nodes, 0, tokens, 0)
            if suffixes is not None:
                if any(s < 0 for s in suffixes) and suffix_error is None:
                    suffix_error = (cmd, suffixes)
                    continue
                return cmd, suffixes
        return suffix_error


def _match(nodes, i, tokens, j):
    """Match tokens[j:] against nodes[i:]; returns per-node suffixes or None.

    A suffix out of the node's range is returned as -1 (header suffix error -114);
    a suffix on a node that takes none does not match (-113).
    """
    if j == len(tokens):
        if all(node.optional for node in nodes[i:]):
            return (1,) * (len(nodes) - i)
        return None
    if i == len(nodes):
        return None
    node = nodes[i]
    name, suffix = tokens[j]
    if name == node.short or name == node.long:
        ok = True
        value = 1
        if suffix is not None:
            if node.suffix_max == 0:
                ok = False
            elif not 1 <= suffix <= node.suffix_max:
                value = -1
            else:
                value = suffix
        if ok:
            rest = _match(nodes, i + 1, tokens, j + 1)
            if rest is not None:
                return (value,) + rest
    if node.optional:
        rest = _match(nodes, i + 1, tokens, j)
        if rest is not None:
            return (1,) + rest
    return None


# --------------------------------------------------------------------------- execution


class Context:
    """What a handler sees: the instrument, the client connection, the node suffixes."""

    def __init__(self, instrument: "ScpiInstrument", connection: Any, pending_replies: int = 0):
        self.instrument = instrument
        self.connection = connection
        self.suffixes: tuple[int, ...] = ()
        self.pending_replies = pending_replies

    def wait(self, seconds: float) -> None:
        """Spend simulated time (the instrument decides what that means)."""
        self.instrument.spend_time(seconds)


class ScpiInstrument:
    """Base class: common commands, status model, error queue, message execution.

    Subclasses build ``self.table`` in ``build_commands`` and override ``reset``,
    ``update_conditions``, ``operation_pending``, ``wait_operations`` and ``spend_time``.
    """

    identity = "Kestrel Bench Works,KBW-GEN,SIM0000,1.0"

    def __init__(self) -> None:
        self.status = StatusModel()
        self.errors = ErrorQueue()
        self.opc_armed = False
        self.table = CommandTable()
        self._add_system_commands()
        self.build_commands(self.table)

    # ---- hooks for subclasses
    def build_commands(self, table: CommandTable) -> None:
        """Add the instrument's own headers."""

    def reset(self) -> None:
        """``*RST``: the instrument's documented reset state."""

    def update_conditions(self) -> None:
        """Refresh OPERation/QUEStionable CONDition bits from the instrument state."""

    def operation_pending(self) -> bool:
        return False

    def wait_operations(self, ctx: Context) -> None:
        """Block (in simulated time) until no operation is pending."""

    def spend_time(self, seconds: float) -> None:
        """Let ``seconds`` of simulated time pass."""

    def status_polled(self) -> None:
        """Called before a status query (``*STB?``, ``*ESR?``, ``STATus:...?``) is answered."""

    def self_test(self) -> int:
        return 0

    # ---- error queue
    def push_error(self, code: int, detail: str = "") -> None:
        self.errors.push(code, detail)
        self.status.esr |= esr_bit_for(code)

    def push_internal_error(self, exc: BaseException) -> None:
        """An unexpected exception while executing: queue ``-300,"Device-specific error;
        <type>: <message>"`` (ESR bit 3) and carry on; a query unit that raised gives no
        response, as any failing query does."""
        self.push_error(INTERNAL_ERROR_CODE, f"{type(exc).__name__}: {exc}")

    # ---- status byte
    def status_byte(self, mav: bool = False) -> int:
        self.update_conditions()
        self._check_opc()
        st = self.status
        stb = 0
        if len(self.errors):
            stb |= STB_ERROR_QUEUE
        if st.questionable.summary:
            stb |= STB_QUES
        if mav:
            stb |= STB_MAV
        if st.esr & st.ese & 0xFF:
            stb |= STB_ESB
        if st.operation.summary:
            stb |= STB_OPER
        if stb & st.sre & ~STB_MSS & 0xFF:
            stb |= STB_MSS
        return stb

    def _check_opc(self) -> None:
        if self.opc_armed and not self.operation_pending():
            self.opc_armed = False
            self.status.esr |= ESR_OPC

    # ---- execution
    def execute(self, message: str, connection: Any = None) -> bytes | None:
        """Execute one program message; return the joined reply (with ``\\n``) or None."""
        replies: list[bytes] = []
        try:
            units = split_units(message)
        except ScpiError as exc:
            self.push_error(exc.code, exc.detail)
            return None
        path: tuple = ()
        for unit in units:
            ctx = Context(self, connection, len(replies))
            try:
                header = parse_unit(unit)
                if header is None:
                    continue
                if header.common:
                    result = self._common(header, ctx)
                else:
                    tokens = header.tokens if header.absolute else path + header.tokens
                    cmd, suffixes = self.table.resolve(tokens, header.query)
                    path = tokens[:-1]
                    ctx.suffixes = suffixes
                    result = self._call(cmd, header, ctx)
                if header.query and result is not None:
                    replies.append(result if isinstance(result, bytes) else str(result).encode("latin-1"))
            except ScpiError as exc:
                self.push_error(exc.code, exc.detail)
            except Exception as exc:  # noqa: BLE001 - a fault of the simulator itself
                self.push_internal_error(exc)
        try:
            self.update_conditions()
            self._check_opc()
        except Exception as exc:  # noqa: BLE001
            self.push_internal_error(exc)
        if not replies:
            return None
        return b";".join(replies) + b"\n"

    def _call(self, cmd: Command, header: ParsedHeader, ctx: Context) -> Any:
        items = split_params(header.params)
        if header.query:
            if cmd.minmax is not None and len(items) == 1 and items[0].upper() in MINMAXDEF and not cmd.query_params:
                return cmd.minmax.format(cmd.minmax.special(items[0].upper(), ctx))
            values = self._convert(cmd.query_params, len(cmd.query_params), items, ctx)
            result = cmd.query(ctx, *values)
            if cmd.reply is not None and not isinstance(result, (bytes, str)):
                return cmd.reply.format(result)
            return result
        values = self._convert(cmd.params, cmd.optional_params, items, ctx)
        cmd.set(ctx, *values)
        return None

    @staticmethod
    def _convert(params: Sequence[Param], optional: int, items: list[str], ctx: Context) -> list[Any]:
        if params and isinstance(params[-1], NumericList):
            fixed = params[:-1]
            if len(items) < len(fixed) + 1:
                raise ScpiError(-109)
            values = [p.convert(t, ctx) for p, t in zip(fixed, items)]
            values.append(params[-1].convert_all(items[len(fixed):], ctx))
            return values
        required = len(params) - optional
        if len(items) < required:
            raise ScpiError(-109)
        if len(items) > len(params):
            raise ScpiError(-108)
        return [p.convert(t, ctx) for p, t in zip(params, items)]

    # ---- IEEE 488.2 common commands and the SCPI mandatory subsystems
    def _common(self, header: ParsedHeader, ctx: Context) -> Any:
        name = header.tokens[0][0]
        items = split_params(header.params)
        q = header.query
        byte = Integer(None, 0, 255)

        def no_params() -> None:
            if items:
                raise ScpiError(-108)

        def one_param() -> int:
            if not items:
                raise ScpiError(-109)
            if len(items) > 1:
                raise ScpiError(-108)
            return byte.convert(items[0], ctx)

        st = self.status
        if name == "*IDN" and q:
            no_params()
            return self.identity
        if name == "*RST" and not q:
            no_params()
            self.opc_armed = False
            self.reset()
            return None
        if name == "*CLS" and not q:
            no_params()
            self.errors.clear()
            st.esr = 0
            st.operation.event = 0
            st.questionable.event = 0
            self.opc_armed = False
            return None
        if name == "*ESE":
            if q:
                no_params()
                return str(st.ese)
            st.ese = one_param()
            return None
        if name == "*ESR" and q:
            no_params()
            self.status_polled()
            self._check_opc()
            value, st.esr = st.esr, 0
            return str(value)
        if name == "*SRE":
            if q:
                no_params()
                return str(st.sre)
            st.sre = one_param() & ~STB_MSS
            return None
        if name == "*STB" and q:
            no_params()
            self.status_polled()
            return str(self.status_byte(mav=ctx.pending_replies > 0))
        if name == "*OPC":
            no_params()
            if q:
                self.wait_operations(ctx)
                return "1"
            if self.operation_pending():
                self.opc_armed = True
            else:
                st.esr |= ESR_OPC
            return None
        if name == "*WAI" and not q:
            no_params()
            self.wait_operations(ctx)
            return None
        if name == "*TST" and q:
            no_params()
            return str(self.self_test())
        raise ScpiError(-113, header.tokens[0][0] + ("?" if q else ""))

    def _add_system_commands(self) -> None:
        t = self.table

        def pop_error(ctx: Context) -> str:
            return format_error(*self.errors.pop())

        t.add("SYSTem:ERRor[:NEXT]", query=pop_error)
        t.add("SYSTem:ERRor:COUNt", query=lambda ctx: str(len(self.errors)))
        t.add("SYSTem:VERSion", query=lambda ctx: "1999.0")

        def register_commands(root: str, reg: Callable[[], StatusRegister]) -> None:
            mask = Integer(None, 0, 65535)

            def read_event(ctx: Context) -> str:
                self.status_polled()
                self.update_conditions()
                return str(reg().read_event())

            def read_condition(ctx: Context) -> str:
                self.status_polled()
                self.update_conditions()
                return str(reg().condition)

            t.add(f"STATus:{root}[:EVENt]", query=read_event)
            t.add(f"STATus:{root}:CONDition", query=read_condition)
            for word, attr in (("ENABle", "enable"), ("PTRansition", "ptr"), ("NTRansition", "ntr")):
                t.add(f"STATus:{root}:{word}",
                      set=lambda ctx, v, attr=attr: setattr(reg(), attr, v & 0x7FFF),
                      query=lambda ctx, attr=attr: str(getattr(reg(), attr)),
                      params=(mask,))

        register_commands("OPERation", lambda: self.status.operation)
        register_commands("QUEStionable", lambda: self.status.questionable)

        def preset(ctx: Context) -> None:
            self.status.operation.preset()
            self.status.questionable.preset()

        t.add("STATus:PRESet", set=preset)
