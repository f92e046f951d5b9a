"""Schema migrations: upgrade from empty, downgrade/upgrade round trip, and the start-up refusal."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

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


def _fill_0001(engine) -> dict:
    """Rows of a 0001 database as the service wrote them: a study, two participants, nights, versions."""
    import zlib

    import numpy as np
    from sqlalchemy import text

    counts = zlib.compress(np.arange(240, dtype="<f8").tobytes(), 1)
    nights = [  # (participant, start_utc, epoch_seconds, n_epochs)
        ("P01", "2031-03-02 21:41:00", 30, 240), ("P01", "2031-03-03 21:50:30", 30, 961),
        ("P02", "2031-03-04 22:00:00", 60, 7)]
    created = "2031-01-01 00:00:00"
    with engine.begin() as conn:  # keys from the database (RETURNING), so PostgreSQL's sequences stay right
        study = conn.execute(text("INSERT INTO studies (study_id, name, created_at) VALUES ('s', 'S', :at) "
                                  "RETURNING pk"), {"at": created}).scalar_one()
        owners = {pid: conn.execute(text("INSERT INTO participants (study_pk, participant_id, created_at) "
                                         "VALUES (:s, :pid, :at) RETURNING pk"),
                                    {"s": study, "pid": pid, "at": created}).scalar_one() for pid in ("P01", "P02")}
        for i, (pid, start, epoch_s, n) in enumerate(nights):
            conn.execute(text(
                "INSERT INTO nights (participant_pk, night_id, content_hash, label, start, start_utc, epoch_seconds,"
                " n_epochs, labelled, counts, qc, source_format, created_at) VALUES (:owner, :nid, :hash, 'n', "
                "'x', :start, :epoch_s, :n, false, :counts, '[]', 'json', :at)"),
                {"owner": owners[pid], "nid": f"{i:020d}", "hash": f"{i:064d}", "start": start, "epoch_s": epoch_s,
                 "n": n, "counts": counts, "at": created})
        for i, (pid, version) in enumerate(((None, 1), (None, 3), ("P01", 2), ("P02", 1))):
            owner = None if pid is None else owners[pid]
            conn.execute(text(
                "INSERT INTO model_versions (uid, study_pk, participant_pk, scope, kind, version, is_active, "
                "booster, model_meta, info, created_at) VALUES (:uid, :s, :owner, :scope, 'k', :version, false, "
                ":booster, '{}', '{}', :at)"),
                {"uid": f"{i:032d}", "s": study, "owner": owner, "version": version, "booster": b"raw", "at": created,
                 "scope": "pooled" if owner is None else f"participant:{owner}"})
    return {"nights": nights, "counts": counts}


@contextmanager
def _database(backend: str, tmp_path: Path) -> Iterator[Any]:
    """Settings of an empty database: a SQLite file, or a throwaway PostgreSQL database."""
    if backend == "sqlite":
        yield _settings(tmp_path)
        return
    from pg_support import throwaway_database

    from service.config import Settings

    with throwaway_database() as url:
        yield Settings(db=url)


@pytest.mark.parametrize("backend", ["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def test_upgrade_from_0001_keeps_every_row_and_downgrade_returns_to_it(tmp_path: Path, backend: str) -> None:
    import pandas as pd
    from sqlalchemy import create_engine, inspect, text

    from service.store import db, registry, versions
    from service.store.metadata import ModelMetadata
    from service.store.schema import downgrade, upgrade

    with _database(backend, tmp_path) as settings:
        upgrade(settings, "0001")
        engine = create_engine(settings.db)
        try:
            stored = _fill_0001(engine)
            upgrade(settings)
            with engine.connect() as conn:
                assert conn.execute(text("SELECT epoch_seconds FROM studies")).scalar_one() == 30
                rows = conn.execute(text("SELECT end_utc, excluded, source_epoch_seconds, counts FROM nights "
                                         "ORDER BY pk")).all()
                counters = {k: v for k, v in conn.execute(text("SELECT key, last_version FROM version_counters"))}
            for (_, start, epoch_s, n), row in zip(stored["nights"], rows, strict=True):
                # end of the last epoch, by pandas time arithmetic
                expected_end = pd.Timestamp(start) + pd.Timedelta(seconds=epoch_s * n)
                assert (pd.Timestamp(row.end_utc), bool(row.excluded), row.source_epoch_seconds) == (
                    expected_end, False, None)
                assert bytes(row.counts) == stored["counts"]
            # counters start at the highest stored number of each key
            assert counters == {"pooled": 3, "personal:P01": 2, "personal:P02": 1}
            factory = db.make_session_factory(db.make_engine(settings))
            with db.session_scope(factory, write=True) as session:
                study = registry.find_study(session, "s")
                added = versions.add_version(session, study=study, participant=None, booster=b"raw", model_meta={},
                                             metadata=ModelMetadata(), job_id=None, actor="test")
            assert added.version == 4
            factory.kw["bind"].dispose()
            downgrade(settings, "0001")
            tables = set(inspect(engine).get_table_names())
            assert {"version_counters", "import_profiles"} & tables == set()
            assert "end_utc" not in {c["name"] for c in inspect(engine).get_columns("nights")}
            with engine.connect() as conn:
                assert conn.execute(text("SELECT count(*) FROM nights")).scalar_one() == 3
                assert conn.execute(text("SELECT count(*) FROM model_versions")).scalar_one() == 5
                kept = [bytes(c) for (c,) in conn.execute(text("SELECT counts FROM nights"))]
                assert kept == [stored["counts"]] * 3
        finally:
            engine.dispose()
