"""The validated protocol: frozen dataclasses that mirror the YAML schema (see
``protocols/README.md``). Every default has been filled in, so two protocols that mean the
same thing compare equal however they were written."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Iterator, Mapping, Union

from tracer.plan import Limits

SCHEMA_VERSION = 1

STEP_KINDS = ("sweep", "hold", "mpp", "set-light", "wait-temperature", "pixel-loop")
MODELS = ("single", "double", "auto")
PROCEDURES = (1, 2, 3, "model")
SHUTTER = ("open", "closed")

ALPHA_UNITS = ("A/K", "mA/K", "1/K", "%/K")
BETA_UNITS = ("V/K", "mV/K", "1/K", "%/K")


class FrozenMap(Mapping[str, Any]):
    """An immutable, hashable mapping (for free-form metadata); equal to a dict with the
    same items. Nested mappings are FrozenMaps and lists are tuples."""

    __slots__ = ("_data", "_hash")

    def __init__(self, data: Mapping[str, Any] | None = None):
        self._data = {k: _freeze(v) for k, v in (data or {}).items()}
        self._hash: int | None = None

    def __getitem__(self, key: str) -> Any:
        return self._data[key]

    def __iter__(self) -> Iterator[str]:
        return iter(self._data)

    def __len__(self) -> int:
        return len(self._data)

    def __hash__(self) -> int:
        if self._hash is None:
            self._hash = hash(tuple(sorted((k, _hashable(v)) for k, v in self._data.items())))
        return self._hash

    def __eq__(self, other: object) -> bool:
        if isinstance(other, Mapping):
            return dict(self.items()) == dict(other.items())
        return NotImplemented

    def __repr__(self) -> str:
        return f"FrozenMap({self._data!r})"

    def to_plain(self) -> dict[str, Any]:
        return {k: _thaw(v) for k, v in self._data.items()}


def _freeze(value: Any) -> Any:
    if isinstance(value, Mapping) and not isinstance(value, FrozenMap):
        return FrozenMap(value)
    if isinstance(value, (list, tuple)):
        return tuple(_freeze(v) for v in value)
    return value


def _thaw(value: Any) -> Any:
    if isinstance(value, FrozenMap):
        return value.to_plain()
    if isinstance(value, tuple):
        return [_thaw(v) for v in value]
    return value


def _hashable(value: Any) -> Any:
    if isinstance(value, FrozenMap):
        return ("map", hash(value))
    if isinstance(value, tuple):
        return tuple(_hashable(v) for v in value)
    return value


@dataclass(frozen=True)
class SampleSpec:
    id: str
    area_cm2: float | None = None
    cells_in_series: int = 1
    pixels: int | None = None          # how many pixels the substrate has ("all" = 1 … pixels)
    description: str = ""


@dataclass(frozen=True)
class ChecksSpec:
    temperature_window_c: tuple[float, float] | None = None
    light_stability_rel: float | None = 0.05
    watchdog_s: float = 10.0


@dataclass(frozen=True)
class SweepSpec:
    """``start``/``stop``/``compliance`` are in V or A by ``source`` (the YAML keys carry the
    unit: ``start_v``/``start_a``, ``compliance_a``/``compliance_v``)."""

    name: str
    light: bool
    source: str                 # "voltage" | "current"
    start: float
    stop: float
    points: int
    spacing: str
    direction: str
    settle_s: float
    nplc: float
    four_wire: bool
    repeats: int
    acquisition: str
    compliance: float
    voc_estimate_v: float | None = None

    kind = "sweep"


@dataclass(frozen=True)
class HoldSpec:
    """``compliance`` is [V] for mode "voc" (the SMU sources 0 A) and [A] otherwise."""

    name: str
    light: bool
    mode: str
    duration_s: float
    interval_s: float
    level_v: float | None
    nplc: float
    four_wire: bool
    compliance: float

    kind = "hold"


@dataclass(frozen=True)
class MppSpec:
    name: str
    duration_s: float
    interval_s: float
    step_v: float
    start_v: float | None
    nplc: float
    four_wire: bool
    compliance_a: float

    kind = "mpp"
    light = True


@dataclass(frozen=True)
class SetLightSpec:
    shutter: str                # "open" | "closed"
    irradiance_w_m2: float | None = None
    stability_tolerance_rel: float = 0.02
    settle_timeout_s: float = 60.0

    kind = "set-light"


@dataclass(frozen=True)
class WaitTemperatureSpec:
    target_c: float
    tolerance_c: float = 1.0
    timeout_s: float = 600.0

    kind = "wait-temperature"


MeasureSpec = Union[SweepSpec, HoldSpec, MppSpec, SetLightSpec, WaitTemperatureSpec]


@dataclass(frozen=True)
class PixelLoopSpec:
    pixels: Union[tuple[int, ...], str]     # explicit channels, or "all"
    steps: tuple[MeasureSpec, ...]

    kind = "pixel-loop"


StepSpec = Union[MeasureSpec, PixelLoopSpec]


@dataclass(frozen=True)
class Coefficient:
    value: float
    unit: str


@dataclass(frozen=True)
class ProcedureParameters:
    """Optional IEC 60891 correction parameters for procedure 1 or 2 (Rs, kappa; for
    procedure 2 also the Voc irradiance factor ``a``). Left out: the analyser determines them."""

    rs_ohm: float | None = None
    kappa_ohm_per_k: float | None = None
    voc_irradiance_factor: float | None = None


@dataclass(frozen=True)
class TranslationSpec:
    target_irradiance_w_m2: float = 1000.0
    target_temperature_c: float = 25.0
    procedures: tuple[Union[int, str], ...] = (1,)
    procedure_1: ProcedureParameters | None = None
    procedure_2: ProcedureParameters | None = None


@dataclass(frozen=True)
class TemperatureCoefficients:
    alpha_isc: Coefficient | None = None
    beta_voc: Coefficient | None = None


@dataclass(frozen=True)
class ReferenceCellSpec:
    calibration_isc_a: float
    calibration_uncertainty_rel: float | None = None
    temperature_coefficient_per_k: float | None = None
    id: str = ""


@dataclass(frozen=True)
class AnalysisSpec:
    models: tuple[str, ...] = ("auto",)
    translation: TranslationSpec | None = None
    temperature_coefficients: TemperatureCoefficients = TemperatureCoefficients()
    reference_cell: ReferenceCellSpec | None = None


@dataclass(frozen=True)
class Protocol:
    name: str
    sample: SampleSpec
    limits: Limits
    steps: tuple[StepSpec, ...]
    checks: ChecksSpec = ChecksSpec()
    analysis: AnalysisSpec = AnalysisSpec()
    metadata: FrozenMap = field(default_factory=FrozenMap)
    description: str = ""
    schema: int = SCHEMA_VERSION
    # where it came from, and the line of each key path (tuple of keys and indices); these
    # two are not compared
    source: str = field(default="<text>", compare=False)
    lines: Mapping[tuple, int] = field(default_factory=dict, compare=False, repr=False)

    def line_of(self, key: "str | tuple") -> int | None:
        """Line of a key path, given as ``"steps[1].points"`` or ``("steps", 1, "points")``
        (or of its nearest parent that has one); None for a protocol built in code."""
        from ._yamltree import format_path
        text = key if isinstance(key, str) else format_path(tuple(key))
        by_text = {format_path(k): v for k, v in self.lines.items()}
        while True:
            if text in by_text:
                return by_text[text]
            if not text:
                return None
            cut = max(text.rfind("."), text.rfind("["))
            text = text[:cut] if cut > 0 else ""

    def measure_steps(self) -> Iterator[tuple[str, MeasureSpec]]:
        """(key path, step) of every step, loop bodies included once."""
        for i, step in enumerate(self.steps):
            if isinstance(step, PixelLoopSpec):
                for j, inner in enumerate(step.steps):
                    yield f"steps[{i}].steps[{j}]", inner
            else:
                yield f"steps[{i}]", step
