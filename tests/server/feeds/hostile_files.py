"""Generated hostile feed files for the hostile-input suites (CLI ingest and the push endpoint).

Every file is built from one seeded :class:`random.Random`, so a failing file can be rebuilt from
the seed and its number. The kinds: random bytes, wrong encodings, formula injection, NUL bytes,
huge fields and lines, many columns, stray and unclosed quotes, odd line endings, deep and wide
JSON, huge integers, denormal and non-finite numbers, dates far out, duplicate columns and keys,
truncated JSON; and good files carrying one or two hostile values, so that some rows land and the
evaluation after them runs. Regions, measures and values are invented.
"""

from __future__ import annotations

import hashlib
import json
import random
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import date, timedelta
from pathlib import Path

from sqlalchemy import func, select

from server.services.database import Database
from server.services.evaluation import evaluate_districts, newest_cutoff
from server.services.observations import MeasureRecord, define_measures
from server.services.regions import RegionRecord, store_regions
from server.services.ruleset_activation import store_ruleset
from server.services.rulesets import active_ruleset
from server.store.models import Observation, Vintage

REGIONS = ("HA", "HB", "HC", "HD", "HE")
MEASURES = ("cases", "tests", "positives", "ww_concentration")
FIRST_DAY = date(2026, 1, 1)
DAYS = 21  # three weeks: every evaluation after a landed file explains each day
HEADER = "region,date,measure,value"

FORMULAS = ("=cmd|' /C calc'!A0", "+1+1", "-2+3", "@SUM(A1:A9)", "=HYPERLINK(\"x\")",
            "\t=1+1", "=1e3")
NUMBERS = ("4.9e-324", "-4.9e-324", "1e-320", "2.2250738585072014e-308", "nan", "NaN", "inf",
           "-inf", "Infinity", "-Infinity", "1e309", "-1e309", "1.7976931348623157e308",
           "5.0000000001", "4.9999999999", "0x10", "1_000", "١٢", "½", "1e", "--1", "+5",
           "9007199254740993", "18446744073709551616", "-0", "0.0", " 7 ", "7.", ".5")
DATES = ("0001-01-01", "1969-12-31", "1989-12-31", "9999-12-31", "2026-13-01", "2026-02-30",
         "+002026-01-01", "2026-W99", "2026-1-1", "20260101", "2026-01-01T00:00:00", "",
         "2026-01-01\u200b", "१९९०-०१-०१", "2099-01-01")
ENCODINGS = ("cp1252", "latin-1", "utf-16", "utf-16-le", "utf-32", "shift_jis", "cp1251")


@dataclass(frozen=True)
class HostileFile:
    """One generated file: its number, kind, format (csv or json) and bytes."""

    number: int
    kind: str
    format: str
    content: bytes

    @property
    def name(self) -> str:
        return f"hostile-{self.number:04d}-{self.kind}.{self.format}"


def _row(rng: random.Random) -> list[str]:
    measure = rng.choice(MEASURES)
    value = str(rng.randint(0, 40)) if measure != "ww_concentration" else f"{rng.uniform(1, 9):.3f}"
    if measure == "tests":
        value = str(rng.randint(40, 90))
    day = FIRST_DAY + timedelta(days=rng.randrange(DAYS))
    return [rng.choice(REGIONS), day.isoformat(), measure, value]


def _csv(rows: list[list[str]], header: str = HEADER) -> bytes:
    return ("\n".join([header, *(",".join(r) for r in rows)]) + "\n").encode()


def _record(row: list[str]) -> dict[str, object]:
    return dict(zip(("region", "date", "measure", "value"), row, strict=True))


def _good(rng: random.Random, n: int | None = None) -> list[list[str]]:
    return [_row(rng) for _ in range(n if n is not None else rng.randint(1, 12))]


def _json(records: list[object]) -> bytes:
    return json.dumps(records).encode()


def random_bytes(rng: random.Random) -> tuple[str, bytes]:
    body = rng.randbytes(rng.randint(0, 3000))
    return "csv", (HEADER.encode() + b"\n" + body) if rng.random() < 0.5 else body


