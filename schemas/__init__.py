"""Contracts between kaledger's stages and of the published database.

This folder is installed as the subpackage ``pipeline.schemas``: the pandera schemas of every
stage's table live in :mod:`pipeline.schemas.tables` and the DDL of the published DuckDB file in
``kaledger.sql`` beside it.
"""

from importlib.resources import files

SCHEMA_VERSION = "1"


def published_ddl() -> str:
    """Return the DDL (``CREATE TABLE`` statements) of the published database."""
    return files(__name__).joinpath("kaledger.sql").read_text(encoding="utf-8")
