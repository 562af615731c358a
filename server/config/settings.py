"""Settings read from ``TIERWISE_*`` environment variables.

Built once in an entry point (the CLI, the ASGI factory, a test) and passed down explicitly; no
module builds settings at import time.
"""

from __future__ import annotations

import re
from pathlib import Path
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from pydantic import Field, field_validator, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict
from sqlalchemy.engine import make_url
from sqlalchemy.exc import ArgumentError

DEFAULT_SECRET_KEY = "change-me-tierwise-demo-only"
DEFAULT_DATABASE_URL = "sqlite:///var/tierwise.db"


def masked_url(url: str) -> str:
    """``url`` with any password replaced by ``***`` (safe to print or log)."""
    try:
        return make_url(url).render_as_string(hide_password=True)
    except ArgumentError:
        return re.sub(r"(//[^/:@]*:)[^@/]*@", r"\1***@", url)


class Settings(BaseSettings):
    """Application settings; every field can be set as ``TIERWISE_<FIELD>``."""

    model_config = SettingsConfigDict(
        env_prefix="TIERWISE_", extra="ignore", frozen=True, hide_input_in_errors=True
    )

    database_url: str = Field(
        default=DEFAULT_DATABASE_URL,
        description="SQLAlchemy URL: sqlite:///path.db or postgresql+psycopg://user@host/db",
    )
    secret_key: str = Field(
        default=DEFAULT_SECRET_KEY, description="Key that signs session cookies"
    )
    demo_mode: bool = Field(default=False, description="Allow demo defaults such as the secret key")
    rules_dir: Path | None = Field(
        default=None,
        description="Folder of ruleset YAML (default: the policies shipped with tierwise)",
    )
    time_zone: str = Field(default="UTC", description="IANA time zone of the health office")
    public_base_url: str = Field(
        default="http://127.0.0.1:8000", description="Address residents reach the public view at"
    )
    small_count_threshold: int = Field(
        default=10, ge=1, description="Counts below this are shown as '<N' on public pages"
    )
    sql_echo: bool = Field(default=False, description="Log every SQL statement")
    feeds_file: Path | None = Field(
        default=None,
        description="Feed definitions YAML (default: none; the demo's feeds in demo mode)",
    )
    scheduler: bool = Field(
        default=True, description="Run the feed scheduler inside `tierwise serve`"
    )
    upload_max_bytes: int = Field(
        default=50_000_000, ge=1,
        description="Largest file a staff member may upload on the Feeds page (bytes); a "
        "larger one is refused with 413 before it is read whole",
    )
    notify_file: Path | None = Field(
        default=None,
        description="Notification recipients YAML (webhooks and e-mail; default: none)",
    )

    @field_validator("time_zone")
    @classmethod
    def _known_time_zone(cls, value: str) -> str:
        try:
            ZoneInfo(value)
        except (ZoneInfoNotFoundError, ValueError) as exc:
            raise ValueError(f"unknown time zone {value!r}") from exc
        return value

    @field_validator("database_url")
    @classmethod
    def _supported_database(cls, value: str) -> str:
        if not value.startswith(("sqlite", "postgresql")):
            raise ValueError(
                "database_url must be sqlite:// or postgresql+psycopg://, "
                f"got {masked_url(value)!r}"
            )
        return value

    @model_validator(mode="after")
    def _refuse_default_secret(self) -> Settings:
        if self.secret_key == DEFAULT_SECRET_KEY and not self.demo_mode:
            raise ValueError(
                "TIERWISE_SECRET_KEY is the built-in demo key; set your own secret "
                "(for example: python -c 'import secrets; print(secrets.token_urlsafe(32))')"
            )
        return self

    @property
    def zone(self) -> ZoneInfo:
        return ZoneInfo(self.time_zone)
