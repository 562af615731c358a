"""Public page data in the resident's language (server.readmodels.pages), on the invented demo."""

from __future__ import annotations

import pytest
from sqlalchemy.orm import Session

from server.readmodels.pages import public_district_page, public_map
from server.services.review import publish

pytestmark = pytest.mark.slow

# rules/policies/county.yaml: tier names with their German translations (invented texts)
GERMAN = {0: "Grundstufe", 1: "Erhöht", 2: "Hoch", 3: "Sehr hoch"}
ENGLISH = {0: "Baseline", 1: "Heightened", 2: "High", 3: "Severe"}


def test_tier_names_and_texts_follow_the_language(demo_session: Session) -> None:
    publish(session=demo_session, user="otto.approver")  # first publication: every district
    for lang, names in (("de", GERMAN), ("en", ENGLISH), (None, ENGLISH), ("it", ENGLISH)):
        data = public_map(session=demo_session, lang=lang)
        assert {t.level: t.name for t in data.tiers} == names
        assert all(d.tier_name == names[d.tier] for d in data.districts if d.tier is not None)
    page = public_district_page(session=demo_session, code="D02", threshold=10, lang="de")
    assert page.tier is not None and page.tier_name == GERMAN[page.tier]
    assert page.public_text is not None and page.public_text.startswith("Die Infektionen")
    english = public_district_page(session=demo_session, code="D02", threshold=10)
    assert english.public_text is not None and english.public_text.startswith("Infections")
