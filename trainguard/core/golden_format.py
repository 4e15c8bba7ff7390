"""The golden file format: Parquet schemas, metadata keys, the content digest, strict reads.

Layout of one golden folder (documented in README, "Golden file format"):

- `metrics.parquet`: long layout, one row per (metric, step): `metric` string,
  `step` int64, `value` float64.
- `state.parquet`: one row per recorded tensor or number, values in a list column when
  the tensor was small enough to keep them.
- `trace.parquet` (optional): one row per watched tensor per stage per optimizer step.

Every file carries Parquet key-value metadata: `trainguard.format_version`, `trainguard.meta`
(JSON, see `meta.GoldenMeta`) and, from format 2 on, `trainguard.run_id` (shared by all files
of one write), `trainguard.writer` (the trainguard version that wrote it) and
`trainguard.digest` (see `content_digest`).

Reading is strict: size limits before loading, schema checked column by column, the digest
verified, metadata JSON parsed with depth and type checks; every failure becomes a
`GoldenError` naming the file. Nothing here uses pickle or eval. Which files make a golden,
and how they are written together, is the store's business (`store.GoldenStore`).
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import struct
from pathlib import Path
from typing import Any, Callable

import numpy as np

from .atomic import short_error
from .errors import GoldenCorruptError, GoldenError, GoldenVersionError, UsageError
from .fixes import FixCommands, current
from .meta import GoldenMeta, MetaError
from .parquet_bounds import BoundsError, OverLimitError, measure
from .records import STAGE_ORDER, MetricSeries, Run, TensorRecord, TraceEntry
from .version import __version__

#: Format 2 added `trainguard.run_id`, `trainguard.writer` and `trainguard.digest`;
#: format 1 files (no digest) are still read, and `trainguard upgrade-goldens` converts them.
#: Format 3 numbers trace events in call order (`call` is the event within the step, stage
#: `init` added) and keeps a wider count-sketch for large state tensors. A format-2 golden is
#: read with its trace left out (its events were grouped another way) and compared on
#: statistics where its sketch is the old size; `upgrade-goldens` drops the old trace.
#: Format 4 verifies each column on its own (`column_digests`, stored as `trainguard.columns`)
#: and seals the file with a digest over metadata and schema, so a reader may leave a column
#: undecoded (the state's stored values, when every checksum already matches) and still have
#: verified everything it uses. Stored values, statistics and sketches are as in format 3.
FORMAT_VERSION = 4
#: First format with per-column digests.
COLUMN_DIGEST_FORMAT = 4
#: Formats whose trace is still compared (older traces are left out when read).
TRACE_FORMAT = 3
#: Oldest format this trainguard reads.
OLDEST_FORMAT = 1
METRICS_FILE = "metrics.parquet"
STATE_FILE = "state.parquet"
TRACE_FILE = "trace.parquet"
#: The files of a golden, in the order they are written and read.
KINDS = (METRICS_FILE, STATE_FILE, TRACE_FILE)
KEY_VERSION = b"trainguard.format_version"
KEY_META = b"trainguard.meta"
KEY_RUN_ID = b"trainguard.run_id"
KEY_WRITER = b"trainguard.writer"
KEY_DIGEST = b"trainguard.digest"
KEY_PREFIX = b"trainguard."
KEY_COLUMNS = b"trainguard.columns"
#: Largest golden file read by default; larger files are refused before loading. Real goldens
#: are kilobytes to a few MiB (values are kept only for tensors up to `trainguard_max_values`).
DEFAULT_MAX_FILE_BYTES = 32 * 1024 * 1024
#: Decoded data may be at most this many times the file size limit (see `read_limits`).
DECODED_FACTOR = 2
#: Longest shape and sketch trainguard writes (a sketch has `checksum.SKETCH_ROWS x width` values at most).
MAX_DIMS = 64
MAX_SKETCH = 4096
#: Metadata JSON nested deeper than this is refused (trainguard writes depth 4 at most).
MAX_META_DEPTH = 32
_DIGEST_LABEL = b"trainguard golden digest 1\x00"
_DIGEST_LABEL_2 = b"trainguard golden digest 2\x00"
_COLUMN_LABEL = b"trainguard column digest 1\x00"

_STATE_FLOAT_COLUMNS = ("min", "max", "mean", "l2")
#: Columns a format-1 reader tolerates missing (added late in format 1; read as null).
_OPTIONAL_COLUMNS = ("sketch",)

def _schemas() -> tuple[Any, Any]:
    import pyarrow as pa

    metrics = pa.schema([("metric", pa.string()), ("step", pa.int64()), ("value", pa.float64())])
    state = pa.schema(
        [
            ("name", pa.string()),
            ("kind", pa.string()),
            ("dtype", pa.string()),
            ("shape", pa.list_(pa.int64())),
            ("numel", pa.int64()),
            ("sha256", pa.string()),
            ("min", pa.float64()),
            ("max", pa.float64()),
            ("mean", pa.float64()),
            ("l2", pa.float64()),
            ("nonfinite", pa.int64()),
            ("values", pa.list_(pa.float64())),
            ("sketch", pa.list_(pa.float64())),
        ]
    )
    return metrics, state

def _trace_schema() -> Any:
    import pyarrow as pa

    return pa.schema(
        [
            ("step", pa.int64()),
            ("stage", pa.string()),
            ("seq", pa.int64()),
            ("call", pa.int64()),
            ("name", pa.string()),
            ("dtype", pa.string()),
            ("shape", pa.list_(pa.int64())),
            ("sha256", pa.string()),
            ("min", pa.float64()),
            ("max", pa.float64()),
            ("mean", pa.float64()),
            ("l2", pa.float64()),
            ("nonfinite", pa.int64()),
            ("sketch", pa.list_(pa.float64())),
        ]
    )

def schema_of(kind: str) -> Any:
    if kind == TRACE_FILE:
        return _trace_schema()
    metrics, state = _schemas()
    return metrics if kind == METRICS_FILE else state



#: Parquet write options per file. Floats: byte-stream-split + zstd compresses smooth float
#: series far better than plain encodings; dictionary encoding suits repeated names; steps
#: grow by a constant stride, which delta encoding stores in a few bits each (100,000 steps
#: x 4 metrics: 0.89x the bytes of numpy.savez_compressed of the values alone, see benchmarks/).
WRITE_OPTIONS: dict[str, dict[str, Any]] = {
    METRICS_FILE: dict(compression="zstd", use_dictionary=["metric"],
                       column_encoding={"value": "BYTE_STREAM_SPLIT", "step": "DELTA_BINARY_PACKED"}),
    STATE_FILE: dict(compression="zstd", use_dictionary=["kind", "dtype"]),
    TRACE_FILE: dict(compression="zstd", use_dictionary=["stage", "name", "dtype"],
                     column_encoding={"min": "BYTE_STREAM_SPLIT", "max": "BYTE_STREAM_SPLIT",
                                      "mean": "BYTE_STREAM_SPLIT", "l2": "BYTE_STREAM_SPLIT",
                                      "step": "DELTA_BINARY_PACKED", "seq": "DELTA_BINARY_PACKED",
                                      "call": "DELTA_BINARY_PACKED"}),
}



# -- content digest ------------------------------------------------------------------



def _u64(n: int) -> bytes:
    return struct.pack("<Q", n)


def _canon_type(t: Any) -> str:
    import pyarrow as pa

    if pa.types.is_dictionary(t):
        return _canon_type(t.value_type)
    if pa.types.is_int64(t):
        return "int64"
    if pa.types.is_float64(t):
        return "float64"
    if pa.types.is_string(t):
        return "string"
    if pa.types.is_list(t):
        return f"list<{_canon_type(t.value_type)}>"
    raise TypeError(f"no canonical form for type {t}")


def _feed_array(h: Any, arr: Any) -> None:
    """Feed one Arrow array to `h` in trainguard's canonical form (see `content_digest`)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if isinstance(arr, pa.ChunkedArray):
        if pa.types.is_dictionary(arr.type):  # one dictionary per row group: decode each, then join
            arr = pa.chunked_array([c.dictionary_decode() for c in arr.chunks], type=arr.type.value_type)
        arr = arr.combine_chunks() if arr.num_chunks else pa.array([], type=arr.type)
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    n = len(arr)
    h.update(_u64(n))
    # Without nulls (every file trainguard writes) the buffers are read directly: pyarrow.compute
    # calls cost ~0.1 ms each, more than the small columns of a golden they would process.
    plain = arr.null_count == 0
    valid = np.ones(n, np.uint8) if plain else arr.is_valid().to_numpy(zero_copy_only=False).astype(np.uint8)
    h.update(valid.tobytes())
    t = arr.type
    if pa.types.is_int64(t) or pa.types.is_float64(t):
        filled = arr.fill_null(0) if arr.null_count else arr
        h.update(memoryview(np.ascontiguousarray(filled.to_numpy(zero_copy_only=False),
                                                 dtype="<i8" if pa.types.is_int64(t) else "<f8")).cast("B"))
    elif pa.types.is_string(t):
        filled = arr.fill_null("") if arr.null_count else arr
        lengths = (_cell_lengths(filled) if plain else pc.binary_length(filled).to_numpy(zero_copy_only=False)).astype("<u8")
        h.update(lengths.tobytes())
        if n:
            offsets = np.frombuffer(filled.buffers()[1], dtype="<i4")[filled.offset: filled.offset + n + 1]
            data = filled.buffers()[2]
            if data is not None and offsets[-1] > offsets[0]:
                h.update(memoryview(data)[int(offsets[0]): int(offsets[-1])])
    elif pa.types.is_list(t):
        lengths = list_lengths(arr).astype("<u8")
        h.update(lengths.tobytes())
        _feed_array(h, arr.flatten())
    else:
        raise TypeError(f"no canonical form for type {t}")


