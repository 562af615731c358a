"""Liveness and readiness."""

from __future__ import annotations

from fastapi import APIRouter
from sqlalchemy import text

from web.deps import SessionDep

router = APIRouter(tags=["health"])


@router.get("/healthz")
def healthz(session: SessionDep) -> dict[str, str]:
    """``ok`` when the app answers and the database runs a query."""
    session.execute(text("SELECT 1"))
    return {"status": "ok"}
