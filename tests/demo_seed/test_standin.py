"""The demo's stand-in water authority serves a file the demo's HTTP feed reads whole."""

from __future__ import annotations

import io
from collections.abc import Iterator
from datetime import date

import httpx
import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from demo_seed.feeds import DEMO_FEEDS_FILE
from demo_seed.scenario import build_scenario
from demo_seed.standin import WaterAuthority, wastewater_csv
from server.feeds.definition import load_feeds
from server.feeds.parser import read_chunks
from server.feeds.validation import Catalogue, validate_chunk

END = date(2026, 3, 31)


@pytest.fixture(scope="module")
def observations() -> pd.DataFrame:
    return build_scenario(seed=3, end=END, days=150).observations


@pytest.fixture(scope="module")
def content(observations: pd.DataFrame) -> bytes:
    return wastewater_csv(observations)


@pytest.fixture
def authority(content: bytes) -> Iterator[WaterAuthority]:
    server = WaterAuthority(content, port=0).start()  # any free loopback port
    yield server
    server.stop()


def test_standin_answers_with_an_etag_and_304_when_unchanged(authority: WaterAuthority) -> None:
    first = httpx.get(authority.url, timeout=5)
    assert first.status_code == 200 and first.content == authority.content
    again = httpx.get(authority.url, headers={"If-None-Match": first.headers["etag"]}, timeout=5)
    assert again.status_code == 304
    assert httpx.get(authority.url.replace(".csv", ".txt"), timeout=5).status_code == 404


def test_standin_file_passes_every_row_check_of_the_demo_http_feed(
    content: bytes, observations: pd.DataFrame,
) -> None:
    feed = load_feeds(DEMO_FEEDS_FILE)["wastewater-http"]
    measures = {"ww_concentration": 1, "ww_flow": 2, "ww_marker": 3}
    catalogue = Catalogue(regions={f"WW{i}": i for i in range(1, 6)}, measures=measures,
                          counts=frozenset())
    results = [validate_chunk(c, feed, catalogue, today=END)
               for c in read_chunks(io.BytesIO(content), feed, label="wastewater.csv")]
    assert not [r for res in results for r in res.rejections]
    accepted = sum(len(res.accepted) for res in results)
    assert accepted == content.count(b"\n") - 1  # every data line, header excluded
    # concentrations come back in copies per litre (the feed's scale: 1000 per ml), as simulated
    conc = np.concatenate([res.accepted.value[res.accepted.measure_id == 1] for res in results])
    simulated = observations[observations["measure"] == "ww_concentration"]
    final = simulated.sort_values("known_on").groupby(["region", "ref_date"])["value"].last()
    assert_allclose(np.sort(conc), np.sort(final.to_numpy()), rtol=1e-6)
