"""Fuzzing the golden reader: only trainguard's own errors may come out of `read_run`.

Golden files arrive through pull requests, so the reader gets hostile bytes. Five
Hypothesis-driven tests (500 examples each, derandomized so CI sees the same cases every
run) mutate valid goldens: raw byte flips, truncations and insertions; metadata rewritten
with random and deeply nested JSON; tables of random column types; valid tables with
random cell values (resealed with a correct digest so the checks behind it are reached);
and, structure-aware, valid tables re-encoded (codecs, dictionary pages on or off, page
versions, row groups and pages of a few rows), with list cells of hostile lengths and
metadata fields given values of every type and range, all behind a valid digest.
Each prints how many cases it tried, how many were refused with a trainguard error, and how
many other exceptions escaped (must be 0).
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from golden_samples import make_run, same_run
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from trainguard.core import golden_format
from trainguard.core import store as golden
from trainguard.core.errors import TrainguardError
from trainguard.core.meta import GoldenMeta

pytestmark = pytest.mark.slow  # 2,000 mutated goldens, about 50 s of CPU: outside the fast subset (README)

EXAMPLES = 500
FUZZ = settings(max_examples=EXAMPLES, deadline=None, derandomize=True, database=None,
                suppress_health_check=list(HealthCheck))
FILES = ("metrics.parquet", "state.parquet", "trace.parquet")
A = make_run("A")


@pytest.fixture(scope="module")
def pristine(tmp_path_factory) -> tuple[Path, dict[str, bytes]]:
    base = tmp_path_factory.mktemp("fuzz") / "golden" / "test_proofing"
    golden.write_run(base, A)
    return base, {name: (base / name).read_bytes() for name in FILES}


class Tally:
    def __init__(self, label: str) -> None:
        self.label, self.cases, self.refused, self.accepted, self.escapes = label, 0, 0, 0, []

    def read(self, folder: Path):
        """read_run on a damaged folder: a Run, or None after a trainguard error; anything else is recorded."""
        self.cases += 1
        before = sorted(os.listdir(folder))
        try:
            run = golden.read_run(folder, max_bytes=1 << 20)
        except TrainguardError as exc:
            assert str(folder) in str(exc)  # every refusal names the folder or a file in it
            self.refused += 1
            run = None
        except BaseException as exc:  # noqa: BLE001 - exactly what this test hunts for
            self.escapes.append(f"{type(exc).__name__}: {str(exc)[:200]}")
            run = None
        else:
            self.accepted += 1
        assert sorted(os.listdir(folder)) == before  # reading never writes
        return run

    def report(self) -> None:
        print(f"\nfuzz {self.label}: {self.cases} cases, {self.refused} refused with a trainguard error, "
              f"{self.accepted} accepted, {len(self.escapes)} other exceptions escaped")
        assert self.cases >= EXAMPLES
        assert self.escapes == [], self.escapes[:5]


def _fresh(pristine, tmp_path: Path) -> Path:
    base, _ = pristine
    folder = tmp_path / "case"
    if folder.exists():
        shutil.rmtree(folder)
    shutil.copytree(base, folder)
    return folder


def _restore(folder: Path, original: dict[str, bytes]) -> None:
    """Put the pristine golden files back before the next case damages one."""
    for name in FILES:
        (folder / name).write_bytes(original[name])


# -- 1. raw bytes --------------------------------------------------------------------------------

_edit = st.one_of(
    st.tuples(st.just("flip"), st.integers(0, 1 << 20), st.integers(1, 255)),
    st.tuples(st.just("truncate"), st.integers(0, 1 << 20), st.just(0)),
    st.tuples(st.just("insert"), st.integers(0, 1 << 20), st.binary(min_size=1, max_size=16)),
    st.tuples(st.just("overwrite"), st.integers(0, 1 << 20), st.binary(min_size=1, max_size=16)),
)


def _apply(data: bytes, edits) -> bytes:
    out = bytearray(data)
    for op, pos, arg in edits:
        pos = pos % (len(out) + 1)
        if op == "flip" and out:
            out[pos % len(out)] ^= arg
        elif op == "truncate":
            del out[pos:]
        elif op == "insert":
            out[pos:pos] = arg
        elif op == "overwrite":
            out[pos:pos + len(arg)] = arg
    return bytes(out)


def test_fuzz_byte_flips_truncations_and_insertions(pristine, tmp_path):
    tally = Tally("raw bytes")
    folder = _fresh(pristine, tmp_path)
    _, original = pristine

    @FUZZ
    @given(name=st.sampled_from(FILES), edits=st.lists(_edit, min_size=1, max_size=4))
    def case(name, edits):
        _restore(folder, original)
        damaged = _apply(original[name], edits)
        (folder / name).write_bytes(damaged)
        run = tally.read(folder)
        if run is not None:  # accepted only where the bytes changed nothing the digest covers
            assert same_run(run, A), (name, edits)

    case()
    tally.report()


# -- 2. metadata ---------------------------------------------------------------------------------

_json = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False) | st.text(max_size=8),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=6), inner, max_size=4),
    max_leaves=20,
)
_known_keys = st.sampled_from(["nodeid", "seed", "deterministic", "tolerances", "max_values", "fingerprint",
                               "blessed_at", "reason", "calibrated", "format_version"])


@st.composite
def _meta_bytes(draw) -> bytes:
    kind = draw(st.integers(0, 3))
    if kind == 0:  # deep nesting, up to far past Python's recursion limit
        depth = draw(st.integers(1, 5000))
        opener, closer = draw(st.sampled_from([(b"[", b"]"), (b'{"k":', b"}")]))
        return opener * depth + b"0" + closer * depth
    if kind == 1:  # valid object, known keys with values of any type
        meta = dict(A.meta)
        meta.update(draw(st.dictionaries(_known_keys, _json, max_size=4)))
        return json.dumps(meta).encode()
    if kind == 2:  # any JSON at all
        return json.dumps(draw(_json)).encode()
    return draw(st.binary(max_size=64))  # not JSON


def test_fuzz_metadata_rewrites_with_random_and_deeply_nested_json(pristine, tmp_path):
    tally = Tally("metadata")
    folder = _fresh(pristine, tmp_path)
    _, original = pristine
    tables = {n: pq.read_table(folder / n) for n in FILES}

    @FUZZ
    @given(name=st.sampled_from(FILES), meta=_meta_bytes(), reseal=st.booleans(),
           version=st.one_of(st.just(b"2"), st.just(b"1"),
                             st.sampled_from([b"3", b"-1", b"02", b"", b"\xff", b"99999999999999999999"])),
           run_id=st.one_of(st.just(b"keep"), st.none(), st.binary(max_size=70)))
    def case(name, meta, reseal, version, run_id):
        _restore(folder, original)
        table = tables[name]
        md = dict(table.schema.metadata)
        md[golden_format.KEY_META] = meta
        md[golden_format.KEY_VERSION] = version
        if run_id == b"keep":
            pass
        elif run_id is None:
            md.pop(golden_format.KEY_RUN_ID, None)
        else:
            md[golden_format.KEY_RUN_ID] = run_id
        if reseal:
            md = golden_format.reseal(name, table, md)
        pq.write_table(table.replace_schema_metadata(md), folder / name)
        run = tally.read(folder)
        if run is not None:
            assert isinstance(run.meta, GoldenMeta)

    case()
    tally.report()


# -- 3. random column types ------------------------------------------------------------------------

_types = st.sampled_from([pa.int64(), pa.int32(), pa.float64(), pa.float32(), pa.string(), pa.large_string(), pa.binary(),
                          pa.bool_(), pa.null(), pa.list_(pa.int64()), pa.list_(pa.float64()), pa.list_(pa.string()),
                          pa.large_list(pa.float64()), pa.timestamp("ms"), pa.dictionary(pa.int32(), pa.string()),
                          pa.struct([("x", pa.float64())]), pa.list_(pa.list_(pa.float64())), pa.decimal128(10, 2)])
_names = st.sampled_from(sorted({f.name for n in FILES for f in golden_format.schema_of(n)}) + ["extra", ""])


def _random_array(data, arrow_type, rows: int):
    empty = pa.array([], type=arrow_type)
    if rows == 0:
        return empty
    nulls = pa.nulls(rows, arrow_type)
    if data.draw(st.booleans()):
        return nulls
    sample = {
        "int64": lambda: pa.array(data.draw(st.lists(st.integers(-2**63, 2**63 - 1) | st.none(), min_size=rows, max_size=rows)), arrow_type),
        "double": lambda: pa.array(data.draw(st.lists(st.floats() | st.none(), min_size=rows, max_size=rows)), arrow_type),
        "string": lambda: pa.array(data.draw(st.lists(st.text(max_size=6) | st.none(), min_size=rows, max_size=rows)), arrow_type),
        "list<item: int64>": lambda: pa.array(data.draw(st.lists(st.lists(st.integers(-5, 2**40), max_size=4) | st.none(), min_size=rows, max_size=rows)), arrow_type),
        "list<item: double>": lambda: pa.array(data.draw(st.lists(st.lists(st.floats(), max_size=30) | st.none(), min_size=rows, max_size=rows)), arrow_type),
    }.get(str(arrow_type))
    return sample() if sample else nulls


def test_fuzz_tables_of_random_column_types(pristine, tmp_path):
    tally = Tally("column types")
    folder = _fresh(pristine, tmp_path)
    _, original = pristine
    tables = {n: pq.read_table(folder / n) for n in FILES}

    @FUZZ
    @given(name=st.sampled_from(FILES), data=st.data(), reseal=st.booleans())
    def case(name, data, reseal):
        _restore(folder, original)
        rows = data.draw(st.integers(0, 6))
        expected = golden_format.schema_of(name)
        columns = {}
        for field in expected:  # start from the right schema, then change some columns
            choice = data.draw(st.integers(0, 3))
            if choice == 0:
                continue  # missing column
            arrow_type = field.type if choice == 1 else data.draw(_types)
            columns[field.name if choice != 3 else data.draw(_names)] = _random_array(data, arrow_type, rows)
        if data.draw(st.booleans()):
            columns[data.draw(_names)] = _random_array(data, data.draw(_types), rows)
        md = dict(tables[name].schema.metadata)
        try:
            table = pa.table(columns) if columns else pa.table({"x": pa.array([], pa.int64())})
        except (pa.ArrowException, ValueError):
            return
        try:
            if reseal:
                md = golden_format.reseal(name, table, md)
        except TypeError:
            pass  # a type the digest has no canonical form for: keep the old digest
        try:
            pq.write_table(table.replace_schema_metadata(md), folder / name)
        except (pa.ArrowException, ValueError):
            return  # a table Parquet cannot store is no test of the reader
        tally.read(folder)

    case()
    tally.report()


# -- 4. random cell values in the right schema -----------------------------------------------------


def test_fuzz_cell_values_behind_a_valid_digest(pristine, tmp_path):
    tally = Tally("cell values")
    folder = _fresh(pristine, tmp_path)
    _, original = pristine
    tables = {n: pq.read_table(folder / n) for n in FILES}

    @FUZZ
    @given(name=st.sampled_from(FILES), data=st.data())
    def case(name, data):
        _restore(folder, original)
        table = tables[name]
        for _ in range(data.draw(st.integers(1, 3))):
            field = table.schema.field(data.draw(st.integers(0, table.num_columns - 1)))
            rows = table.num_rows
            if data.draw(st.booleans()):
                array = _random_array(data, field.type, rows)
            else:  # one cell changed, the rest intact
                cells = table.column(field.name).to_pylist()
                one = pa.array([], field.type)
                while len(one) == 0:
                    one = _random_array(data, field.type, 1)
                cells[data.draw(st.integers(0, rows - 1))] = one.to_pylist()[0]
                array = pa.array(cells, field.type)
            table = table.set_column(table.schema.get_field_index(field.name), field.name, array)
        md = dict(tables[name].schema.metadata)
        md = golden_format.reseal(name, table, md)
        pq.write_table(table.replace_schema_metadata(md), folder / name)
        tally.read(folder)

    case()
    tally.report()


# -- 5. structure-aware: encodings, dictionary pages, list lengths, metadata fields ------------------

_tolerance_value = st.one_of(st.floats(), st.sampled_from([1e300, -0.0, 0.5, 0.51, 1e-2, 1.01e-2, 1e-4]),
                             st.integers(-3, 10**9), st.text(max_size=4), st.none(), st.booleans())
_field_values = {
    "seed": st.one_of(st.integers(-2, 2**33), st.booleans(), st.floats(), st.text(max_size=3)),
    "deterministic": st.one_of(st.sampled_from([True, False, "warn", "Warn", 0, 1, None]), st.text(max_size=3)),
    "tolerances": st.fixed_dictionaries({"rtol": _tolerance_value, "atol": _tolerance_value},
                                        optional={"exact": st.one_of(st.booleans(), st.integers(0, 1)),
                                                  "metrics": st.one_of(st.lists(st.integers(), max_size=2),
                                                                       st.dictionaries(st.text(max_size=3),
                                                                                       st.dictionaries(st.sampled_from(["rtol", "atol", "x"]), _tolerance_value, max_size=2), max_size=2)),
                                                  "source": st.text(max_size=3)}),
    "calibrated": st.fixed_dictionaries({"rtol": _tolerance_value, "atol": _tolerance_value},
                                        optional={"metrics": st.one_of(st.lists(st.integers(), max_size=2),
                                                                       st.dictionaries(st.text(max_size=3),
                                                                                       st.dictionaries(st.sampled_from(["rtol", "atol"]), _tolerance_value, max_size=2), max_size=2)),
                                                  "safety": st.floats(), "switch": st.text(max_size=3)}),
    "blessed_at": st.one_of(st.just("2026-12-01T21:57:42Z"), st.text(max_size=24)),
    "reason": st.one_of(st.text(max_size=30), st.text(alphabet="\r\n\x1b:|`<>", max_size=30), st.integers()),
    "max_values": st.one_of(st.integers(-5, 2**45), st.floats()),
    "fingerprint": st.one_of(st.dictionaries(st.text(max_size=4), _json, max_size=4), st.text(max_size=4)),
}


@st.composite
def _structure(draw, table):
    """A valid table re-encoded and re-shaped the ways Parquet allows, with metadata fields fuzzed."""
    columns = {name: table.column(name) for name in table.column_names}
    rows = table.num_rows
    # list lengths: the shape and sketch (or values) cells of one row given another length
    for name in ("shape", "sketch", "values"):
        if name in columns and rows and draw(st.booleans()):
            cells = columns[name].to_pylist()
            length = draw(st.sampled_from([0, 1, 65, 4097, 5000, 20_000]))
            fill = 1 if name == "shape" else 0.5
            cells[draw(st.integers(0, rows - 1))] = [fill] * length
            columns[name] = pa.array(cells, table.schema.field(name).type)
    new = pa.table(columns, schema=table.schema)
    meta = dict(A.meta.to_json())
    for key in draw(st.lists(st.sampled_from(sorted(_field_values)), max_size=3, unique=True)):
        meta[key] = draw(_field_values[key])
    options = dict(
        compression=draw(st.sampled_from(["zstd", "snappy", "gzip", "none", "brotli", "lz4"])),
        use_dictionary=draw(st.booleans()),
        row_group_size=draw(st.sampled_from([None, 1, 2, 5])),
        data_page_size=draw(st.sampled_from([None, 64, 1024])),
        data_page_version=draw(st.sampled_from(["1.0", "2.0"])),
        write_statistics=draw(st.booleans()),
    )
    return new, json.dumps(meta, allow_nan=True).encode(), options


def test_fuzz_structure_encodings_list_lengths_and_metadata_fields(pristine, tmp_path):
    tally = Tally("structure")
    folder = _fresh(pristine, tmp_path)
    _, original = pristine
    tables = {n: pq.read_table(folder / n) for n in FILES}

    @FUZZ
    @given(name=st.sampled_from(FILES), data=st.data())
    def case(name, data):
        _restore(folder, original)
        table, meta, options = data.draw(_structure(tables[name]))
        run_id = tables[name].schema.metadata[golden_format.KEY_RUN_ID].decode()
        targets = FILES if data.draw(st.booleans()) else (name,)  # metadata of the whole set, or one file
        for n in targets:
            t = table if n == name else tables[n]
            sealed = golden_format.seal(n, t, meta, run_id)
            pq.write_table(sealed, folder / n, **options)
        run = tally.read(folder)
        if run is not None:
            # accepted: then every tolerance it carries is finite and within the caps
            for key in ("tolerances", "calibrated"):
                for part in ("rtol", "atol"):
                    value = (run.meta.get(key) or {}).get(part, 0.0)
                    assert 0 <= value <= 1.0

    case()
    tally.report()
