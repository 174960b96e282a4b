"""Start a throw-away PostgreSQL server for the database tests.

Uses ``NOISEBENCH_TEST_PG_URL`` when set (a server someone else runs). Otherwise starts
Debian's PostgreSQL binaries (``initdb``/``pg_ctl``) in a temporary directory on a free loopback
port, as the ``postgres`` user when running as root (the server refuses to run as root), and
stops it afterwards. When that is impossible the tests that need it are skipped with the
printed reason — never silently.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _find(binary: str) -> str | None:
    found = shutil.which(binary)
    if found:
        return found
    for root in sorted(Path("/usr/lib/postgresql").glob("*/bin"), reverse=True):
        if (root / binary).exists():
            return str(root / binary)
    return None


@contextmanager
def temporary_postgres() -> Iterator[str]:
    """Yield a SQLAlchemy URL of a running PostgreSQL; raise RuntimeError(reason) if impossible."""
    url = os.environ.get("NOISEBENCH_TEST_PG_URL")
    if url:
        yield url
        return
    initdb, pg_ctl = _find("initdb"), _find("pg_ctl")
    if not initdb or not pg_ctl:
        raise RuntimeError(
            "PostgreSQL binaries (initdb, pg_ctl) not found; "
            "apt-get install postgresql, or set NOISEBENCH_TEST_PG_URL"
        )
    as_user: list[str] = []
    if os.geteuid() == 0:
        runuser = shutil.which("runuser")
        if not runuser:
            raise RuntimeError("running as root and 'runuser' is missing to start PostgreSQL")
        as_user = [runuser, "-u", "postgres", "--"]
    tmp = Path(tempfile.mkdtemp(prefix="nb-pg-"))
    data = tmp / "data"
    if as_user:
        shutil.chown(tmp, user="postgres")
    port = _free_port()
    env = dict(os.environ, LC_ALL="C")

    def run(cmd: list[str]) -> subprocess.CompletedProcess:
        return subprocess.run(
            as_user + cmd, capture_output=True, text=True, env=env, timeout=120, cwd=tmp
        )

    r = run([initdb, "-D", str(data), "-U", "postgres", "-A", "trust", "-E", "UTF8"])
    if r.returncode != 0:
        shutil.rmtree(tmp, ignore_errors=True)
        raise RuntimeError(f"initdb failed: {r.stderr.strip()[-300:]}")
    opts = f"-p {port} -k {tmp} -c listen_addresses=127.0.0.1 -c fsync=off"
    r = run(
        [pg_ctl, "-D", str(data), "-o", opts, "-l", str(tmp / "log"), "-w", "-t", "60", "start"]
    )
    if r.returncode != 0:
        log_text = (tmp / "log").read_text() if (tmp / "log").exists() else ""
        shutil.rmtree(tmp, ignore_errors=True)
        raise RuntimeError(f"pg_ctl start failed: {(r.stderr + log_text).strip()[-300:]}")
    try:
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            try:
                socket.create_connection(("127.0.0.1", port), timeout=1).close()
                break
            except OSError:
                time.sleep(0.2)
        yield f"postgresql+psycopg://postgres@127.0.0.1:{port}/postgres"
    finally:
        run([pg_ctl, "-D", str(data), "-m", "immediate", "-w", "stop"])
        shutil.rmtree(tmp, ignore_errors=True)


def fresh_database(url: str, name: str) -> str:
    """URL of a new, empty database ``name`` on the server of ``url`` (dropped first if it
    exists), so tests that share one server do not share rows."""
    import sqlalchemy as sa

    engine = sa.create_engine(url, isolation_level="AUTOCOMMIT")
    with engine.connect() as con:
        con.execute(sa.text(f'DROP DATABASE IF EXISTS "{name}"'))
        con.execute(sa.text(f'CREATE DATABASE "{name}"'))
    engine.dispose()
    return url.rsplit("/", 1)[0] + f"/{name}"
