"""Opening a registry: engine set-up for SQLite or PostgreSQL, automatic migrations, one transaction per write."""

from __future__ import annotations

import hashlib
import os
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

from sqlalchemy import create_engine, event, text
from sqlalchemy.engine import Engine, make_url
from sqlalchemy.exc import ArgumentError, DBAPIError, IntegrityError, OperationalError
from sqlalchemy.orm import Session
from sqlalchemy.orm.exc import StaleDataError

from ivdossier.errors import ConflictError, InvalidInputError, NotFoundError

DEFAULT_PATH = "ivdossier.sqlite"
ENV_DB = "IVDOSSIER_DB"
SQLITE_BUSY_TIMEOUT_MS = 30_000
# Keep in step with the newest file in migrations/versions (a test checks this).
SCHEMA_HEAD = "0006"
# PostgreSQL SQLSTATEs after which the whole transaction may simply be run again.
TRANSIENT_SQLSTATES = {"40001", "40P01"}  # serialization failure, deadlock detected

T = TypeVar("T")


class BusyError(ConflictError):
    """A write lost a race the database could not queue (deadlock, serialization failure, lock timeout)."""


def resolve_url(db: str | None) -> str:
    """Turn a --db value (URL or file path), else $IVDOSSIER_DB, else ./ivdossier.sqlite, into a URL."""
    value = db or os.environ.get(ENV_DB) or DEFAULT_PATH
    if "://" in value:
        if value.startswith("postgresql://") or value.startswith("postgres://"):
            value = "postgresql+psycopg://" + value.split("://", 1)[1]
        try:
            make_url(value)
        except ArgumentError as exc:
            raise InvalidInputError(
                f"--db {value!r} is not a valid database URL; use a file path or "
                "postgresql://user@host/dbname."
            ) from exc
        return value
    return "sqlite:///" + str(Path(value).expanduser())


def _install_sqlite_hooks(engine: Engine) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn: Any, _record: Any) -> None:
        # Manage transactions ourselves so that writers can start with BEGIN IMMEDIATE.
        dbapi_conn.isolation_level = None
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA foreign_keys=ON")
        cur.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS}")
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute("PRAGMA synchronous=NORMAL")
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Any) -> None:
        # A writer takes the lock up front; waiting happens in busy_timeout, never as "database is locked"
        # half-way through a transaction.
        mode = "IMMEDIATE" if conn.get_execution_options().get("ivdossier_write") else "DEFERRED"
        conn.exec_driver_sql(f"BEGIN {mode}")


@dataclass
class Registry:
    """An open registry: an engine at the current schema and helpers to read or write in one transaction."""

    url: str
    engine: Engine

    @property
    def is_sqlite(self) -> bool:
        return self.engine.dialect.name == "sqlite"

    @contextmanager
    def reading(self) -> Iterator[Session]:
        """A session for reading; closing it ends the read transaction and keeps loaded objects usable."""
        with Session(self.engine, expire_on_commit=False) as session:
            yield session

    @contextmanager
    def writing(self) -> Iterator[Session]:
        """One transaction: committed if the block succeeds, rolled back entirely if anything fails."""
        bind = self.engine.execution_options(ivdossier_write=True)
        with Session(bind, expire_on_commit=False) as session:
            try:
                yield session
                session.commit()
            except StaleDataError as exc:
                session.rollback()
                raise ConflictError(
                    "someone else changed this entity since it was read; reload it and apply your edit again"
                ) from exc
            except IntegrityError as exc:
                session.rollback()
                raise ConflictError(_integrity_message(exc)) from exc
            except DBAPIError as exc:
                session.rollback()
                if _is_transient(exc):
                    raise BusyError(
                        f"the registry was busy with a conflicting write ({_first_line(exc)}); "
                        "nothing was written, run the command again."
                    ) from exc
                raise
            except BaseException:
                session.rollback()
                raise

    def write_retrying(self, work: Callable[[Session], T], *, attempts: int = 5) -> T:
        """Run `work` in one write transaction, rerunning it from the start after a BusyError.

        Optimistic-locking conflicts (a stale expected version) are not retried: they need a person's decision.
        """
        for attempt in range(1, attempts + 1):
            try:
                with self.writing() as session:
                    return work(session)
            except BusyError:
                if attempt == attempts:
                    raise
                time.sleep(0.01 * 2**attempt)
        raise AssertionError("unreachable")  # pragma: no cover

    def dispose(self) -> None:
        self.engine.dispose()


def _first_line(exc: DBAPIError) -> str:
    return (str(exc.orig) if exc.orig is not None else str(exc)).strip().splitlines()[0]


def _is_transient(exc: DBAPIError) -> bool:
    """Deadlocks and serialization failures (PostgreSQL), or a lock wait that ran out of time (SQLite)."""
    sqlstate = getattr(exc.orig, "sqlstate", None)
    if sqlstate in TRANSIENT_SQLSTATES:
        return True
    return isinstance(exc, OperationalError) and "database is locked" in str(exc.orig)


def _integrity_message(exc: IntegrityError) -> str:
    detail = str(exc.orig).strip().splitlines()[0] if exc.orig is not None else str(exc)
    if "UNIQUE" in detail.upper() or "duplicate key" in detail:
        return f"an entity with the same name already exists ({detail}); choose another slug or edit the existing one"
    if "FOREIGN KEY" in detail.upper() or "foreign key" in detail:
        return f"a referenced entity does not exist or is still referenced ({detail})"
    return f"the registry refused the write ({detail})"


