"""Feed definitions: the YAML schema of ``feeds.yaml``, read into frozen, self-checking objects.

A feed says where its data come from (a file-drop folder, an HTTP(S) URL, or pushes to the API),
how they are laid out (CSV long or wide, JSON records), how its columns, measures and region codes
map onto the catalogue, when it is pulled, how often it should report and when it counts as stale.
The full annotated schema is in ``docs/feeds.md``. Every problem is reported with file, line,
column and key path (:class:`~server.feeds.errors.FeedConfigError`).
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import timedelta
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import yaml

from server.feeds.errors import FeedConfigError

NAME = re.compile(r"^[a-z0-9][a-z0-9_-]{0,99}$")
DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([smhdw])\s*$")
UNITS = {"s": 1, "m": 60, "h": 3600, "d": 86400, "w": 604800}
#: Pathogens a feeds file allows when it lists none (``pathogens:``); the demo's.
DEFAULT_PATHOGENS = ("sars-cov-2", "influenza", "rsv")
PATHOGEN = re.compile(r"[a-z0-9][a-z0-9_-]{0,39}")
LAYOUTS = ("long", "wide")
FORMATS = ("csv", "json")
CADENCES = ("daily", "weekly", "irregular")
DATE_STYLES = ("iso", "iso-week")
DECIMAL_MARKS = (".", ",")
THOUSANDS = (".", ",", " ", "'")


@dataclass(frozen=True, kw_only=True)
class FileSource:
    """A folder watched for files matching ``glob``; processed files move to ``done``."""

    folder: Path
    glob: str = "*.csv"
    done: Path | None = None

    @property
    def done_folder(self) -> Path:
        return self.done if self.done is not None else self.folder / "processed"


@dataclass(frozen=True, kw_only=True)
class HttpSource:
    """An HTTP(S) URL pulled with a conditional GET (ETag / Last-Modified)."""

    url: str
    headers: Mapping[str, str] = field(default_factory=dict)
    token_env: str | None = None
    timeout_s: float = 30.0
    max_bytes: int = 200_000_000
    retries: int = 4

    def __post_init__(self) -> None:
        if not self.url.startswith(("http://", "https://")):
            raise ValueError(f"url must start with http:// or https://, got {self.url!r}")
        if self.timeout_s <= 0:
            raise ValueError(f"timeout_s must be positive, got {self.timeout_s!r}")
        if self.max_bytes <= 0:
            raise ValueError(f"max_bytes must be positive, got {self.max_bytes!r}")


@dataclass(frozen=True, kw_only=True)
class PushSource:
    """Data pushed to ``POST /api/feeds/{name}/push`` with the feed's bearer token."""


Source = FileSource | HttpSource | PushSource


@dataclass(frozen=True, kw_only=True)
class MeasureMap:
    """One measure a feed carries: its name in the file, unit scale and plausible range."""

    measure: str
    source: str
    scale: float = 1.0
    minimum: float | None = None
    maximum: float | None = None
    #: Rank of this feed for this measure: a row is not taken in when the value it would revise
    #: came from a feed ranked higher for the measure (reason ``outranked``); 0 by default.
    precedence: int = 0
    #: The pathogen (or surveillance stream) of a pathogen-specific measure: the catalogue
    #: measure is then ``base.pathogen`` (``cases.influenza``); None: unqualified.
    pathogen: str | None = None

    @property
    def base(self) -> str:
        """The measure this one qualifies (the measure itself when unqualified)."""
        return self.measure[: -len(self.pathogen) - 1] if self.pathogen else self.measure

    def __post_init__(self) -> None:
        if self.scale == 0 or self.scale != self.scale:
            raise ValueError(f"scale must be a non-zero number, got {self.scale!r}")
        if isinstance(self.precedence, bool) or not isinstance(self.precedence, int):
            raise ValueError(f"precedence must be a whole number, got {self.precedence!r}")
        if self.minimum is not None and self.maximum is not None and self.minimum > self.maximum:
            raise ValueError(f"min {self.minimum} is above max {self.maximum}")


