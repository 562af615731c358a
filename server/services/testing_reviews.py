"""Use case: an analyst confirms or dismisses a district's detected testing change.

A verdict is stored append-only in ``testing_change_review`` (revision
``0010_testing_change_review``) with an audit entry (action ``review_testing_change``); who may
give one is ``PERMISSIONS["record_event"]`` (:mod:`server.services.users`). The newest verdict on
a change counts. A dismissal is *as known*: it counts from the office's day it was given
(``office_day``, in the office's time zone) on, so an evaluation with data up to that day or
later no longer holds escalations for the change nor names it in explanations, while the days
before keep it as they knew it (re-evaluating them gives the assessment stored then). An
evaluation reads the verdicts given by its data cutoff (:func:`dismissals`), the same way it
reads vintages. A confirmation changes no tier; it is shown beside the change.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from zoneinfo import ZoneInfo

from sqlalchemy import select
from sqlalchemy.orm import Session

from server.services import audit
from server.services.errors import FormFieldError, checked_note
from server.services.users import permitted_account
from server.store.models import Region, TestingChangeReview, User

__all__ = ["VERDICTS", "TestingReviewError", "Verdict", "dismissals", "review_testing_change",
           "verdicts_of"]

VERDICTS = ("confirmed", "dismissed")
NOTE_MAX = 500
#: A verdict on a change dated within this many days of another is on the same change.
SAME_CHANGE_DAYS = 3


class TestingReviewError(FormFieldError):
    """A verdict the service refuses; ``field`` names the form field."""


@dataclass(frozen=True, kw_only=True)
class Verdict:
    """The newest verdict on one change of a district."""

    change_day: dt.date
    verdict: str
    note: str
    by: str
    office_day: dt.date


def review_testing_change(
    *, session: Session, user: str, region: str, change_day: dt.date, verdict: str, note: str,
    time_zone: str = "UTC", now: dt.datetime | None = None,
) -> TestingChangeReview:
    """Store one verdict and its audit entry (the caller commits)."""
    account = permitted_account(session=session, name=user, action="record_event")
    if account is None:
        raise TestingReviewError("user", f"{user!r} may not review testing changes")
    if verdict not in VERDICTS:
        raise TestingReviewError("verdict", f"{verdict!r} is not one of {', '.join(VERDICTS)}")
    text = checked_note(note, limit=NOTE_MAX, missing="a verdict needs a note",
                        error=TestingReviewError)
    target = session.scalar(select(Region).where(Region.code == region.strip()))
    if target is None or target.level != "district":
        raise TestingReviewError("region", f"no district with code {region!r}")
    at = now or dt.datetime.now(dt.UTC)
    office_day = at.astimezone(ZoneInfo(time_zone)).date()
    row = TestingChangeReview(region_id=target.id, change_day=change_day, verdict=verdict,
                              note=text, office_day=office_day, reviewed_by=account.id,
                              reviewed_at=at)
    session.add(row)
    session.flush()
    audit.record(session=session, actor=user, action="review_testing_change",
                 subject=target.code,
                 details={"review_id": row.id, "change_day": change_day.isoformat(),
                          "verdict": verdict, "note": text, "office_day": office_day.isoformat()},
                 at=at)
    return row


def _newest(session: Session, as_of: dt.datetime | None, code: str | None
            ) -> dict[tuple[str, dt.date], tuple[TestingChangeReview, str]]:
    """Newest verdict per (district, change), as given by ``as_of``; changes within
    :data:`SAME_CHANGE_DAYS` of an earlier verdict's change are that change."""
    query = (select(Region.code, TestingChangeReview, User.name)
             .join(Region, Region.id == TestingChangeReview.region_id)
             .outerjoin(User, User.id == TestingChangeReview.reviewed_by)
             .order_by(TestingChangeReview.reviewed_at, TestingChangeReview.id))
    if as_of is not None:
        query = query.where(TestingChangeReview.reviewed_at <= as_of)
    if code is not None:
        query = query.where(Region.code == code)
    out: dict[tuple[str, dt.date], tuple[TestingChangeReview, str]] = {}
    for region, row, name in session.execute(query).all():
        key = next((k for k in out if k[0] == region
                    and abs((k[1] - row.change_day).days) <= SAME_CHANGE_DAYS),
                   (region, row.change_day))
        out[key] = (row, name or "")
    return out


def dismissals(*, session: Session, as_of: dt.datetime | None = None
               ) -> tuple[tuple[str, dt.date, dt.date], ...]:
    """(district code, change day, office day) of each change whose newest verdict given by
    ``as_of`` (None: all) is a dismissal; read into ``DistrictData.testing_dismissals``."""
    return tuple((code, row.change_day, row.office_day)
                 for (code, _day), (row, _by) in _newest(session, as_of, None).items()
                 if row.verdict == "dismissed")


def verdicts_of(*, session: Session, code: str) -> tuple[Verdict, ...]:
    """The newest verdict on each reviewed change of one district (oldest change first)."""
    rows = _newest(session, None, code)
    return tuple(sorted((Verdict(change_day=row.change_day, verdict=row.verdict, note=row.note,
                                 by=by, office_day=row.office_day)
                         for row, by in rows.values()), key=lambda v: v.change_day))
