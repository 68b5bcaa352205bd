"""Fixtures shared by the whole suite."""

from __future__ import annotations

import os
import uuid

import pytest

POSTGRES_ENV = "LIMEN_TEST_POSTGRES_URL"


@pytest.fixture
def postgres_url():
    """A fresh, empty PostgreSQL database for one test, dropped afterwards.

    `.ci/run` starts a throwaway server on 127.0.0.1 and sets ``LIMEN_TEST_POSTGRES_URL`` (an SQLAlchemy
    URL of its maintenance database); without it the test is skipped with a message.
    """
    admin_url = os.environ.get(POSTGRES_ENV)
    if not admin_url:
        pytest.skip(f"no PostgreSQL server: set {POSTGRES_ENV} (.ci/run starts one on 127.0.0.1)")
    sqlalchemy = pytest.importorskip("sqlalchemy")
    name = f"limen_test_{uuid.uuid4().hex[:12]}"
    admin = sqlalchemy.create_engine(admin_url, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            conn.exec_driver_sql(f'CREATE DATABASE "{name}"')
    except Exception as exc:  # server named but not reachable: a CI set-up error, not a skip
        pytest.fail(f"cannot reach the PostgreSQL test server at {admin_url}: {exc}")
    url = sqlalchemy.engine.make_url(admin_url).set(database=name)
    yield url.render_as_string(hide_password=False)
    with admin.connect() as conn:
        conn.exec_driver_sql(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
    admin.dispose()
