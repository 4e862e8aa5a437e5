"""The composition root: the one place that names driver classes and the VISA backend.

::

    from tracer.app import build_application

    with build_application(bench_file="bench.yaml", logbook_path="lab.sqlite") as app:
        run_uid = app.engine.start(plan, operator="ana")
        finished = app.engine.wait()

:func:`build_application` opens the logbook first (nothing is touched if the results cannot
be kept), then builds the bench from a bench profile — or, with no profile, starts the
built-in simulated bench in this process on free loopback ports and uses the profile it
writes, so the simulated bench is reached exactly like a real one: over the wire, through
the same drivers — then connects the instruments, wires the irradiance from the reference
cell's calibration and the end-of-sweep analysis (:func:`make_analyzer`), and subscribes the
logbook writer to the engine as its first, critical subscriber.

:meth:`Application.close` (also on ``with`` exit) ends any run safely (the engine's
emergency stop: level 0, output off, read back), closes the logbook writer, the instruments,
the VISA resource manager and, last, the simulator.
"""
from __future__ import annotations

import contextlib
import math
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping

import numpy as np

from tracer.conventions import generator_current
from tracer.logbook import LogbookWriter, default_logbook_path
from tracer.logbook.backend import is_url, logbook_target

VISA_BACKEND = "@py"     # pyvisa-py: pure Python, TCP/IP sockets, no vendor library
ROLES = ("smu", "light", "thermometer", "switch")


class ApplicationError(Exception):
    """The bench could not be assembled (instrument unreachable, unknown driver...)."""


@dataclass
class Application:
    """A ready engine and what it owns; close it (or use ``with``) when done."""

    engine: Any                       # tracer.engine.Engine
    bench: Any                        # tracer.engine.Bench
    profile: Any                      # tracer.bench_profile.BenchProfile
    writer: LogbookWriter
    logbook_path: Path                # or a RedactedUrl (a PostgreSQL store; prints no secret)
    simulator: Any = None             # the running simulated bench, when built in
    forwarder: Any = None             # tracer.logbook.forward.Forwarder, when forwarding
    _stack: contextlib.ExitStack = field(default_factory=contextlib.ExitStack, repr=False)
    _closed: bool = field(default=False, repr=False)

    @property
    def simulated(self) -> bool:
        return self.simulator is not None

    def close(self) -> None:
        if self._closed:
            return
        self._closed = True
        self._stack.close()

    def __enter__(self) -> "Application":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


