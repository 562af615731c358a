"""Read models: the data behind each page, read from the store through the services.

Between ``web`` and ``server.services``: a page's router asks one function here for a frozen
object holding everything the template shows (the morning overview, a district's page, its
explanation and briefing, the review queue, the capacity page, the public pages and downloads,
the staff feeds page). Nothing here writes: use cases that change state (ingest, evaluate,
review and publish, backtests, notifications, accounts) stay in :mod:`server.services`, which
never imports this package (``tests/test_layers.py``).
"""
