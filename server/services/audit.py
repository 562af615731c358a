"""The append-only audit log."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

from sqlalchemy.orm import Session

from server.store.models import AuditEntry


def record(
    *, session: Session, actor: str, action: str, subject: str = "",
    details: dict[str, Any] | None = None, at: datetime | None = None,
) -> None:
    """Append one audit entry; never holds secrets (callers pass no passwords or tokens)."""
    session.add(
        AuditEntry(
            at=at or datetime.now(UTC), actor=actor, action=action, subject=subject,
            details=details or {},
        )
    )