def content_digest(kind: str, table: Any, metadata: dict[bytes, bytes]) -> str:
    """The digest stored as `trainguard.digest`: "sha256:" + hex SHA-256 (FIPS 180-4) of a
    canonical serialization that does not depend on how Parquet encoded the data.

    The hashed byte string is, with u64(n) = n as 8 bytes little-endian and
    str(x) = u64(len(x)) + x (UTF-8):

    1. the label `trainguard golden digest 1` + NUL, then str(kind) (the file name, e.g. `state.parquet`);
    2. u64(count), then str(key) + str(value) for every metadata key starting with `trainguard.`
       except `trainguard.digest`, sorted by key bytes (values taken as the stored bytes);
    3. u64(column count), then per column in schema order: str(name), str(canonical type:
       `int64`, `float64`, `string` or `list<...>`), then the column's values:
       u64(rows); one byte per row, 1 valid or 0 null; then
       int64/float64: 8 bytes little-endian per row (IEEE 754 bits for floats, nulls as 0);
       string: u64(byte length) per row (nulls as 0), then all UTF-8 bytes concatenated;
       list: u64(length) per row (nulls as 0), then the values of all valid lists, encoded
       the same way as a column of the element type.

    So the digest covers every value bit (NaN payloads and -0.0 included), nulls, column
    names, types and order, and the metadata, but not Parquet's encodings, compression,
    page or row-group layout: the file may be re-encoded by any writer and still verify.
    """
    h = _digest_head(_DIGEST_LABEL, kind, metadata)
    h.update(_u64(table.num_columns))
    for name, column in zip(table.column_names, table.columns):
        h.update(_name_and_type(name, column.type))
        _feed_array(h, column)
    return "sha256:" + h.hexdigest()


def _digest_head(label: bytes, kind: str, metadata: dict[bytes, bytes]) -> Any:
    h = hashlib.sha256()
    h.update(label)
    kind_b = kind.encode()
    h.update(_u64(len(kind_b)) + kind_b)
    items = sorted((k, v) for k, v in metadata.items() if k.startswith(KEY_PREFIX) and k != KEY_DIGEST)
    h.update(_u64(len(items)))
    for key, value in items:
        h.update(_u64(len(key)) + key + _u64(len(value)) + value)
    return h