def random_json_bytes(rng: random.Random) -> tuple[str, bytes]:
    tokens = ["[", "]", "{", "}", ",", ":", '"region"', '"value"', "1e999", "null", "true",
              '"\\ud800"', '"\\u0000"', "-", "0", "\x00", "\xff", '"records"', " "]
    return "json", "".join(rng.choice(tokens) for _ in range(rng.randint(1, 400))).encode(
        "utf-8", "surrogatepass")


def wrong_encoding(rng: random.Random) -> tuple[str, bytes]:
    rows = _good(rng)
    rows.append(["Hé", rows[0][1], "cases", "1"])
    text = "\n".join([HEADER, *(",".join(r) for r in rows)]) + "\n"
    try:
        return "csv", text.encode(rng.choice(ENCODINGS))
    except UnicodeEncodeError:
        return "csv", text.encode("cp1252", "replace")


def formula_injection(rng: random.Random) -> tuple[str, bytes]:
    rows = _good(rng)
    for _ in range(rng.randint(1, 3)):
        rows.append([rng.choice(REGIONS), rows[0][1], "cases", rng.choice(FORMULAS)])
        rows.append([rng.choice(FORMULAS), rows[0][1], "cases", "1"])
        rows.append([rng.choice(REGIONS), rows[0][1], rng.choice(FORMULAS), "1"])
    rng.shuffle(rows)
    if rng.random() < 0.3:
        return "json", _json([_record(r) for r in rows])
    return "csv", _csv(rows)


def nul_bytes(rng: random.Random) -> tuple[str, bytes]:
    content = bytearray(_csv(_good(rng)))
    for _ in range(rng.randint(1, 3)):
        content.insert(rng.randrange(len(content) + 1), 0)
    return "csv", bytes(content)


def huge_field(rng: random.Random) -> tuple[str, bytes]:
    size = rng.choice((70_000, 300_000, 1_200_000))
    rows = _good(rng, 3)
    rows[rng.randrange(3)][rng.randrange(4)] = rng.choice("A9,\"") * size
    return "csv", _csv(rows)


def huge_line(rng: random.Random) -> tuple[str, bytes]:
    line = (rng.choice(("x", "1,", "\"", ";")) * rng.randint(100_000, 1_500_000)).encode()
    return "csv", _csv(_good(rng, 2)) + line


def many_columns(rng: random.Random) -> tuple[str, bytes]:
    extra = [f"c{i}" for i in range(rng.choice((300, 5000)))]
    header = ",".join([HEADER, *extra])
    rows = [r + ["1"] * len(extra) for r in _good(rng, 3)]
    return "csv", _csv(rows, header)


def quotes_and_endings(rng: random.Random) -> tuple[str, bytes]:
    rows = _good(rng)
    text = _csv(rows).decode()
    choice = rng.randrange(5)
    if choice == 0:
        text = text.replace("\n", "\r")
    elif choice == 1:
        text = text.replace(",", '"', 1)
    elif choice == 2:
        cut = rng.randrange(len(text))
        text = text[:cut] + '"' + text[cut:]
    elif choice == 3:
        text = text.replace("\n", "\r\n") + '"unclosed,2026-01-01,cases,1\n' * 3
    else:
        text = '"' + text.replace("\n", '"\n"', 2)
    return "csv", text.encode()


def numbers(rng: random.Random) -> tuple[str, bytes]:
    rows = _good(rng)
    for _ in range(rng.randint(1, 4)):
        rows.append([rng.choice(REGIONS), rows[0][1], rng.choice(MEASURES), rng.choice(NUMBERS)])
    if rng.random() < 0.4:
        records = [_record(r) for r in rows]
        for record in records[-2:]:
            record["value"] = rng.choice((4.9e-324, 1e308, -0.0, 5.0000000001, 2**60, 1e-320))
        text = json.dumps(records).replace("1e+308", "1e999")
        return "json", text.encode()
    return "csv", _csv([[f'"{v}"' if "," in v else v for v in r] for r in rows])


def huge_integers(rng: random.Random) -> tuple[str, bytes]:
    digits = "".join(rng.choice("123456789") for _ in range(rng.choice((4301, 5000, 60_000))))
    rows = _good(rng)
    if rng.random() < 0.5:
        body = _json([_record(r) for r in rows])[:-1] + (
            ', {"region": "HA", "date": "2026-01-02", "measure": "cases", "value": '
            + digits + "}]").encode()
        return "json", body
    rows.append([rng.choice(REGIONS), rows[0][1], "cases", digits])
    return "csv", _csv(rows)


