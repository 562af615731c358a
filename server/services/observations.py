"""Use case: record ready-made batches of observations as vintages, and the measure catalogue.

:class:`VintageWriter` appends data frames that need no row validation (the demo seeder and
``bench/web.py`` use it). Configured feeds do not come this way: a feed file or push is parsed,
validated and landed by :func:`server.services.ingest.ingest_payload`.
"""

from __future__ import annotations

from collections.abc import Iterable
from datetime import datetime

import pandas as pd
from sqlalchemy.orm import Session

from server.store import (
    MeasureRecord,
    Rejection,
    append_vintage,
    checksum_of,
    code_maps,
    upsert_measures,
)
from server.store.models import Vintage

__all__ = ["MeasureRecord", "VintageWriter", "define_measures"]


def define_measures(*, session: Session, measures: Iterable[MeasureRecord]) -> int:
    """Add or update entries of the measure catalogue; returns how many are new."""
    return upsert_measures(session=session, records=measures)


class VintageWriter:
    """Appends many already valid batches as vintages in one session, resolving region and
    measure codes once (feeds land through :func:`server.services.ingest.ingest_payload`)."""

    def __init__(self, *, session: Session, feed: str, source: str = "") -> None:
        self._session = session
        self._feed = feed
        self._source = source
        self._codes = code_maps(session=session)

    def append(
        self,
        rows: pd.DataFrame,
        *,
        received_at: datetime,
        checksum: str | None = None,
        rejections: Iterable[Rejection] = (),
    ) -> Vintage:
        """Append ``rows`` (region, measure, ref_date, value) as one vintage received at a time."""
        digest = checksum or checksum_of(rows.to_csv(index=False).encode())
        return append_vintage(
            session=self._session, feed=self._feed, source=self._source, received_at=received_at,
            rows=rows, checksum=digest, rejections=rejections, code_lookup=self._codes,
        )
