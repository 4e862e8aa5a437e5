"""A throwaway PostgreSQL server on a loopback port, for the shared-logbook tests.

Standard library only, so that ``.ci/run`` can use it before the virtual environment
exists. As a script::

    python3 tests/logbook_shared/pg_server.py start --dir DIR [--port N]
        # initdb into DIR/data, start on 127.0.0.1:N (default: a free port), create the
        # database, print ``export TRACER_TEST_POSTGRES_URL=...`` (eval it in a shell)
    python3 tests/logbook_shared/pg_server.py stop --dir DIR [--mode fast|immediate]
    python3 tests/logbook_shared/pg_server.py start-again --dir DIR   # after a stop

From Python (tests): :class:`PgServer`.

The cluster is made by ``initdb`` as an unprivileged account: as root, the files belong to
``--os-user`` (default ``nobody``) and every server command runs through ``runuser -u``.
Password authentication (scram-sha-256) is required on TCP, with a random password for
the cluster's only role, so the URL the tests get carries a real secret and the tests can
check that it is never shown. For speed the server runs with ``fsync=off`` and
``synchronous_commit=off``: a test server keeps nothing worth a disk sync (common practice
for throwaway test databases; never for a real store).
"""
from __future__ import annotations

import argparse
import glob
import json
import os
import secrets
import shlex
import shutil
import socket
import subprocess
import sys
import time
from pathlib import Path
from urllib.parse import quote

ROLE = "tracer_ci"
DATABASE = "tracer_test"
STATE_FILE = "server.json"


class PgServerError(RuntimeError):
    pass


