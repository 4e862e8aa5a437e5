"""Exports of a stored run: CSV (one file per sweep) or one JSON document.

Layout: ``OUT/<run uid>/NN-<step>-<direction>[-pN].csv`` or ``OUT/<run uid>/run.json``.
File and folder names are built from sanitised ids (letters, digits, ``.``, ``_``, ``-``),
and every path is checked to resolve inside ``OUT`` before anything is written, so a
hostile step name or a planted symlink cannot make an export write elsewhere. Files are
written to a temporary name and renamed into place.

CSV: a header of ``# key: value`` lines (value in JSON), then the columns::

    voltage_v,current_a,seq,run_seq,time,setpoint,current_load_a,in_compliance,irradiance_w_m2,temperature_c

``voltage_v``/``current_a`` are in the GENERATOR convention (Isc > 0 under light), converted
by :func:`tracer.conventions.generator_current`; ``current_load_a`` is the SMU's reading as
stored (load convention). Floats are written with ``repr`` (shortest text that reads back
to the same IEEE-754 double), so :func:`read_sweep_csv` returns the stored points bit for
bit. An empty field is a missing value; ``nan`` a reading that was not a number.
"""
from __future__ import annotations

import csv
import io
import json
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable

from tracer import events as ev
from tracer.conventions import generator_current
from tracer.logbook.store import Logbook, LogbookError, StoredRun, StoredSweep, _plain

CSV_FORMAT = "tracer-sweep-csv/1"
JSON_FORMAT = "tracer-run-json/1"
CSV_COLUMNS = ("voltage_v", "current_a", "seq", "run_seq", "time", "setpoint", "current_load_a",
               "in_compliance", "irradiance_w_m2", "temperature_c")
FORMATS = ("csv", "json")
CONVENTION_NOTE = ("voltage_v and current_a: generator convention (current_a = -current_load_a; "
                   "Isc > 0 under light); current_load_a: the SMU reading as measured, current "
                   "into the + terminal")


class ExportError(LogbookError):
    pass


@dataclass(frozen=True)
class ExportResult:
    run_uid: str
    directory: Path          # OUT/<run uid>
    files: tuple[Path, ...]
    format: str


@dataclass(frozen=True)
class SweepCsv:
    metadata: dict[str, Any]
    points: list[ev.Point]          # exactly as stored (load convention)
    voltage_v: list[float]          # generator-convention columns as written
    current_a: list[float]


# ----------------------------------------------------------------------------- names
_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")


def safe_name(text: Any, *, max_len: int = 64) -> str:
    """A file-name component from any text: only ``[A-Za-z0-9._-]``, no leading dot or
    dash, never empty, ``.`` or ``..``."""
    name = _UNSAFE.sub("-", str(text)).strip(".-")[:max_len].strip(".-")
    return name or "unnamed"


def _inside(base: Path, target: Path) -> Path:
    resolved = target.resolve()
    if not resolved.is_relative_to(base):
        raise ExportError(f"refusing to write {target}: it resolves to {resolved}, outside {base}")
    return resolved


def _write_atomically(base: Path, path: Path, text: str) -> Path:
    final = _inside(base, path)
    tmp = final.with_name(f".{final.name}.tmp-{os.getpid()}")
    _inside(base, tmp)
    with open(tmp, "w", encoding="utf-8", newline="") as fh:
        fh.write(text)
    os.replace(tmp, final)
    return final


def run_directory(out_dir: Path | str, run_uid: str) -> Path:
    """``OUT/<run uid>``, created, checked to lie inside ``OUT``."""
    base = Path(out_dir).expanduser()
    base.mkdir(parents=True, exist_ok=True)
    base = base.resolve()
    directory = _inside(base, base / safe_name(run_uid))
    directory.mkdir(exist_ok=True)
    return _inside(base, directory)


def sweep_file_name(sweep: StoredSweep) -> str:
    parts = [f"{sweep.sweep_index:02d}", safe_name(sweep.step_name, max_len=40),
             safe_name(sweep.direction, max_len=10)]
    if sweep.pixel is not None:
        parts.append(f"p{int(sweep.pixel)}")
    return "-".join(parts) + ".csv"


# ----------------------------------------------------------------------------- values
def _fmt(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, int):
        return str(value)
    return repr(float(value))


def _parse_float(text: str) -> float | None:
    return None if text == "" else float(text)


def _header_lines(meta: dict[str, Any]) -> Iterable[str]:
    for key, value in meta.items():
        yield f"# {key}: {json.dumps(_plain(value), sort_keys=True, allow_nan=False)}\n"


# ----------------------------------------------------------------------------- CSV
def sweep_metadata(run: StoredRun, sweep: StoredSweep) -> dict[str, Any]:
    sample = run.sample or {}
    return {
        "format": CSV_FORMAT,
        "run_uid": run.uid,
        "sweep_uid": sweep.uid,
        "sweep_index": sweep.sweep_index,
        "step_index": sweep.step_index,
        "step_name": sweep.step_name,
        "kind": sweep.kind,
        "light": sweep.light,
        "direction": sweep.direction,
        "pixel": sweep.pixel,
        "source_mode": sweep.source_mode,
        "acquisition": sweep.acquisition,
        "four_wire": sweep.four_wire,
        "nplc": sweep.nplc,
        "settle_s": sweep.settle_s,
        "compliance": sweep.compliance,
        "points_planned": sweep.points_planned,
        "points": sweep.points_stored,
        "sweep_status": sweep.status,
        "sweep_reason": sweep.reason,
        "sweep_started_at": sweep.started_at,
        "sweep_ended_at": sweep.ended_at,
        "conditions": sweep.conditions,
        "final_conditions": sweep.final_conditions,
        "pair_sweep_uid": sweep.pair_sweep_uid,
        "sample_id": run.sample_id,
        "area_cm2": sample.get("area_cm2"),
        "cells_in_series": sample.get("cells_in_series"),
        "sample_description": sample.get("description", ""),
        "operator": run.operator,
        "protocol_name": run.protocol_name,
        "protocol_sha256": run.protocol_sha256,
        "bench_name": run.bench_name,
        "instruments": {i.role: {"identity": i.identity, "address": i.address, "driver": i.driver}
                        for i in run.instruments},
        "software_version": run.software_version,
        "run_status": run.status,
        "run_reason": run.reason,
        "current_convention": CONVENTION_NOTE,
    }


