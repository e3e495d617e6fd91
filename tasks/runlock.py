"""One fleet run at a time per database: the run lock.

Two runs writing one database at once keep events and models right but both
log the same changes (a doubled revision log, both claiming the same new
events), and a scan moving the watermarks under a backfill makes the backfill
skip what it was given.  So a scan, backfill or refit holds the database for
its whole run:

- **PostgreSQL**: a session advisory lock (``pg_try_advisory_lock``) keyed on
  the database's current schema, held on one connection of its own.  The
  server releases it when that connection ends, so a killed run never leaves
  it behind.  If the connection is dropped mid-run (the server restarted, or
  an administrator terminated it), :meth:`RunLock.check` takes the lock again
  before the next write, or stops the run if another run took it meanwhile.
- **SQLite**: the row ``run_locks(lock_name='fleet')``, taken in one write
  transaction.  A row whose process is gone (same host, no such process) or
  whose heartbeat (every ``HEARTBEAT_SECONDS``) is older than
  ``STALE_SECONDS`` belongs to a dead run and is taken over.

On both, the ``run_locks`` row says who holds the database (run id, kind,
host, process id, since when), which the refused run names.  A run that
cannot get the lock waits up to its ``wait_seconds``, then raises
:class:`~changekind.tasks.errors.RunBusyError` without having written
anything.
"""

from __future__ import annotations

import contextlib
import os
import socket
import threading
import time
from dataclasses import dataclass
from datetime import UTC, datetime

import sqlalchemy as sa

from changekind.tasks import persist
from changekind.tasks.errors import RunBusyError

LOCK_NAME = "fleet"
HEARTBEAT_SECONDS = 15.0
"""How often a holder writes its heartbeat (SQLite: the lock's sign of life)."""
STALE_SECONDS = 120.0
"""A SQLite lock whose heartbeat is older than this belongs to a dead run."""
POLL_SECONDS = 1.0
"""How often a waiting run tries the lock again."""

_HELD: set[str] = set()
"""Run ids whose lock this process holds now."""


@dataclass(frozen=True, slots=True)
class Holder:
    """Who holds the database (the ``run_locks`` row)."""

    run_id: str
    kind: str
    host: str
    pid: int
    acquired_at: datetime
    heartbeat_at: datetime

    def describe(self) -> str:
        since = self.acquired_at.isoformat(timespec="seconds")
        return f"{self.kind} run {self.run_id} (process {self.pid} on {self.host}, since {since})"


