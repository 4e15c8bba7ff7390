"""core.parquet_bounds: the pure-Python footer and page-header walk, checked against pyarrow's own
reading of the same files (pyarrow as the reference implementation of the Apache Parquet spec)."""

from __future__ import annotations

import copy
import io
import struct

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from trainguard.core.parquet_bounds import BoundsError, OverLimitError, key_values, measure


def _table(rows: int) -> pa.Table:
    rng = np.random.default_rng(3)  # a tram depot's sensor log, invented
    return pa.table({
        "line": pa.array([f"tram-{i % 5}" for i in range(rows)]),
        "minute": pa.array(np.arange(rows, dtype=np.int64)),
        "delay": pa.array(rng.normal(size=rows)),
        "doors": pa.array([[1, 2, 3][: i % 4] if i % 7 else None for i in range(rows)], pa.list_(pa.int64())),
    }).replace_schema_metadata({b"depot": b"north"})


OPTIONS = [dict(), dict(use_dictionary=False, compression="none"), dict(row_group_size=7, data_page_size=64),
           dict(data_page_version="2.0", compression="snappy"), dict(compression="gzip", write_statistics=False),
           dict(use_byte_stream_split=["delay"], column_encoding={"minute": "DELTA_BINARY_PACKED"},
                use_dictionary=["line"])]


@pytest.mark.parametrize("options", OPTIONS)
def test_value_counts_match_pyarrow_for_every_column_chunk(options):
    buf = io.BytesIO()
    pq.write_table(_table(50), buf, **copy.deepcopy(options))  # pyarrow fills in nested dicts
    data = buf.getvalue()
    bounds = measure(data, 1 << 30)
    md = pq.ParquetFile(io.BytesIO(data)).metadata
    assert bounds.num_rows == md.num_rows == 50
    assert bounds.row_groups == [md.row_group(i).num_rows for i in range(md.num_row_groups)]
    expected = [(md.row_group(i).column(j).path_in_schema, md.row_group(i).column(j).num_values,
                 md.row_group(i).column(j).has_dictionary_page)
                for i in range(md.num_row_groups) for j in range(md.num_columns)]
    assert [(c.column, c.slots, c.has_dictionary) for c in bounds.chunks] == expected
    # a list column's slots are its leaf count plus one per null or empty list (the level count)
    leaves = sum(len(x) if x else 1 for x in _table(50).column("doors").to_pylist())
    assert bounds.slots("doors.list.element") == leaves
    assert key_values(data)[b"depot"] == b"north"


def test_a_page_over_the_limit_is_refused_before_decoding():
    buf = io.BytesIO()
    pq.write_table(pa.table({"zeros": np.zeros(100_000)}), buf, compression="zstd", use_dictionary=False)
    with pytest.raises(OverLimitError, match="once decompressed"):
        measure(buf.getvalue(), 10_000)


@pytest.mark.parametrize("damage", ["footer length", "magic", "values", "truncated footer"])
def test_malformed_footers_are_refused(damage):
    buf = io.BytesIO()
    pq.write_table(_table(20), buf)
    data = bytearray(buf.getvalue())
    n = struct.unpack("<I", data[-8:-4])[0]  # Apache Parquet spec: footer length, little-endian, then PAR1
    if damage == "footer length":
        data[-8:-4] = struct.pack("<I", len(data))
    elif damage == "magic":
        data[:4] = b"PAR2"
    elif damage == "values":
        bounds = measure(bytes(data), 1 << 30)
        assert bounds.chunks[0].slots == 20
        # the footer's num_values (ColumnMetaData field 5) of the first chunk, as a zigzag varint 40 (=20*2)
        start = len(data) - 8 - n
        pos = data.index(bytes([0x28]), start)
        data[pos] = 0x2A  # 21 values declared, 20 in the pages
    else:
        data[-8 - n + 4:-8] = b"\x00" * (n - 4)
    with pytest.raises(BoundsError):
        measure(bytes(data), 1 << 30)


@pytest.mark.parametrize("options", OPTIONS)
def test_a_table_with_no_rows_measures_as_empty(options):
    # pyarrow writes a zero-row row group whose chunks have no pages (data offset 0), or only a
    # dictionary page; a golden of a test that recorded metrics but no state is such a file.
    buf = io.BytesIO()
    pq.write_table(_table(0), buf, **copy.deepcopy(options))  # pyarrow fills in the nested dicts it is given
    bounds = measure(buf.getvalue(), 1 << 30)
    assert bounds.num_rows == pq.ParquetFile(io.BytesIO(buf.getvalue())).metadata.num_rows == 0
    assert all(c.slots == 0 for c in bounds.chunks)


def test_a_golden_without_state_entries_reads_back(tmp_path):
    from trainguard.core import store
    from trainguard.core.records import MetricSeries, Run

    store.write_run(tmp_path / "g", Run(metrics={"loss": MetricSeries([0, 1], [0.8, 0.6])}))
    back = store.read_run(tmp_path / "g")
    assert back.tensors == {} and list(back.metrics["loss"].values) == [0.8, 0.6]
