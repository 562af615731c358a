"""The bitemporal, append-only store: models, migrations, bulk writes and as-of reads."""

from server.store.catalogue import (
    MeasureRecord,
    RegionRecord,
    replace_catchments,
    upsert_measures,
    upsert_regions,
)
from server.store.engine import check_connection, make_engine, make_sessionmaker, scratch_engine
from server.store.errors import (
    DatabaseUnavailableError,
    DuplicateKeyError,
    StoreError,
    UnknownCodeError,
)
from server.store.reads import (
    DenseSeries,
    LatestDate,
    Revision,
    latest_dates,
    read_dense,
    revision_history,
)
from server.store.schema import current_revision, head_revision, upgrade
from server.store.vintages import (
    Rejection,
    append_vintage,
    checksum_of,
    code_maps,
    find_vintage_by_checksum,
)

__all__ = [
    "DatabaseUnavailableError",
    "DenseSeries",
    "DuplicateKeyError",
    "LatestDate",
    "MeasureRecord",
    "RegionRecord",
    "Rejection",
    "Revision",
    "StoreError",
    "UnknownCodeError",
    "append_vintage",
    "check_connection",
    "checksum_of",
    "code_maps",
    "current_revision",
    "find_vintage_by_checksum",
    "head_revision",
    "latest_dates",
    "make_engine",
    "make_sessionmaker",
    "read_dense",
    "replace_catchments",
    "revision_history",
    "scratch_engine",
    "upgrade",
    "upsert_measures",
    "upsert_regions",
]