@dataclass(frozen=True, kw_only=True)
class Columns:
    """Names of the key columns in the file (long layout adds measure and value)."""

    region: str = "region"
    date: str = "date"
    measure: str = "measure"
    value: str = "value"


@dataclass(frozen=True, kw_only=True)
class Schedule:
    """When a pulled feed runs: a 5-field cron expression or a fixed interval, in a time zone."""

    cron: str | None = None
    interval: timedelta | None = None
    timezone: str = "UTC"

    def __post_init__(self) -> None:
        if (self.cron is None) == (self.interval is None):
            raise ValueError("give exactly one of cron or interval")
        if self.cron is not None and len(self.cron.split()) != 5:
            raise ValueError(f"cron needs 5 fields (minute hour day month weekday): {self.cron!r}")
        if self.interval is not None and self.interval <= timedelta(0):
            raise ValueError(f"interval must be positive, got {self.interval}")
        try:
            ZoneInfo(self.timezone)
        except (ZoneInfoNotFoundError, ValueError):
            raise ValueError(f"unknown time zone {self.timezone!r}") from None


@dataclass(frozen=True, kw_only=True)
class FeedDefinition:
    """Everything tierwise needs to know to take in one feed."""

    name: str
    source: Source
    measures: tuple[MeasureMap, ...]
    description: str = ""
    format: str = "csv"
    layout: str = "long"
    delimiter: str | None = None
    encoding: str = "utf-8"
    decimal: str = "."
    thousands: str | None = None
    dates: str = "iso"
    columns: Columns = field(default_factory=Columns)
    regions: Mapping[str, str] = field(default_factory=dict)
    schedule: Schedule | None = None
    cadence: str = "daily"
    stale_after: timedelta = timedelta(days=3)
    #: Health turns to *attention* when the last delivery rejected a larger share of its rows
    #: (0.1 = 10 %: common practice, no source).
    max_rejected_share: float = 0.1

    def __post_init__(self) -> None:
        if not NAME.match(self.name):
            raise ValueError(f"name {self.name!r} must be lower-case letters, digits, - or _")
        if self.format not in FORMATS:
            raise ValueError(f"format {self.format!r} is not one of {FORMATS}")
        if self.layout not in LAYOUTS:
            raise ValueError(f"layout {self.layout!r} is not one of {LAYOUTS}")
        if self.delimiter not in (None, ",", ";", "\t"):
            raise ValueError(f"delimiter {self.delimiter!r} must be ',', ';' or a tab")
        if self.decimal not in DECIMAL_MARKS:
            raise ValueError(f"decimal {self.decimal!r} must be '.' or ','")
        if self.thousands is not None and self.thousands not in THOUSANDS:
            raise ValueError(
                f"thousands {self.thousands!r} must be one of {list(THOUSANDS)} or left out"
            )
        if self.thousands == self.decimal:
            raise ValueError(f"thousands and decimal cannot both be {self.decimal!r}")
        if self.format == "json" and (self.decimal != "." or self.thousands is not None):
            raise ValueError("decimal and thousands apply to CSV feeds (JSON numbers use '.')")
        if self.dates not in DATE_STYLES:
            raise ValueError(f"dates {self.dates!r} is not one of {DATE_STYLES}")
        if self.cadence not in CADENCES:
            raise ValueError(f"cadence {self.cadence!r} is not one of {CADENCES}")
        if not self.measures:
            raise ValueError("a feed carries at least one measure")
        if self.stale_after <= timedelta(0):
            raise ValueError(f"stale_after must be positive, got {self.stale_after}")
        if isinstance(self.source, PushSource) and self.schedule is not None:
            raise ValueError("a push feed has no schedule")
        share = self.max_rejected_share
        if isinstance(share, bool) or not isinstance(share, int | float) or not 0 <= share <= 1:
            raise ValueError(f"max_rejected_share must be a share from 0 to 1, got {share!r}")

    @property
    def measure_names(self) -> tuple[str, ...]:
        """The catalogue measures this feed carries."""
        return tuple(m.measure for m in self.measures)

    @property
    def required_columns(self) -> list[str]:
        """Columns the header must have."""
        c = self.columns
        if self.layout == "long":
            return [c.region, c.date, c.measure, c.value]
        return [c.region, c.date, *(m.source for m in self.measures)]

    @property
    def kind(self) -> str:
        return {FileSource: "file", HttpSource: "http", PushSource: "push"}[type(self.source)]


