"""Fixtures shared by the whole suite."""

from __future__ import annotations

import os
import re
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


_OWN_CODE = re.compile(r"\b(scorer|webapp)(\.\w+)*\b")


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_makereport(item, call):
    """A skip caused by the project's own code (an import of ``scorer``/``webapp`` that failed, or a skip reason that
    names them) is a failure: a broken module must never turn its tests into silent skips (issue 22).  Skips for
    missing outside components (PostgreSQL server, Chromium, an optional extra) stay skips."""
    outcome = yield
    rep = outcome.get_result()
    if not rep.skipped or getattr(rep, "wasxfail", None) is not None:
        return
    reason = str(rep.longrepr[2] if isinstance(rep.longrepr, tuple) else rep.longrepr)
    if "could not import" in reason and _OWN_CODE.search(reason):
        rep.outcome = "failed"
        rep.longrepr = f"skip of the project's own code turned into a failure: {reason}"


@pytest.hookimpl(hookwrapper=True)
def pytest_make_collect_report(collector):
    """The same rule for a whole test module skipped at import (a module-level ``importorskip``)."""
    outcome = yield
    rep = outcome.get_result()
    if rep.skipped:
        reason = str(rep.longrepr[2] if isinstance(rep.longrepr, tuple) else rep.longrepr)
        if "could not import" in reason and _OWN_CODE.search(reason):
            rep.outcome = "failed"
            rep.longrepr = f"skip of the project's own code turned into a failure: {reason}"