def _name_and_type(name: str, arrow_type: Any) -> bytes:
    name_b = name.encode()
    type_b = _canon_type(arrow_type).encode()
    return _u64(len(name_b)) + name_b + _u64(len(type_b)) + type_b


def column_digest(kind: str, name: str, column: Any) -> str:
    """Hex SHA-256 of one column (format 4): the label `trainguard column digest 1` + NUL,
    str(kind), str(name), str(canonical type), then the column's values exactly as
    `content_digest` feeds them. A reader that decodes a column checks it against this."""
    h = hashlib.sha256()
    h.update(_COLUMN_LABEL)
    kind_b = kind.encode()
    h.update(_u64(len(kind_b)) + kind_b)
    h.update(_name_and_type(name, column.type))
    _feed_array(h, column)
    return h.hexdigest()


def columns_entry(kind: str, table: Any) -> bytes:
    """The `trainguard.columns` metadata value: a JSON list of [name, column digest] in schema order."""
    pairs = [[name, column_digest(kind, name, column)] for name, column in zip(table.column_names, table.columns)]
    return json.dumps(pairs, separators=(",", ":")).encode()


def sealed_digest(kind: str, schema: Any, metadata: dict[bytes, bytes]) -> str:
    """The format-4 `trainguard.digest`: "sha256:" + hex SHA-256 of the label `trainguard golden
    digest 2` + NUL, str(kind), the `trainguard.` metadata as in `content_digest` (which includes
    `trainguard.columns`, so every column's digest), then u64(column count) and str(name) +
    str(canonical type) per column. It covers the data through the column digests; nothing
    here needs the data itself, so it is checked before any column is decoded."""
    h = _digest_head(_DIGEST_LABEL_2, kind, metadata)
    h.update(_u64(len(schema.names)))
    for field in schema:
        h.update(_name_and_type(field.name, field.type))
    return "sha256:" + h.hexdigest()



# -- writing -------------------------------------------------------------------------



def max_bytes_from_ini(raw: Any) -> int:
    """The ini option `trainguard_max_file_mib` (MiB, may be fractional) in bytes; default 32 MiB."""
    if raw in (None, ""):
        return DEFAULT_MAX_FILE_BYTES
    try:
        mib = float(raw)
    except (TypeError, ValueError):
        mib = math.nan
    if not (math.isfinite(mib) and mib > 0):
        raise UsageError(f"ini option trainguard_max_file_mib = {raw!r} is not a positive number of MiB")
    return max(int(mib * 1024 * 1024), 1)


def _metadata(meta_json: bytes, run_id: str) -> dict[bytes, bytes]:
    return {
        KEY_VERSION: str(FORMAT_VERSION).encode(),
        KEY_META: meta_json,
        KEY_RUN_ID: run_id.encode(),
        KEY_WRITER: __version__.encode(),
    }


def seal(kind: str, table: Any, meta_json: bytes, run_id: str) -> Any:
    """`table` with the current format's metadata (`meta_json` stored as given), digests included."""
    return table.replace_schema_metadata(reseal(kind, table, _metadata(meta_json, run_id)))


def reseal(kind: str, table: Any, metadata: dict[bytes, bytes]) -> dict[bytes, bytes]:
    """`metadata` with the digests recomputed for `table` as its declared format defines them
    (what someone who edits a golden on purpose can always do; the digests are no signature).
    Used by `upgrade-goldens` and by tests that must reach the checks behind the digest."""
    out = dict(metadata)
    try:
        version = int(out.get(KEY_VERSION, b"0").decode("ascii"))
    except (UnicodeDecodeError, ValueError):
        version = 0
    if version >= COLUMN_DIGEST_FORMAT:
        out[KEY_COLUMNS] = columns_entry(kind, table)
        out[KEY_DIGEST] = sealed_digest(kind, table.schema, out).encode()
    else:
        out.pop(KEY_COLUMNS, None)
        out[KEY_DIGEST] = content_digest(kind, table, out).encode()
    return out


def metrics_table(run: Run) -> Any:
    import pyarrow as pa

    schema, _ = _schemas()
    names, steps, values = [], [], []
    for name, series in run.metrics.items():
        names.append(np.full(len(series.steps), name, dtype=object))
        steps.append(series.steps)
        values.append(series.values)
    if names:
        columns = [
            pa.array(np.concatenate(names), type=pa.string()),
            pa.array(np.concatenate(steps), type=pa.int64()),
            pa.array(np.concatenate(values), type=pa.float64()),
        ]
    else:
        columns = [pa.array([], type=f.type) for f in schema]
    return pa.Table.from_arrays(columns, schema=schema)


def state_table(run: Run) -> Any:
    import pyarrow as pa

    _, schema = _schemas()
    recs = list(run.tensors.values())
    columns = {
        "name": [r.name for r in recs],
        "kind": [r.kind for r in recs],
        "dtype": [r.dtype for r in recs],
        "shape": [list(r.shape) for r in recs],
        "numel": [r.numel for r in recs],
        "sha256": [r.sha256 for r in recs],
        "min": [r.min for r in recs],
        "max": [r.max for r in recs],
        "mean": [r.mean for r in recs],
        "l2": [r.l2 for r in recs],
        "nonfinite": [r.nonfinite for r in recs],
        "values": [None if r.values is None else r.values for r in recs],
        "sketch": [None if r.sketch is None else r.sketch for r in recs],
    }
    arrays = [pa.array(columns[f.name], type=f.type) for f in schema]
    return pa.Table.from_arrays(arrays, schema=schema)