@dataclass(frozen=True, kw_only=True)
class FeedCatalogue:
    """All feeds of one configuration file, by name."""

    path: str
    feeds: Mapping[str, FeedDefinition]
    #: The pathogens (or surveillance streams) measures may be qualified by (``pathogens:``).
    pathogens: tuple[str, ...] = ()

    def __getitem__(self, name: str) -> FeedDefinition:
        try:
            return self.feeds[name]
        except KeyError:
            raise KeyError(f"unknown feed {name!r}; configured: {sorted(self.feeds)}") from None

    def __contains__(self, name: object) -> bool:
        return name in self.feeds

    def __iter__(self):  # type: ignore[no-untyped-def]
        return iter(self.feeds.values())

    def __len__(self) -> int:
        return len(self.feeds)

    def precedence(self) -> dict[str, dict[str, int]]:
        """Measure -> feed -> rank, for every measure some feed ranks above 0 (a feed not
        listed, or not configured any more, ranks 0)."""
        out: dict[str, dict[str, int]] = {}
        for feed in self.feeds.values():
            for m in feed.measures:
                out.setdefault(m.measure, {})[feed.name] = m.precedence
        return {k: v for k, v in out.items() if any(v.values())}


def parse_duration(text: Any) -> timedelta:
    """``"36h"``, ``"3d"``, ``"2w"``, ``"90m"``, ``"30s"`` (one number and one unit)."""
    match = DURATION.match(str(text))
    if match is None:
        raise ValueError(f"{text!r} is not a duration such as 30m, 6h, 3d or 2w")
    return timedelta(seconds=float(match.group(1)) * UNITS[match.group(2)])


class _Reader:
    """Converts composed YAML nodes to plain values, remembering each key path's mark."""

    def __init__(self, source: str) -> None:
        self.source = source
        self.marks: dict[str, tuple[int, int]] = {}

    def plain(self, node: yaml.Node, path: str) -> Any:
        self.marks[path] = (node.start_mark.line + 1, node.start_mark.column + 1)
        if isinstance(node, yaml.MappingNode):
            out: dict[str, Any] = {}
            for key_node, value_node in node.value:
                key = str(key_node.value)
                if key in out:
                    raise self.error(f"{path}.{key}".lstrip("."), "key given twice")
                out[key] = self.plain(value_node, f"{path}.{key}".lstrip("."))
            return out
        if isinstance(node, yaml.SequenceNode):
            return [self.plain(n, f"{path}[{i}]") for i, n in enumerate(node.value)]
        return yaml.SafeLoader(  # scalars: let the safe loader resolve ints, floats, bools
            ""
        ).construct_object(node, deep=True)

    def error(self, path: str, problem: str) -> FeedConfigError:
        line, column = self.marks.get(path, (0, 0))
        while not line and "." in path:
            path_up = path.rsplit(".", 1)[0]
            line, column = self.marks.get(path_up, (0, 0))
            if line:
                break
            path = path_up
        return FeedConfigError(self.source, line, column, path, problem)


def parse_feeds(text: str, *, source: str = "<feeds>", base: Path | None = None) -> FeedCatalogue:
    """Parse feed definitions from YAML ``text``; relative folders resolve against ``base``."""
    reader = _Reader(source)
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark
        line, col = (mark.line + 1, mark.column + 1) if mark else (0, 0)
        raise FeedConfigError(source, line, col, "", f"invalid YAML: {exc.problem}") from None
    if root is None:
        raise FeedConfigError(source, 1, 1, "", "the file is empty")
    document = reader.plain(root, "")
    if not isinstance(document, dict) or not isinstance(document.get("feeds"), list):
        raise reader.error("feeds", "expected a top-level key `feeds:` holding a list")
    pathogens = _pathogens(reader, document.get("pathogens", list(DEFAULT_PATHOGENS)))
    feeds: dict[str, FeedDefinition] = {}
    for i, raw in enumerate(document["feeds"]):
        feed = _feed(reader, raw, f"feeds[{i}]", base or Path("."), pathogens)
        if feed.name in feeds:
            raise reader.error(f"feeds[{i}].name", f"feed {feed.name!r} is defined twice")
        feeds[feed.name] = feed
    return FeedCatalogue(path=source, feeds=feeds, pathogens=pathogens)


