"""Configuration: the :class:`Settings` object built once per process."""

from server.config.settings import (
    DEFAULT_DATABASE_URL,
    DEFAULT_SECRET_KEY,
    Settings,
    masked_url,
)

__all__ = ["DEFAULT_DATABASE_URL", "DEFAULT_SECRET_KEY", "Settings", "masked_url"]