def _process_alive(pid: int) -> bool:
    """Whether process ``pid`` of this host runs (a zombie counts as ended)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as f:
            state = f.read().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return True
    return state not in ("Z", "X")


class RunLock:
    """The database held by one run; use as a context manager.

    Parameters
    ----------
    url : str
        The database URL (the lock is per database; on PostgreSQL per schema).
    run_id, kind : str
        Recorded in ``run_locks`` so a refused run can name the holder.
    wait_seconds : float, default=0
        How long to wait for another run to finish before giving up.
    """

    def __init__(self, url: str, run_id: str, kind: str, *, wait_seconds: float = 0.0) -> None:
        self.url = url
        self.run_id = run_id
        self.kind = kind
        self.wait_seconds = max(0.0, float(wait_seconds))
        self.host = socket.gethostname()
        self.pid = os.getpid()
        self._engine: sa.Engine | None = None
        self._conn: sa.Connection | None = None  # PostgreSQL: the session holding the lock
        self._stop = threading.Event()
        self._beat: threading.Thread | None = None
        self.waited = 0.0

    # -- public -----------------------------------------------------------------

    def __enter__(self) -> RunLock:
        self.acquire()
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()

    @property
    def postgres(self) -> bool:
        return self._db().dialect.name == "postgresql"

    def acquire(self) -> None:
        """Take the lock, waiting up to ``wait_seconds``.

        Raises
        ------
        RunBusyError
            Another run still held it when the wait ended.
        """
        t0 = time.monotonic()
        while True:
            if self._try():
                _HELD.add(self.run_id)
                self.waited = time.monotonic() - t0
                self._beat = threading.Thread(
                    target=self._heartbeat, name="changekind-run-lock", daemon=True
                )
                self._beat.start()
                return
            if time.monotonic() - t0 >= self.wait_seconds:
                holder = self.holder()
                who = holder.describe() if holder is not None else "another run"
                waited = f" after waiting {self.wait_seconds:.0f} s" if self.wait_seconds else ""
                raise RunBusyError(
                    f"{who} is using the database{waited}; one fleet run at a time per "
                    "database: run this again when it has finished (or give a longer wait), "
                    "or, if that run is dead, wait "
                    f"{STALE_SECONDS:.0f} s for its lock to expire"
                    + ("" if self.postgres else " (SQLite)")
                )
            time.sleep(POLL_SECONDS)

    def check(self) -> None:
        """Before a write: make sure this run still holds the lock (PostgreSQL re-takes it).

        Raises
        ------
        RunBusyError
            The lock's connection was lost and another run took the lock.
        """
        if not self.postgres:
            return
        try:
            assert self._conn is not None
            self._conn.exec_driver_sql("SELECT 1")
            return
        except (sa.exc.DBAPIError, AssertionError):
            self._drop_connection()
        if not self._try_postgres():
            holder = self.holder()
            who = holder.describe() if holder is not None else "another run"
            raise RunBusyError(
                f"this run lost its database lock (its connection was dropped) and {who} "
                "took it; this run stops: what it wrote stays, and a rerun continues"
            )

    def holder(self) -> Holder | None:
        """The recorded holder, if any."""
        try:
            with self._db().connect() as conn:
                row = conn.execute(
                    sa.select(persist.run_locks).where(persist.run_locks.c.lock_name == LOCK_NAME)
                ).first()
        except sa.exc.DBAPIError:
            return None
        if row is None:
            return None
        return Holder(row.run_id, row.kind, row.host, row.pid, row.acquired_at, row.heartbeat_at)

    def release(self) -> None:
        """Let go (also of the PostgreSQL session); never raises."""
        _HELD.discard(self.run_id)
        self._stop.set()
        if self._beat is not None:
            self._beat.join(timeout=5)
        try:
            with self._db().begin() as conn:
                conn.execute(
                    sa.delete(persist.run_locks).where(
                        persist.run_locks.c.lock_name == LOCK_NAME,
                        persist.run_locks.c.run_id == self.run_id,
                    )
                )
        except sa.exc.DBAPIError:
            pass  # PostgreSQL: the lock goes with the session; SQLite: it expires
        self._drop_connection()
        if self._engine is not None:
            self._engine.dispose()
            self._engine = None

    # -- internals ----------------------------------------------------------------

    def _db(self) -> sa.Engine:
        if self._engine is None:
            self._engine = persist.connect(self.url)
        return self._engine

    def _row(self, now: datetime) -> dict[str, object]:
        return {
            "lock_name": LOCK_NAME,
            "run_id": self.run_id,
            "kind": self.kind,
            "host": self.host,
            "pid": self.pid,
            "acquired_at": now,
            "heartbeat_at": now,
        }

    def _try(self) -> bool:
        if self.postgres:
            return self._try_postgres()
        return self._try_sqlite()

    def _try_postgres(self) -> bool:
        if self._conn is None:
            conn = self._db().connect().execution_options(isolation_level="AUTOCOMMIT")
            got = conn.exec_driver_sql(
                "SELECT pg_try_advisory_lock(hashtext('changekind-run:' || current_schema()))"
            ).scalar()
            if not got:
                conn.close()
                return False
            self._conn = conn
        with self._db().begin() as tx:
            tx.execute(
                sa.delete(persist.run_locks).where(persist.run_locks.c.lock_name == LOCK_NAME)
            )
            tx.execute(sa.insert(persist.run_locks), [self._row(datetime.now(UTC))])
        return True

    def _try_sqlite(self) -> bool:
        now = datetime.now(UTC)
        table = persist.run_locks
        try:
            with self._db().begin() as conn:
                row = conn.execute(sa.select(table).where(table.c.lock_name == LOCK_NAME)).first()
                if row is None:
                    conn.execute(sa.insert(table), [self._row(now)])
                    return True
                if row.run_id == self.run_id:
                    return True
                here = row.host == self.host
                dead = (
                    (here and not _process_alive(row.pid))
                    # this process's run that let go but could not delete its row
                    or (here and row.pid == self.pid and row.run_id not in _HELD)
                ) or (
                    (now - row.heartbeat_at).total_seconds() > STALE_SECONDS
                )
                if not dead:
                    return False
                taken = conn.execute(
                    sa.update(table)
                    .where(table.c.lock_name == LOCK_NAME, table.c.run_id == row.run_id)
                    .values(self._row(now))
                )
                return taken.rowcount == 1
        except (sa.exc.IntegrityError, sa.exc.OperationalError):
            return False  # another run inserted the row first, or holds the write lock

    def _heartbeat(self) -> None:
        table = persist.run_locks
        while not self._stop.wait(HEARTBEAT_SECONDS):
            try:
                with self._db().begin() as conn:
                    conn.execute(
                        sa.update(table)
                        .where(table.c.lock_name == LOCK_NAME, table.c.run_id == self.run_id)
                        .values(heartbeat_at=datetime.now(UTC))
                    )
            except sa.exc.DBAPIError:
                continue  # a blip; the next beat tries again

    def _drop_connection(self) -> None:
        if self._conn is not None:
            with contextlib.suppress(sa.exc.DBAPIError):
                self._conn.close()
            self._conn = None
