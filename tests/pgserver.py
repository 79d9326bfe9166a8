"""Start a throw-away PostgreSQL server for tests (Debian's postgresql package), as the postgres user if root."""

from __future__ import annotations

import glob
import os
import shutil
import socket
import subprocess
import tempfile
import time
import uuid
from dataclasses import dataclass
from pathlib import Path


def find_pg_bin() -> Path | None:
    """The folder holding initdb and pg_ctl: Debian's versioned folder, else whatever is on PATH."""
    candidates = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"), reverse=True)
    if candidates:
        return Path(candidates[0]).parent
    found = shutil.which("initdb")
    return Path(found).parent if found else None


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


@dataclass
class PgServer:
    bin_dir: Path
    root: Path
    port: int
    as_user: list[str]

    @property
    def socket_dir(self) -> Path:
        return self.root / "sock"

    def url(self, dbname: str) -> str:
        return f"postgresql+psycopg://postgres@/{dbname}?host={self.socket_dir}&port={self.port}"

    def create_database(self) -> str:
        """A new empty database; returns its URL."""
        name = "t_" + uuid.uuid4().hex[:12]
        subprocess.run(
            [
                *self.as_user,
                str(self.bin_dir / "createdb"),
                "-h",
                str(self.socket_dir),
                "-p",
                str(self.port),
                "-U",
                "postgres",
                name,
            ],
            check=True,
            capture_output=True,
        )
        return self.url(name)

    def stop(self) -> None:
        subprocess.run(
            [
                *self.as_user,
                str(self.bin_dir / "pg_ctl"),
                "-D",
                str(self.root / "data"),
                "-m",
                "immediate",
                "stop",
            ],
            capture_output=True,
        )
        shutil.rmtree(self.root, ignore_errors=True)


def start_server() -> PgServer:
    """initdb + pg_ctl start in a temporary folder, listening only on a Unix socket in that folder."""
    bin_dir = find_pg_bin()
    if bin_dir is None:
        raise FileNotFoundError(
            "PostgreSQL server binaries (initdb, pg_ctl) not found; install the postgresql package"
        )
    root = Path(tempfile.mkdtemp(prefix="ivd-pg-"))
    as_user: list[str] = []
    if os.geteuid() == 0:
        # The server refuses to run as root; hand the folder to the postgres account Debian creates.
        shutil.chown(root, user="postgres", group="postgres")
        as_user = ["runuser", "-u", "postgres", "--"]
    os.chmod(root, 0o755)
    (root / "sock").mkdir()
    if as_user:
        shutil.chown(root / "sock", user="postgres", group="postgres")
    port = _free_port()
    subprocess.run(
        [
            *as_user,
            str(bin_dir / "initdb"),
            "-D",
            str(root / "data"),
            "-U",
            "postgres",
            "-A",
            "trust",
            "-E",
            "UTF8",
        ],
        check=True,
        capture_output=True,
    )
    options = f"-p {port} -k {root / 'sock'} -c listen_addresses='' -c fsync=off -c max_connections=150"
    subprocess.run(
        [
            *as_user,
            str(bin_dir / "pg_ctl"),
            "-D",
            str(root / "data"),
            "-o",
            options,
            "-l",
            str(root / "log"),
            "-w",
            "start",
        ],
        check=True,
        capture_output=True,
    )
    server = PgServer(bin_dir=bin_dir, root=root, port=port, as_user=as_user)
    deadline = time.time() + 20
    while not (root / "sock" / f".s.PGSQL.{port}").exists():
        if time.time() > deadline:
            server.stop()
            raise TimeoutError("PostgreSQL did not open its socket within 20 s")
        time.sleep(0.1)
    return server
