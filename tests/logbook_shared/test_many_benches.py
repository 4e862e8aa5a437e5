"""Sixteen simulated benches measuring at once, each forwarding to one PostgreSQL server,
which is stopped (as by a crash: ``pg_ctl stop -m immediate``) while runs are going on and
started again later. Every bench keeps measuring into its local logbook; after the
restart every run and every point is in the shared store exactly once, row for row as
the bench stored it; and the server's password shows up in no log and no stored bench
snapshot.

The server is a private one (this test stops it), made with ``pg_server.py``; the benches
are the built-in simulated bench, in this process, reached over loopback TCP through the
real drivers, with bench profiles that carry ``logbook:`` and ``forward_to:``.
"""
from __future__ import annotations

import contextlib
import logging
import shutil
import tempfile
import threading
import time
from pathlib import Path

import pytest
import yaml

import simulated_instrument
from tracer.app import build_application
from tracer.logbook import Logbook
from tracer.logbook.forward import RetryPolicy, read_run
from tracer.protocol import compile_plan, load_protocol

from conftest import in_ci, pg_server

BENCHES = 16
PROTOCOL = """\
name: shared-logbook-check
sample: {id: CELL-SHARED, area_cm2: 1.0}
limits: {voltage_v: 1.0, current_a: 0.1, power_w: 0.1, reverse_voltage_v: 0.5}
steps:
  - {kind: sweep, name: dark, light: false, range: {start_v: -0.2, stop_v: 0.6}, points: 12, compliance_a: 0.05}
  - {kind: set-light, shutter: open, irradiance_w_m2: 1000}
  - {kind: sweep, name: light, light: true, range: {start_v: -0.1, stop_v: 0.7}, points: 12, compliance_a: 0.06}
  - {kind: set-light, shutter: closed}
"""
POINTS_PER_RUN = 24


@pytest.fixture
def private_server():
    """A PostgreSQL server of this test's own (it gets stopped and started)."""
    if pg_server.find_bin_dir() is None:
        reason = "no PostgreSQL server binaries (initdb, pg_ctl): apt-get install postgresql"
        if in_ci():
            pytest.fail(f"CI must run the store-outage test, but {reason}", pytrace=False)
        pytest.skip(reason)
    base = tempfile.mkdtemp(prefix="tracer-pg-outage-")
    server = pg_server.PgServer(base)
    try:
        server.setup()
        yield server
    finally:
        server.stop("immediate")
        shutil.rmtree(base, ignore_errors=True)


def _count_shared(url: str) -> int:
    try:
        with Logbook(url, recover=False, busy_timeout_s=2) as lb:
            return len(lb.list_runs())
    except Exception:  # noqa: BLE001 - not up yet
        return -1


def _wait(predicate, timeout_s: float, what: str) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if predicate():
            return
        time.sleep(0.05)
    raise AssertionError(f"timed out after {timeout_s} s waiting for {what}")