def _pathogens(reader: _Reader, raw: Any) -> tuple[str, ...]:
    """The configured pathogen names: a list of lower-case names (letters, digits, '-', '_')."""
    if not isinstance(raw, list):
        raise reader.error("pathogens", "expected a list of pathogen names")
    out: list[str] = []
    for i, name in enumerate(raw):
        if not isinstance(name, str) or not PATHOGEN.fullmatch(name):
            raise reader.error(f"pathogens[{i}]", f"{name!r} is not a pathogen name (lower-case "
                                                  "letters, digits, '-' or '_')")
        if name in out:
            raise reader.error(f"pathogens[{i}]", f"{name!r} is listed twice")
        out.append(name)
    return tuple(out)


def load_feeds(path: Path) -> FeedCatalogue:
    """Read and parse the feed definition file at ``path``."""
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise FeedConfigError(str(path), 0, 0, "", f"cannot read the file: {exc}") from None
    return parse_feeds(text, source=str(path), base=path.resolve().parent)


_FEED_KEYS = {
    "name", "description", "source", "format", "layout", "delimiter", "encoding", "decimal",
    "thousands", "dates", "columns", "measures", "regions", "schedule", "cadence", "stale_after",
    "max_rejected_share",
}


def _feed(
    reader: _Reader, raw: Any, path: str, base: Path, pathogens: tuple[str, ...]
) -> FeedDefinition:
    if not isinstance(raw, dict):
        raise reader.error(path, "each feed is a mapping")
    unknown = sorted(set(raw) - _FEED_KEYS)
    if unknown:
        raise reader.error(f"{path}.{unknown[0]}", f"unknown key; allowed: {sorted(_FEED_KEYS)}")
    for key in ("name", "source", "measures"):
        if key not in raw:
            raise reader.error(path, f"missing required key {key!r}")
    source = _source(reader, raw["source"], f"{path}.source", base)
    measures = _measures(reader, raw["measures"], f"{path}.measures", pathogens)
    kwargs: dict[str, Any] = {}
    for key in ("description", "format", "layout", "encoding", "decimal", "dates", "cadence"):
        if key in raw:
            kwargs[key] = str(raw[key])
    if raw.get("thousands") is not None:
        kwargs["thousands"] = str(raw["thousands"])
    if "delimiter" in raw:
        kwargs["delimiter"] = None if raw["delimiter"] in (None, "auto") else str(raw["delimiter"])
    if "columns" in raw:
        kwargs["columns"] = _build(reader, Columns, raw["columns"], f"{path}.columns")
    if "regions" in raw:
        regions = raw["regions"]
        if not isinstance(regions, dict):
            raise reader.error(f"{path}.regions", "expected a mapping of file code: region code")
        kwargs["regions"] = {str(k): str(v) for k, v in regions.items()}
    if raw.get("schedule") is not None:
        kwargs["schedule"] = _schedule(reader, raw["schedule"], f"{path}.schedule")
    if "stale_after" in raw:
        kwargs["stale_after"] = _duration(reader, raw["stale_after"], f"{path}.stale_after")
    if "max_rejected_share" in raw:
        kwargs["max_rejected_share"] = raw["max_rejected_share"]
    try:
        return FeedDefinition(name=str(raw["name"]), source=source, measures=measures, **kwargs)
    except ValueError as exc:
        raise reader.error(path, str(exc)) from None


def _duration(reader: _Reader, raw: Any, path: str) -> timedelta:
    try:
        return parse_duration(raw)
    except ValueError as exc:
        raise reader.error(path, str(exc)) from None