def trace_table(run: Run) -> Any:
    import pyarrow as pa

    schema = _trace_schema()
    entries = run.trace or []
    columns = {f.name: [getattr(e, f.name) for e in entries] for f in schema}
    columns["shape"] = [list(s) for s in columns["shape"]]
    columns["sketch"] = [None if s is None else np.asarray(s, dtype=np.float64) for s in columns["sketch"]]
    arrays = [pa.array(columns[f.name], type=f.type) for f in schema]
    return pa.Table.from_arrays(arrays, schema=schema)



# -- reading -------------------------------------------------------------------------



def encode_meta(meta: GoldenMeta) -> bytes:
    """The `trainguard.meta` bytes: sorted keys, so the same metadata always gives the same bytes."""
    return json.dumps(meta.to_json(), sort_keys=True, allow_nan=True).encode()


def tables_of(run: Run) -> dict[str, Any]:
    """The Arrow tables of a run's golden files (trace only when the run was traced)."""
    tables = {METRICS_FILE: metrics_table(run), STATE_FILE: state_table(run)}
    if run.trace is not None:
        tables[TRACE_FILE] = trace_table(run)
    return tables


def parquet_writer(kind: str, table: Any) -> Callable[[Path], None]:
    """A writer of `table` as the golden file `kind` (with that file's encodings), for `atomic`."""
    import pyarrow.parquet as pq

    def write(path: Path) -> None:
        pq.write_table(table, path, **WRITE_OPTIONS[kind])

    return write


class FileRead:
    """One verified golden file: its Arrow table, metadata, format version, run id (None in format 1),
    and the limits it was read under (which the conversion to records keeps applying)."""

    __slots__ = ("table", "meta", "version", "run_id", "limits", "deferred")

    def __init__(self, table: Any, meta: GoldenMeta, version: int, run_id: str | None,
                 limits: dict[str, int] | None = None, deferred: tuple[str, ...] = ()) -> None:
        self.table, self.meta, self.version, self.run_id = table, meta, version, run_id
        self.limits = limits or read_limits(DEFAULT_MAX_FILE_BYTES)
        self.deferred = deferred  # columns not decoded (format 4 and later, on request)

    def metrics(self, path: Path) -> dict[str, MetricSeries]:
        """The metric series of a `metrics.parquet` read, with the same limit on distinct names."""
        return metrics_from_table(path, self.table, max_names=self.limits["records"])


