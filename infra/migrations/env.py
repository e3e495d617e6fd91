"""Alembic environment for changekind's database.

Used two ways:

* programmatically by ``changekind.tasks.persist.migrate``, which passes an open
  connection in ``config.attributes["connection"]``;
* from the command line with ``infra/alembic.ini``, e.g.
  ``alembic -c infra/alembic.ini -x url=postgresql+psycopg://user@host/db upgrade head``
  (without ``-x url=...`` the ini file's ``sqlalchemy.url`` is used).
"""

from __future__ import annotations

from logging.config import fileConfig

from alembic import context
from sqlalchemy.engine import Connection

from changekind.tasks.persist import VERSION_TABLE, connect, metadata

config = context.config
target_metadata = metadata

if config.config_file_name is not None and config.attributes.get("connection") is None:
    fileConfig(config.config_file_name, disable_existing_loggers=False)


def _url() -> str:
    url = context.get_x_argument(as_dictionary=True).get("url")
    return url or config.get_main_option("sqlalchemy.url") or "sqlite:///changekind.db"


def _options(dialect_name: str) -> dict[str, object]:
    return {
        "target_metadata": target_metadata,
        "version_table": VERSION_TABLE,
        "compare_type": True,
        # SQLite alters tables by copying them; later migrations need batch mode there.
        "render_as_batch": dialect_name == "sqlite",
    }


def _run(connection: Connection) -> None:
    context.configure(connection=connection, **_options(connection.dialect.name))
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_offline() -> None:
    """Write the SQL to stdout instead of running it (``alembic upgrade head --sql``)."""
    url = _url()
    context.configure(url=url, literal_binds=True, **_options(url.split(":", 1)[0]))
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        _run(connection)
        return
    engine = connect(_url())
    try:
        with engine.begin() as conn:
            _run(conn)
    finally:
        engine.dispose()


if context.is_offline_mode():
    run_migrations_offline()
else:
    run_migrations_online()
