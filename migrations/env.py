"""Alembic environment: batch mode for SQLite, the app's metadata and naming convention."""

from alembic import context
from sqlalchemy import create_engine, text

from app.store.base import Base
from app.store import models  # noqa: F401  (registers the tables)

config = context.config
target_metadata = Base.metadata


def run_migrations_offline() -> None:
    context.configure(url=config.get_main_option("sqlalchemy.url"), target_metadata=target_metadata,
                      literal_binds=True, render_as_batch=True)
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    url = config.get_main_option("sqlalchemy.url")
    engine = create_engine(url)
    with engine.connect() as connection:
        is_sqlite = connection.dialect.name == "sqlite"
        if is_sqlite:
            # Batch migrations copy tables; foreign keys are checked after instead of during.
            connection.exec_driver_sql("PRAGMA foreign_keys=OFF")
            connection.commit()  # end the implicit transaction so Alembic owns its own
        context.configure(connection=connection, target_metadata=target_metadata,
                          render_as_batch=True, compare_type=True)
        with context.begin_transaction():
            context.run_migrations()
        if is_sqlite:
            problems = connection.execute(text("PRAGMA foreign_key_check")).fetchall()
            if problems:
                raise RuntimeError(f"foreign key check failed after migration: {problems[:5]}")
            connection.exec_driver_sql("PRAGMA journal_mode=WAL")
            connection.commit()
    engine.dispose()


if context.is_offline_mode():
    run_migrations_offline()
else:
    run_migrations_online()
