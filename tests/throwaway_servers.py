"""Throwaway database servers for the engine tests and benchmarks.

A PostgreSQL server made with initdb/pg_ctl in a temporary directory (run as an
unprivileged user when we are root, since PostgreSQL refuses to run as root),
listening only on a Unix socket inside that directory; and a local SparkSession.

``unavailable(reason)`` skips a test loudly, or fails it when CI=true: on CI an
engine that cannot start is a broken machine, not a reason to pass.
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import subprocess
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import pytest

#: Where PostgreSQL server binaries are looked for, besides $TILLITE_PG_BIN and PATH.
PG_BIN_GLOBS = ("/usr/lib/postgresql/*/bin", "/usr/local/pgsql/bin", "/usr/pgsql-*/bin", "/opt/homebrew/opt/postgresql*/bin")

#: The unprivileged account the server runs as when the tests run as root.
PG_USER_CANDIDATES = ("nobody", "postgres")


def unavailable(reason: str) -> None:
    """Skip with the reason; on CI (CI=true) fail instead, so a missing engine cannot pass unnoticed."""
    if os.environ.get("CI", "").lower() == "true":
        pytest.fail(f"engine unavailable on CI: {reason}", pytrace=False)
    pytest.skip(reason)


def find_pg_bin() -> Path | None:
    """The folder holding initdb and pg_ctl, newest version first."""
    candidates: list[str] = []
    if os.environ.get("TILLITE_PG_BIN"):
        candidates.append(os.environ["TILLITE_PG_BIN"])
    on_path = shutil.which("pg_ctl")
    if on_path:
        candidates.append(str(Path(on_path).parent))
    for pattern in PG_BIN_GLOBS:
        candidates.extend(sorted(glob.glob(pattern), key=_version_key, reverse=True))
    for folder in candidates:
        if (Path(folder) / "initdb").exists() and (Path(folder) / "pg_ctl").exists():
            return Path(folder)
    return None


def _version_key(path: str) -> tuple[int, ...]:
    digits = "".join(ch if ch.isdigit() else " " for ch in path).split()
    return tuple(int(d) for d in digits)


def _server_account() -> str | None:
    """None when we may run the server ourselves; else an unprivileged account name."""
    if os.geteuid() != 0:
        return None
    for name in PG_USER_CANDIDATES:
        try:
            pwd.getpwnam(name)
            return name
        except KeyError:
            continue
    subprocess.run(["useradd", "--system", "--no-create-home", "tillite-pg"], check=True, capture_output=True)
    return "tillite-pg"


@dataclass
class ThrowawayPostgres:
    """initdb + pg_ctl start in a fresh directory; ``conninfo`` connects as superuser ``postgres``."""

    bin_dir: Path
    port: int = 5432
    folder: Path = field(default_factory=lambda: Path(tempfile.mkdtemp(prefix="tillite-pg-")))
    account: str | None = field(default_factory=_server_account)

    @property
    def data_dir(self) -> Path:
        return self.folder / "data"

    @property
    def conninfo(self) -> str:
        return f"host={self.folder} port={self.port} user=postgres dbname=postgres"

    @property
    def url(self) -> str:
        """The same server as a postgresql:// URL (socket folder as the host parameter)."""
        return f"postgresql://postgres@/postgres?host={self.folder}&port={self.port}"

    def _run(self, *args: str, timeout: float = 60) -> subprocess.CompletedProcess:
        cmd = [str(self.bin_dir / args[0]), *args[1:]]
        if self.account is not None:
            cmd = ["runuser", "-u", self.account, "--", *cmd]
        return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, stdin=subprocess.DEVNULL)

    def start(self) -> "ThrowawayPostgres":
        if self.account is not None:
            uid = pwd.getpwnam(self.account)
            os.chown(self.folder, uid.pw_uid, uid.pw_gid)
        os.chmod(self.folder, 0o700)
        done = self._run("initdb", "-D", str(self.data_dir), "-U", "postgres", "--auth=trust", "--no-locale", "-E", "UTF8", "--no-sync")
        if done.returncode != 0:
            raise RuntimeError(f"initdb failed: {done.stderr.strip() or done.stdout.strip()}")
        options = f"-c listen_addresses='' -c unix_socket_directories='{self.folder}' -c port={self.port} -c fsync=off -c full_page_writes=off -c synchronous_commit=off"
        done = self._run("pg_ctl", "-D", str(self.data_dir), "-o", options, "-l", str(self.folder / "server.log"), "-w", "-t", "30", "start")
        if done.returncode != 0:
            log = (self.folder / "server.log").read_text() if (self.folder / "server.log").exists() else ""
            raise RuntimeError(f"pg_ctl start failed: {done.stderr.strip()} {log[-2000:]}")
        return self

    def stop(self) -> None:
        if self.data_dir.exists():
            self._run("pg_ctl", "-D", str(self.data_dir), "-m", "immediate", "-w", "stop", timeout=30)
        shutil.rmtree(self.folder, ignore_errors=True)


def start_postgres() -> ThrowawayPostgres:
    """A running throwaway server, or a loud skip (a failure on CI) saying why not."""
    try:
        import psycopg  # noqa: F401
    except ImportError:
        unavailable("psycopg is not installed: pip install 'tillite[postgres]'")
    bin_dir = find_pg_bin()
    if bin_dir is None:
        unavailable("PostgreSQL server binaries (initdb, pg_ctl) not found; set TILLITE_PG_BIN")
    server = ThrowawayPostgres(bin_dir)
    try:
        return server.start()
    except (RuntimeError, OSError, subprocess.SubprocessError) as err:
        server.stop()
        unavailable(f"cannot start a throwaway PostgreSQL server: {err}")
    raise AssertionError("unreachable")


def start_spark(folder: Path):
    """A local SparkSession (2 threads, 2 shuffle partitions, no UI), warehouse in ``folder``."""
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        unavailable("pyspark is not installed: pip install 'tillite[spark]'")
    if shutil.which("java") is None and not os.environ.get("JAVA_HOME"):
        unavailable("no Java runtime (java on PATH or JAVA_HOME) for Spark")
    t0 = time.perf_counter()
    try:
        spark = (
            SparkSession.builder.master("local[2]")
            .appName("tillite-tests")
            .config("spark.ui.enabled", "false")
            .config("spark.ui.showConsoleProgress", "false")
            .config("spark.sql.shuffle.partitions", "2")
            .config("spark.default.parallelism", "2")
            .config("spark.sql.warehouse.dir", str(folder / "warehouse"))
            .config("spark.driver.memory", "1g")
            .config("spark.log.level", "ERROR")
            .getOrCreate()
        )
    except Exception as err:  # the JVM failing to start surfaces as many exception types
        unavailable(f"cannot start a local SparkSession: {err}")
    spark.sparkContext.setLogLevel("FATAL")
    spark.conf.set("tillite.tests.started_in_s", f"{time.perf_counter() - t0:.1f}")
    return spark