def find_bin_dir() -> Path | None:
    """The folder holding initdb/pg_ctl/postgres: Debian's /usr/lib/postgresql/N/bin
    (highest N), else wherever ``initdb`` is on PATH."""
    candidates = []
    for d in glob.glob("/usr/lib/postgresql/*/bin"):
        if os.path.isfile(os.path.join(d, "initdb")) and os.path.isfile(os.path.join(d, "pg_ctl")):
            try:
                candidates.append((int(Path(d).parent.name), Path(d)))
            except ValueError:
                continue
    if candidates:
        return max(candidates)[1]
    found = shutil.which("initdb")
    if found and shutil.which("pg_ctl"):
        return Path(os.path.realpath(found)).parent
    return None


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class PgServer:
    """One cluster in ``base``/data, reachable at 127.0.0.1:``port``."""

    def __init__(self, base: str | os.PathLike, *, port: int | None = None,
                 os_user: str = "nobody", bin_dir: Path | None = None):
        self.base = Path(base).resolve()
        self.data = self.base / "data"
        self.log = self.base / "server.log"
        self.bin_dir = bin_dir or find_bin_dir()
        if self.bin_dir is None:
            raise PgServerError("no PostgreSQL server binaries (initdb, pg_ctl) found; install "
                                "Debian's package: apt-get install -y postgresql")
        state = self._read_state()
        self.port = port or state.get("port") or free_port()
        self.password = state.get("password") or secrets.token_urlsafe(18)
        self.os_user = os_user if os.geteuid() == 0 else None

    # -- helpers
    def _read_state(self) -> dict:
        try:
            return json.loads((self.base / STATE_FILE).read_text())
        except (OSError, ValueError):
            return {}

    def _write_state(self) -> None:
        path = self.base / STATE_FILE
        path.write_text(json.dumps({"port": self.port, "password": self.password}))
        os.chmod(path, 0o600)

    def _run(self, *argv: str, check: bool = True, env: dict | None = None,
             timeout: float = 120) -> subprocess.CompletedProcess:
        cmd = [str(self.bin_dir / argv[0]), *argv[1:]]
        if self.os_user:
            cmd = ["runuser", "-u", self.os_user, "--", *cmd]
        result = subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=timeout,
                                cwd=str(self.base))
        if check and result.returncode != 0:
            tail = ""
            if self.log.exists():
                tail = "\n" + "\n".join(self.log.read_text(errors="replace").splitlines()[-15:])
            raise PgServerError(f"{argv[0]} failed ({result.returncode}): "
                                f"{result.stderr.strip() or result.stdout.strip()}{tail}")
        return result

    # -- lifecycle
    def init(self) -> None:
        self.base.mkdir(parents=True, exist_ok=True)
        if self.os_user:
            shutil.chown(self.base, user=self.os_user)
            os.chmod(self.base, 0o700)
        pwfile = self.base / "pwfile"
        pwfile.write_text(self.password + "\n")
        os.chmod(pwfile, 0o600)
        if self.os_user:
            shutil.chown(pwfile, user=self.os_user)
        try:
            self._run("initdb", "-D", str(self.data), "-U", ROLE, f"--pwfile={pwfile}",
                      "--auth-host=scram-sha-256", "--auth-local=scram-sha-256",
                      "--encoding=UTF8", "--locale=C", "--no-sync")
        finally:
            pwfile.unlink(missing_ok=True)
        self._write_state()
        if self.os_user:
            shutil.chown(self.base / STATE_FILE, user=self.os_user)

    def start(self) -> None:
        options = " ".join([
            "-c listen_addresses=127.0.0.1", f"-c port={self.port}",
            f"-c unix_socket_directories={shlex.quote(str(self.data))}",
            "-c fsync=off", "-c synchronous_commit=off", "-c full_page_writes=off",
            "-c max_connections=200", "-c shared_buffers=64MB",
        ])
        self._run("pg_ctl", "-D", str(self.data), "-l", str(self.log), "-o", options, "-w",
                  "-t", "60", "start")

    def create_database(self) -> None:
        env = dict(os.environ, PGPASSWORD=self.password)
        result = self._run("createdb", "-h", "127.0.0.1", "-p", str(self.port), "-U", ROLE,
                           DATABASE, env=env, check=False)
        if result.returncode != 0 and "already exists" not in result.stderr:
            raise PgServerError(f"createdb failed: {result.stderr.strip()}")

    def stop(self, mode: str = "fast") -> None:
        if (self.data / "postmaster.pid").exists():
            self._run("pg_ctl", "-D", str(self.data), "-m", mode, "-w", "-t", "60", "stop",
                      check=False)

    def running(self) -> bool:
        return self._run("pg_ctl", "-D", str(self.data), "status", check=False).returncode == 0

    def url(self, database: str = DATABASE, *, with_password: bool = True) -> str:
        secret = f":{quote(self.password, safe='')}" if with_password else ""
        return f"postgresql://{ROLE}{secret}@127.0.0.1:{self.port}/{database}"

    def setup(self) -> "PgServer":
        """initdb (if not done), start, create the test database."""
        if not (self.data / "PG_VERSION").exists():
            self.init()
        self.start()
        self.create_database()
        return self


def _wait_port_closed(port: int, timeout: float = 10.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        with socket.socket() as s:
            if s.connect_ex(("127.0.0.1", port)) != 0:
                return
        time.sleep(0.05)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("action", choices=("start", "stop", "start-again", "url"))
    parser.add_argument("--dir", required=True, help="folder for the cluster (created)")
    parser.add_argument("--port", type=int, default=None, help="TCP port (default: a free one)")
    parser.add_argument("--os-user", default="nobody",
                        help="account that owns and runs the cluster when started as root")
    parser.add_argument("--mode", default="fast", choices=("smart", "fast", "immediate"),
                        help="shutdown mode for stop")
    args = parser.parse_args(argv)
    try:
        server = PgServer(args.dir, port=args.port, os_user=args.os_user)
        if args.action == "start":
            server.setup()
            print(f"export TRACER_TEST_POSTGRES_URL={shlex.quote(server.url())}")
        elif args.action == "start-again":
            server.start()
        elif args.action == "url":
            print(server.url())
        else:
            server.stop(args.mode)
            _wait_port_closed(server.port)
    except (PgServerError, OSError, subprocess.TimeoutExpired) as exc:
        print(f"pg_server: {exc}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
