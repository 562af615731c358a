"""Which region-days an evaluation run must build: fingerprints kept from the previous run.

Building an assessment row means its explanation and its ``content_sha256``, the bulk of an
evaluation's time. A row is a deterministic function of the engine's state around its region
and day (:func:`rules.fingerprint.fingerprints`), so where that state's fingerprint equals the
one the newest earlier run of the same ruleset computed, the row equals the one that run
computed, which is the row in force before this run's cutoff (that run stored it, or found it
equal to the one before). Such a row would not be written, so it is neither built nor hashed.

The newest run of a ruleset keeps its fingerprints in ``evaluation_run.fingerprints``
(revision ``0010_run_fingerprints``): zlib of a header (format, first day, regions, days), the
region codes and the ``(regions, days)`` little-endian ``uint64`` array. Storing a run's
fingerprints clears those of the ruleset's earlier runs (one array per ruleset, about 2.9 MB at
3 000 districts x 120 days). A run replayed at a cutoff older than a stored run keeps none and
finds none (its predecessor's were cleared): it builds every row, as does a run without a
predecessor, one after older databases or a code change (the salt, :func:`code_salt`, covers
the source of ``rules/`` and of the row's layout, Python's and numpy's versions).
"""

from __future__ import annotations

import functools
import hashlib
import struct
import sys
import zlib
from dataclasses import dataclass
from datetime import date, datetime
from pathlib import Path

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import select, update
from sqlalchemy.orm import Session

import rules
from rules import Evaluation
from rules.fingerprint import fingerprints
from server.store.models import EvaluationRun as RunRow

#: Off: every run builds every row (the oracle of the equivalence tests).
ENABLED = True
_MAGIC = b"TWFP1\n"
_HEADER = struct.Struct("<iii")  # first day (ordinal), regions, days


@functools.cache
def code_salt() -> bytes | None:
    """SHA-256 of the code that shapes a stored row: every module of ``rules/``, the row's
    layout (``evaluation.py``) and this module, with Python's and numpy's versions. None when
    a source cannot be read (then no run uses fingerprints)."""
    here = Path(__file__).resolve().parent
    files = sorted(Path(rules.__file__).resolve().parent.glob("*.py"))
    files += [here / "evaluation.py", here / "run_fingerprints.py"]
    digest = hashlib.sha256(f"{sys.version_info[:3]} numpy {np.__version__}".encode())
    try:
        for path in files:
            digest.update(path.name.encode() + b"\0" + path.read_bytes() + b"\0")
    except OSError:
        return None
    return digest.digest()


def pack(codes: tuple[str, ...], first: date, values: NDArray[np.uint64]) -> bytes:
    n_r, n_d = values.shape
    names = "\n".join(codes).encode("utf-8")
    body = (_MAGIC + _HEADER.pack(first.toordinal(), n_r, n_d)
            + struct.pack("<i", len(names)) + names + values.astype("<u8").tobytes())
    return zlib.compress(body, 1)


def unpack(blob: bytes) -> tuple[tuple[str, ...], date, NDArray[np.uint64]] | None:
    """(region codes, first day, fingerprints), or None for a blob of another format."""
    try:
        body = zlib.decompress(blob)
    except zlib.error:
        return None
    if not body.startswith(_MAGIC):
        return None
    at = len(_MAGIC)
    first, n_r, n_d = _HEADER.unpack_from(body, at)
    at += _HEADER.size
    (size,) = struct.unpack_from("<i", body, at)
    at += 4
    codes = tuple(body[at:at + size].decode("utf-8").split("\n")) if n_r else ()
    values = np.frombuffer(body, dtype="<u8", offset=at + size).astype(np.uint64)
    if len(codes) != n_r or values.size != n_r * n_d:
        return None
    return codes, date.fromordinal(first), values.reshape(n_r, n_d)


@dataclass(frozen=True)
class Plan:
    """What a run builds: ``build`` ``(regions, days)`` (None: every row) and the packed
    fingerprints to keep on the run (None: keep none)."""

    build: NDArray[np.bool_] | None
    keep: bytes | None


def plan(session: Session, ruleset_id: int, cutoff: datetime, result: Evaluation) -> Plan:
    """The rows this run must build and the fingerprints it keeps (module docstring)."""
    salt = code_salt()
    if not ENABLED or salt is None:
        return Plan(build=None, keep=None)
    later = session.scalar(select(RunRow.id).where(
        RunRow.ruleset_id == ruleset_id, RunRow.data_cutoff > cutoff).limit(1))
    if later is not None:  # a replay: its predecessor's fingerprints were cleared
        return Plan(build=None, keep=None)
    values = fingerprints(result, salt)
    first = result.dates[0].astype(date) if result.dates.size else date.min
    keep = pack(result.regions, first, values)
    previous = session.scalar(
        select(RunRow.fingerprints).where(RunRow.ruleset_id == ruleset_id,
                                          RunRow.data_cutoff < cutoff)
        .order_by(RunRow.data_cutoff.desc()).limit(1))
    stored = None if previous is None else unpack(previous)
    if stored is None:
        return Plan(build=None, keep=keep)
    return Plan(build=_differs(values, result.regions, first, stored), keep=keep)


def _differs(values: NDArray[np.uint64], codes: tuple[str, ...], first: date,
             stored: tuple[tuple[str, ...], date, NDArray[np.uint64]]) -> NDArray[np.bool_]:
    """Region-days whose fingerprint differs from the stored one, or that it lacks."""
    old_codes, old_first, old = stored
    n_r, n_d = values.shape
    out = np.ones((n_r, n_d), dtype=bool)
    where = {code: k for k, code in enumerate(old_codes)}
    rows = np.array([where.get(code, -1) for code in codes], dtype=np.int64)
    offset = (first - old_first).days  # day d here is day d + offset there
    lo, hi = max(0, -offset), min(n_d, old.shape[1] - offset)
    have = rows >= 0
    if hi > lo and have.any():
        out[have, lo:hi] = values[have, lo:hi] != old[rows[have], lo + offset:hi + offset]
    return out


def keep_only(session: Session, ruleset_id: int, cutoff: datetime) -> None:
    """Clear the fingerprints of the ruleset's runs before ``cutoff`` (the new run keeps its
    own): the next run compares with the newest run only."""
    session.execute(
        update(RunRow)
        .where(RunRow.ruleset_id == ruleset_id, RunRow.data_cutoff < cutoff,
               RunRow.fingerprints.is_not(None))
        .values(fingerprints=None)
    )