def read_limits(max_bytes: int) -> dict[str, int]:
    """The limits a read enforces, all derived from the file size limit B (`trainguard_max_file_mib`).

    - decoded data (Arrow's memory, strings kept dictionary-encoded): at most 2 B;
    - one page once decompressed: at most 2 B; decoded strings (all string cells): at most B;
    - rows that become Python records (state entries, trace entries) and distinct metric
      names: at most B / 256 each (128 Ki at the default B = 32 MiB);
    - per cell: a shape of at most 64 dimensions, a sketch of at most 4096 values.

    At the default B these keep a reader below 256 MiB above its baseline for any file,
    however it is encoded (tests/test_hostile_goldens.py measures it).
    """
    return {"decoded": DECODED_FACTOR * max_bytes, "page": DECODED_FACTOR * max_bytes, "strings": max_bytes,
            "records": max(max_bytes // 256, 1), "dims": MAX_DIMS, "sketch": MAX_SKETCH}


def read_file(path: Path, kind: str, max_bytes: int = DEFAULT_MAX_FILE_BYTES,
              commands: FixCommands | None = None, data: bytes | None = None, accept_format_1: bool = False,
              skip: tuple[str, ...] = ()) -> FileRead:
    """Read and verify one golden file; `path` may be a commit's temp file for `kind`.

    The file is read into memory once (so what is checked is what is decoded), its footer
    and page headers are measured in pure Python (`parquet_bounds`) against `read_limits`,
    and only then does pyarrow decode it, one row group at a time, strings kept as
    dictionaries. `data` gives the bytes directly (a file from git history, for `audit`).

    Format 1 carried no digest, so a format-1 file cannot be told from an edited one: it is
    refused (with the fix) unless `accept_format_1`, which only `upgrade-goldens` passes.

    From format 4 on, the columns named in `skip` are left undecoded (`FileRead.deferred`):
    the file's sealed digest is checked on metadata and schema first, then each decoded column
    against its own digest, so what is returned is verified and what is skipped costs nothing.
    Older formats are always read whole (their one digest needs every column).

    Raises `GoldenCorruptError` or `GoldenVersionError` naming `path`; `commands` supplies
    the re-bless command quoted when a digest does not match.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    expected = schema_of(kind)
    if data is None:
        data = _read_bytes(path, max_bytes)
    if len(data) > max_bytes:
        raise _too_large(path, len(data), max_bytes)
    limits = read_limits(max_bytes)
    bounds = _bounds(path, data, kind, limits, skip)
    strings = [f.name for f in expected if f.type == pa.string()]
    try:
        pf = pq.ParquetFile(pa.BufferReader(data), read_dictionary=strings)
        schema = pf.schema_arrow
    except (pa.ArrowException, OSError, ValueError, MemoryError, OverflowError, TypeError, KeyError, IndexError) as exc:
        raise GoldenCorruptError(path, f"is not a readable Parquet file ({short_error(exc)})") from None
    raw = dict(schema.metadata or {})
    version, meta = _check_metadata(path, raw)
    if version == 1 and not accept_format_1:
        raise GoldenVersionError(
            path, "is in golden format 1, which carries no content digest: trainguard cannot tell it from an edited "
            "file, so it does not read it (a format-2 golden rewritten as format 1 is the classic way to hide an edit)",
            f"review the golden's history (git log -p -- {path.parent}), then vouch for it: trainguard upgrade-goldens")
    present = []
    for field in expected:
        if field.name not in schema.names:
            if field.name in _OPTIONAL_COLUMNS and version == 1:
                continue
            raise GoldenCorruptError(path, f"has no column {field.name!r}")
        if schema.names.count(field.name) > 1:
            raise GoldenCorruptError(path, f"has column {field.name!r} more than once")
        present.append(field.name)
        actual = schema.field(field.name).type
        if field.name in strings and pa.types.is_dictionary(actual):  # read_dictionary keeps strings encoded
            actual = actual.value_type
        if not actual.equals(field.type):
            raise GoldenCorruptError(path, f"column {field.name!r} has type {actual}, expected {field.type}")
    extra = [n for n in schema.names if n not in present]
    if extra:
        raise GoldenCorruptError(path, f"has columns trainguard does not write: {', '.join(map(repr, extra[:5]))}")
    sealed: tuple[str, dict[str, str]] | None = None
    deferred: tuple[str, ...] = ()
    if version >= COLUMN_DIGEST_FORMAT:
        sealed = _check_sealed(path, kind, schema, raw, commands or current())
        deferred = tuple(n for n in present if n in skip)
        present = [n for n in present if n not in deferred]
    elif skip:  # an older format is decoded whole: bound the skipped columns' pages too
        bounds = _bounds(path, data, kind, limits, ())
    try:
        if pf.metadata.num_row_groups != len(bounds.row_groups):
            raise GoldenCorruptError(path, "has a footer pyarrow reads differently from the Parquet spec")
        groups = [pf.read_row_group(i, columns=present) for i in range(len(bounds.row_groups))]
        table = pa.concat_tables(groups) if groups else schema.empty_table().select(present)
    except GoldenError:
        raise
    except (pa.ArrowException, OSError, ValueError, MemoryError, OverflowError, TypeError, KeyError, IndexError) as exc:
        raise GoldenCorruptError(path, f"cannot be read ({short_error(exc)})") from None
    _check_cells(path, table, [n for n in strings if n in present], limits)
    run_id = None
    if sealed is not None:
        run_id = sealed[0]
        _check_columns(path, kind, table, sealed[1], commands or current())
    elif version >= 2:
        run_id = _check_digest(path, kind, table, raw, commands or current())
    return FileRead(table, meta, version, run_id, limits, deferred)


_RAISE_LIMIT = "raise the ini option trainguard_max_file_mib if the file is genuine"


def _bounds(path: Path, data: bytes, kind: str, limits: dict[str, int], skip: tuple[str, ...]) -> Any:
    """The file's footer and page headers measured against `limits`, before pyarrow decodes anything."""
    try:
        bounds = measure(data, limits["page"], skip)
    except OverLimitError as exc:
        raise GoldenCorruptError(path, f"would decode to more than the limits allow ({exc}); refusing to decode it",
                                 _RAISE_LIMIT) from None
    except BoundsError as exc:
        raise GoldenCorruptError(path, f"is not a readable Parquet file ({exc})") from None
    if bounds.decoded_bytes > limits["decoded"]:
        raise GoldenCorruptError(path, f"would decode to about {bounds.decoded_bytes} bytes, over the limit of "
                                 f"{limits['decoded']} ({DECODED_FACTOR} x the file size limit); refusing to decode it",
                                 _RAISE_LIMIT)
    if kind != METRICS_FILE and bounds.num_rows > limits["records"]:
        raise GoldenCorruptError(path, f"declares {bounds.num_rows} rows, more than the {limits['records']} allowed "
                                 "(file size limit / 256)", _RAISE_LIMIT)
    return bounds


def _too_large(path: Path, size: int, max_bytes: int) -> GoldenCorruptError:
    return GoldenCorruptError(path, f"is {size} bytes, over the {max_bytes}-byte limit for golden files; refusing to "
                              "load it", _RAISE_LIMIT)


def _read_bytes(path: Path, max_bytes: int) -> bytes:
    if path.is_symlink():
        raise GoldenCorruptError(path, "is a symbolic link; goldens must be regular files", "replace it with the real file")
    if not path.is_file():
        if path.exists():
            raise GoldenCorruptError(path, "is not a regular file (a folder?) where a golden file belongs",
                                     "remove it, then re-bless")
        raise GoldenCorruptError(path, "is missing while its sibling golden file exists")
    try:  # O_NOFOLLOW: a file swapped for a link after the check above is not followed either
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0))
        with os.fdopen(fd, "rb") as fh:
            size = os.fstat(fh.fileno()).st_size
            if size > max_bytes:
                raise _too_large(path, size, max_bytes)
            return fh.read(max_bytes + 1)
    except OSError as exc:
        raise GoldenCorruptError(path, f"cannot be read ({short_error(exc)})") from None


def string_lengths(column: Any) -> np.ndarray:
    """The UTF-8 byte length of every cell of a string column (dictionary-encoded or not), nulls 0.

    Read from the Arrow offsets buffer (a subtraction per cell), not through `pyarrow.compute`:
    this runs on every golden read, and a compute kernel call costs more than the whole column.
    Offsets that go backwards (a crafted file) raise ValueError.
    """
    import pyarrow as pa

    parts = []
    for chunk in (column.chunks if isinstance(column, pa.ChunkedArray) else [column]):
        if pa.types.is_dictionary(chunk.type):
            lengths = _cell_lengths(chunk.dictionary)
            indices = chunk.indices
            codes = (indices.fill_null(0) if indices.null_count else indices).to_numpy(zero_copy_only=False)
            codes = codes.astype(np.int64)
            if codes.size and (codes.min() < 0 or codes.max() >= max(lengths.size, 1)):
                raise ValueError("refers to dictionary entries that do not exist")
            parts.append(lengths[codes] if lengths.size else np.zeros(codes.size, np.int64))
        else:
            parts.append(_cell_lengths(chunk))
    return np.concatenate(parts) if parts else np.zeros(0, np.int64)


