"""Benchmark: points per second forwarded into PostgreSQL, sixteen benches at once beside
one bench alone, in the same run against the same server.

Each bench is its own process (as each is its own machine in a lab) with its own local
SQLite logbook full of ended runs; it forwards them with :func:`tracer.logbook.forward.forward`
(one transaction per run, points by ``COPY``). "One bench" times one such process alone;
"sixteen" starts sixteen at once (after they have all started up and opened their files)
and divides every point they sent by the wall time from the first start to the last end.
The ratio says how much of sixteen benches' worth of forwarding the one server (and this
machine's two cores, which also run the sixteen clients) absorbs.

Needs ``TRACER_TEST_POSTGRES_URL`` (see tests/logbook_shared/pg_server.sh); without it the
benchmark prints why and returns ``{"skipped": reason}``.
Run: ``python tests/benchmarks/bench_forward.py [--quick]`` or ``run(quick=True)``.
"""
from __future__ import annotations

import json
import os
import secrets
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from urllib.parse import quote

ROOT = Path(__file__).resolve().parents[2]
if __package__ in (None, ""):
    sys.path.insert(0, str(ROOT))

from tracer import events as ev  # noqa: E402
from tracer.logbook import LogbookWriter  # noqa: E402

URL_ENV = "TRACER_TEST_POSTGRES_URL"
BENCHES = 16

_CHILD = r"""
import json, sys, time
sys.path.insert(0, {root!r})
from tracer.logbook.forward import forward
sys.stdin.readline()                       # wait for "go"
t0 = time.time()
report = forward({local!r}, {url!r}, connect_timeout_s=30)
t1 = time.time()
print(json.dumps({{"start": t0, "end": t1, "points": report.points, "runs": len(report.forwarded),
                  "ok": report.ok, "why": report.unreachable or report.failed}}))
"""


def _fill(path: Path, bench: int, runs: int, sweeps: int, points: int) -> int:
    """A bench's local logbook with ``runs`` ended runs; returns the number of points."""
    total = 0
    with LogbookWriter(path) as w:
        for r in range(runs):
            uid = f"b{bench:02d}-r{r:03d}-{secrets.token_hex(4)}"
            t = 1.7e9 + 3600 * r
            w(ev.RunStarted(run_uid=uid, time=t, protocol_name="bench-forward", protocol={},
                            protocol_sha256="0" * 64, sample={"id": f"cell-{r}"}, operator="bench",
                            bench={"name": f"bench-{bench:02d}", "instruments": {}}, limits={},
                            software_version="bench"))
            seq = 0
            for s in range(sweeps):
                sw = f"{uid}-s{s}"
                w(ev.SweepStarted(run_uid=uid, sweep_uid=sw, sweep_index=s, step_index=s,
                                  step_name="sweep", kind="sweep", light=bool(s % 2),
                                  direction="forward", pixel=None, source_mode="voltage",
                                  acquisition="point", points_planned=points, four_wire=True,
                                  nplc=1.0, settle_s=0.0, compliance=0.1, time=t))
                for k in range(points):
                    seq += 1
                    w(ev.Point(run_uid=uid, sweep_uid=sw, seq=k + 1, run_seq=seq, time=t + 1e-3 * seq,
                               setpoint=1e-3 * k, voltage_v=1e-3 * k + 1e-7, current_a=-0.035 + 1e-7 * k,
                               in_compliance=False, irradiance_w_m2=1000.0, temperature_c=25.0))
                w(ev.SweepFinished(run_uid=uid, sweep_uid=sw, status="completed", reason="",
                                   points=points, time=t + 1e-3 * seq))
            w(ev.RunFinished(run_uid=uid, status="completed", reason="", time=t + 1e-3 * seq + 0.1,
                             output_verified_off=True, points=seq))
            total += seq
    return total


def _forward_at_once(locals_: list[Path], url: str) -> dict:
    children = [subprocess.Popen(
        [sys.executable, "-c", _CHILD.format(root=str(ROOT), local=str(p), url=url)],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        for p in locals_]
    time.sleep(1.0 + 0.15 * len(children))     # let every child finish importing
    for c in children:
        c.stdin.write("go\n")
        c.stdin.flush()
    results = []
    for c in children:
        out, err = c.communicate(timeout=900)
        if c.returncode != 0:
            raise RuntimeError(f"a forwarding process failed: {err.strip()[-500:]}")
        results.append(json.loads(out.strip().splitlines()[-1]))
    bad = [r["why"] for r in results if not r["ok"]]
    if bad:
        raise RuntimeError(f"forwarding failed: {bad[0]}")
    wall = max(r["end"] for r in results) - min(r["start"] for r in results)
    points = sum(r["points"] for r in results)
    return {"points": points, "runs": sum(r["runs"] for r in results), "wall_s": wall,
            "points_per_s": points / wall}


def run(quick: bool = False) -> dict:
    url = os.environ.get(URL_ENV, "").strip()
    if not url:
        reason = f"{URL_ENV} is not set (start a server: tests/logbook_shared/pg_server.sh start)"
        print(f"forward: skipped - {reason}")
        return {"skipped": reason}
    import psycopg

    runs, sweeps, points = (3, 2, 400) if quick else (6, 2, 2000)
    admin = psycopg.connect(url, autocommit=True)
    schemas = []

    def store() -> str:
        name = "bench_" + secrets.token_hex(5)
        admin.execute(f"CREATE SCHEMA {name}")
        schemas.append(name)
        sep = "&" if "?" in url else "?"
        return f"{url}{sep}options={quote(f'-csearch_path={name}', safe='')}"

    try:
        with tempfile.TemporaryDirectory(prefix="tracer-bench-forward-") as tmp:
            tmp = Path(tmp)
            alone = tmp / "alone.sqlite"
            _fill(alone, 99, runs, sweeps, points)
            many = [tmp / f"bench-{k:02d}.sqlite" for k in range(BENCHES)]
            for k, p in enumerate(many):
                _fill(p, k, runs, sweeps, points)
            shared_one, shared_many = store(), store()
            # both stores get their tables first, so neither figure includes creating them
            from tracer.logbook import Logbook
            Logbook(shared_one).close()
            Logbook(shared_many).close()
            one = _forward_at_once([alone], shared_one)
            sixteen = _forward_at_once(many, shared_many)
    finally:
        for name in schemas:
            admin.execute(f"DROP SCHEMA IF EXISTS {name} CASCADE")
        admin.close()
    result = {
        "points_per_bench": runs * sweeps * points,
        "forward_points_per_s_one_bench": round(one["points_per_s"]),
        "forward_points_per_s_sixteen_benches": round(sixteen["points_per_s"]),
        "forward_sixteen_over_one": round(sixteen["points_per_s"] / one["points_per_s"], 3),
        "sixteen_benches_wall_s": round(sixteen["wall_s"], 3),
        "sixteen_benches_points": sixteen["points"],
        "cores": os.cpu_count(),
    }
    print(f"forward: one bench alone     {result['forward_points_per_s_one_bench']:>10,} points/s "
          f"into PostgreSQL ({one['runs']} runs, {one['points']:,} points)")
    print(f"         sixteen benches     {result['forward_points_per_s_sixteen_benches']:>10,} points/s "
          f"in all ({sixteen['runs']} runs, {sixteen['points']:,} points in {sixteen['wall_s']:.2f} s)")
    print(f"         sixteen / one: {result['forward_sixteen_over_one']} "
          f"(server and all sixteen clients share {os.cpu_count()} cores)")
    return result


if __name__ == "__main__":
    run(quick="--quick" in sys.argv)
