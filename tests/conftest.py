"""Shared fixtures: seeded randomness, reference-data locations, database servers.

Servers
-------
Tests that need PostgreSQL or MariaDB read ``REGWARDEN_TEST_POSTGRES_URL`` and
``REGWARDEN_TEST_MARIADB_URL``.  When a variable is unset the test is skipped with
the reason; when it is set and the server cannot be reached the test FAILS (CI
sets both, see ``.ci/run`` and DEVELOPERS.md).
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

PROJECT_ROOT = Path(__file__).resolve().parents[1]
#: NIST StRD copies live outside the project (never copied in); absent on a user's machine.
NIST_DIR = PROJECT_ROOT.parent / "shared" / "reference" / "nist_strd"

SERVER_VARIABLES = {
    "postgresql": "REGWARDEN_TEST_POSTGRES_URL",
    "mariadb": "REGWARDEN_TEST_MARIADB_URL",
}


@pytest.fixture
def rng() -> np.random.Generator:
    """A seeded generator; tests that need their own seed make their own."""
    return np.random.default_rng(20261202)


def server_url(kind: str) -> str:
    """URL of a test server, or skip with the reason when it is not configured."""
    variable = SERVER_VARIABLES[kind]
    url = os.environ.get(variable)
    if not url:
        pytest.skip(f"{kind} tests need {variable} (see DEVELOPERS.md, 'Servers for tests')")
    return url


def fresh_server_engine(kind: str):  # type: ignore[no-untyped-def]
    """An engine on the configured server; fails (does not skip) when unreachable."""
    import sqlalchemy as sa

    url = server_url(kind)
    engine = sa.create_engine(url, pool_pre_ping=True)
    try:
        with engine.connect() as connection:
            connection.execute(sa.text("SELECT 1"))
    except Exception as error:  # the whole point: a configured server must answer
        engine.dispose()
        pytest.fail(f"{kind} server configured by {SERVER_VARIABLES[kind]} is unreachable: "
                    f"{type(error).__name__}: {str(error).splitlines()[0]}")
    return engine


@pytest.fixture
def unique_name() -> str:
    """A short unique suffix for tables and monitors shared with a server."""
    return "t" + uuid.uuid4().hex[:10]


@pytest.fixture(params=["sqlite", "postgresql", "mariadb"])
def store_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """A history-store URL per backend: SQLite in tmp_path, and the two real servers.

    Server databases are shared, so each test gets a fresh schema prefix through
    ``unique_name`` where it needs isolation; this fixture only proves reachability.
    """
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'history.sqlite'}"
        return
    engine = fresh_server_engine(request.param)
    engine.dispose()
    yield server_url(request.param)
