"""Engines and migrations: :func:`connect` checks a URL and makes an engine,
:func:`migrate` brings a database's schema to the head revision.
"""

from __future__ import annotations

import functools
import math
import re
import threading
from collections.abc import Iterator
from contextlib import AbstractContextManager, contextmanager, nullcontext
from pathlib import Path
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import URL, Connection, Engine
from sqlalchemy.exc import ArgumentError, DBAPIError, NoSuchModuleError

from changekind.tasks.errors import (
    ConfigError,
    DatabaseUnavailableError,
    mask_url,
)
from changekind.tasks.persist.convert import _INSERTS
from changekind.tasks.persist.schema import (
    CONNECT_TIMEOUT_SECONDS,
    DEFAULT_URL,
    SQLITE_BUSY_TIMEOUT_SECONDS,
    VERSION_TABLE,
    Database,
)

# --------------------------------------------------------------------------- engines


def our_driver(url: URL) -> URL:
    """``url`` with changekind's PostgreSQL driver: ``postgres://`` and ``postgresql://``
    (the forms hosting services hand out) mean ``postgresql+psycopg://``."""
    if url.drivername in ("postgres", "postgresql"):
        return url.set(drivername="postgresql+psycopg")
    if url.drivername.startswith("postgres+"):
        return url.set(drivername="postgresql+" + url.drivername.split("+", 1)[1])
    return url


def _parse_url(url: str | URL) -> URL:
    if isinstance(url, URL):
        parsed = url
    else:
        if not isinstance(url, str) or not url.strip():
            raise ConfigError(
                f"database URL {url!r} is empty; give one such as {DEFAULT_URL!r} or "
                "'postgresql+psycopg://user@host:5432/dbname'"
            )
        try:
            parsed = sa.make_url(url.strip())
        except ArgumentError as exc:
            raise ConfigError(
                f"database URL {url!r} cannot be read ({exc}); give one such as "
                f"{DEFAULT_URL!r} or 'postgresql+psycopg://user@host:5432/dbname'"
            ) from None
    parsed = our_driver(parsed)
    backend = parsed.get_backend_name()
    if backend not in _INSERTS:
        raise ConfigError(
            f"database {mask_url(parsed)!r} uses {backend!r}; changekind supports "
            "sqlite and postgresql URLs only"
        )
    return parsed


def _engine_options(url: URL, timeout: float) -> dict[str, Any]:
    if url.get_backend_name() == "sqlite":
        return {"connect_args": {"timeout": SQLITE_BUSY_TIMEOUT_SECONDS}}
    connect_args: dict[str, Any] = {}
    if "connect_timeout" not in url.query:
        connect_args["connect_timeout"] = max(1, math.ceil(timeout))
    return {"connect_args": connect_args, "pool_pre_ping": True}


def _first_line(exc: BaseException) -> str:
    inner = getattr(exc, "orig", None) or exc
    text = " ".join(str(inner).split("\n")[0].split())
    return text or type(inner).__name__


def connect(url: str | URL = DEFAULT_URL, *, timeout: float = CONNECT_TIMEOUT_SECONDS) -> Engine:
    """Make an engine for ``url`` and check that the database answers.

    Parameters
    ----------
    url : str or sqlalchemy.engine.URL, default='sqlite:///changekind.db'
        A SQLite or PostgreSQL URL.  ``postgresql://`` means the psycopg 3 driver.
    timeout : float, default=5
        Seconds to wait for a database server (ignored for SQLite files).

    Returns
    -------
    sqlalchemy.engine.Engine
        The caller owns it and should ``dispose()`` it when done.

    Raises
    ------
    ConfigError
        The URL cannot be read, names another database or a missing driver.
    SourceError
        The database cannot be reached or opened; the message shows the URL
        with its password masked and says what to check.
    """
    parsed = _parse_url(url)
    try:
        engine = sa.create_engine(parsed, **_engine_options(parsed, timeout))
    except (NoSuchModuleError, ImportError) as exc:
        raise ConfigError(
            f"database {mask_url(parsed)!r} needs a driver that is not installed ({exc}); "
            "for PostgreSQL install psycopg 3 (pip install 'changekind[postgres]') and "
            "use a postgresql+psycopg:// URL"
        ) from None
    except (ArgumentError, TypeError) as exc:
        raise ConfigError(f"database URL {mask_url(parsed)!r} is not usable: {exc}") from None
    try:
        with engine.connect():
            pass
    except (DBAPIError, OSError) as exc:
        engine.dispose()
        if parsed.get_backend_name() == "sqlite":
            hint = "check that its folder exists and is writable, or give another URL"
        else:
            hint = (
                "check that the server is running and reachable, that the database "
                "and user exist, or give another URL"
            )
        raise DatabaseUnavailableError(
            f"cannot open database {mask_url(parsed)!r}: {_first_line(exc)}; {hint}"
        ) from None
    return engine


