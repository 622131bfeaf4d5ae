"""PostgreSQL: an orphaned session holding a study's lock is named with the way to end it; a user
who may not create schemas in the database still runs in a work schema that exists.

Needs SQLMATCH_TEST_POSTGRES_URL (skips without it, fails under CI; see test_engines)."""

from __future__ import annotations

import pytest

from sqlmatch import api
from sqlmatch.errors import EngineError

from test_concurrency_postgres import pg  # noqa: F401 (a fixture, shared)
from test_engines import demo_spec, postgres_url  # noqa: F401 (a fixture, shared)


def test_a_lock_held_by_another_session_names_its_pid_and_how_to_end_it(pg):  # noqa: F811
    from sqlmatch.engines.postgres import PostgresEngine, study_lock_key

    url, tag, psycopg = pg
    # an orphan: a session that took the study's lock (as a killed run's backend keeps it)
    orphan = psycopg.connect(url, autocommit=True)
    engine = PostgresEngine(url)
    try:
        orphan.execute("SELECT pg_advisory_lock(%s)", (study_lock_key(f"{tag}_w", "annual_pass"),))
        pid = orphan.info.backend_pid
        with pytest.raises(EngineError) as info:
            api.run(demo_spec(tag, f"{tag}_w"), engine=engine)
        text = str(info.value)
        assert "\n" not in text
        assert f"pid {pid}" in text
        assert f"SELECT pg_terminate_backend({pid})" in text
        assert "earlier run" in text and "killed" in text
    finally:
        engine.close()
        orphan.close()


def test_a_user_without_create_on_the_database_runs_in_an_existing_work_schema(pg):  # noqa: F811
    """The role owns its work schema and may read the data, but has no CREATE on the database
    (PostgreSQL 15 grants PUBLIC only CONNECT and TEMP), so CREATE SCHEMA IF NOT EXISTS would be
    refused even though the schema exists."""
    from sqlmatch.engines.postgres import PostgresEngine

    url, tag, psycopg = pg
    role, work = f"{tag}_analyst", f"{tag}_own"
    admin = psycopg.connect(url, autocommit=True)
    try:
        admin.execute(f'CREATE ROLE "{role}" LOGIN')
        admin.execute(f'CREATE SCHEMA "{work}" AUTHORIZATION "{role}"')
        admin.execute(f'GRANT USAGE ON SCHEMA "{tag}" TO "{role}"')
        admin.execute(f'GRANT SELECT ON ALL TABLES IN SCHEMA "{tag}" TO "{role}"')
        (may_create,) = admin.execute("SELECT has_database_privilege(%s, current_database(), 'CREATE')", (role,)).fetchone()
        assert not may_create
        role_url = url.replace("postgres@", f"{role}@", 1)
        assert role_url != url
        with PostgresEngine(role_url) as engine:
            results = api.run(demo_spec(tag, work), engine=engine, keep_tables=False)
        assert results.matching.n_treated_matched > 0
        assert [r[0] for r in admin.execute("SELECT tablename FROM pg_tables WHERE schemaname = %s", (work,)).fetchall()] == []
    finally:
        admin.execute(f'DROP SCHEMA IF EXISTS "{work}" CASCADE')
        admin.execute(f'DROP OWNED BY "{role}"') if admin.execute("SELECT 1 FROM pg_roles WHERE rolname = %s", (role,)).fetchone() else None
        admin.execute(f'DROP ROLE IF EXISTS "{role}"')
        admin.close()
