"""Alembic environment: the URL comes from the caller (service/db/migrate.py) or from
Settings, never from alembic.ini."""

from __future__ import annotations

from alembic import context

from service.db.models import Base
from service.db.session import make_engine

config = context.config
target_metadata = Base.metadata


def _run(connection) -> None:  # noqa: ANN001 - alembic hands us a Connection
    context.configure(
        connection=connection,
        target_metadata=target_metadata,
        render_as_batch=connection.dialect.name == "sqlite",  # ALTER TABLE support on SQLite
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        _run(connection)
        return
    url = config.get_main_option("sqlalchemy.url")
    if not url:
        from service.settings import Settings

        url = Settings().database_url
    engine = make_engine(url)
    try:
        with engine.connect() as conn:
            _run(conn)
            conn.commit()
    finally:
        engine.dispose()


if context.is_offline_mode():
    raise SystemExit("offline (SQL script) migrations are not supported; run against a database")
run_migrations_online()
