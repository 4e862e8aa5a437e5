"""Bench profiles: which instruments a bench has, where they are, which driver speaks to
each, the bench's hard limits and the reference cell's calibration (format:
``docs/bench-profile.md``).

    profile = load_bench_profile("bench.yaml")      # raises BenchProfileError with every problem
    profile.hard_limits                             # tracer.plan.Limits
    profile.instrument("smu").address
    profile.to_snapshot()                           # JSON-safe, credentials removed

Driver names are checked against ``known_drivers`` when given, else against the registry
``drivers.DRIVERS`` if that package can be imported (imported only when a profile is
loaded, never at module import); without either, any well-formed name is accepted.
"""
from __future__ import annotations

import dataclasses
import difflib
import importlib
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Collection, Iterable

from tracer.logbook.backend import RedactedUrl, is_url, redact_url

from tracer.plan import Limits
from tracer.protocol._fields import (INVALID, Choice, Ctx, Custom, Field, Number, Text, describe,
                                     ok, read_mapping, unknown_key)
from tracer.protocol._yamltree import load_document
from tracer.protocol.errors import ProblemReport
from tracer.protocol.schema import LIMIT_FIELDS

ROLES = ("smu", "light", "thermometer", "switch")
INSTABILITY_CLASSES = ("A+", "A", "B", "C")   # IEC 60904-9 temporal-instability classes

_ROLE_SYNONYMS = {
    name: f"the role is called {role!r}" for role, names in {
        "light": ("lamp", "solar_simulator", "simulator", "light_source", "shutter"),
        "smu": ("sourcemeter", "source_meter", "source-meter", "smu1"),
        "thermometer": ("stage", "temperature", "thermo", "thermocouple"),
        "switch": ("mux", "multiplexer", "relay", "pixel_switch", "matrix"),
    }.items() for name in names}
_VISA = re.compile(r"(TCPIP\d*|GPIB\d*|USB\d*|ASRL[^:\s]*|VXI\d*|PXI\d*|VICP\d*)::\S+",
                   re.IGNORECASE)
_VISA_HELP = "a VISA resource string such as TCPIP0::127.0.0.1::5025::SOCKET"
_CREDENTIALS = re.compile(r"(?<=[:/])[^:/@\s]+:[^@\s]+@")
_HOST_PORT = re.compile(r"[A-Za-z0-9.\-]+:\d{1,5}|\[[0-9A-Fa-f:.]+\]:\d{1,5}")


class BenchProfileError(ProblemReport):
    """A bench profile that cannot be loaded. ``.problems`` lists every problem."""

    what = "bench profile"


@dataclass(frozen=True)
class Instrument:
    role: str
    address: str
    driver: str
    timeout_s: float = 5.0
    channels: int | None = None        # the switch only: how many pixels it can select


@dataclass(frozen=True)
class ReferenceCell:
    calibration_isc_a: float                         # its Isc at 1000 W/m2, 25 C, AM1.5G [A]
    calibration_uncertainty_rel: float | None = None
    temperature_coefficient_per_k: float | None = None   # relative change of Isc per kelvin
    id: str = ""


@dataclass(frozen=True)
class BenchProfile:
    name: str
    instruments: tuple[Instrument, ...]
    hard_limits: Limits
    reference_cell: ReferenceCell | None = None
    instability_class: str | None = None
    usual_series_resistance_ohm: float | None = None
    simulator_control: str | None = None      # "host:port" of a simulated bench's harness
    source: str = field(default="<text>", compare=False)
    # where this bench keeps its runs: a file (relative to the profile's folder) or a
    # postgresql:// URL; and the shared store its runs are forwarded to. URLs are kept as
    # tracer.logbook.backend.RedactedUrl: their text has no credentials.
    logbook: Any = None
    forward_to: Any = None

    @property
    def roles(self) -> tuple[str, ...]:
        return tuple(i.role for i in self.instruments)

    def has_role(self, role: str) -> bool:
        return any(i.role == role for i in self.instruments)

    def instrument(self, role: str) -> Instrument:
        for i in self.instruments:
            if i.role == role:
                return i
        raise KeyError(f"bench {self.name!r} has no {role!r} instrument")

    @property
    def switch_channels(self) -> int | None:
        return self.instrument("switch").channels if self.has_role("switch") else None

    @property
    def simulated(self) -> bool:
        return self.simulator_control is not None

    def to_snapshot(self) -> dict[str, Any]:
        """JSON-safe description for run records; credentials in addresses are removed and the
        simulator's harness port is left out."""
        instruments = {}
        for i in self.instruments:
            entry: dict[str, Any] = {"address": redact_address(i.address), "driver": i.driver,
                                     "timeout_s": i.timeout_s}
            if i.channels is not None:
                entry["channels"] = i.channels
            instruments[i.role] = entry
        ref = None
        if self.reference_cell is not None:
            r = self.reference_cell
            ref = {"calibration_isc_a": r.calibration_isc_a,
                   "calibration_uncertainty_rel": r.calibration_uncertainty_rel,
                   "temperature_coefficient_per_k": r.temperature_coefficient_per_k}
            if r.id:
                ref["id"] = r.id
        return {
            "name": self.name,
            "instruments": instruments,
            "hard_limits": {"voltage_v": self.hard_limits.voltage_v,
                            "current_a": self.hard_limits.current_a,
                            "power_w": self.hard_limits.power_w,
                            "reverse_voltage_v": self.hard_limits.reverse_voltage_v},
            "reference_cell": ref,
            "instability_class": self.instability_class,
            "usual_series_resistance_ohm": self.usual_series_resistance_ohm,
            "simulated": self.simulated,
            **({"logbook": str(self.logbook)} if self.logbook is not None else {}),
            **({"forward_to": str(self.forward_to)} if self.forward_to is not None else {}),
        }


