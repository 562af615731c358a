"""Run the feed scheduler inside another process (``tierwise serve`` and its web workers).

``with embedded_scheduler(settings, db):`` joins the leader election for as long as the block
runs; with several workers only the leader pulls. Nothing starts when ``settings.scheduler`` is
off or no configured feed has a schedule.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager

from server.config import Settings
from server.scheduler.feed_scheduler import FeedScheduler
from server.services.database import Database
from server.services.feeds import load_catalogue
from server.services.notify import notify_config_from


@contextmanager
def embedded_scheduler(settings: Settings, db: Database) -> Iterator[FeedScheduler | None]:
    catalogue = load_catalogue(settings)
    if not settings.scheduler or not any(f.schedule is not None for f in catalogue):
        yield None
        return
    scheduler = FeedScheduler(db, catalogue=catalogue, time_zone=settings.time_zone,
                              environ=dict(os.environ),
                              notify=notify_config_from(settings.notify_file))
    scheduler.start()
    try:
        yield scheduler
    finally:
        scheduler.stop()
