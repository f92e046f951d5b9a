"""Schema migrations: upgrade from empty, downgrade/upgrade round trip, and the start-up refusal."""

from __future__ import annotations

from pathlib import Path

import pytest


def _settings(tmp_path: Path):
    from service.config import Settings

    return Settings(db=f"sqlite:///{tmp_path / 'm.db'}")


def _tables(settings) -> set[str]:
    from sqlalchemy import create_engine, inspect

    engine = create_engine(settings.db)
    try:
        return set(inspect(engine).get_table_names()) - {"alembic_version"}
    finally:
        engine.dispose()


def test_upgrade_from_empty_creates_every_table_and_matches_the_models(tmp_path: Path) -> None:
    from alembic.autogenerate import compare_metadata
    from alembic.migration import MigrationContext
    from sqlalchemy import create_engine

    from service.store.db import Base
    from service.store.schema import current_revision, head_revision, upgrade

    settings = _settings(tmp_path)
    upgrade(settings)
    assert _tables(settings) == set(Base.metadata.tables)
    engine = create_engine(settings.db)
    try:
        assert current_revision(engine) == head_revision()
        with engine.connect() as conn:  # the migrations and the ORM tables describe the same schema
            diff = compare_metadata(MigrationContext.configure(conn, opts={"compare_type": True}), Base.metadata)
        assert diff == []
    finally:
        engine.dispose()


def test_downgrade_to_base_and_upgrade_again_round_trips(tmp_path: Path) -> None:
    from service.store.schema import downgrade, upgrade

    settings = _settings(tmp_path)
    upgrade(settings)
    first = _tables(settings)
    downgrade(settings, "base")
    assert _tables(settings) == set()
    upgrade(settings)
    assert _tables(settings) == first


def test_app_refuses_an_unmigrated_database_and_names_the_command(tmp_path: Path) -> None:
    from service.app import create_app
    from service.store.schema import DatabaseNotMigrated

    with pytest.raises(DatabaseNotMigrated, match="nightbank migrate") as info:
        create_app(_settings(tmp_path))
    assert info.value.code == "database_not_migrated"


def test_app_refuses_a_database_behind_the_newest_revision(tmp_path: Path) -> None:
    from service.app import create_app
    from service.store.schema import DatabaseNotMigrated, downgrade, upgrade

    settings = _settings(tmp_path)
    upgrade(settings)
    downgrade(settings, "base")
    with pytest.raises(DatabaseNotMigrated, match="nightbank migrate"):
        create_app(settings)


def test_sqlite_connections_use_wal_foreign_keys_and_busy_timeout(settings) -> None:
    from sqlalchemy import text

    from service.store.db import make_engine

    engine = make_engine(settings)
    try:
        with engine.connect() as conn:
            assert conn.execute(text("PRAGMA journal_mode")).scalar() == "wal"
            assert conn.execute(text("PRAGMA foreign_keys")).scalar() == 1
            assert conn.execute(text("PRAGMA busy_timeout")).scalar() >= 5000
    finally:
        engine.dispose()
