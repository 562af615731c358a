"""plotly.js served from the installed ``plotly`` package (no CDN: the app works offline)."""

from __future__ import annotations

from pathlib import Path

import plotly
from fastapi import APIRouter
from fastapi.responses import FileResponse

PLOTLY_JS = Path(plotly.__file__).parent / "package_data" / "plotly.min.js"

router = APIRouter(include_in_schema=False)


@router.get("/static/vendor/plotly.min.js")
def plotly_js() -> FileResponse:
    return FileResponse(PLOTLY_JS, media_type="text/javascript",
                        headers={"Cache-Control": "public, max-age=86400"})