def redact_address(address: str) -> str:
    """Remove ``user:password@`` from an address, should a resource string carry one."""
    return _CREDENTIALS.sub("***@", address)


def registered_drivers() -> frozenset[str] | None:
    """Names in ``drivers.DRIVERS``, or None when the registry is not importable."""
    try:
        module = importlib.import_module("drivers")
        registry = getattr(module, "DRIVERS")
    except (ImportError, AttributeError):
        return None
    try:
        return frozenset(str(k) for k in registry)
    except TypeError:
        return None


# --------------------------------------------------------------------------- loading
def load_bench_profile(source: Any, *, known_drivers: Iterable[str] | None = None,
                       source_name: str | None = None) -> BenchProfile:
    """Load and validate a bench profile from a path (or YAML text / bytes).

    Raises :class:`BenchProfileError` listing every problem found."""
    doc = load_document(source, source_name=source_name, what="bench profile",
                        error=BenchProfileError)
    drivers = frozenset(known_drivers) if known_drivers is not None else registered_drivers()
    ctx = Ctx(doc)
    profile = _validate(ctx, doc.value, drivers)
    if ctx.problems or profile is None:
        if not ctx.problems:  # pragma: no cover - every INVALID comes with a problem
            ctx.add((), "is not a valid bench profile")
        raise BenchProfileError(ctx.problems)
    if profile.logbook is not None and not is_url(profile.logbook):
        where = Path(doc.file).parent if os.path.isfile(doc.file) else Path.cwd()
        profile = dataclasses.replace(profile, logbook=where / Path(profile.logbook).expanduser())
    return dataclasses.replace(profile, source=doc.file)


def _store_url(ctx: Ctx, path: tuple, value: Any) -> Any:
    """A postgresql:// URL; a problem report never repeats its credentials."""
    if not isinstance(value, str) or not is_url(value.strip()) or any(c.isspace() for c in value.strip()):
        shown = redact_url(value) if isinstance(value, str) else describe(value)
        ctx.add(path, f"{shown!r} is not a postgresql:// URL", value=shown,
                allowed="postgresql://user@host:port/database (password in ~/.pgpass or PGPASSWORD)")
        return INVALID
    return RedactedUrl(value.strip())


def _logbook_target(ctx: Ctx, path: tuple, value: Any) -> Any:
    if isinstance(value, str) and is_url(value.strip()):
        return _store_url(ctx, path, value)
    if not isinstance(value, str) or not value.strip() or len(value) > 4096:
        ctx.add(path, f"expected a logbook file or a postgresql:// URL; got {describe(value)}",
                value=value, allowed="a file path or postgresql://user@host:port/database")
        return INVALID
    return value.strip()


