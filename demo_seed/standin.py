"""A stand-in for the invented water authority's server, so the demo's HTTP feed has someone to ask.

``demo_seed/feeds.yaml`` has ``wastewater-http`` pull ``http://127.0.0.1:8765/wastewater.csv``.
When ``tierwise demo --scheduler`` runs the feeds' schedules, :class:`WaterAuthority` answers there
on the loopback interface only, with the scenario's wastewater samples in the authority's own
layout (``plant,sample_date,marker,result``, plant codes ``PLANT-n``, concentrations per ml) and
an ETag, so repeated pulls get ``304 Not Modified``. Everything it serves is invented.
"""

from __future__ import annotations

import hashlib
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

import pandas as pd

__all__ = ["PATH", "PORT", "WaterAuthority", "wastewater_csv"]

PORT = 8765
PATH = "/wastewater.csv"
# the authority's names for the stored measures (inverse of the feed's mapping in feeds.yaml)
_MARKERS = {
    "ww_concentration": ("sars2_copies_per_ml", 1 / 1000),
    "ww_flow": ("flow_m3_per_day", 1),
    "ww_marker": ("pmmov_copies_per_l", 1),
}


def wastewater_csv(observations: pd.DataFrame) -> bytes:
    """The authority's file: every plant's newest value per sample day and measure.

    ``observations`` are the scenario's rows (region, measure, ref_date, value, known_on).
    """
    rows = observations[observations["measure"].isin(list(_MARKERS))]
    rows = rows.sort_values("known_on").groupby(["region", "measure", "ref_date"]).last()
    rows = rows.reset_index().sort_values(["ref_date", "region", "measure"])
    names = rows["measure"].map({k: v[0] for k, v in _MARKERS.items()})
    scale = rows["measure"].map({k: v[1] for k, v in _MARKERS.items()})
    out = pd.DataFrame({
        "plant": "PLANT-" + rows["region"].str.removeprefix("WW"),
        "sample_date": pd.to_datetime(rows["ref_date"]).dt.strftime("%Y-%m-%d"),
        "marker": names, "result": (rows["value"] * scale).round(6),
    })
    return out.to_csv(index=False).encode()


class WaterAuthority:
    """Serves :func:`wastewater_csv` bytes at ``http://127.0.0.1:PORT/wastewater.csv``."""

    def __init__(self, content: bytes, *, port: int = PORT) -> None:
        self.content = content
        etag = f'"{hashlib.sha256(content).hexdigest()[:32]}"'
        body = content

        class Handler(BaseHTTPRequestHandler):
            def do_GET(self) -> None:  # noqa: N802 - the standard library's name
                if self.path != PATH:
                    self.send_error(404)
                    return
                if self.headers.get("If-None-Match") == etag:
                    self.send_response(304)
                    self.send_header("ETag", etag)
                    self.end_headers()
                    return
                self.send_response(200)
                self.send_header("Content-Type", "text/csv; charset=utf-8")
                self.send_header("ETag", etag)
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

            def log_message(self, format: str, *args: Any) -> None:  # noqa: A002
                return None

        self._server = ThreadingHTTPServer(("127.0.0.1", port), Handler)
        self.url = f"http://127.0.0.1:{self._server.server_address[1]}{PATH}"
        self._thread = threading.Thread(target=self._server.serve_forever, daemon=True,
                                        name="demo-water-authority")

    def start(self) -> WaterAuthority:
        self._thread.start()
        return self

    def stop(self) -> None:
        self._server.shutdown()
        self._server.server_close()