# ----------------------------------------------------------------------------- analysis
def _analysis_settings(plan_analysis: Mapping[str, Any], profile: Any, figures: Any):
    """``tracer.analysis.AnalysisSettings`` from a plan's ``analysis`` dict (see
    ``tracer.protocol.analysis_settings``) and the bench profile. ``figures`` are the
    sweep's data figures (Isc, Voc), used to turn relative temperature coefficients into
    absolute ones for IEC 60891 procedure 1 and absolute ones into relative ones for
    procedure 2; None when unknown (those procedures then report what they miss)."""
    from tracer.analysis import AnalysisSettings, ReferenceCell
    from tracer.quality import QualityThresholds
    from tracer.stc import Procedure1Coefficients, Procedure2Coefficients

    a = dict(plan_analysis or {})
    kwargs: dict[str, Any] = {}
    models = [m for m in (a.get("models") or ["single"]) if m in ("single", "double", "auto")]
    kwargs["models"] = tuple(models) or ("single",)

    coeffs = dict(a.get("temperature_coefficients") or {})
    alpha_abs = coeffs.get("alpha_isc_a_per_k")
    alpha_rel = coeffs.get("alpha_isc_per_k")
    beta_abs = coeffs.get("beta_voc_v_per_k")
    beta_rel = coeffs.get("beta_voc_per_k")
    isc = getattr(figures, "isc_a", None)
    voc = getattr(figures, "voc_v", None)
    if alpha_abs is None and alpha_rel is not None and isc:
        alpha_abs_from_rel = alpha_rel * isc
    else:
        alpha_abs_from_rel = None
    if alpha_abs is not None:
        kwargs["alpha_isc_a_per_k"] = float(alpha_abs)
    elif alpha_rel is not None:
        kwargs["alpha_isc_rel_per_k"] = float(alpha_rel)

    translation = a.get("translation")
    if translation:
        names = {1: "procedure1", 2: "procedure2", 3: "procedure3", "1": "procedure1",
                 "2": "procedure2", "3": "procedure3", "model": "diode_model"}
        methods = []
        for p in translation.get("procedures") or ():
            name = names.get(p)
            if name and name not in methods:
                methods.append(name)
        kwargs["stc_methods"] = tuple(methods)
        kwargs["target_irradiance_w_m2"] = float(translation.get("target_irradiance_w_m2", 1000.0))
        kwargs["target_temperature_c"] = float(translation.get("target_temperature_c", 25.0))
        p1 = translation.get("procedure_1")
        if p1 and p1.get("rs_ohm") is not None:
            alpha = alpha_abs if alpha_abs is not None else alpha_abs_from_rel
            beta = beta_abs if beta_abs is not None else (
                beta_rel * voc if beta_rel is not None and voc else None)
            if alpha is not None and beta is not None:
                kwargs["procedure1"] = Procedure1Coefficients(
                    alpha_a_per_k=float(alpha), beta_v_per_k=float(beta),
                    series_resistance_ohm=float(p1["rs_ohm"]),
                    kappa_ohm_per_k=float(p1.get("kappa_ohm_per_k") or 0.0))
        p2 = translation.get("procedure_2")
        if p2 and p2.get("rs_ohm") is not None and p2.get("voc_irradiance_factor") is not None:
            arel = alpha_rel if alpha_rel is not None else (
                alpha_abs / isc if alpha_abs is not None and isc else None)
            brel = beta_rel if beta_rel is not None else (
                beta_abs / voc if beta_abs is not None and voc else None)
            if arel is not None and brel is not None:
                kwargs["procedure2"] = Procedure2Coefficients(
                    alpha_rel_per_k=float(arel), beta_rel_per_k=float(brel),
                    irradiance_factor=float(p2["voc_irradiance_factor"]),
                    series_resistance_ohm=float(p2["rs_ohm"]),
                    kappa_ohm_per_k=float(p2.get("kappa_ohm_per_k") or 0.0))
    else:
        kwargs["stc_methods"] = ()

    ref = a.get("reference_cell")
    if ref is None and profile is not None and getattr(profile, "reference_cell", None) is not None:
        r = profile.reference_cell
        ref = {"calibration_isc_a": r.calibration_isc_a,
               "calibration_uncertainty_rel": r.calibration_uncertainty_rel,
               "temperature_coefficient_per_k": r.temperature_coefficient_per_k}
    if ref:
        kwargs["reference_cell"] = ReferenceCell(
            calibration_isc_a=float(ref["calibration_isc_a"]),
            calibration_uncertainty_rel=float(ref.get("calibration_uncertainty_rel") or 0.0),
            temperature_coefficient_per_k=float(ref.get("temperature_coefficient_per_k") or 0.0))
    if profile is not None:
        if getattr(profile, "usual_series_resistance_ohm", None) is not None:
            kwargs["usual_series_resistance_ohm"] = float(profile.usual_series_resistance_ohm)
        if getattr(profile, "instability_class", None):
            kwargs["quality"] = QualityThresholds(instability_class=profile.instability_class)
    return AnalysisSettings(**kwargs)


def _stage_setpoint(plan: Any, step_index: int) -> float | None:
    """The temperature the stage was last asked to hold before ``step_index``."""
    from tracer.plan import WaitTemperature

    target = None
    for k, step in enumerate(getattr(plan, "steps", ())):
        if k >= step_index:
            break
        if isinstance(step, WaitTemperature):
            target = step.target_c
    return target


def _finite_mean(values) -> float | None:
    a = np.asarray([v for v in values if v is not None], dtype=float)
    a = a[np.isfinite(a)]
    return float(a.mean()) if a.size else None


