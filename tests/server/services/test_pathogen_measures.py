"""Pathogen as a dimension of the data: a feed maps its columns to pathogen-specific measures,
the store keeps them as ordinary measures, and a policy applies any kind to one of them."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats
from sqlalchemy import select
from sqlalchemy.orm import Session

from rules import parse_ruleset
from server.feeds.definition import FeedConfigError, parse_feeds
from server.feeds.sources import Payload
from server.services.district_data import load_district_data, store_measures
from server.services.district_indicators import district_indicators
from server.services.indicator_kinds import indicator_check, measure_needs
from server.services.ingest import ingest_payload
from server.store import MeasureRecord, RegionRecord, read_dense, upsert_measures, upsert_regions
from server.store.models import Measure

FEEDS = """pathogens: [sars-cov-2, influenza, rsv]
feeds:
  - name: lab
    source: {kind: push}
    layout: wide
    measures:
      cases: {source: covid}
      cases.influenza: {source: flu}
      cases.rsv: {source: rsv}
"""
START = date(2026, 3, 1)


def _feeds():  # type: ignore[no-untyped-def]
    return parse_feeds(FEEDS, source="feeds.yaml")


def _setup(session: Session) -> None:
    upsert_regions(session=session, records=[
        RegionRecord(code="Z0", name="Zephyrvale", level="county", parent=None, population=30000),
        RegionRecord(code="ZA", name="Alderholt", level="district", parent="Z0",
                     population=12000),
        RegionRecord(code="ZB", name="Birchmere", level="district", parent="Z0",
                     population=18000),
    ])
    upsert_measures(session=session, records=[
        MeasureRecord(name="cases", unit="n", kind="count", aggregation="sum"),
        MeasureRecord(name="cases.influenza", unit="n", kind="count", aggregation="sum",
                      pathogen="influenza"),
        MeasureRecord(name="cases.rsv", unit="n", kind="count", aggregation="sum",
                      pathogen="rsv"),
    ])


def _ingest(session: Session, rows: dict[str, dict[str, list[int]]], at: datetime) -> None:
    feed = _feeds()["lab"]
    lines = ["region,date,covid,flu,rsv"]
    for region, cols in rows.items():
        for d in range(len(cols["covid"])):
            lines.append(f"{region},{START + timedelta(days=d)},{cols['covid'][d]},"
                         f"{cols['flu'][d]},{cols['rsv'][d]}")
    ingest_payload(session=session, feed=feed, payload=Payload.from_bytes(
        f"lab-{at:%d%H}", ("\n".join(lines) + "\n").encode()), received_at=at,
        today=date(2026, 4, 1))


def test_feed_maps_columns_to_pathogen_measures() -> None:
    lab = _feeds()["lab"]
    assert [(m.measure, m.base, m.pathogen, m.source) for m in lab.measures] == [
        ("cases", "cases", None, "covid"), ("cases.influenza", "cases", "influenza", "flu"),
        ("cases.rsv", "cases", "rsv", "rsv")]
    keyed = parse_feeds(FEEDS.replace("cases.rsv: {source: rsv}",
                                      "tests: {source: rsv_tests, pathogen: rsv}"))
    assert [(m.measure, m.base, m.pathogen) for m in keyed["lab"].measures][2] == (
        "tests.rsv", "tests", "rsv")


@pytest.mark.parametrize(("change", "where", "message"), [
    (("cases.influenza:", "cases.measles:"), "feeds.yaml:8:22: feeds[0].measures.cases.measles",
     "unknown pathogen 'measles'"),
    (("cases.rsv: {source: rsv}", "tests: {source: t, pathogen: flu}"),
     "feeds.yaml:9:36: feeds[0].measures.tests.pathogen", "unknown pathogen 'flu'"),
    (("[sars-cov-2, influenza, rsv]", "[sars-cov-2, RSV]"), "feeds.yaml:1:25: pathogens[1]",
     "'RSV' is not a pathogen name"),
    (("cases.rsv: {source: rsv}", "cases.rsv: {source: r, pathogen: rsv}"),
     "feeds.yaml:9:40: feeds[0].measures.cases.rsv.pathogen",
     "'cases.rsv' names its pathogen already"),
    (("cases.rsv: {source: rsv}", "tests: {source: r, pathogen: sars-cov-2}\n"
      "      tests.sars-cov-2: {source: s}"),
     "feeds.yaml:10:25: feeds[0].measures.tests.sars-cov-2", "measure 'tests.sars-cov-2' is "
                                                            "mapped twice"),
], ids=["qualified-name", "pathogen-key", "list", "named-twice", "mapped-twice"])
def test_feed_refuses_unknown_pathogens_with_file_line_and_field(
    change: tuple[str, str], where: str, message: str,
) -> None:
    text = FEEDS.replace(*change)
    with pytest.raises(FeedConfigError) as info:
        parse_feeds(text, source="feeds.yaml")
    assert str(info.value).startswith(f"{where}: {message}")


def test_pathogen_measures_are_stored_and_read_as_of_like_any_measure(session: Session) -> None:
    _setup(session)
    first = datetime(2026, 3, 16, 6, tzinfo=UTC)
    second = first + timedelta(days=1)
    _ingest(session, {"ZA": {"covid": [5] * 14, "flu": [1] * 14, "rsv": [0] * 14}}, first)
    _ingest(session, {"ZA": {"covid": [5] * 14, "flu": [3] * 14, "rsv": [2] * 14}}, second)
    stored = session.execute(select(Measure.name, Measure.base, Measure.pathogen)
                             .order_by(Measure.name)).all()
    assert [tuple(r) for r in stored] == [("cases", "cases", None),
                                          ("cases.influenza", "cases", "influenza"),
                                          ("cases.rsv", "cases", "rsv")]
    end = START + timedelta(days=13)
    old = read_dense(session=session, measures=["cases.influenza", "cases.rsv"], start=START,
                     end=end, regions=["ZA"], as_of=first)
    new = read_dense(session=session, measures=["cases.influenza", "cases.rsv"], start=START,
                     end=end, regions=["ZA"])
    assert (old["cases.influenza"] == 1).all() and (old["cases.rsv"] == 0).all()
    assert (new["cases.influenza"] == 3).all() and (new["cases.rsv"] == 2).all()


def test_a_policy_applies_incidence_to_a_pathogen_measure(session: Session) -> None:
    _setup(session)
    rng = np.random.default_rng(5)
    rows = {code: {"covid": rng.poisson(9, 21).tolist(), "flu": rng.poisson(4, 21).tolist(),
                   "rsv": rng.poisson(2, 21).tolist()} for code in ("ZA", "ZB")}
    _ingest(session, rows, datetime(2026, 3, 25, 6, tzinfo=UTC))
    text = """name: flu