def make_engine(url: str) -> Engine:
    if url.startswith("sqlite"):
        path = url.split("sqlite:///", 1)[-1]
        if path and path != ":memory:":
            parent = Path(path).parent
            if not parent.exists():
                raise InvalidInputError(
                    f"the folder {str(parent)!r} for the registry file does not exist; "
                    "create it first or pass another --db path."
                )
        engine = create_engine(url, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_MS / 1000})
        _install_sqlite_hooks(engine)
        return engine
    from ivdossier.registry.models import postgresql_options

    postgresql_options()
    return create_engine(url, pool_pre_ping=True)


def current_revision(engine: Engine) -> str | None:
    """The schema revision stored in the database, or None for an empty database."""
    with engine.connect() as conn:
        try:
            row = conn.execute(text("SELECT version_num FROM alembic_version")).first()
        except OperationalError:
            return None
        except Exception:  # PostgreSQL raises ProgrammingError for a missing table
            return None
        finally:
            conn.rollback()
    return None if row is None else str(row[0])


def upgrade(engine: Engine, revision: str = "head") -> None:
    """Apply alembic migrations up to `revision` (imports alembic only when work is needed)."""
    from ivdossier.registry.migrations.runner import run_upgrade

    run_upgrade(engine, revision)


def open_registry(db: str | None = None, *, migrate: bool = True, create: bool = True) -> Registry:
    """Open (and upgrade if needed) the registry named by --db, $IVDOSSIER_DB or the default file.

    With ``create`` off, a registry that does not exist yet (a missing SQLite file, a database without the
    registry's schema) is refused with `NotFoundError` instead of being created empty: the command line creates
    registries only in `init` and `demo`, so a mistyped --db path fails instead of starting a second registry.
    """
    import ivdossier.registry.plans  # noqa: F401  (registers the guard that keeps frozen plans read-only)

    url = resolve_url(db)
    if not create:
        _refuse_missing_file(url)
    engine = make_engine(url)
    try:
        rev = current_revision(engine)
    except OperationalError as exc:
        raise InvalidInputError(f"cannot open the registry at {url!r}: {exc.orig}") from exc
    if rev is None and not create:
        engine.dispose()
        raise NotFoundError(
            f"{_where(url)} holds no ivdossier registry; check --db (or $IVDOSSIER_DB), "
            f"or create a registry there with `ivdossier --db {_shown(url)} init`."
        )
    if rev != SCHEMA_HEAD:
        if not migrate:
            raise InvalidInputError(
                f"the registry at {url!r} is at schema {rev or 'none'}, not {SCHEMA_HEAD}; "
                "open it once with migrations enabled."
            )
        _upgrade_once(engine)
    return Registry(url=url, engine=engine)


def _sqlite_file(url: str) -> Path | None:
    """The file behind a SQLite URL (None for PostgreSQL or an in-memory database)."""
    if not url.startswith("sqlite"):
        return None
    path = url.split("sqlite:///", 1)[-1]
    return None if not path or path == ":memory:" else Path(path)


def _shown(url: str) -> str:
    """The --db value a person would type for this URL (the file path for SQLite; the URL without password)."""
    file = _sqlite_file(url)
    if file is not None:
        return str(file)
    return make_url(url).render_as_string(hide_password=True)


def _where(url: str) -> str:
    file = _sqlite_file(url)
    return f"the file {str(file)!r}" if file is not None else f"the database {_shown(url)!r}"


def _refuse_missing_file(url: str) -> None:
    file = _sqlite_file(url)
    if file is not None and not file.exists():
        raise NotFoundError(
            f"no registry at {str(file)!r}: the file does not exist; check --db (or $IVDOSSIER_DB), "
            f"or create a registry there with `ivdossier --db {file} init`."
        )


def serialize_writes(session: Session, topic: str) -> None:
    """Make write transactions about `topic` run one after another, from their start (reads included).

    SQLite writers already do (BEGIN IMMEDIATE). On PostgreSQL, READ COMMITTED lets two transactions both see
    that, say, the built-in catalogue is missing and both insert it, so the second fails on a duplicate key;
    a transaction-scoped advisory lock taken first makes the second wait, then see the first one's rows.
    """
    if session.get_bind().dialect.name != "postgresql":
        return
    key = int.from_bytes(hashlib.sha256(f"ivdossier:{topic}".encode()).digest()[:8], "big", signed=True)
    session.connection().execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": key})


def _upgrade_once(engine: Engine, patience_s: float = SQLITE_BUSY_TIMEOUT_MS / 1000) -> None:
    """Upgrade, tolerating other processes that open the same new registry at the same moment.

    Migrations run in one transaction, so a process that loses the race fails on "table already exists" (or, on
    SQLite, "database is locked" while the winner still migrates); it waits and retries for up to the busy
    timeout, and carries on as soon as it finds the schema at the head.
    """
    deadline = time.monotonic() + patience_s
    attempt = 0
    while True:
        attempt += 1
        try:
            upgrade(engine)
            return
        except DBAPIError as exc:
            engine.dispose()
            if current_revision(engine) == SCHEMA_HEAD:
                return
            if not _lost_race(exc) or time.monotonic() >= deadline:
                raise
            time.sleep(min(0.05 * attempt, 1.0))


def _lost_race(exc: DBAPIError) -> bool:
    """An error another process's simultaneous migration explains (lock held, object already created)."""
    detail = str(exc.orig if exc.orig is not None else exc).lower()
    return _is_transient(exc) or any(
        word in detail for word in ("locked", "already exists", "duplicate key", "unique constraint")
    )