def make_analyzer(profile: Any = None) -> Callable[[Any], dict]:
    """The engine's analyser: a finished sweep (``tracer.engine.SweepRecord``) in, the
    JSON-safe ``tracer.analysis`` result out. Currents are turned into the generator
    convention here, with :func:`tracer.conventions.generator_current`."""
    from tracer.analysis import PairedSweep, SweepContext, analyze_sweep
    from tracer.fit import FitError, figures_from_data

    def analyze(record: Any) -> dict:
        started = record.started
        plan = record.plan
        points = record.points
        v = np.array([p.voltage_v for p in points], dtype=float)
        i = generator_current(np.array([p.current_a for p in points], dtype=float))
        dark = not started.light
        figures = None
        if not dark:
            try:
                figures = figures_from_data(v, i)
            except (FitError, ValueError, ArithmeticError):
                figures = None
        settings = _analysis_settings(plan.analysis, profile, figures)
        temps = list(record.temperature_c) or [p.temperature_c for p in points]
        temperature_c = _finite_mean(temps)
        if temperature_c is None:
            temperature_c = started.conditions.get("temperature_c")
        irradiance = [g for g in record.irradiance_w_m2 if g is not None and math.isfinite(g)]
        pair = None
        if record.pair is not None and record.pair.points:
            pv = np.array([p.voltage_v for p in record.pair.points], dtype=float)
            pi = generator_current(np.array([p.current_a for p in record.pair.points], dtype=float))
            pair = PairedSweep(voltage_v=pv, current_a=pi, direction=record.pair.started.direction)
        context = SweepContext(
            direction=started.direction if started.direction in ("forward", "reverse") else None,
            irradiance_readings_w_m2=tuple(irradiance) or None,
            temperature_readings_c=tuple(t for t in record.temperature_c if t is not None) or None,
            stage_setpoint_c=_stage_setpoint(plan, started.step_index),
            compliance_flags=tuple(bool(p.in_compliance) for p in points),
            paired_sweep=pair,
            four_wire=bool(started.four_wire))
        sample = plan.sample
        result = analyze_sweep(
            v, i, dark=dark, temperature_c=temperature_c, irradiance_w_m2=None,
            area_cm2=sample.area_cm2, cells_in_series=sample.cells_in_series,
            settings=settings, context=context)
        return result.to_dict()

    return analyze


# ----------------------------------------------------------------------------- the bench
def _irradiance_function(profile: Any) -> Callable[[float, float], float] | None:
    ref = getattr(profile, "reference_cell", None)
    if ref is None:
        return None
    from tracer.stc import irradiance_from_reference_cell

    calibration = float(ref.calibration_isc_a)
    alpha = float(ref.temperature_coefficient_per_k or 0.0)

    def irradiance(reference_isc_a: float, reference_temperature_c: float) -> float:
        # The reference cell reads its short-circuit current; its sign depends on how it is
        # wired to the light source's meter, so the magnitude is what counts.
        return float(irradiance_from_reference_cell(
            abs(float(reference_isc_a)), calibration_isc_a=calibration,
            reference_temperature_c=float(reference_temperature_c), alpha_rel_per_k=alpha))

    return irradiance


def _connect_instruments(profile: Any, stack: contextlib.ExitStack) -> dict[str, Any]:
    import pyvisa

    from drivers import DRIVERS, InstrumentError

    rm = pyvisa.ResourceManager(VISA_BACKEND)
    stack.callback(_quietly, rm.close)
    out: dict[str, Any] = {}
    for inst in profile.instruments:
        cls = DRIVERS.get(inst.driver)
        if cls is None:
            raise ApplicationError(f"bench {profile.name!r}: no driver {inst.driver!r} for the "
                                   f"{inst.role}; known: {', '.join(sorted(DRIVERS))}")
        kwargs: dict[str, Any] = {"resource_manager": rm, "timeout_s": float(inst.timeout_s)}
        if inst.role == "switch":
            kwargs["channels"] = int(inst.channels or 1)
        try:
            driver = cls(inst.address, **kwargs)
        except (InstrumentError, OSError) as exc:
            raise ApplicationError(f"cannot reach the {inst.role} at {inst.address}: {exc}") from exc
        stack.callback(_quietly, driver.close)
        out[inst.role] = driver
    if "smu" not in out:
        raise ApplicationError(f"bench {profile.name!r} has no source-measure unit")
    return out