def test_sixteen_benches_forward_every_point_once_through_a_store_outage(private_server, tmp_path,
                                                                          caplog):
    caplog.set_level(logging.DEBUG)
    url = private_server.url()
    password = private_server.password
    protocol = tmp_path / "protocol.yaml"
    protocol.write_text(PROTOCOL)
    stack = contextlib.ExitStack()
    apps = []
    try:
        for k in range(BENCHES):
            sim = stack.enter_context(simulated_instrument.running_bench(time_scale=0.0, seed=k))
            doc = sim.bench_profile()
            doc["bench"]["name"] = f"bench-{k:02d}"
            doc["bench"]["logbook"] = f"bench-{k:02d}.sqlite"      # relative to the profile
            doc["bench"]["forward_to"] = url
            profile = tmp_path / f"bench-{k:02d}.yaml"
            profile.write_text(yaml.safe_dump(doc, sort_keys=False))
            app = build_application(
                profile, analyzer=lambda record: {"points": len(record.points)},
                forward_options={"retry": RetryPolicy(initial_s=0.05, max_s=0.5),
                                 "poll_interval_s": 0.5, "connect_timeout_s": 2})
            stack.callback(app.close)
            apps.append(app)
        assert {Path(a.logbook_path).name for a in apps} == {f"bench-{k:02d}.sqlite" for k in range(BENCHES)}

        outcomes: dict[int, list[str]] = {k: [] for k in range(BENCHES)}

        def measure(k: int, runs: int) -> None:
            app = apps[k]
            for _ in range(runs):
                plan = compile_plan(load_protocol(protocol, bench=app.profile), bench=app.profile)
                deadline = time.monotonic() + 10
                while True:    # the previous run's worker may take a moment to wind down
                    try:
                        app.engine.start(plan, operator=f"op-{k}")
                        break
                    except RuntimeError:
                        if time.monotonic() > deadline:
                            raise
                        time.sleep(0.01)
                outcomes[k].append(app.engine.wait(60).status)

        def all_benches(runs: int, during=None) -> None:
            threads = [threading.Thread(target=measure, args=(k, runs)) for k in range(BENCHES)]
            for t in threads:
                t.start()
            if during is not None:
                during()
            for t in threads:
                t.join(120)
            assert not any(t.is_alive() for t in threads)

        # 1. sixteen benches measure at once; each run is forwarded as it ends
        all_benches(1)
        _wait(lambda: _count_shared(url) == BENCHES, 60, "the first runs in the shared store")

        # 2. the store goes down (as by a crash) while the benches measure two more runs
        all_benches(2, during=lambda: private_server.stop("immediate"))
        assert all(o == ["completed"] * 3 for o in outcomes.values()), outcomes
        for app in apps:      # each bench has every run locally
            with Logbook(app.logbook_path, recover=False) as lb:
                assert [r.points for r in lb.list_runs()] == [POINTS_PER_RUN] * 3
        _wait(lambda: all(a.forwarder.status.reachable is False for a in apps), 30,
              "every forwarder to notice the outage")
        waiting = sum(a.forwarder.status.pending or 0 for a in apps)
        assert waiting > 0

        # 3. the store comes back: the forwarders retry and send what waited
        private_server.start()
        _wait(lambda: _count_shared(url) == 3 * BENCHES, 60, "every run in the shared store")
        _wait(lambda: all(a.forwarder.status.pending == 0 for a in apps), 30, "empty queues")
    finally:
        stack.close()          # engines, writers, then the forwarders' last pass

    # 4. exactly once, row for row
    with Logbook(url) as shared:
        runs = shared.list_runs()
        assert len(runs) == 3 * BENCHES and len({r.uid for r in runs}) == 3 * BENCHES
        assert all(r.status == "completed" and r.points == POINTS_PER_RUN for r in runs)
        for k in range(BENCHES):
            assert len(shared.list_runs(bench_name=f"bench-{k:02d}")) == 3
        (points,) = shared.connection.execute("SELECT COUNT(*) FROM points").fetchone()
        assert points == 3 * BENCHES * POINTS_PER_RUN
        for app in apps:
            with Logbook(app.logbook_path) as local:
                for run in local.list_runs():
                    assert read_run(local, run.uid) == read_run(shared, run.uid)
                    assert shared.run(run.uid).points_reported == POINTS_PER_RUN
        # 5. no password in any stored bench snapshot, local or shared
        snapshots = [r[0] for r in shared.connection.execute("SELECT bench_json FROM runs").fetchall()]
    assert all("forward_to" in s and "***@" in s for s in snapshots)
    assert not any(password in s for s in snapshots)
    for app in apps:
        for part in ("", "-wal"):
            stored = Path(str(app.logbook_path) + part)
            if stored.exists():
                assert password.encode() not in stored.read_bytes()
    # 6. nor in the logs (the outage and the recovery were logged, redacted)
    forwarding = [r.getMessage() for r in caplog.records if r.name == "tracer.logbook.forward"]
    assert any("keeps measuring" in m for m in forwarding), forwarding[:5]
    assert any("answers again" in m for m in forwarding)
    assert password not in caplog.text