def _cell_lengths(array: Any) -> np.ndarray:
    import pyarrow as pa

    n = len(array)
    if n == 0:
        return np.zeros(0, np.int64)
    large = pa.types.is_large_string(array.type) or pa.types.is_large_binary(array.type)
    if not (large or pa.types.is_string(array.type) or pa.types.is_binary(array.type)):
        raise ValueError(f"is not a string column ({array.type})")
    buffer = array.buffers()[1]
    width = 8 if large else 4
    if buffer is None or buffer.size < (array.offset + n + 1) * width:
        raise ValueError("has an offsets buffer shorter than its rows")
    offsets = np.frombuffer(buffer, dtype="<i8" if large else "<i4", count=n + 1, offset=array.offset * width)
    lengths = np.diff(offsets.astype(np.int64))
    if lengths.size and lengths.min() < 0:
        raise ValueError("has string offsets that go backwards")
    if array.null_count:
        lengths[array.is_null().to_numpy(zero_copy_only=False)] = 0
    return lengths


def _check_cells(path: Path, table: Any, strings: list[str], limits: dict[str, int]) -> None:
    """Decoded string sizes and per-row list lengths, checked on the encoded form before anything expands."""
    total = 0
    for name in strings:
        try:
            total += int(string_lengths(table.column(name)).sum())
        except ValueError as exc:
            raise GoldenCorruptError(path, f"column {name!r} {exc}") from None
    if total > limits["strings"]:
        raise GoldenCorruptError(path, f"holds {total} bytes of text once decoded, over the {limits['strings']}-byte "
                                 "limit", _RAISE_LIMIT)
    for name, cap in (("shape", limits["dims"]), ("sketch", limits["sketch"])):
        if name in table.column_names:
            try:
                lengths = list_lengths(table.column(name))
            except ValueError as exc:
                raise GoldenCorruptError(path, f"column {name!r} {exc}") from None
            if lengths.size and int(lengths.max()) > cap:
                raise GoldenCorruptError(path, f"has a {name} of {int(lengths.max())} values; trainguard writes at "
                                         f"most {cap}")


def list_lengths(column: Any) -> np.ndarray:
    """The length of every cell of a list column (nulls 0), from its offsets: nothing is converted."""
    import pyarrow as pa

    parts = []
    for chunk in (column.chunks if isinstance(column, pa.ChunkedArray) else [column]):
        if chunk.null_count:
            parts.append(chunk.value_lengths().fill_null(0).to_numpy(zero_copy_only=False).astype(np.int64))
            continue
        lengths = np.diff(chunk.offsets.to_numpy(zero_copy_only=False).astype(np.int64))
        if lengths.size and lengths.min() < 0:
            raise ValueError("has list offsets that go backwards")
        parts.append(lengths)
    return np.concatenate(parts) if parts else np.zeros(0, np.int64)


def _check_digest(path: Path, kind: str, table: Any, raw: dict[bytes, bytes], commands: FixCommands) -> str:
    stored = raw.get(KEY_DIGEST)
    run_id = raw.get(KEY_RUN_ID)
    fix = f"restore the file from version control, or re-bless the test: {commands.bless_any()}"
    if stored is None:
        raise GoldenCorruptError(path, "has no content digest although its format (2) requires one; it was edited "
                                 "or damaged after trainguard wrote it", fix)
    if run_id is None or not (1 <= len(run_id) <= 64) or not run_id.isalnum():
        raise GoldenCorruptError(path, "has no valid run id in its metadata", fix)
    try:
        actual = content_digest(kind, table, raw)
    except (TypeError, ValueError, MemoryError) as exc:  # pragma: no cover - schema was checked before
        raise GoldenCorruptError(path, f"cannot be digested ({short_error(exc)})") from None
    if stored != actual.encode():
        raise GoldenCorruptError(
            path, "does not match the SHA-256 digest stored in it: its content or metadata was changed after "
            "trainguard wrote it (tampering or corruption)", fix)
    return run_id.decode("ascii")


def _tamper_fix(commands: FixCommands) -> str:
    return f"restore the file from version control, or re-bless the test: {commands.bless_any()}"


def _check_sealed(path: Path, kind: str, schema: Any, raw: dict[bytes, bytes],
                  commands: FixCommands) -> tuple[str, dict[str, str]]:
    """Format 4: the sealed digest over metadata and schema, and the per-column digests it covers."""
    stored = raw.get(KEY_DIGEST)
    run_id = raw.get(KEY_RUN_ID)
    fix = _tamper_fix(commands)
    if stored is None:
        raise GoldenCorruptError(path, "has no content digest although its format requires one; it was edited "
                                 "or damaged after trainguard wrote it", fix)
    if run_id is None or not (1 <= len(run_id) <= 64) or not run_id.isalnum():
        raise GoldenCorruptError(path, "has no valid run id in its metadata", fix)
    if stored != sealed_digest(kind, schema, raw).encode():
        raise GoldenCorruptError(
            path, "does not match the SHA-256 digest stored in it: its content or metadata was changed after "
            "trainguard wrote it (tampering or corruption)", fix)
    try:
        pairs = json.loads(raw.get(KEY_COLUMNS, b"").decode("utf-8"))
        digests = {str(n): str(d) for n, d in pairs}
        names = [str(n) for n, _ in pairs]
    except (UnicodeDecodeError, ValueError, TypeError, RecursionError):
        raise GoldenCorruptError(path, "has no readable list of column digests (trainguard.columns)", fix) from None
    if names != list(schema.names) or not all(len(d) == 64 for d in digests.values()):
        raise GoldenCorruptError(path, "has column digests (trainguard.columns) that do not match its columns", fix)
    return run_id.decode("ascii"), digests


def _check_columns(path: Path, kind: str, table: Any, digests: dict[str, str], commands: FixCommands) -> None:
    for name, column in zip(table.column_names, table.columns):
        try:
            actual = column_digest(kind, name, column)
        except (TypeError, ValueError, MemoryError) as exc:  # pragma: no cover - schema was checked before
            raise GoldenCorruptError(path, f"cannot be digested ({short_error(exc)})") from None
        if actual != digests.get(name):
            raise GoldenCorruptError(
                path, f"does not match the SHA-256 digest stored in it for column {name!r}: its content was changed "
                "after trainguard wrote it (tampering or corruption)", _tamper_fix(commands))


