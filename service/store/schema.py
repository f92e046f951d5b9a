"""Schema migrations (Alembic) run from code: upgrade, downgrade and the start-up check.

Policy: ``nightbank serve`` (and ``nightbank demo``) upgrade the database to the newest revision
before starting (``--no-migrate`` / ``NIGHTBANK_AUTO_MIGRATE=false`` turns that off). The app
itself never migrates: it refuses to start on a database that is not at the newest revision, with
a message naming ``nightbank migrate``. So several HTTP worker processes never race to migrate,
and a production database is only changed by an explicit command.
"""

from __future__ import annotations

from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Engine

from ..config import Settings
from ..errors import StorageError

__all__ = ["DatabaseNotMigrated", "alembic_config", "check_schema", "current_revision", "downgrade",
           "head_revision", "upgrade"]

MIGRATIONS_DIR = Path(__file__).parent / "migrations"


class DatabaseNotMigrated(StorageError):
    """The database is empty or behind the code's newest schema revision."""

    code = "database_not_migrated"


def alembic_config(settings: Settings) -> Config:
    """Alembic configuration for ``settings.db`` (no ini file needed)."""
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    config.attributes["url"] = settings.db
    if (path := settings.sqlite_path()) is not None:
        path.parent.mkdir(parents=True, exist_ok=True)
    return config


def upgrade(settings: Settings, revision: str = "head") -> None:
    """Upgrade the database to ``revision`` (default: the newest)."""
    command.upgrade(alembic_config(settings), revision)


def downgrade(settings: Settings, revision: str) -> None:
    """Downgrade the database to ``revision`` (``"base"`` = empty)."""
    command.downgrade(alembic_config(settings), revision)


def head_revision() -> str:
    """The newest revision shipped with the code."""
    head = ScriptDirectory(str(MIGRATIONS_DIR)).get_current_head()
    assert head is not None
    return head


def current_revision(engine: Engine) -> str | None:
    """The database's revision, or None for a database never migrated."""
    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def check_schema(engine: Engine) -> None:
    """Refuse a database that is not at the newest revision.

    Raises
    ------
    DatabaseNotMigrated
        With a message naming the command that fixes it.
    """
    current, head = current_revision(engine), head_revision()
    if current != head:
        state = "has no nightbank tables" if current is None else f"is at revision {current}, not {head}"
        raise DatabaseNotMigrated(f"the database {state}; run `nightbank migrate` (same --db / NIGHTBANK_DB) "
                                  "and start again")
