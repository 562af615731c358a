"""Demo feed configuration: the feed file and push tokens of the invented county.

The seeder calls :func:`configure_demo_feeds` after the catalogue exists; it returns the push
tokens to print (invented, demo only). ``tierwise demo`` runs in demo mode, where the settings'
feed file defaults to ``demo_seed/feeds.yaml`` (:data:`DEMO_FEEDS_FILE`).
"""

from __future__ import annotations

from pathlib import Path

from server.services.database import Database
from server.services.feeds import issue_token

DEMO_FEEDS_FILE = Path(__file__).with_name("feeds.yaml")
PUSH_FEEDS = ("long-csv", "gp-weekly")


def configure_demo_feeds(db: Database) -> dict[str, str]:
    """Issue a push token for each demo push feed; returns feed name -> token (print them)."""
    tokens = {}
    with db.transaction() as session:
        for feed in PUSH_FEEDS:
            tokens[feed] = issue_token(session=session, feed=feed, actor="demo")
    return tokens