def _depth_ok(value: Any, limit: int) -> bool:
    stack = [(value, 1)]
    while stack:
        item, depth = stack.pop()
        if isinstance(item, (dict, list)):
            if depth > limit:
                return False
            children = item.values() if isinstance(item, dict) else item
            stack.extend((c, depth + 1) for c in children)
    return True


def _check_metadata(path: Path, raw: dict[bytes, bytes]) -> tuple[int, GoldenMeta]:
    version_raw = raw.get(KEY_VERSION)
    if version_raw is None:
        raise GoldenCorruptError(path, "has no trainguard format version in its metadata; it was not written by trainguard")
    try:
        text = version_raw.decode("ascii")
        if not (0 < len(text) <= 9 and text.isdigit()):
            raise ValueError(text)
        version = int(text)
    except (UnicodeDecodeError, ValueError):
        raise GoldenCorruptError(path, f"has an unreadable format version {version_raw[:20]!r}") from None
    if version > FORMAT_VERSION:
        writer = raw.get(KEY_WRITER, b"")[:40].decode("ascii", "replace")
        needed = f"trainguard {writer} or later" if writer else f"a trainguard newer than {__version__}"
        raise GoldenVersionError(
            path,
            f"was written in golden format {version}"
            + (f" by trainguard {writer}" if writer else "")
            + f"; this trainguard ({__version__}) reads formats {OLDEST_FORMAT} to {FORMAT_VERSION}",
            f"install {needed}: pip install --upgrade trainguard",
        )
    if version < OLDEST_FORMAT:
        raise GoldenCorruptError(path, f"declares an invalid format version {version}")
    try:
        meta = json.loads(raw.get(KEY_META, b"{}").decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError):
        raise GoldenCorruptError(path, "has metadata that is not valid JSON") from None
    if not isinstance(meta, dict):
        raise GoldenCorruptError(path, "has metadata that is not a JSON object")
    if not _depth_ok(meta, MAX_META_DEPTH):
        raise GoldenCorruptError(path, f"has metadata nested deeper than {MAX_META_DEPTH} levels")
    try:
        return version, GoldenMeta.from_json(meta, format_version=version)
    except MetaError as exc:
        raise GoldenCorruptError(path, str(exc)) from None


def pq_metadata(path: Path) -> dict[bytes, bytes]:
    """The key-value metadata of a Parquet file (its Arrow schema's)."""
    import pyarrow.parquet as pq

    return dict(pq.ParquetFile(path).schema_arrow.metadata or {})



# -- tables to records ---------------------------------------------------------------



def string_codes(column: Any) -> tuple[list[str | None], np.ndarray]:
    """A string column as (distinct values, one code per row): linear time, one Python str per distinct value.

    Works on dictionary-encoded columns (as `read_file` returns them, one dictionary per row
    group, possibly with repeated entries) and on plain ones; a null cell gets the code of None.
    """
    import pyarrow as pa

    values: list[str | None] = []
    index: dict[str | None, int] = {}
    parts = []
    chunks = column.chunks if isinstance(column, pa.ChunkedArray) else [column]
    for chunk in chunks:
        if not pa.types.is_dictionary(chunk.type):
            chunk = chunk.dictionary_encode()
        local = []
        for v in chunk.dictionary.to_pylist():
            if v not in index:
                index[v] = len(values)
                values.append(v)
            local.append(index[v])
        codes = chunk.indices.to_numpy(zero_copy_only=False)
        if chunk.null_count:
            if None not in index:
                index[None] = len(values)
                values.append(None)
            codes = chunk.indices.fill_null(len(local)).to_numpy(zero_copy_only=False)
            local.append(index[None])
        parts.append(np.asarray(local, dtype=np.int64)[codes.astype(np.int64)] if len(local) else
                     np.zeros(len(codes), np.int64))
    return values, (np.concatenate(parts) if parts else np.zeros(0, np.int64))


def _cells(table: Any, column: str) -> list[Any]:
    """A string column as Python values per row, sharing one str per distinct value."""
    values, codes = string_codes(table.column(column))
    return [values[c] for c in codes.tolist()]


def trace_from_table(path: Path, table: Any) -> list[TraceEntry]:
    shapes = _int_list_cells(table, "shape")
    sketches = _list_cells(table, "sketch")
    strings = {c: _cells(table, c) for c in ("stage", "name", "dtype", "sha256")}
    plain = table.select(["step", "seq", "call", "nonfinite", *_STATE_FLOAT_COLUMNS]).to_pydict()
    entries = []
    for i in range(table.num_rows):
        row = {k: v[i] for k, v in plain.items()}
        row.update({k: v[i] for k, v in strings.items()})
        if any(row[k] is None for k in ("step", "stage", "seq", "call", "name", "dtype", "sha256", "nonfinite")) \
                or shapes[i] is None:
            raise GoldenCorruptError(path, f"row {i} has empty (null) cells")
        if row["stage"] not in STAGE_ORDER:
            raise GoldenCorruptError(path, f"row {i} has unknown stage {row['stage']!r}")
        floats = [math.nan if row[c] is None else float(row[c]) for c in _STATE_FLOAT_COLUMNS]
        shape = shapes[i]
        if shape is None or any(d < 0 for d in shape):
            raise GoldenCorruptError(path, f"row {i} has an invalid shape {shape}")
        entries.append(TraceEntry(int(row["step"]), row["stage"], int(row["seq"]), int(row["call"]), row["name"],
                                  row["dtype"], shape, row["sha256"],
                                  *floats, int(row["nonfinite"]), _sketch_cell(path, row["name"], sketches[i])))
    return entries


