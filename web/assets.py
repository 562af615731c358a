"""plotly.js, vendored as the "basic" partial bundle (scatter, bar and pie traces: all that
:mod:`web.charts` draws) from the npm package ``plotly.js-basic-dist-min`` of the same plotly.js
version as the installed ``plotly`` package (no CDN: the app works offline).

The full bundle that ships with the Python package is 4.8 MB; the basic bundle 1.2 MB (0.4 MB
gzipped). ``tests/web/test_assets.py`` keeps the two versions equal, so figures built in Python
draw the same. To update: ``npm pack plotly.js-basic-dist-min@VERSION`` and copy
``plotly-basic.min.js`` here.
"""

from __future__ import annotations

from pathlib import Path

from fastapi import APIRouter
from fastapi.responses import FileResponse

PLOTLY_JS = Path(__file__).with_name("static") / "vendor" / "plotly-basic.min.js"

router = APIRouter(include_in_schema=False)


@router.get("/static/vendor/plotly-basic.min.js")
def plotly_js() -> FileResponse:
    return FileResponse(PLOTLY_JS, media_type="text/javascript",
                        headers={"Cache-Control": "public, max-age=86400"})
