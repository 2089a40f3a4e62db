"""The Alembic migrations build exactly the schema of service/db/models.py (on whichever
engine the suite runs): a model change without its migration, or the reverse, fails here.
The comparison is Alembic's own autogenerate (alembic.autogenerate.compare_metadata)."""

from __future__ import annotations

from pathlib import Path

from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext

import pg_server
from service_env import TEST_DATABASE_URL
from service.db.migrate import upgrade
from service.db.models import Base
from service.db.session import make_engine


def test_migrations_match_the_models(tmp_path: Path) -> None:
    url = pg_server.schema_url(TEST_DATABASE_URL, str(tmp_path)) if TEST_DATABASE_URL else f"sqlite:///{tmp_path / 'm.db'}"
    engine = make_engine(url)
    try:
        upgrade(engine)
        with engine.connect() as conn:
            drift = compare_metadata(MigrationContext.configure(conn), Base.metadata)
    finally:
        engine.dispose()
        if TEST_DATABASE_URL:
            pg_server.drop_schema(url)
    assert drift == [], drift