class _InTransaction:
    """A connection already in a transaction, standing in for an engine.

    ``begin()`` and ``connect()`` hand the same connection back, so the public
    writers can run inside one caller's transaction (see :func:`write_batch`).
    """

    def __init__(self, conn: Connection) -> None:
        self._conn = conn

    def begin(self) -> AbstractContextManager[Connection]:
        return nullcontext(self._conn)

    def connect(self) -> AbstractContextManager[Connection]:
        return nullcontext(self._conn)


@contextmanager
def _engine(db: Database) -> Iterator[Engine]:
    """The caller's engine as is, or one made from a URL and disposed afterwards."""
    if isinstance(db, Engine):
        yield db
        return
    if isinstance(db, Connection):
        yield _InTransaction(db)  # type: ignore[misc]
        return
    engine = connect(db)
    try:
        yield engine
    finally:
        engine.dispose()


def migrations_dir() -> Path:
    """The Alembic script folder ``infra/migrations`` beside the package folders.

    Raises
    ------
    ConfigError
        When changekind runs from an installation without the ``infra`` folder.
    """
    path = Path(__file__).resolve().parents[2] / "infra" / "migrations"
    if not (path / "env.py").is_file():
        raise ConfigError(
            f"the database migrations were not found (looked for {path / 'env.py'}); "
            "run changekind from a source checkout or an editable install "
            "(pip install -e .), which keeps the infra/ folder beside tasks/"
        )
    return path


def _alembic_config() -> Any:
    from alembic.config import Config  # imported here: only migrations need Alembic

    config = Config()
    config.set_main_option("script_location", str(migrations_dir()).replace("%", "%%"))
    return config


def migrate(db: Database = DEFAULT_URL, *, revision: str = "head") -> None:
    """Upgrade the database's schema to ``revision`` (default: the newest).

    Parameters
    ----------
    db : Engine or str, default='sqlite:///changekind.db'
        The database (see the module notes).
    revision : str, default='head'
        An Alembic revision identifier.

    Notes
    -----
    Runs Alembic's ``upgrade`` command on one connection in one transaction,
    with the script folder from :func:`migrations_dir` (never the working
    folder).  Upgrading a database that is already at ``revision`` does nothing.
    """
    if revision == "head" and _at_head(db):
        return  # what Alembic's upgrade would find, without its 0.4 s of imports
    from alembic import command  # imported here: only migrations need Alembic

    # Two runs may migrate a new database at once: Alembic's context is global
    # to the process (one migration at a time here), PostgreSQL serializes on
    # an advisory lock, and on SQLite the loser of the race tries once more
    # (and then finds the schema up to date).
    for attempt in (1, 2):
        try:
            with _MIGRATING, _engine(db) as engine, engine.begin() as conn:
                if conn.dialect.name == "postgresql":
                    conn.exec_driver_sql(
                        "SELECT pg_advisory_xact_lock("
                        "hashtext('changekind-migrate:' || current_schema()))"
                    )
                config = _alembic_config()
                config.attributes["connection"] = conn
                command.upgrade(config, revision)
            return
        except DBAPIError:
            if attempt == 2:
                raise


_MIGRATING = threading.Lock()

_REVISION = re.compile(r"^(down_)?revision\b[^=\n]*=\s*(None|[\"'](\w+)[\"'])\s*$", re.MULTILINE)


@functools.cache
def script_head() -> str | None:
    """The head revision of the migration scripts, read from their text (no Alembic).

    Each script in ``versions/`` names its ``revision`` and one ``down_revision``;
    the head is the one revision no script revises.  None when the scripts do
    not form one such chain (a merge, a tuple of parents): then only Alembic
    can tell.
    """
    revisions: set[str] = set()
    parents: set[str] = set()
    for script in sorted((migrations_dir() / "versions").glob("*.py")):
        found = {bool(m[1]): m[3] for m in _REVISION.finditer(script.read_text(encoding="utf-8"))}
        if False not in found or True not in found or found[False] is None:
            return None
        revisions.add(found[False])
        if found[True] is not None:
            parents.add(found[True])
    heads = revisions - parents
    return heads.pop() if len(heads) == 1 else None


def _at_head(db: Database) -> bool:
    """Whether the database's version table holds exactly the scripts' head revision."""
    head = script_head()
    if head is None:
        return False
    with _engine(db) as engine, engine.connect() as conn:
        if not sa.inspect(conn).has_table(VERSION_TABLE):
            return False
        stored = conn.exec_driver_sql(f"SELECT version_num FROM {VERSION_TABLE}").scalars().all()
    return stored == [head]


def init_db(url: str | URL = DEFAULT_URL) -> Engine:
    """Connect to ``url``, bring its schema up to date and return the engine.

    The caller owns the engine and should ``dispose()`` it when done.
    """
    engine = connect(url)
    try:
        migrate(engine)
    except BaseException:
        engine.dispose()
        raise
    return engine