def sweep_csv_text(run: StoredRun, sweep: StoredSweep, points: list[ev.Point]) -> str:
    buf = io.StringIO()
    buf.writelines(_header_lines(sweep_metadata(run, sweep)))
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for p in points:
        writer.writerow((_fmt(p.voltage_v), _fmt(generator_current(float(p.current_a))), p.seq,
                         p.run_seq, _fmt(p.time), _fmt(p.setpoint), _fmt(p.current_a),
                         _fmt(bool(p.in_compliance)), _fmt(p.irradiance_w_m2),
                         _fmt(p.temperature_c)))
    return buf.getvalue()


def read_sweep_csv(path: Path | str) -> SweepCsv:
    """Read a CSV written by :func:`export_run`: its metadata and its points exactly as
    they were stored."""
    meta: dict[str, Any] = {}
    body: list[str] = []
    with open(path, encoding="utf-8", newline="") as fh:
        for line in fh:
            if line.startswith("#") and not body:
                key, sep, value = line[1:].strip().partition(":")
                if sep:
                    meta[key.strip()] = json.loads(value.strip())
            else:
                body.append(line)
    rows = list(csv.reader(body))
    if not rows or tuple(rows[0]) != CSV_COLUMNS:
        raise ExportError(f"{path}: not a tracer sweep CSV (columns {rows[0] if rows else None})")
    points, volts, amps = [], [], []
    run_uid, sweep_uid = meta.get("run_uid", ""), meta.get("sweep_uid", "")
    for r in rows[1:]:
        v_gen, i_gen, seq, run_seq, t, setpoint, i_load, comp, irr, temp = r
        volts.append(float(v_gen))
        amps.append(float(i_gen))
        points.append(ev.Point(run_uid=run_uid, sweep_uid=sweep_uid, seq=int(seq),
                               run_seq=int(run_seq), time=float(t), setpoint=float(setpoint),
                               voltage_v=float(v_gen), current_a=float(i_load),
                               in_compliance=comp == "1", irradiance_w_m2=_parse_float(irr),
                               temperature_c=_parse_float(temp)))
    return SweepCsv(meta, points, volts, amps)


# ----------------------------------------------------------------------------- JSON
def _column(values: Iterable[Any]) -> list[Any]:
    out = []
    for v in values:
        if isinstance(v, float) and math.isnan(v):
            out.append(None)
        else:
            out.append(v)
    return out


def run_document(logbook: Logbook, run_ref: str) -> dict[str, Any]:
    """The whole run as one JSON-safe document: run, instruments, sweeps with their point
    columns and analyses, interlock trips."""
    run = logbook.run(run_ref)
    sweeps = []
    for sw in logbook.sweeps(run.uid):
        pts = logbook.points(sw.uid)
        entry = sw.to_dict()
        entry["points"] = {
            "seq": [p.seq for p in pts],
            "run_seq": [p.run_seq for p in pts],
            "time": _column(p.time for p in pts),
            "setpoint": _column(p.setpoint for p in pts),
            "voltage_v": _column(p.voltage_v for p in pts),
            "current_a": _column(generator_current(float(p.current_a)) for p in pts),
            "current_load_a": _column(p.current_a for p in pts),
            "in_compliance": [bool(p.in_compliance) for p in pts],
            "irradiance_w_m2": _column(p.irradiance_w_m2 for p in pts),
            "temperature_c": _column(p.temperature_c for p in pts),
        }
        entry["analyses"] = [a.to_dict() for a in logbook.analyses(sweep_uid=sw.uid)]
        sweeps.append(entry)
    return _plain({
        "format": JSON_FORMAT,
        "current_convention": CONVENTION_NOTE,
        "run": run.to_dict(),
        "sweeps": sweeps,
        "interlocks": [t.to_dict() for t in logbook.interlocks(run.uid)],
    })


def read_run_json(path: Path | str) -> dict[str, Any]:
    with open(path, encoding="utf-8") as fh:
        doc = json.load(fh)
    if doc.get("format") != JSON_FORMAT:
        raise ExportError(f"{path}: not a tracer run JSON export")
    return doc


# ----------------------------------------------------------------------------- entry point
def export_run(logbook: Logbook, run_ref: str, out_dir: Path | str, *, fmt: str = "csv") -> ExportResult:
    """Export one run (uid, unique prefix or ``latest``) into ``out_dir``."""
    if fmt not in FORMATS:
        raise ExportError(f"unknown export format {fmt!r}; use one of {', '.join(FORMATS)}")
    run = logbook.run(run_ref)
    directory = run_directory(out_dir, run.uid)
    base = Path(out_dir).expanduser().resolve()
    files: list[Path] = []
    if fmt == "csv":
        for sw in logbook.sweeps(run.uid):
            text = sweep_csv_text(run, sw, logbook.points(sw.uid))
            files.append(_write_atomically(base, directory / sweep_file_name(sw), text))
    else:
        text = json.dumps(run_document(logbook, run.uid), indent=1, sort_keys=True, allow_nan=False)
        files.append(_write_atomically(base, directory / "run.json", text + "\n"))
    return ExportResult(run.uid, directory, tuple(files), fmt)
