"""Fixtures: the shared example results store."""

from tests.support.stores import _db_template, db_path

__all__ = ["_db_template", "db_path"]
