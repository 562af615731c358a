"""Schema management through Alembic, driven from code (no alembic.ini needed)."""

from __future__ import annotations

from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Engine

MIGRATIONS = Path(__file__).with_name("migrations")


def alembic_config(engine: Engine) -> Config:
    """An Alembic config pointing at the packaged migrations and ``engine``'s URL."""
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS))
    config.set_main_option(
        "sqlalchemy.url", engine.url.render_as_string(hide_password=False).replace("%", "%%")
    )
    return config


def upgrade(engine: Engine, revision: str = "head") -> None:
    """Bring the database to ``revision`` (default: the newest) in one transaction."""
    config = alembic_config(engine)
    with engine.begin() as connection:
        config.attributes["connection"] = connection
        command.upgrade(config, revision)


def current_revision(engine: Engine) -> str | None:
    """The revision the database is at, or None for an empty database."""
    with engine.connect() as connection:
        return MigrationContext.configure(connection).get_current_revision()


def head_revision(engine: Engine) -> str | None:
    """The newest revision shipped with this version of tierwise."""
    return ScriptDirectory.from_config(alembic_config(engine)).get_current_head()
