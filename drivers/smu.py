"""Source-measure unit driver (docs/scpi-dialect.md, "Source-measure unit").

Current is in the load convention throughout (into the + terminal), as the instrument
reports it. Overflow: a reading given as the SCPI overflow marker (+/-9.9E37, 9.91E37)
raises ``OverRangeError``; it is never returned as a number.

Connecting (and every reconnection) puts the instrument in the safe state: abort, fixed
mode, both levels 0, output off, read back off. The output never comes on by itself.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

from . import replies
from .base import ScpiInstrument
from .errors import InstrumentError
from .session import ScpiSession

MAX_LIST_POINTS = 10_000      # dialect: LIST holds at most 10,000 points
_MODES = {"voltage": "VOLT", "current": "CURR"}
_SENSED = {"VOLT": "CURR", "CURR": "VOLT"}   # the quantity clamped by compliance


@dataclass(frozen=True)
class SmuReading:
    voltage_v: float          # at the terminals (sense point when four-wire)
    current_a: float          # load convention: into the + terminal
    in_compliance: bool       # the source was clamped by its compliance limit


class ScpiSourceMeter(ScpiInstrument):
    """A SCPI source-measure unit.

    ``binary_transfer`` chooses how list-sweep readings are fetched (IEEE 488.2 block of
    big-endian float64, or ASCII); ``fetch_chunk_points`` bounds the readings per round
    trip. Extra attribute ``last_safe_notes``: what ``make_safe`` met on its last run.
    """

    # Device-specific headers (dialect), kept here so a subclass for another instrument
    # can replace them without touching the standard ones.
    REMOTE_SENSE = "SENS:REM"
    INTERLOCK_QUERY = "OUTP:INT:TRIP?"
    # Abort, leave list mode, zero both levels, output off. One command per message so an
    # instrument that drops the rest of a message after an error still gets every step.
    SAFE_SEQUENCE = ("ABOR", "SOUR:VOLT:MODE FIX", "SOUR:CURR:MODE FIX",
                     "SOUR:VOLT 0", "SOUR:CURR 0", "OUTP OFF")

    def __init__(self, address: str, *, resource_manager: Any, timeout_s: float = 5.0,
                 binary_transfer: bool = True, fetch_chunk_points: int = 1000) -> None:
        if not (isinstance(fetch_chunk_points, int) and fetch_chunk_points > 0):
            raise ValueError(f"fetch_chunk_points must be a positive int, got {fetch_chunk_points!r}")
        self.binary_transfer = bool(binary_transfer)
        self.fetch_chunk_points = fetch_chunk_points
        self.last_safe_notes: tuple[str, ...] = ()
        self._mode: str | None = None          # "VOLT" | "CURR", None = ask the instrument
        self._list_points: int | None = None   # caller's list length (without the final 0)
        super().__init__(address, resource_manager=resource_manager, timeout_s=timeout_s)

    # ------------------------------------------------------------------ set-up
    def configure(self, *, source_mode: str, compliance: float, nplc: float, four_wire: bool,
                  source_range: float | None = None, measure_range: float | None = None) -> None:
        """Source mode ("voltage" | "current"), compliance [A when sourcing voltage, V
        when sourcing current], integration [power-line cycles], four-wire sense, ranges
        (None = autorange; the measure range applies to the clamped quantity). Each step
        is followed by an error-queue check."""
        mode = _MODES.get(source_mode)
        if mode is None:
            raise self._invalid(f"source_mode must be 'voltage' or 'current', got {source_mode!r}")
        sensed = _SENSED[mode]
        steps = [f"SOUR:FUNC:MODE {mode}", f"SOUR:{mode}:MODE FIX",
                 f"SENS:{sensed}:PROT {self._number('compliance', compliance, positive=True)}"]
        steps += self._range_steps(f"SOUR:{mode}:RANG", "source_range", source_range)
        steps += self._range_steps(f"SENS:{sensed}:RANG", "measure_range", measure_range)
        steps += [f"SENS:{sensed}:NPLC {self._number('nplc', nplc, minimum=0)}",
                  f"{self.REMOTE_SENSE} {'ON' if four_wire else 'OFF'}"]
        self._mode = None
        for step in steps:
            self._session.configure(step)
            if step.startswith("SOUR:FUNC:MODE"):
                self._mode = mode

    def _range_steps(self, node: str, name: str, value: float | None) -> list[str]:
        if value is None:
            return [f"{node}:AUTO ON"]
        return [f"{node}:AUTO OFF", f"{node} {self._number(name, value, positive=True)}"]

    def read_compliance(self) -> float:
        """The compliance limit as the instrument reports it [A or V, per source mode]."""
        sensed = _SENSED[self._source_mode()]
        return self._ask(f"SENS:{sensed}:PROT?", replies.real)

    def set_overvoltage_protection(self, voltage_v: float) -> None:
        self._session.configure(f"SOUR:VOLT:PROT {self._number('voltage_v', voltage_v, positive=True)}")

    def read_overvoltage_protection(self) -> float:
        return self._ask("SOUR:VOLT:PROT?", replies.real)

    def clear_protection(self) -> None:
        """Clear a latched OVP / forced-off state (the output stays off)."""
        self._session.configure("OUTP:PROT:CLE")

    # ------------------------------------------------------------------ point by point
    def set_level(self, value: float) -> None:
        """Source level [V or A per source mode; current in the load convention]."""
        self._session.configure(f"SOUR:{self._source_mode()} {self._number('level', value)}")

    def measure(self) -> SmuReading:
        """One reading at the present level, with the compliance flag (one round trip)."""
        sensed = _SENSED[self._source_mode()]
        return self._reading(f"READ?;:SENS:{sensed}:PROT:TRIP?")

    def set_level_and_measure(self, value: float) -> SmuReading:
        """Set the level and read one point: one message, one round trip."""
        mode = self._source_mode()
        level = self._number("level", value)
        return self._reading(f"SOUR:{mode} {level};:READ?;:SENS:{_SENSED[mode]}:PROT:TRIP?")

    def _reading(self, command: str) -> SmuReading:
        (voltage_v, current_a), clamped = self._session.query_values(
            command, (replies.readings(2), replies.boolean))
        return SmuReading(voltage_v, current_a, clamped)

    # ------------------------------------------------------------------ output, protection
    def output(self, on: bool) -> None:
        self._session.configure(f"OUTP {'ON' if on else 'OFF'}")

    # State queries answer even while an event (interlock, OVP) has an error queued: they
    # do not read the error queue, which is left for the next command or make_safe.
    def output_is_on(self) -> bool:
        """Queried from the instrument, never cached."""
        return self._ask_state("OUTP?", replies.boolean)

    def protection_tripped(self) -> bool:
        """OVP latched, or the output forced off by protection or the interlock."""
        forced_off, ovp = self._session.query_values(
            "OUTP:PROT:TRIP?;:SOUR:VOLT:PROT:TRIP?", (replies.boolean, replies.boolean),
            check_errors=False)
        return forced_off or ovp

    def interlock_open(self) -> bool:
        return self._ask_state(self.INTERLOCK_QUERY, replies.boolean)

    # ------------------------------------------------------------------ list sweeps
    def load_list(self, levels: Sequence[float], *, settle_s: float) -> None:
        """Load a list sweep of ``levels`` (V or A per source mode) with ``settle_s``
        before each reading. A final 0 level is always appended, so a sweep that ends
        unattended leaves the source at zero; it is hidden from ``list_points_done`` and
        ``fetch_list``. The loaded length is read back."""
        wire = [self._number(f"levels[{k}]", level) for k, level in enumerate(levels)]
        if not wire:
            raise self._invalid("a list sweep needs at least one level")
        if len(wire) + 1 > MAX_LIST_POINTS:
            raise self._invalid(f"{len(wire)} levels plus the final 0 exceed {MAX_LIST_POINTS} points")
        settle = self._number("settle_s", settle_s, minimum=0)
        mode = self._source_mode()
        total = len(wire) + 1
        self._list_points = None
        for step in (f"SOUR:LIST:{mode} {','.join(wire + ['0'])}", f"TRIG:COUN {total}",
                     f"TRIG:DEL {settle}", f"SOUR:{mode}:MODE LIST"):
            self._session.configure(step)
        loaded = self._ask(f"SOUR:LIST:{mode}:POIN?", replies.integer)
        if loaded != total:
            raise InstrumentError(f"list read back with {loaded} points, {total} were sent",
                                  address=self.address, identity=self.identity,
                                  command=f"SOUR:LIST:{mode}:POIN?")
        self._list_points = len(wire)

    def start_list(self) -> None:
        self._session.configure("INIT")

    def list_points_done(self) -> int:
        """Readings of the caller's levels that are stored. The last one counts only once
        the appended 0 level has been reached too, so ``list_points_done() ==
        len(levels)`` means the sweep is over and the source is back at zero."""
        stored = self._ask("TRAC:POIN:ACT?", replies.integer)
        n = self._list_points
        if n is None:
            return stored
        return n if stored > n else min(stored, n - 1)

    def fetch_list(self, start: int, count: int) -> list[SmuReading]:
        """Readings ``start … start+count-1`` (0-based) of the list sweep, fetched in
        chunks of ``fetch_chunk_points`` per round trip."""
        for name, value in (("start", start), ("count", count)):
            if isinstance(value, bool) or not isinstance(value, int) or value < 0:
                raise self._invalid(f"{name} must be an int >= 0, got {value!r}")
        if self._list_points is not None and start + count > self._list_points:
            raise self._invalid(f"readings {start}..{start + count - 1} requested, "
                                f"the list has {self._list_points}")
        result: list[SmuReading] = []
        for first in range(start, start + count, self.fetch_chunk_points):
            size = min(self.fetch_chunk_points, start + count - first)
            result += [SmuReading(v, i, c) for v, i, c in self._fetch_chunk(first, size)]
        return result

    def _fetch_chunk(self, first: int, size: int) -> list[tuple[float, float, bool]]:
        parse = replies.reading_triples(size)
        if self.binary_transfer:
            command = f"FORM:DATA REAL,64;:FORM:BORD NORM;:TRAC:DATA? {first},{size}"
            values = self._session.query_binary_floats(command, big_endian=True)
            return self._session.parse_reply(command, values, parse, values)
        command = f"FORM:DATA ASC;:TRAC:DATA? {first},{size}"
        return self._session.query_values(command, (parse,))[0]

    def abort(self) -> None:
        self._session.configure("ABOR")

    # ------------------------------------------------------------------ recovery
    def make_safe(self) -> bool:
        """Abort, level 0, output off, then read the output state back. Never raises
        (``Exception``; a second Ctrl-C still interrupts). Tries twice, reconnecting
        before the second try. True only if the output was read back off. What went
        wrong is kept in ``last_safe_notes``."""
        notes: list[str] = []
        with self._session.lock:
            for attempt in (1, 2):
                try:
                    if attempt == 2 or self._session.state in ("broken", "closed"):
                        self._session.reconnect()
                    for command in self.SAFE_SEQUENCE:
                        self._session.write_unsynchronised(command)
                    reply = self._session.query("OUTP?")
                    on = self._session.parse_reply("OUTP?", reply, replies.boolean, reply)
                    if not on:
                        self.last_safe_notes = tuple(notes + self._queued_errors())
                        return True
                    notes.append(f"attempt {attempt}: output read back ON")
                except Exception as exc:  # never raise from the safety path
                    notes.append(f"attempt {attempt}: {exc}")
        self.last_safe_notes = tuple(notes)
        return False

    def close(self) -> None:
        """Make safe first (best effort, never raises; see ``last_safe_notes``), then
        close the connection: closing a driver never leaves the output on by omission."""
        if self._session.state != "closed":
            self.make_safe()
        super().close()

    def _queued_errors(self) -> list[str]:
        try:
            return [f'queued: {code},"{text}"' for code, text in self._session.read_error_queue()]
        except Exception as exc:  # the output is already verified off; just note it
            return [f"error queue unreadable: {exc}"]

    # ------------------------------------------------------------------ helpers
    def _after_connect(self, session: ScpiSession) -> None:
        self._mode = None
        for command in self.SAFE_SEQUENCE:
            session.write(command)
        reply = session.query("OUTP?")
        on = session.parse_reply("OUTP?", reply, replies.boolean, reply)
        session.write("*CLS")   # errors from aborting an idle instrument are not news
        if on:
            raise InstrumentError("output still on after switching it off at connect",
                                  address=session.address, identity=session.identity,
                                  command="OUTP OFF")

    def _ask_state(self, command: str, parse) -> Any:
        return self._session.query_values(command, (parse,), check_errors=False)[0]

    def _source_mode(self) -> str:
        if self._mode is None:
            self._mode = self._ask("SOUR:FUNC:MODE?", replies.word("VOLT", "CURR"))
        return self._mode
