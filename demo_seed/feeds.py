"""Demo feed configuration: which demo feed delivers each measure, and the push tokens.

The invented county's data arrive through the feeds of ``demo_seed/feeds.yaml``
(:data:`DEMO_FEEDS_FILE`): the seeder stores each day's rows as one vintage per feed, at the
feed's usual hour, so the Feeds page and the engine's staleness judge real deliveries. One feed
is late on purpose: the GP sentinel network's push stopped :data:`LATE_DAYS` days before the end
(its data go stale, so the GP alarm is unknown on the newest days), as feeds do. ``tierwise
demo`` runs in demo mode, where the settings' feed file defaults to :data:`DEMO_FEEDS_FILE`.
Everything here is invented.
"""

from __future__ import annotations

from datetime import UTC, date, datetime, time, timedelta
from pathlib import Path

from server.config import Settings
from server.services.database import Database
from server.services.feed_push import issue_token
from server.services.feeds import FeedCatalogue, catalogue_limits, load_catalogue

DEMO_FEEDS_FILE = Path(__file__).with_name("feeds.yaml")
PUSH_FEEDS = ("long-csv", "gp-sentinel")

#: measure -> the demo feed that delivers it
FEED_OF_MEASURE: dict[str, str] = {
    "cases": "long-csv", "hosp_admissions": "long-csv", "icu_occupied": "long-csv",
    "icu_staffed": "long-csv", "ward_occupied": "long-csv", "ward_staffed": "long-csv",
    "tests": "lab-drop", "positives": "lab-drop",
    "ww_concentration": "wastewater-http", "ww_flow": "wastewater-http",
    "ww_marker": "wastewater-http",
    "gp_ari": "gp-sentinel",
    "gp_ari.influenza": "gp-sentinel", "gp_ari.rsv": "gp-sentinel",
    "cases.influenza": "long-csv", "cases.rsv": "long-csv",
}
#: feed -> when its delivery lands on the morning after the data are known (UTC)
ARRIVAL: dict[str, time] = {
    "lab-drop": time(5, 15),        # its cron schedule picks up the night's file
    "long-csv": time(5, 30),
    "wastewater-http": time(6, 0),  # pulled every 6 hours
    "gp-sentinel": time(6, 45),
}


def last_complete_day(now: datetime) -> date:
    """The newest day whose deliveries have all arrived by ``now``: each feed delivers a day's
    data the next morning at its :data:`ARRIVAL` hour (UTC). The demo ends on this day, so no
    delivery is stamped later than the clock (before 06:45 UTC that is the day before
    yesterday)."""
    day = now.astimezone(UTC).date() - timedelta(days=1)
    while datetime.combine(day + timedelta(days=1), max(ARRIVAL.values()), tzinfo=UTC) > now:
        day -= timedelta(days=1)
    return day


#: The invented office's time zone (an IANA name): ``tierwise demo`` serves with it unless
#: TIERWISE_TIME_ZONE is set, so pages that show the office's local time show it; the feeds'
#: arrival hours above stay in UTC.
DEMO_TIME_ZONE = "Europe/Berlin"
LATE_FEED = "gp-sentinel"
LATE_DAYS = 5  # its last delivery came this many days before the newest morning
SOURCES: dict[str, str] = {
    "long-csv": "push to long-csv (demo_seed simulator)",
    "lab-drop": "nightly lab file (demo_seed simulator)",
    "wastewater-http": "http://127.0.0.1:8765/wastewater.csv (demo_seed simulator)",
    "gp-sentinel": "push to gp-sentinel (demo_seed simulator)",
}


def demo_catalogue() -> FeedCatalogue:
    """The demo feeds, checked against :data:`FEED_OF_MEASURE`.

    Raises
    ------
    ValueError
        If a feed of the mapping is not in the file or does not carry its measure.
    """
    catalogue = load_catalogue(Settings(demo_mode=True, feeds_file=DEMO_FEEDS_FILE))
    for measure, feed in FEED_OF_MEASURE.items():
        if feed not in catalogue or measure not in catalogue[feed].measure_names:
            raise ValueError(f"{DEMO_FEEDS_FILE.name}: feed {feed!r} does not carry {measure!r}")
    return catalogue


def demo_limits() -> dict[str, timedelta]:
    """Feed name -> staleness limit of the demo feeds (for the evaluation)."""
    return catalogue_limits(demo_catalogue())


def configure_demo_feeds(db: Database) -> dict[str, str]:
    """Issue a push token for each demo push feed; returns feed name -> token (print them)."""
    tokens = {}
    with db.transaction() as session:
        for feed in PUSH_FEEDS:
            tokens[feed] = issue_token(session=session, feed=feed, actor="demo")
    return tokens