def _quietly(fn: Callable[[], Any]) -> None:
    try:
        fn()
    except Exception:  # noqa: BLE001 - teardown must go on
        pass


def build_application(bench_file: Path | str | None = None, *, logbook_path: Path | str | None = None,
                      synchronous: str = "NORMAL", scenario: Any = None, time_scale: float | None = None,
                      seed: int | None = None, engine_options: Any = None,
                      analyzer: Callable[[Any], Mapping] | None | bool = True,
                      forward_to: Any = None, forward_options: Mapping[str, Any] | None = None
                      ) -> Application:
    """Assemble a ready engine (see the module docstring).

    ``bench_file``: a bench profile; None starts the built-in simulated bench (``scenario``,
    ``time_scale``, ``seed`` go to it). ``logbook_path``: a file or a ``postgresql://`` URL;
    None = the profile's ``logbook``, else the default logbook. ``forward_to``: a shared
    store (URL) to which a background :class:`tracer.logbook.forward.Forwarder` copies
    every run once it has ended (None = the profile's ``forward_to``, if any);
    ``forward_options`` go to the Forwarder. ``analyzer``: True = :func:`make_analyzer`,
    False/None = no analysis, or a callable.
    Raises ``BenchProfileError`` (bad profile), ``LogbookError``, ``ApplicationError``.
    """
    from tracer.bench_profile import load_bench_profile
    from tracer.engine import Bench, Engine

    stack = contextlib.ExitStack()
    try:
        early = load_bench_profile(bench_file) if bench_file is not None else None
        if logbook_path is None and early is not None and early.logbook is not None:
            logbook_path = early.logbook
        if forward_to is None and early is not None:
            forward_to = early.forward_to
        if logbook_path is None:
            path = default_logbook_path()
        else:
            path = logbook_target(logbook_path) if isinstance(logbook_path, str) else logbook_path
            path = path if is_url(path) else Path(path)
        forwarder = None
        if forward_to is not None:
            from tracer.logbook.forward import Forwarder

            if is_url(path):
                raise ApplicationError("forwarding copies runs from a local logbook file; the "
                                       f"logbook here is already a shared store ({path})")
            forwarder = Forwarder(path, forward_to, **dict(forward_options or {}))
            stack.callback(forwarder.close)     # after the writer (LIFO): a last pass
        writer = LogbookWriter(path, synchronous=synchronous)
        stack.callback(writer.close)            # closed after the engine (LIFO)

        simulator = None
        if bench_file is None:
            import simulated_instrument

            sim_kwargs: dict[str, Any] = {}
            if scenario is not None:
                sim_kwargs["scenario"] = scenario
            if time_scale is not None:
                sim_kwargs["time_scale"] = time_scale
            if seed is not None:
                sim_kwargs["seed"] = seed
            simulator = stack.enter_context(simulated_instrument.running_bench(**sim_kwargs))
            tmp = stack.enter_context(tempfile.TemporaryDirectory(prefix="tracer-sim-"))
            bench_file = Path(tmp) / "simulated-bench.yaml"
            simulator.write_bench_profile(bench_file)
        profile = load_bench_profile(bench_file)

        instruments = _connect_instruments(profile, stack)
        bench = Bench(
            name=profile.name, smu=instruments["smu"], light=instruments.get("light"),
            thermometer=instruments.get("thermometer"), switch=instruments.get("switch"),
            hard_limits=profile.hard_limits,
            irradiance_from_reference=_irradiance_function(profile),
            snapshot=profile.to_snapshot())
        if analyzer is True:
            analyzer = make_analyzer(profile)
        elif analyzer is False:
            analyzer = None
        engine = Engine(bench, analyzer=analyzer, options=engine_options)
        engine.subscribe(writer, critical=True)     # first: durable before anyone sees it
        if forwarder is not None:
            engine.subscribe(forwarder.notify, batch=True)   # wakes it when a run ends
            forwarder.start()
        stack.callback(engine.close)
        return Application(engine=engine, bench=bench, profile=profile, writer=writer,
                           logbook_path=writer.path, simulator=simulator, forwarder=forwarder,
                           _stack=stack)
    except BaseException:
        stack.close()
        raise
