"""Liveness and readiness."""

from __future__ import annotations

from fastapi import APIRouter, Request

router = APIRouter(tags=["health"])


@router.get("/healthz")
def healthz(request: Request) -> dict[str, str]:
    """``ok`` when the app answers and the database runs a query."""
    request.app.state.database.ping()
    return {"status": "ok"}
