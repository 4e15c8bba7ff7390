"""Golden storage: writing and reading a `Run` as Parquet files.

Layout of one golden folder (documented in README, "Golden file format"):

- `metrics.parquet`: long layout, one row per (metric, step): `metric` string,
  `step` int64, `value` float64.
- `state.parquet`: one row per recorded tensor or number, values in a list column when
  the tensor was small enough to keep them.

Both files carry the same key-value metadata: `trainguard.format_version` and
`trainguard.meta` (JSON: seed, tolerances, fingerprint, bless time and reason, node id).
Writes go to a uniquely named temp file in the same folder, then `os.replace`, so a
reader sees the old file or the new one, never half of one. Reading checks the schema
strictly and turns every pyarrow or OS failure into a `GoldenCorruptError` naming the file.
Nothing on the read path uses pickle or eval: Parquet data and JSON metadata only.
"""

from __future__ import annotations

import json
import math
import os
import uuid
from pathlib import Path
from typing import Any

import numpy as np

from .errors import GoldenCorruptError, GoldenMissingError, GoldenVersionError
from .record import STAGE_ORDER, MetricSeries, Run, TensorRecord, TraceEntry

FORMAT_VERSION = 1
METRICS_FILE = "metrics.parquet"
STATE_FILE = "state.parquet"
TRACE_FILE = "trace.parquet"
KEY_VERSION = b"trainguard.format_version"
KEY_META = b"trainguard.meta"
TEMP_PREFIX = ".tmp-"
#: Largest golden file read by default; larger files are refused before loading.
DEFAULT_MAX_FILE_BYTES = 512 * 1024 * 1024

_STATE_FLOAT_COLUMNS = ("min", "max", "mean", "l2")
#: Columns a reader tolerates missing (added late in format 1; read as null).
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


# -- writing -------------------------------------------------------------------------


def _metadata(meta: dict[str, Any]) -> dict[bytes, bytes]:
    return {
        KEY_VERSION: str(FORMAT_VERSION).encode(),
        KEY_META: json.dumps(meta, sort_keys=True, allow_nan=True).encode(),
    }


def _metrics_table(run: Run) -> Any:
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
    return pa.Table.from_arrays(columns, schema=schema.with_metadata(_metadata(run.meta)))


def _state_table(run: Run) -> Any:
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
    return pa.Table.from_arrays(arrays, schema=schema.with_metadata(_metadata(run.meta)))


def _trace_table(run: Run) -> Any:
    import pyarrow as pa

    schema = _trace_schema()
    entries = run.trace or []
    columns = {f.name: [getattr(e, f.name) for e in entries] for f in schema}
    columns["shape"] = [list(s) for s in columns["shape"]]
    columns["sketch"] = [None if s is None else np.asarray(s, dtype=np.float64) for s in columns["sketch"]]
    arrays = [pa.array(columns[f.name], type=f.type) for f in schema]
    return pa.Table.from_arrays(arrays, schema=schema.with_metadata(_metadata(run.meta)))


