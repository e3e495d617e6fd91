"""Fixtures of the fetch tests: the invented fleet written as every kind of source."""

from tests.tasks.fetch.sources import pg_table, source, sqlite_db

__all__ = ["pg_table", "source", "sqlite_db"]
