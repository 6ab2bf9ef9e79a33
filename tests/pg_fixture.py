"""A throwaway PostgreSQL cluster for tests: initdb + pg_ctl on loopback in a temporary folder.

Registered for every test module by ``pytest_plugins`` in ``tests/conftest.py``; use::

    def test_something(postgres_url): ...  # a SQLAlchemy URL of an empty schema

``pg_cluster`` (session scope) starts one cluster for the whole test session and always stops
it (``pg_ctl stop -m immediate``) afterwards; ``postgres_url`` (function scope) creates a fresh
schema for one test and drops it afterwards. PostgreSQL refuses to run as root, so when the
tests run as root the server binaries run as the ``postgres`` user through ``runuser``.
The tests are skipped only when the PostgreSQL server binaries are not installed
(``scripts/install-test-deps.sh`` installs them).
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

_TIMEOUT_S = 60
_START_ATTEMPTS = 3


def _find_bin_dir() -> Path | None:
    def version(initdb: str) -> int:
        name = Path(initdb).parent.parent.name
        return int(name) if name.isdigit() else 0

    candidates = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"), key=version)
    if candidates:
        return Path(candidates[-1]).parent
    found = shutil.which("initdb")
    return Path(found).parent if found and shutil.which("pg_ctl") else None


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class PgCluster:
    """A running throwaway cluster; ``url(db)`` gives a SQLAlchemy URL for a database."""

    port: int
    base: Path
    test_database: str = ""
    bin_dir: Path | None = None
    prefix: tuple[str, ...] = ()
    options: str = ""

    def stop(self) -> None:
        """Stop the server (fast shutdown: open connections are closed), for outage tests."""
        subprocess.run(
            [*self.prefix, str(self.bin_dir / "pg_ctl"), "-D", str(self.base / "data"), "-m",
             "fast", "-w", "-t", str(_TIMEOUT_S), "stop"],
            check=True, capture_output=True, timeout=_TIMEOUT_S + 10,
        )  # fmt: skip

    def start(self) -> None:
        """Start the stopped server again on the same port."""
        subprocess.run(
            [*self.prefix, str(self.bin_dir / "pg_ctl"), "-D", str(self.base / "data"), "-l",
             str(self.base / "server.log"), "-o", self.options, "-w", "-t", str(_TIMEOUT_S),
             "start"],
            check=True, capture_output=True, timeout=_TIMEOUT_S + 10,
        )  # fmt: skip

    def url(self, database: str = "postgres") -> str:
        return f"postgresql+psycopg://postgres@127.0.0.1:{self.port}/{database}"

    def execute(self, sql: str, database: str = "postgres") -> None:
        """Run one statement in autocommit mode (default: the maintenance database)."""
        import psycopg

        with psycopg.connect(
            host="127.0.0.1", port=self.port, user="postgres", dbname=database, autocommit=True
        ) as conn:
            conn.execute(sql)


def _runner_prefix() -> list[str]:
    if os.geteuid() != 0:
        return []
    try:
        pwd.getpwnam("postgres")
    except KeyError:
        pytest.skip("running as root and there is no 'postgres' user to run the server")
    return ["runuser", "-u", "postgres", "--"]


@pytest.fixture(scope="session")
def pg_cluster() -> Iterator[PgCluster]:
    """Start a PostgreSQL cluster on 127.0.0.1 for the test session, stop it afterwards."""
    bin_dir = _find_bin_dir()
    if bin_dir is None:
        pytest.skip("PostgreSQL server binaries (initdb, pg_ctl) are not installed")
    prefix = _runner_prefix()
    base = Path(tempfile.mkdtemp(prefix="benchrun-pg-", dir="/tmp"))
    data = base / "data"
    log = base / "server.log"
    if prefix:
        entry = pwd.getpwnam("postgres")
        os.chown(base, entry.pw_uid, entry.pw_gid)
    os.chmod(base, 0o700)
    started = False
    try:
        subprocess.run(
            [*prefix, str(bin_dir / "initdb"), "-D", str(data), "-A", "trust", "-U", "postgres",
             "-E", "UTF8", "--no-sync"],
            check=True, capture_output=True, timeout=_TIMEOUT_S,
        )  # fmt: skip
        # the free port can be taken by another process before the server binds it: a new
        # port is tried when the start fails
        for _ in range(_START_ATTEMPTS):
            port = _free_port()
            options = f"-p {port} -k {base} -c listen_addresses=127.0.0.1 -c fsync=off"
            result = subprocess.run(
                [*prefix, str(bin_dir / "pg_ctl"), "-D", str(data), "-l", str(log), "-o",
                 options, "-w", "-t", str(_TIMEOUT_S), "start"],
                capture_output=True, text=True, timeout=_TIMEOUT_S + 10,
            )  # fmt: skip
            started = result.returncode == 0
            if started:
                break
        if not started:
            server_log = log.read_text(errors="replace") if log.exists() else ""
            pytest.fail(f"PostgreSQL did not start: {result.stderr}\n{server_log}")
        yield PgCluster(port=port, base=base, bin_dir=bin_dir, prefix=tuple(prefix),
                        options=options)
    finally:
        if data.exists():
            subprocess.run(
                [*prefix, str(bin_dir / "pg_ctl"), "-D", str(data), "-m", "immediate", "stop"],
                capture_output=True, timeout=_TIMEOUT_S, check=False,
            )  # fmt: skip
        shutil.rmtree(base, ignore_errors=True)


@pytest.fixture
def postgres_url(pg_cluster: PgCluster) -> Iterator[str]:
    """A fresh, empty schema on the session cluster (first on the search path); dropped after.

    A schema per test instead of a database per test: creating one is instant, while
    ``CREATE DATABASE`` copies the template database.
    """
    if not pg_cluster.test_database:
        pg_cluster.execute("CREATE DATABASE benchrun_test")
        pg_cluster.test_database = "benchrun_test"
    schema = f"t_{uuid.uuid4().hex[:12]}"
    pg_cluster.execute(f"CREATE SCHEMA {schema}", pg_cluster.test_database)
    try:
        # libpq "options": -c search_path=<schema>  (URL-encoded)
        yield f"{pg_cluster.url(pg_cluster.test_database)}?options=-csearch_path%3D{schema}"
    finally:
        pg_cluster.execute(f"DROP SCHEMA IF EXISTS {schema} CASCADE", pg_cluster.test_database)