def _validate(ctx: Ctx, raw: dict, drivers: Collection[str] | None) -> BenchProfile | None:
    for key in raw:
        if key != "bench":
            unknown_key(ctx, (key,), key, ("bench",), what="the bench profile",
                        extra_help={"steps": "this looks like a protocol, not a bench profile",
                                    "limits": "a bench profile has bench.hard_limits"})
    if "bench" not in raw:
        ctx.add((), "missing the top-level key 'bench'", allowed="bench: {name, instruments, "
                "hard_limits, ...}")
        return None
    body = raw["bench"]
    fields = {
        "name": Field(Text(64, min_len=1), required=True),
        "instruments": Field(Custom(lambda c, p, v: v, "a mapping of role to instrument"),
                             required=True),
        "hard_limits": Field(Custom(lambda c, p, v: v, "a mapping"), required=True),
        "reference_cell": Field(Custom(lambda c, p, v: v, "a mapping")),
        "instability_class": Field(Choice(INSTABILITY_CLASSES)),
        "usual_series_resistance_ohm": Field(Number(0, 10_000, lo_open=True, unit="Ω")),
        "simulator_control": Field(Text(100, pattern=_HOST_PORT.pattern,
                                        pattern_help="host:port", min_len=1)),
        "logbook": Field(Custom(_logbook_target, "a logbook file or a postgresql:// URL")),
        "forward_to": Field(Custom(_store_url, "a postgresql:// URL")),
    }
    v = read_mapping(ctx, ("bench",), body, fields, what="bench")
    if v is None:
        return None
    instruments = _instruments(ctx, v["instruments"], drivers)
    limits = INVALID
    if v["hard_limits"] is not INVALID:
        lv = read_mapping(ctx, ("bench", "hard_limits"), v["hard_limits"], LIMIT_FIELDS,
                          what="hard_limits")
        if lv is not None and ok(*lv.values()):
            limits = Limits(**lv)
    reference = None
    if v["reference_cell"] not in (None, INVALID):
        rv = read_mapping(ctx, ("bench", "reference_cell"), v["reference_cell"], {
            "calibration_isc_a": Field(Number(0, 10, lo_open=True, unit="A"), required=True),
            "calibration_uncertainty_rel": Field(Number(0, 0.5)),
            "temperature_coefficient_per_k": Field(Number(-0.01, 0.01, unit="1/K")),
            "id": Field(Text(64), default=""),
        }, what="reference_cell")
        reference = ReferenceCell(**rv) if rv is not None and ok(*rv.values()) else INVALID
    elif v["reference_cell"] is INVALID:
        reference = INVALID
    if not ok(*v.values(), instruments, limits, reference):
        return None
    return BenchProfile(name=v["name"], instruments=instruments, hard_limits=limits,
                        reference_cell=reference, instability_class=v["instability_class"],
                        usual_series_resistance_ohm=v["usual_series_resistance_ohm"],
                        simulator_control=v["simulator_control"],
                        logbook=v["logbook"], forward_to=v["forward_to"])


def _instruments(ctx: Ctx, raw: Any, drivers: Collection[str] | None) -> Any:
    path = ("bench", "instruments")
    if raw is INVALID:
        return INVALID
    if not isinstance(raw, dict) or not raw:
        ctx.add(path, f"expected a mapping of role to instrument; got {describe(raw)}",
                value=raw, allowed="roles " + ", ".join(ROLES) + " (smu required)")
        return INVALID
    out = []
    bad = False
    for role, body in raw.items():
        if role not in ROLES:
            unknown_key(ctx, path + (role,), role, ROLES, what="instruments (roles)",
                        extra_help=_ROLE_SYNONYMS)
            bad = True
            continue
        driver_allowed = ("one of " + ", ".join(sorted(drivers))) if drivers else \
            "a driver name (lower-case letters, digits and -)"
        fields = {
            "address": Field(Text(256, pattern=_VISA.pattern, pattern_help=_VISA_HELP,
                                  min_len=1), required=True),
            "driver": Field(Text(64, pattern=r"[a-z0-9][a-z0-9_-]*",
                                 pattern_help="lower-case letters, digits, - and _", min_len=1),
                            required=True),
            "timeout_s": Field(Number(0, 600, lo_open=True, unit="s"), default=5.0),
        }
        if role == "switch":
            fields["channels"] = Field(Number(1, 64, integer=True), required=True)
        v = read_mapping(ctx, path + (role,), body, fields, what=f"instrument {role!r}",
                         extra_help={"channels": "only a switch has channels"})
        if v is None or not ok(*v.values()):
            bad = True
            continue
        if drivers is not None and v["driver"] not in drivers:
            close = difflib.get_close_matches(v["driver"], sorted(drivers), n=1, cutoff=0.6)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            ctx.add(path + (role, "driver"), f"unknown driver {v['driver']!r}{hint}; allowed "
                    f"{driver_allowed}", value=v["driver"], allowed=driver_allowed)
            bad = True
            continue
        out.append(Instrument(role=role, address=v["address"], driver=v["driver"],
                              timeout_s=v["timeout_s"], channels=v.get("channels")))
    if not bad and not any(i.role == "smu" for i in out):
        ctx.add(path, "a bench needs an 'smu' instrument", allowed="an smu entry")
        bad = True
    return INVALID if bad else tuple(out)
