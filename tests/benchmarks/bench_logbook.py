"""Benchmark: how many points per second the logbook keeps durably.

``logbook_durable_points_per_s`` is the writer's real path: each point its own committed
transaction (the critical-subscriber contract), WAL, ``synchronous=NORMAL``. The baseline,
measured in the same run on the same disk, writes the same points in ONE transaction (the
fastest SQLite can take them, with no per-point durability). ``logbook_full_sync_points_per_s``
shows what ``synchronous=FULL`` (a disk sync per point) would cost.

Run: ``python tests/benchmarks/bench_logbook.py [--quick]`` or ``run(quick=True)``.
Goal (project brief): at least 20,000 durable points/s.
"""
from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from tracer import events as ev  # noqa: E402
from tracer.logbook import LogbookWriter  # noqa: E402
from tracer.logbook.writer import _INSERT_POINT  # noqa: E402

GOAL_POINTS_PER_S = 20_000


def _events(run_uid: str, n: int) -> tuple[list, list]:
    head = [
        ev.RunStarted(run_uid=run_uid, time=0.0, protocol_name="bench", protocol={},
                      protocol_sha256="", sample={"id": "bench"}, operator="bench",
                      bench={"name": "bench", "instruments": {}}, limits={},
                      software_version="bench"),
        ev.SweepStarted(run_uid=run_uid, sweep_uid=run_uid + "-s", sweep_index=0, step_index=0,
                        step_name="sweep", kind="sweep", light=True, direction="forward",
                        pixel=None, source_mode="voltage", acquisition="point",
                        points_planned=n, four_wire=True, nplc=1.0, settle_s=0.0,
                        compliance=0.1, time=0.0),
    ]
    points = [ev.Point(run_uid=run_uid, sweep_uid=run_uid + "-s", seq=k + 1, run_seq=k + 1,
                       time=1e-3 * k, setpoint=1e-4 * k, voltage_v=1e-4 * k + 1e-7,
                       current_a=-0.035 + 1e-8 * k, in_compliance=False,
                       irradiance_w_m2=1000.0, temperature_c=25.0) for k in range(n)]
    return head, points


def _per_point_commit(path: Path, n: int, synchronous: str) -> float:
    head, points = _events("durable-" + synchronous, n)
    with LogbookWriter(path, synchronous=synchronous) as w:
        for e in head:
            w(e)
        t0 = time.perf_counter()
        for p in points:
            w(p)
        elapsed = time.perf_counter() - t0
    return n / elapsed


def _one_transaction(path: Path, n: int) -> float:
    head, points = _events("batch", n)
    with LogbookWriter(path) as w:
        for e in head:
            w(e)
        conn = w.logbook.connection
        t0 = time.perf_counter()
        conn.execute("BEGIN IMMEDIATE")
        conn.executemany(_INSERT_POINT, [
            (p.sweep_uid, p.seq, p.run_uid, p.run_seq, p.time, p.setpoint, p.voltage_v,
             p.current_a, 0, p.irradiance_w_m2, p.temperature_c) for p in points])
        conn.execute("COMMIT")
        elapsed = time.perf_counter() - t0
    return n / elapsed


def run(quick: bool = False) -> dict:
    n = 5_000 if quick else 50_000
    n_full = 300 if quick else 2_000
    repeats = 1 if quick else 3
    with tempfile.TemporaryDirectory(prefix="tracer-bench-logbook-") as tmp:
        tmp = Path(tmp)
        durable = max(_per_point_commit(tmp / f"d{r}.sqlite", n, "NORMAL") for r in range(repeats))
        baseline = max(_one_transaction(tmp / f"b{r}.sqlite", n) for r in range(repeats))
        full = _per_point_commit(tmp / "f.sqlite", n_full, "FULL")
    result = {
        "points": n,
        "logbook_durable_points_per_s": round(durable),
        "logbook_one_transaction_points_per_s": round(baseline),
        "logbook_durable_over_one_transaction": round(durable / baseline, 3),
        "logbook_full_sync_points_per_s": round(full),
        "goal_points_per_s": GOAL_POINTS_PER_S,
        "goal_met": durable >= GOAL_POINTS_PER_S,
    }
    print(f"logbook: {result['logbook_durable_points_per_s']:,} durable points/s "
          f"(one commit per point, WAL, synchronous=NORMAL; goal {GOAL_POINTS_PER_S:,})")
    print(f"         baseline one transaction: {result['logbook_one_transaction_points_per_s']:,} points/s; "
          f"ratio {result['logbook_durable_over_one_transaction']}")
    print(f"         synchronous=FULL (disk sync per point): {result['logbook_full_sync_points_per_s']:,} points/s")
    return result


if __name__ == "__main__":
    run(quick="--quick" in sys.argv)