def _write_table_atomic(table: Any, path: Path, **options: Any) -> None:
    import pyarrow.parquet as pq

    tmp = path.with_name(f"{TEMP_PREFIX}{path.name}.{os.getpid()}.{uuid.uuid4().hex[:12]}")
    try:
        pq.write_table(table, tmp, **options)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def write_run(folder: str | os.PathLike[str], run: Run) -> None:
    """Write `run` as a golden (or result) folder, each file atomically."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    _clean_temp_files(folder)
    # Floats: byte-stream-split + zstd compresses smooth float series far better than plain
    # encodings; dictionary encoding suits the few, repeated metric names.
    _write_table_atomic(
        _metrics_table(run),
        folder / METRICS_FILE,
        compression="zstd",
        use_dictionary=["metric"],
        use_byte_stream_split=["value"],
    )
    _write_table_atomic(_state_table(run), folder / STATE_FILE, compression="zstd", use_dictionary=["kind", "dtype"])
    trace_path = folder / TRACE_FILE
    if run.trace is not None:
        _write_table_atomic(_trace_table(run), trace_path, compression="zstd",
                            use_dictionary=["stage", "name", "dtype"],
                            use_byte_stream_split=["min", "max", "mean", "l2"])
    elif trace_path.exists():
        trace_path.unlink()  # a golden without a trace must not keep an older run's trace


def _clean_temp_files(folder: Path) -> None:
    """Remove temp files an interrupted earlier write left behind (readers ignore them)."""
    for leftover in folder.glob(TEMP_PREFIX + "*"):
        try:
            leftover.unlink()
        except OSError:
            pass


# -- reading -------------------------------------------------------------------------


def exists(folder: str | os.PathLike[str]) -> bool:
    folder = Path(folder)
    return (folder / METRICS_FILE).exists() or (folder / STATE_FILE).exists()


def _read_table(path: Path, expected: Any, max_bytes: int) -> tuple[Any, dict[str, Any]]:
    import pyarrow as pa
    import pyarrow.parquet as pq

    if path.is_symlink():
        raise GoldenCorruptError(path, "is a symbolic link; goldens must be regular files", "replace it with the real file")
    if not path.is_file():
        if path.exists():
            raise GoldenCorruptError(path, "is not a regular file")
        raise GoldenCorruptError(path, "is missing while its sibling golden file exists")
    size = path.stat().st_size
    if size > max_bytes:
        raise GoldenCorruptError(
            path, f"is {size} bytes, over the {max_bytes}-byte limit for golden files; refusing to load it"
        )
    try:
        pf = pq.ParquetFile(path)
        schema = pf.schema_arrow
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise GoldenCorruptError(path, f"is not a readable Parquet file ({_short(exc)})") from None
    meta = _check_metadata(path, schema.metadata or {})
    present = []
    for field in expected:
        if field.name not in schema.names:
            if field.name in _OPTIONAL_COLUMNS:
                continue
            raise GoldenCorruptError(path, f"has no column {field.name!r}")
        present.append(field.name)
        actual = schema.field(field.name).type
        if not actual.equals(field.type):
            raise GoldenCorruptError(path, f"column {field.name!r} has type {actual}, expected {field.type}")
    try:
        table = pf.read(columns=present)
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise GoldenCorruptError(path, f"cannot be read ({_short(exc)})") from None
    return table, meta


def _short(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return text[:200]


def _check_metadata(path: Path, raw: dict[bytes, bytes]) -> dict[str, Any]:
    version_raw = raw.get(KEY_VERSION)
    if version_raw is None:
        raise GoldenCorruptError(path, "has no trainguard format version in its metadata; it was not written by trainguard")
    try:
        version = int(version_raw.decode("ascii"))
    except (UnicodeDecodeError, ValueError):
        raise GoldenCorruptError(path, f"has an unreadable format version {version_raw[:20]!r}") from None
    if version > FORMAT_VERSION:
        raise GoldenVersionError(
            path,
            f"was written in golden format {version}; this trainguard reads format {FORMAT_VERSION} and older",
            "upgrade trainguard: pip install --upgrade trainguard",
        )
    if version < 1:
        raise GoldenCorruptError(path, f"declares an invalid format version {version}")
    try:
        meta = json.loads(raw.get(KEY_META, b"{}").decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError):
        raise GoldenCorruptError(path, "has metadata that is not valid JSON") from None
    if not isinstance(meta, dict):
        raise GoldenCorruptError(path, "has metadata that is not a JSON object")
    meta["format_version"] = version
    return meta


def read_metrics(path: str | os.PathLike[str], max_bytes: int = DEFAULT_MAX_FILE_BYTES) -> tuple[dict[str, MetricSeries], dict[str, Any]]:
    """Read one `metrics.parquet`: the series by metric name, and the file's metadata."""
    path = Path(path)
    table, meta = _read_table(path, _schemas()[0], max_bytes)
    return _metrics_from_table(path, table), meta


