"""Fixtures of the persistence tests: each database URL, and its engine."""

from tests.tasks.persist.tables import engine, url

__all__ = ["engine", "url"]
