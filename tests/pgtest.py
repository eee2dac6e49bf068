"""The shared PostgreSQL server in tests (127.0.0.1:5432, trust auth, database ``test``): a fresh schema per use.

Under ``CI=true`` a test that needs the server fails when it cannot be reached; elsewhere it skips with the reason.
"""

from __future__ import annotations

import contextlib
import os
import uuid
from collections.abc import Iterator

import pytest

PG_CONNINFO = "host=127.0.0.1 port=5432 dbname=test user=postgres connect_timeout=3"


def postgres_problem() -> str | None:
    """Why the server cannot be used, or None."""
    try:
        import psycopg

        with psycopg.connect(PG_CONNINFO) as conn:
            conn.execute("select 1")
        return None
    except Exception as exc:  # any failure to connect: driver missing, refused, auth
        return str(exc)


def require_postgres() -> None:
    problem = postgres_problem()
    if problem is not None:
        msg = f"PostgreSQL not reachable on 127.0.0.1:5432: {problem}"
        if os.environ.get("CI") == "true":
            pytest.fail(msg + " (CI=true: a test that needs a service must not skip)")
        pytest.skip(msg)


@contextlib.contextmanager
def fresh_schema() -> Iterator[str]:
    """A new, empty schema (dropped afterwards); yields its name."""
    require_postgres()
    import psycopg

    schema = f"spanwatch_test_{uuid.uuid4().hex[:12]}"
    with psycopg.connect(PG_CONNINFO, autocommit=True) as conn:
        conn.execute(f'create schema "{schema}"')
    try:
        yield schema
    finally:
        with psycopg.connect(PG_CONNINFO, autocommit=True) as conn:
            conn.execute(f'drop schema if exists "{schema}" cascade')


def schema_url(schema: str, *, port: int = 5432, password: str | None = None) -> str:
    """An SQLAlchemy URL whose connections work in ``schema``."""
    user = "postgres" if password is None else f"postgres:{password}"
    return f"postgresql+psycopg://{user}@127.0.0.1:{port}/test?options=-csearch_path%3D{schema}"