def read_state(path: str | os.PathLike[str], max_bytes: int = DEFAULT_MAX_FILE_BYTES) -> tuple[dict[str, TensorRecord], dict[str, Any]]:
    """Read one `state.parquet`: the records by tensor name, and the file's metadata."""
    path = Path(path)
    table, meta = _read_table(path, _schemas()[1], max_bytes)
    return _tensors_from_table(path, table), meta


def read_run(folder: str | os.PathLike[str], max_bytes: int = DEFAULT_MAX_FILE_BYTES) -> Run:
    """Read a golden (or result) folder. Raises GoldenMissingError or GoldenCorruptError."""
    folder = Path(folder)
    if folder.is_symlink():
        raise GoldenCorruptError(folder, "is a symbolic link; golden folders must be real folders")
    if not exists(folder):
        raise GoldenMissingError(folder, "no golden here")
    metrics, meta = read_metrics(folder / METRICS_FILE, max_bytes)
    tensors, _ = read_state(folder / STATE_FILE, max_bytes)
    trace = read_trace(folder / TRACE_FILE, max_bytes) if (folder / TRACE_FILE).exists() else None
    return Run(metrics=metrics, tensors=tensors, meta=meta, trace=trace)


def read_trace(path: str | os.PathLike[str], max_bytes: int = DEFAULT_MAX_FILE_BYTES) -> list[TraceEntry]:
    """Read one `trace.parquet` into entries in recording order."""
    path = Path(path)
    table, _ = _read_table(path, _trace_schema(), max_bytes)
    entries = []
    for i, row in enumerate(table.to_pylist()):
        if any(row[k] is None for k in ("step", "stage", "seq", "call", "name", "dtype", "shape", "sha256", "nonfinite")):
            raise GoldenCorruptError(path, f"row {i} has empty (null) cells")
        if row["stage"] not in STAGE_ORDER:
            raise GoldenCorruptError(path, f"row {i} has unknown stage {row['stage']!r}")
        floats = [math.nan if row[c] is None else float(row[c]) for c in _STATE_FLOAT_COLUMNS]
        entries.append(TraceEntry(int(row["step"]), row["stage"], int(row["seq"]), int(row["call"]), row["name"],
                                  row["dtype"],
                                  tuple(int(d) for d in row["shape"] if d is not None), row["sha256"],
                                  *floats, int(row["nonfinite"]), _sketch_cell(path, row["name"], row.get("sketch"))))
    return entries


def find_goldens(root: str | os.PathLike[str]) -> list[Path]:
    """Every golden folder below `root` (folders holding a golden file), sorted, symlinks not followed."""
    found = []
    for dirpath, dirnames, filenames in os.walk(root, followlinks=False):
        dirnames.sort()
        if METRICS_FILE in filenames or STATE_FILE in filenames:
            found.append(Path(dirpath))
    return sorted(found)


def _metrics_from_table(path: Path, table: Any) -> dict[str, MetricSeries]:
    names = table.column("metric").to_pylist()
    steps = table.column("step").to_numpy(zero_copy_only=False)
    values = table.column("value").to_numpy(zero_copy_only=False)
    if any(n is None for n in names) or table.column("step").null_count or table.column("value").null_count:
        raise GoldenCorruptError(path, "has empty (null) cells in metric, step or value")
    out: dict[str, MetricSeries] = {}
    if not names:
        return out
    names_arr = np.asarray(names, dtype=object)
    order = np.argsort(names_arr, kind="stable")
    for name in dict.fromkeys(names_arr[order]):
        mask = names_arr == name
        s = np.asarray(steps[mask], dtype=np.int64)
        if s.size > 1 and not np.all(np.diff(s) > 0):
            raise GoldenCorruptError(path, f"metric {name!r} has steps that do not strictly increase")
        out[str(name)] = MetricSeries(s, np.asarray(values[mask], dtype=np.float64))
    return out


def _tensors_from_table(path: Path, table: Any) -> dict[str, TensorRecord]:
    rows = table.to_pylist()
    out: dict[str, TensorRecord] = {}
    for i, row in enumerate(rows):
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
            values = np.array([math.nan if v is None else v for v in values], dtype=np.float64)
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
    return np.array([math.nan if v is None else v for v in cell], dtype=np.float64)