def _build(reader: _Reader, cls: type, raw: Any, path: str) -> Any:
    if not isinstance(raw, dict):
        raise reader.error(path, "expected a mapping")
    try:
        return cls(**raw)
    except TypeError as exc:
        raise reader.error(path, f"unknown or missing key ({exc})") from None
    except ValueError as exc:
        raise reader.error(path, str(exc)) from None


def _source(reader: _Reader, raw: Any, path: str, base: Path) -> Source:
    if not isinstance(raw, dict) or "kind" not in raw:
        raise reader.error(path, "expected a mapping with `kind: file | http | push`")
    raw = dict(raw)
    kind = raw.pop("kind")
    if kind == "file":
        for key in ("folder", "done"):
            if key in raw:
                folder = Path(str(raw[key])).expanduser()
                raw[key] = folder if folder.is_absolute() else base / folder
        return _build(reader, FileSource, raw, path)  # type: ignore[no-any-return]
    if kind == "http":
        if "timeout" in raw:
            raw["timeout_s"] = _duration(
                reader, raw.pop("timeout"), f"{path}.timeout"
            ).total_seconds()
        return _build(reader, HttpSource, raw, path)  # type: ignore[no-any-return]
    if kind == "push":
        return _build(reader, PushSource, raw, path)  # type: ignore[no-any-return]
    raise reader.error(f"{path}.kind", f"{kind!r} is not one of file, http, push")


def _measures(
    reader: _Reader, raw: Any, path: str, pathogens: tuple[str, ...]
) -> tuple[MeasureMap, ...]:
    """Each column's measure; ``cases.influenza`` (or ``cases`` with ``pathogen: influenza``)
    is the pathogen-specific measure, its pathogen one of ``pathogens``."""
    if isinstance(raw, list):  # short form: [cases, tests]
        raw = {str(m): {} for m in raw}
    if not isinstance(raw, dict) or not raw:
        raise reader.error(path, "expected a mapping of measure name: settings (or a list)")
    out: list[MeasureMap] = []
    for name, spec in raw.items():
        spec = dict(spec or {})
        where = f"{path}.{name}"
        allowed = {"source", "scale", "min", "max", "pathogen", "precedence"}
        if set(spec) - allowed:
            bad = sorted(set(spec) - allowed)[0]
            raise reader.error(f"{where}.{bad}", f"unknown key; allowed: {sorted(allowed)}")
        base_name, dot, qualifier = str(name).partition(".")
        pathogen = qualifier if dot else None
        if spec.get("pathogen") is not None:
            if dot:
                raise reader.error(f"{where}.pathogen", f"{name!r} names its pathogen already")
            pathogen = str(spec["pathogen"])
        if pathogen is not None and pathogen not in pathogens:
            at = f"{where}.pathogen" if "pathogen" in spec else where
            raise reader.error(at, f"unknown pathogen {pathogen!r} (configured: "
                                   f"{', '.join(pathogens) or 'none'}; `pathogens:` lists them)")
        measure = f"{base_name}.{pathogen}" if pathogen is not None else base_name
        if any(m.measure == measure for m in out):
            raise reader.error(where, f"measure {measure!r} is mapped twice")
        try:
            out.append(MeasureMap(
                measure=measure, pathogen=pathogen, source=str(spec.get("source", name)),
                scale=float(spec.get("scale", 1.0)),
                minimum=None if spec.get("min") is None else float(spec["min"]),
                maximum=None if spec.get("max") is None else float(spec["max"]),
                precedence=spec.get("precedence", 0),
            ))
        except (TypeError, ValueError) as exc:
            raise reader.error(where, str(exc)) from None
    return tuple(out)


def _schedule(reader: _Reader, raw: Any, path: str) -> Schedule:
    if not isinstance(raw, dict):
        raise reader.error(path, "expected a mapping with cron or interval, and timezone")
    raw = dict(raw)
    if "interval" in raw:
        raw["interval"] = _duration(reader, raw["interval"], f"{path}.interval")
    return _build(reader, Schedule, raw, path)  # type: ignore[no-any-return]
