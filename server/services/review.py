"""Review and publish tier changes: the names of the four modules below, in one place.

The engine recommends; people decide. The work is split by what each part does:

* :mod:`server.services.review_pending`: the current run and the changes awaiting a decision
  (read model of the review queue);
* :mod:`server.services.review_decisions`: deciding one change (use case);
* :mod:`server.services.review_publication`: publishing the decisions taken (use case);
* :mod:`server.services.review_official`: the official tiers and the decision history (read
  model).

Application code imports from those modules. This one re-exports their public names because
many tests (about fifteen files) and two modules outside the split that made it
(``server/readmodels/review_state.py``, ``demo_seed/story.py``) import them from here.
"""

from __future__ import annotations

from server.services.review_decisions import (
    Decision,
    DecisionConflictError,
    RecommendationChangedError,
    ReviewError,
    decide,
    effective_from,
)
from server.services.review_official import (
    DecisionRecord,
    OfficialTier,
    decision_history,
    official_tiers,
)
from server.services.review_pending import PendingChange, current_run, pending_changes
from server.services.review_publication import (
    PublishResult,
    has_something_to_publish,
    publish,
)

__all__ = [
    "Decision",
    "DecisionConflictError",
    "DecisionRecord",
    "OfficialTier",
    "PendingChange",
    "PublishResult",
    "RecommendationChangedError",
    "ReviewError",
    "current_run",
    "decide",
    "decision_history",
    "effective_from",
    "has_something_to_publish",
    "official_tiers",
    "pending_changes",
    "publish",
]
