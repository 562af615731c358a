"""JSON feeds streamed in blocks: record positions and text, errors with line and column."""

from __future__ import annotations

import io

import numpy as np
import pytest

from server.feeds.definition import parse_feeds
from server.feeds.errors import FeedFileError
from server.feeds.parser import read_chunks

JSON_FEED = parse_feeds("feeds:\n  - name: j\n    source: {kind: push}\n    format: json\n"
                        "    measures: [cases]\n", source="t.yaml")["j"]


@pytest.mark.parametrize("block", [1, 5, 64, 1 << 20])
def test_json_records_streamed_in_blocks_keep_position_and_text(block: int) -> None:
    content = (b'{"source": {"note": "]},["}, "records": [\n'
               b' {"region": "A", "date": "2026-01-01", "measure": "cases", "value": 12345},\n'
               b' 7,\n {"region": "B", "date": "2026-01-02", "measure": "cases", "value": 1.5e3}'
               b"\n]}")
    parts = list(read_chunks(io.BytesIO(content), JSON_FEED, label="f.json", block_bytes=block))
    lines = np.concatenate([c.lines for c in parts]).tolist()
    values = [v for c in parts for v in c.columns["value"].values.tolist()]
    raw = [r for c in parts for r in c.raw.tolist()]
    assert (lines, values) == ([1, 2, 3], ["12345", "", "1500.0"])
    assert raw[1] == "7" and raw[0].startswith('{"region": "A"')
    assert [m for c in parts for m in c.malformed.tolist()] == [False, True, False]


@pytest.mark.parametrize("block", [3, 1 << 20])
def test_json_error_named_with_line_and_column_whatever_the_blocks(block: int) -> None:
    content = b'[{"region": "A", "date": "d", "measure": "cases", "value": 1}\n,\n{"value": tru}]'
    with pytest.raises(FeedFileError, match=r"f.json: record 2, line 3 column 11: not valid JSON"):
        list(read_chunks(io.BytesIO(content), JSON_FEED, label="f.json", block_bytes=block))


def test_json_without_a_required_key_in_any_record_is_rejected_whole() -> None:
    content = b'[{"region": "A", "date": "2026-01-01", "count": 1}]'
    with pytest.raises(FeedFileError, match=r"header lacks column\(s\) \['measure', 'value'\]"):
        list(read_chunks(io.BytesIO(content), JSON_FEED, label="f.json"))