def dates_far_out(rng: random.Random) -> tuple[str, bytes]:
    rows = _good(rng)
    for _ in range(rng.randint(1, 4)):
        rows.append([rng.choice(REGIONS), rng.choice(DATES), "cases", "1"])
    if rng.random() < 0.3:
        return "json", _json([_record(r) for r in rows])
    return "csv", _csv(rows)


def duplicates(rng: random.Random) -> tuple[str, bytes]:
    rows = _good(rng)
    if rng.random() < 0.5:
        return "csv", _csv(rows, HEADER + ",value")
    body = ",".join(
        f'{{"region": "{r[0]}", "date": "{r[1]}", "measure": "{r[2]}", "value": {r[3]}, '
        f'"value": {rng.randint(0, 5)}}}' for r in rows)
    return "json", f"[{body}]".encode()


def deep_json(rng: random.Random) -> tuple[str, bytes]:
    depth = rng.choice((50, 900, 1100, 5000, 100_000))
    nest = "[" * depth + "]" * depth
    if rng.random() < 0.5:
        nest = '{"a":' * depth + "1" + "}" * depth
    records = [_record(r) for r in _good(rng, 2)]
    head = json.dumps(records)[:-1]
    where = rng.randrange(3)
    if where == 0:
        return "json", f'{head}, {{"region": "HA", "value": {nest}}}]'.encode()
    if where == 1:
        return "json", f"{head}, {nest}]".encode()
    return "json", f'{{"meta": {nest}, "records": {json.dumps(records)}}}'.encode()


def wide_json(rng: random.Random) -> tuple[str, bytes]:
    if rng.random() < 0.5:
        record = {f"k{i}": i for i in range(rng.choice((1000, 20_000)))}
        record.update(_record(_row(rng)))
        return "json", _json([record, *(_record(r) for r in _good(rng, 2))])
    return "json", _json([_record(_row(rng)) for _ in range(rng.choice((500, 5000)))])


def truncated_json(rng: random.Random) -> tuple[str, bytes]:
    body = _json([_record(r) for r in _good(rng)])
    return "json", body[: rng.randrange(len(body))]


def good_with_one_bad_value(rng: random.Random) -> tuple[str, bytes]:
    rows = _good(rng, rng.randint(3, 20))
    bad = rng.choice((*NUMBERS, *FORMULAS, *DATES))
    rows[rng.randrange(len(rows))][rng.choice((1, 3))] = bad
    if rng.random() < 0.3:
        return "json", _json([_record(r) for r in rows])
    return "csv", _csv([[f'"{v}"' if "," in v or '"' in v else v for v in r] for r in rows])


KINDS: dict[str, Callable[[random.Random], tuple[str, bytes]]] = {
    f.__name__: f for f in (
        random_bytes, random_json_bytes, wrong_encoding, formula_injection, nul_bytes,
        huge_field, huge_line, many_columns, quotes_and_endings, numbers, huge_integers,
        dates_far_out, duplicates, deep_json, wide_json, truncated_json,
        good_with_one_bad_value,
    )
}
# Heavy kinds (megabytes each) are drawn less often, so the suite stays within minutes.
WEIGHTS = {"huge_field": 0.3, "huge_line": 0.3, "many_columns": 0.5, "wide_json": 0.5,
           "deep_json": 0.8, "good_with_one_bad_value": 1.5}


def hostile_files(seed: int, count: int) -> list[HostileFile]:
    """``count`` files from ``seed``: every kind at least once, then drawn by :data:`WEIGHTS`."""
    rng = random.Random(seed)
    names = list(KINDS)
    weights = [WEIGHTS.get(n, 1.0) for n in names]
    chosen = names + rng.choices(names, weights=weights, k=max(count - len(names), 0))
    out = []
    for number, kind in enumerate(chosen[:count]):
        fmt, content = KINDS[kind](rng)
        out.append(HostileFile(number=number, kind=kind, format=fmt, content=content))
    return out