def metrics_from_table(path: Path, table: Any, max_names: int | None = None) -> dict[str, MetricSeries]:
    """Series by metric name, in linear time (codes sorted once, not one pass per name)."""
    names, codes = string_codes(table.column("metric"))
    steps = table.column("step").to_numpy(zero_copy_only=False)
    values = table.column("value").to_numpy(zero_copy_only=False)
    if None in names or table.column("step").null_count or table.column("value").null_count:
        raise GoldenCorruptError(path, "has empty (null) cells in metric, step or value")
    if max_names is not None and len(names) > max_names:
        raise GoldenCorruptError(path, f"holds {len(names)} metric names, more than the {max_names} allowed "
                                 "(file size limit / 256)", _RAISE_LIMIT)
    out: dict[str, MetricSeries] = {}
    if not len(codes):
        return out
    # One stable sort by name code, then every series is a slice: linear apart from the sort.
    order = np.argsort(codes, kind="stable")
    sorted_codes = codes[order]
    steps = np.asarray(steps, dtype=np.int64)[order]
    values = np.asarray(values, dtype=np.float64)[order]
    same = sorted_codes[1:] == sorted_codes[:-1]
    bad = np.flatnonzero(same & (np.diff(steps) <= 0))
    if bad.size:
        name = names[int(sorted_codes[bad[0]])]
        raise GoldenCorruptError(path, f"metric {name!r} has steps that do not strictly increase")
    bounds = np.flatnonzero(~same) + 1
    starts = np.concatenate(([0], bounds)).tolist()
    ends = np.concatenate((bounds, [len(order)])).tolist()
    groups = {names[c]: (lo, hi) for c, lo, hi in zip(sorted_codes[starts].tolist(), starts, ends)}
    for name in sorted(groups):  # by name, as before
        lo, hi = groups[name]
        out[str(name)] = MetricSeries(steps[lo:hi], values[lo:hi])
    return out


def _int_list_cells(table: Any, column: str) -> list[tuple[int, ...] | None]:
    """A list<int64> column (shapes) as tuples; None for a null cell or one holding a null element."""
    import pyarrow as pa

    arr = table.column(column)
    arr = pa.concat_arrays(arr.chunks) if arr.num_chunks else pa.array([], type=arr.type)
    offsets = arr.offsets.to_numpy()
    values = arr.values
    flat = (values.fill_null(-1) if values.null_count else values).to_numpy(zero_copy_only=False).tolist()
    bad = (values.is_null().to_numpy(zero_copy_only=False) if values.null_count else np.zeros(len(values), bool))
    nulls = arr.is_null().to_numpy(zero_copy_only=False) if arr.null_count else np.zeros(len(arr), bool)
    out: list[tuple[int, ...] | None] = []
    for i in range(len(arr)):
        lo, hi = int(offsets[i]), int(offsets[i + 1])
        out.append(None if nulls[i] or bad[lo:hi].any() else tuple(flat[lo:hi]))
    return out


def _list_cells(table: Any, column: str) -> list[np.ndarray | None]:
    """A list<float64> column as one NumPy array per row (None for null), without Python floats.

    Null elements inside a list read as NaN, as the per-element path did.
    """
    import pyarrow as pa

    if column not in table.column_names:
        return [None] * table.num_rows
    col = table.column(column)
    out: list[np.ndarray | None] = []
    for arr in (col.chunks if col.num_chunks else [pa.array([], type=col.type)]):
        # Views into Arrow's buffer, read-only: no second copy of every stored value.
        offsets = arr.offsets.to_numpy()
        flat = arr.values.to_numpy(zero_copy_only=False).astype(np.float64, copy=False)
        nulls = arr.is_null().to_numpy(zero_copy_only=False)
        out.extend(None if nulls[i] else flat[offsets[i]:offsets[i + 1]] for i in range(len(arr)))
    return out


def tensors_from_table(path: Path, table: Any) -> dict[str, TensorRecord]:
    values_cells = _list_cells(table, "values")
    sketch_cells = _list_cells(table, "sketch")
    rows = table.drop_columns([c for c in ("values", "sketch") if c in table.column_names]).to_pylist()
    out: dict[str, TensorRecord] = {}
    for i, row in enumerate(rows):
        row["values"], row["sketch"] = values_cells[i], sketch_cells[i]
        name = row["name"]
        if not isinstance(name, str) or not name:
            raise GoldenCorruptError(path, f"row {i} has no tensor name")
        if name in out:
            raise GoldenCorruptError(path, f"tensor {name!r} appears twice")
        for column in ("kind", "dtype", "sha256", "numel", "nonfinite", "shape"):
            if row[column] is None:
                raise GoldenCorruptError(path, f"tensor {name!r} has no {column}")
        shape = tuple(int(d) for d in row["shape"] if d is not None)
        if len(shape) != len(row["shape"]) or any(d < 0 for d in shape):
            raise GoldenCorruptError(path, f"tensor {name!r} has an invalid shape {row['shape']}")
        numel = math.prod(shape)
        if numel != row["numel"]:
            raise GoldenCorruptError(path, f"tensor {name!r}: shape {shape} does not match numel {row['numel']}")
        values = row["values"]
        if values is not None:
            if len(values) != numel and len(values) != 2 * numel:  # complex tensors store real and imaginary parts
                raise GoldenCorruptError(path, f"tensor {name!r}: {len(values)} stored values for {numel} elements")
        floats = [math.nan if row[c] is None else float(row[c]) for c in _STATE_FLOAT_COLUMNS]
        sketch = _sketch_cell(path, name, row.get("sketch"))
        out[name] = TensorRecord(
            name=name,
            kind=row["kind"],
            dtype=row["dtype"],
            shape=shape,
            sha256=row["sha256"],
            min=floats[0],
            max=floats[1],
            mean=floats[2],
            l2=floats[3],
            nonfinite=int(row["nonfinite"]),
            values=values,
            sketch=sketch,
        )
    return out


def _sketch_cell(path: Path, name: str, cell: Any) -> np.ndarray | None:
    if cell is None:
        return None
    if len(cell) > 4096:
        raise GoldenCorruptError(path, f"{name!r}: a sketch of {len(cell)} values is larger than trainguard writes")
    if isinstance(cell, np.ndarray):
        return cell
    return np.array([math.nan if v is None else v for v in cell], dtype=np.float64)