version: "1"
tiers:
  - {name: T0, staff: s, public: p}
  - {name: T1, staff: s, public: p}
indicators:
  flu_7d:
    kind: incidence
    measure: cases.influenza
    label: influenza incidence
criteria:
  - {id: flu, indicator: flu_7d, enter: [50], exit: [30]}
"""
    rs = parse_ruleset(text, indicators=indicator_check(store_measures(session=session)))
    needs = measure_needs(rs, store_measures(session=session))
    assert needs.district == ("cases.influenza",)
    data = load_district_data(session=session, start=START, end=START + timedelta(days=20),
                              needs=needs, nowcast=False)
    series = district_indicators(data, rs)["flu_7d"]
    for i, code in enumerate(("ZA", "ZB")):
        flu = np.array(rows[code]["flu"], dtype=float)
        x = np.convolve(flu, np.ones(7))[6:21]  # 7-day sums ending on days 6..20
        pop = (12000, 18000)[i]
        # incidence per 100 000 by its definition; Garwood (1936) bounds from scipy's chi-square
        assert_allclose(series.estimate[i, 6:], x / pop * 1e5, rtol=1e-12)
        assert_allclose(series.upper[i, 6:], stats.chi2.ppf(0.975, 2 * x + 2) / 2 / pop * 1e5,
                        rtol=1e-9)


def test_pathogen_count_measures_get_their_own_reporting_triangle(session: Session) -> None:
    _setup(session)
    rows = {"ZA": {"covid": [4] * 10, "flu": [2] * 10, "rsv": [1] * 10}}
    _ingest(session, rows, datetime(2026, 3, 12, 6, tzinfo=UTC))
    text = """name: flu
version: "1"
tiers:
  - {name: T0, staff: s, public: p}
  - {name: T1, staff: s, public: p}
indicators:
  rsv_7d: {label: r, kind: incidence, measure: cases.rsv}
criteria:
  - {id: rsv, indicator: rsv_7d, enter: [50], exit: [30]}
"""
    rs = parse_ruleset(text)
    data = load_district_data(session=session, start=START, end=START + timedelta(days=9),
                              needs=measure_needs(rs, store_measures(session=session)))
    assert set(data.nowcasts) == {"cases.rsv"}  # only what the policy reads, pathogen and all
    assert data.nowcasts["cases.rsv"].model.reported.shape[0] == 2  # both districts