FEEDS_YAML = """\
feeds:
  - name: long-csv
    source: {kind: push}
    measures: [cases, tests, positives, ww_concentration]
  - name: long-json
    source: {kind: push}
    format: json
    measures: [cases, tests, positives, ww_concentration]
"""
RULES = """\
name: hostile
version: "1"
tiers:
  - {name: Calm, staff: s, public: p}
  - {name: Watch, staff: s, public: p}
indicators:
  incidence_7d: {label: 7-day incidence, unit: per 100 000, decimals: 0}
  positivity_7d: {label: positivity, unit: '%', decimals: 1}
criteria:
  - {id: incidence, indicator: incidence_7d, enter: [50], exit: [35]}
  - {id: positivity, indicator: positivity_7d, enter: [20], exit: [15]}
timing: {confirm_days: 1, release_days: 1, min_days_in_tier: 0, effective_delay_days: 0}
"""


def feed_of(file: HostileFile) -> str:
    return "long-json" if file.format == "json" else "long-csv"


def prepare(db: Database, folder: Path) -> None:
    """Regions HA..HE, the measures, and the active ruleset in a migrated database."""
    db.upgrade()
    rules = folder / "hostile-rules.yaml"
    rules.write_text(RULES)
    with db.transaction() as session:
        store_regions(session=session, actor="t", source="t", records=[
            RegionRecord(code=c, name=f"Heathfold {c}", level="district", parent=None,
                         population=20_000) for c in REGIONS])
        define_measures(session=session, measures=[
            MeasureRecord(name=m, unit="n", kind="count", aggregation="sum")
            for m in ("cases", "tests", "positives", "hosp_admissions", "gp_ari",
                      "icu_occupied", "icu_staffed")] + [
            MeasureRecord(name=m, unit="copies/l", kind="concentration", aggregation="mean")
            for m in ("ww_concentration", "ww_flow")])
        store_ruleset(session=session, path=rules, author="t", activate=True)


def digest(db: Database, *, up_to_vintage: int | None = None) -> tuple[str, int, int]:
    """SHA-256 of the observation rows (of vintages up to ``up_to_vintage``), their count and
    the newest vintage id."""
    whole, earlier = digests(db, up_to_vintage=up_to_vintage)
    return earlier if up_to_vintage is not None else whole


def digests(db: Database, *, up_to_vintage: int | None) -> tuple[tuple[str, int, int],
                                                                  tuple[str, int, int]]:
    """:func:`digest` of every observation row and of the rows of vintages up to
    ``up_to_vintage`` (every row when None), from one read of the table: the suites compare
    both after every file, and a read of the whole table per comparison was a quarter of
    their time."""
    with db.transaction() as session:
        query = select(Observation.measure_id, Observation.region_id, Observation.ref_date,
                       Observation.vintage_id, Observation.value).order_by(
            Observation.measure_id, Observation.region_id, Observation.ref_date,
            Observation.vintage_id)
        rows = [tuple(r) for r in session.execute(query).all()]
        newest = int(session.scalar(select(func.max(Vintage.id))) or 0)
    earlier = rows if up_to_vintage is None else [r for r in rows if r[3] <= up_to_vintage]

    def of(part: list[tuple[object, ...]]) -> tuple[str, int, int]:
        return hashlib.sha256(repr(part).encode()).hexdigest(), len(part), newest

    whole = of(rows)
    return whole, (whole if earlier is rows else of(earlier))


def evaluate_now(db: Database) -> bool:
    """Run the evaluation of the active ruleset on the newest data; True when it went through
    (a run already stored for that cutoff is reused: nothing new landed)."""
    with db.transaction() as session:
        row, cutoff = active_ruleset(session=session), newest_cutoff(session=session)
        if row is None or cutoff is None:
            return True  # nothing stored yet: nothing to evaluate
        evaluate_districts(session=session, ruleset_row=row, cutoff=cutoff)
    return True


@dataclass
class Tally:
    """What a hostile run saw (reported by the suites)."""

    tried: int = 0
    failures: list[str] = field(default_factory=list)
    rows_changed: int = 0
    evaluations: int = 0
    landed: int = 0
    rejected_whole: int = 0

    def summary(self, path: str) -> str:
        return (f"{path}: {self.tried} files tried, {len(self.failures)} failures, "
                f"{self.rows_changed} with stored rows changed, {self.landed} landed rows, "
                f"{self.rejected_whole} rejected whole or without a good row, "
                f"{self.evaluations} evaluations succeeded")
