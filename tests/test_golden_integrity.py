"""Golden storage integrity: digests, format versions, upgrade-goldens, symlinks, limits, hostile files."""

from __future__ import annotations

import hashlib
import json
import os
import struct
from dataclasses import replace
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from golden_samples import downgrade_to_format_1, file_tag, make_run, rewrite, same_run, snapshot

from trainguard import __version__
from trainguard.core import atomic, golden_format
from trainguard.core import store as golden
from trainguard.core.errors import GoldenCorruptError, GoldenError, GoldenVersionError, TrainguardError
from trainguard.core.records import TensorRecord
from trainguard.skins.cli import main

A, B = make_run("A"), make_run("B")


@pytest.fixture
def folder(tmp_path: Path) -> Path:
    target = tmp_path / "golden" / "tests" / "test_bakery.py" / "test_proofing"
    golden.write_run(target, A)
    return target


def _corrupt(folder: Path, expected_path: Path, *phrases: str, **kwargs) -> GoldenError:
    before = snapshot(folder.parent)
    with pytest.raises(GoldenError) as info:
        golden.read_run(folder, **kwargs)
    message = str(info.value)
    assert info.value.path == str(expected_path), message
    for phrase in phrases:
        assert phrase in message, message
    assert snapshot(folder.parent) == before  # a read never writes, not even a repair
    return info.value


# -- the digest ------------------------------------------------------------------------------


def _independent_digest(path: Path) -> str:
    """The README's digest definition, implemented again value by value with hashlib
    (SHA-256 as specified in FIPS 180-4), for files holding int64, float64, string and list columns."""
    table = pq.read_table(path)
    meta = table.schema.metadata

    def s(b: bytes) -> bytes:
        return struct.pack("<Q", len(b)) + b

    def type_name(t) -> str:
        if pa.types.is_list(t):
            return f"list<{type_name(t.value_type)}>"
        return {"int64": "int64", "double": "float64", "string": "string"}[str(t)]

    def values(t, cells) -> bytes:
        out = struct.pack("<Q", len(cells)) + bytes(0 if c is None else 1 for c in cells)
        if pa.types.is_list(t):
            out += b"".join(struct.pack("<Q", 0 if c is None else len(c)) for c in cells)
            return out + values(t.value_type, [x for c in cells if c is not None for x in c])
        if str(t) == "string":
            data = [b"" if c is None else c.encode() for c in cells]
            return out + b"".join(struct.pack("<Q", len(d)) for d in data) + b"".join(data)
        fmt = "<q" if str(t) == "int64" else "<d"
        return out + b"".join(struct.pack(fmt, 0 if c is None else c) for c in cells)

    items = sorted((k, v) for k, v in meta.items() if k.startswith(b"trainguard.") and k != b"trainguard.digest")
    head = s(path.name.encode()) + struct.pack("<Q", len(items)) + b"".join(s(k) + s(v) for k, v in items)
    head += struct.pack("<Q", table.num_columns)
    if int(meta[b"trainguard.format_version"]) < 4:
        body = b"trainguard golden digest 1\x00" + head
        for field in table.schema:
            body += s(field.name.encode()) + s(type_name(field.type).encode())
            body += values(field.type, table.column(field.name).to_pylist())
        return "sha256:" + hashlib.sha256(body).hexdigest()
    # Format 4: each column has its own digest, listed in trainguard.columns; the file's digest
    # covers the metadata (so those column digests) and the column names and types.
    listed = json.loads(meta[b"trainguard.columns"])
    assert [name for name, _ in listed] == table.column_names
    for (name, stored), field in zip(listed, table.schema):
        column = b"trainguard column digest 1\x00" + s(path.name.encode()) + s(name.encode())
        column += s(type_name(field.type).encode()) + values(field.type, table.column(name).to_pylist())
        assert stored == hashlib.sha256(column).hexdigest(), (path.name, name)
    body = b"trainguard golden digest 2\x00" + head
    body += b"".join(s(f.name.encode()) + s(type_name(f.type).encode()) for f in table.schema)
    return "sha256:" + hashlib.sha256(body).hexdigest()


def test_every_file_carries_current_format_metadata_and_a_digest_matching_the_documented_definition(folder):
    run_ids = set()
    for name in ("metrics.parquet", "state.parquet", "trace.parquet"):
        meta = pq.ParquetFile(folder / name).schema_arrow.metadata
        assert meta[b"trainguard.format_version"] == b"4"
        assert meta[b"trainguard.writer"] == __version__.encode()
        digest = meta[b"trainguard.digest"].decode()
        assert digest.startswith("sha256:") and len(digest) == 7 + 64
        assert digest == _independent_digest(folder / name), name
        run_ids.add(meta[b"trainguard.run_id"])
    assert len(run_ids) == 1  # one write, one run id shared by all its files
    golden.write_run(folder, B)
    second = {pq.ParquetFile(folder / n).schema_arrow.metadata[b"trainguard.run_id"] for n in ("metrics.parquet", "state.parquet")}
    assert len(second) == 1 and second != run_ids


def test_digest_does_not_depend_on_parquet_encoding(folder):
    # Another writer (or pyarrow version) may choose other encodings, compression and page layout.
    for name in ("metrics.parquet", "state.parquet", "trace.parquet"):
        table = pq.read_table(folder / name)
        pq.write_table(table, folder / name, compression="none", use_dictionary=False, row_group_size=2,
                       data_page_size=64, data_page_version="2.0", write_statistics=False)
    assert same_run(golden.read_run(folder), A)


@pytest.mark.parametrize("name", ["metrics.parquet", "state.parquet", "trace.parquet"])
def test_an_edit_that_still_parses_is_reported_as_tampering_naming_the_file(folder, name):
    path = folder / name
    table = pq.read_table(path)
    column = {"metrics.parquet": "value", "state.parquet": "min", "trace.parquet": "l2"}[name]
    cells = table.column(column).to_pylist()
    cells[1] = cells[1] + 1e-12  # one value, off in its last bits
    rewrite(path, table.set_column(table.schema.get_field_index(column), column, pa.array(cells, pa.float64())))
    error = _corrupt(folder, path, "digest", "tampering or corruption")
    assert "re-bless" in error.fix and "--trainguard-bless" in error.fix


def test_a_sign_bit_and_a_metadata_edit_are_both_caught(folder):
    path = folder / "state.parquet"
    table = pq.read_table(path)
    values = table.column("values").to_pylist()
    row = table.column("name").to_pylist().index("dough.weight")
    assert str(values[row][3]) == "-0.0"
    values[row][3] = 0.0  # equal as numbers, different bits
    rewrite(path, table.set_column(table.schema.get_field_index("values"), "values", pa.array(values, pa.list_(pa.float64()))))
    _corrupt(folder, path, "digest")

    golden.write_run(folder, A)
    meta = json.loads(pq.ParquetFile(folder / "metrics.parquet").schema_arrow.metadata[b"trainguard.meta"])
    meta["tolerances"]["rtol"] = 0.5  # quietly loosen the tolerance
    rewrite(folder / "metrics.parquet", metadata={b"trainguard.meta": json.dumps(meta, sort_keys=True).encode()})
    _corrupt(folder, folder / "metrics.parquet", "digest")


def test_a_file_of_another_write_makes_the_set_mixed(tmp_path, folder):
    other = tmp_path / "other"
    golden.write_run(other, B)
    (folder / "state.parquet").write_bytes((other / "state.parquet").read_bytes())
    _corrupt(folder, folder, "different writes")


# -- format versions and upgrade-goldens ---------------------------------------------------------


def test_format_1_goldens_are_refused_with_the_fix_and_never_read(folder):
    # A format-2 golden edited and rewritten as format 1 (digest dropped) is the downgrade that
    # used to bypass tamper detection: now no reader takes format 1 at all.
    table = pq.read_table(folder / "metrics.parquet")
    rewrite(folder / "metrics.parquet", table.set_column(2, "value", pa.array(np.zeros(table.num_rows))))
    downgrade_to_format_1(folder)
    with pytest.raises(GoldenVersionError) as info:
        golden.read_run(folder)
    assert "format 1" in str(info.value) and "trainguard upgrade-goldens" in str(info.value)


def test_upgrade_refuses_a_folder_that_mixes_formats(tmp_path, capsys):
    root = tmp_path / "golden"
    target = root / "tests" / "test_a.py" / "test_mixed"
    golden.write_run(target, A)
    downgrade_to_format_1(target, only="state.parquet")  # one file of a format-2 golden rewritten as format 1
    before = snapshot(root)
    assert main(["upgrade-goldens", str(root)]) == 2
    assert "mix" in capsys.readouterr().err  # refused as a mixed set (run ids differ) or as mixed formats
    assert snapshot(root) == before


def test_upgrade_refuses_a_file_that_was_format_2_in_the_last_commit(tmp_path, capsys):
    import subprocess

    root = tmp_path / "golden"
    target = root / "tests" / "test_a.py" / "test_downgraded"
    golden.write_run(target, A)
    git = ["git", "-c", "user.name=Depot", "-c", "user.email=depot@example.invalid"]
    subprocess.run(["git", "init", "-q", str(tmp_path)], check=True)
    subprocess.run([*git, "-C", str(tmp_path), "add", "-A"], check=True)
    subprocess.run([*git, "-C", str(tmp_path), "commit", "-qm", "goldens"], check=True)
    table = pq.read_table(target / "metrics.parquet")
    rewrite(target / "metrics.parquet", table.set_column(2, "value", pa.array(np.zeros(table.num_rows))))
    downgrade_to_format_1(target)
    before = snapshot(root)
    assert main(["upgrade-goldens", str(root)]) == 2
    err = capsys.readouterr().err
    assert "was format 2 in the last commit" in err and "git checkout HEAD --" in err
    assert snapshot(root) == before


def test_upgrade_goldens_is_idempotent_keeps_content_and_adds_digests(tmp_path, capsys):
    root = tmp_path / "golden"
    old, current = root / "tests" / "test_a.py" / "test_old", root / "tests" / "test_a.py" / "test_current"
    golden.write_run(old, A)
    golden.write_run(current, B)
    downgrade_to_format_1(old)
    (old / ".tmp-state.parquet.999.abc").write_bytes(b"leftover of a killed bless")
    meta_before = pq.ParquetFile(old / "state.parquet").schema_arrow.metadata[b"trainguard.meta"]
    current_before = snapshot(current)

    assert main(["upgrade-goldens", str(root)]) == 0
    out = capsys.readouterr().out
    assert "1 of 2 golden folder(s)" in out and "upgraded from format 1" in out
    assert "its trace was dropped: re-bless the test to record one" in out  # events were grouped another way
    assert "vouches for their content" in out  # the user is told what the upgrade takes on trust
    assert snapshot(current) == current_before  # already current: not rewritten
    back = golden.read_run(old)
    assert back.meta["format_version"] == 4 and same_run(back, replace(A, trace=None))
    for name in ("metrics.parquet", "state.parquet"):
        meta = pq.ParquetFile(old / name).schema_arrow.metadata
        assert meta[b"trainguard.digest"].decode() == _independent_digest(old / name)
    assert pq.ParquetFile(old / "state.parquet").schema_arrow.metadata[b"trainguard.meta"] == meta_before
    assert sorted(p.name for p in old.iterdir()) == ["metrics.parquet", "state.parquet"]

    after_first = snapshot(root)
    assert main(["upgrade-goldens", str(root)]) == 0
    assert "0 of 2" in capsys.readouterr().out
    assert snapshot(root) == after_first  # second run: byte-identical files

    # now that a digest exists, the same edit as in the format-1 test is caught
    table = pq.read_table(old / "metrics.parquet")
    rewrite(old / "metrics.parquet", table.set_column(2, "value", pa.array(np.zeros(table.num_rows))))
    _corrupt(old, old / "metrics.parquet", "digest")


def test_upgrade_goldens_writes_nothing_when_any_golden_is_unusable(tmp_path, capsys):
    root = tmp_path / "golden"
    good, bad = root / "t" / "test_good", root / "t" / "test_bad"
    golden.write_run(good, A)
    golden.write_run(bad, B)
    downgrade_to_format_1(good)
    downgrade_to_format_1(bad)
    (bad / "state.parquet").write_bytes((bad / "state.parquet").read_bytes()[:-30])
    before = snapshot(root)
    assert main(["upgrade-goldens", str(root)]) == 2
    err = capsys.readouterr().err
    assert str(bad / "state.parquet") in err and "Traceback" not in err
    assert snapshot(root) == before


def test_upgrade_of_a_folder_is_atomic_when_interrupted(tmp_path, monkeypatch):
    root = tmp_path / "golden"
    target = root / "t" / "test_kiln"
    golden.write_run(target, A)
    downgrade_to_format_1(target)
    before = snapshot(root)

    def crash(*args, **kwargs):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(atomic.FileSet, "_commit", crash)
    with pytest.raises(OSError):
        golden.upgrade_goldens(root)
    assert snapshot(root) == before  # the temp files of the interrupted upgrade were removed
    monkeypatch.undo()
    assert golden.upgrade_goldens(root) == [
        (target, "upgraded from format 1 (its trace was dropped: re-bless the test to record one)")]
    assert same_run(golden.read_run(target), replace(A, trace=None))


def test_a_newer_format_is_refused_saying_which_trainguard_reads_it(folder, tmp_path, capsys):
    for name in ("metrics.parquet", "state.parquet", "trace.parquet"):
        rewrite(folder / name, metadata={b"trainguard.format_version": b"5", b"trainguard.writer": b"0.9.0"})
    error = _corrupt(folder, folder / "metrics.parquet", "golden format 5", "by trainguard 0.9.0",
                     f"this trainguard ({__version__}) reads formats 1 to 4")
    assert isinstance(error, GoldenVersionError) and "trainguard 0.9.0 or later" in error.fix
    before = snapshot(folder.parent)
    assert main(["upgrade-goldens", str(folder.parent)]) == 2  # never "upgrades" a newer golden down
    assert "0.9.0" in capsys.readouterr().err and snapshot(folder.parent) == before
    rewrite(folder / "metrics.parquet", metadata={b"trainguard.format_version": b"7", b"trainguard.writer": b""})
    error = _corrupt(folder, folder / "metrics.parquet", "golden format 7")
    assert f"a trainguard newer than {__version__}" in error.fix


# -- sets, commit records, temp files ------------------------------------------------------------


def test_leftover_temp_files_are_ignored_by_readers_and_removed_by_the_next_write(folder):
    (folder / ".tmp-metrics.parquet.4242.deadbeef0000").write_bytes(b"half a parquet file")
    (folder / ".tmp-state.parquet.4242.deadbeef0001").write_bytes((folder / "state.parquet").read_bytes()[:50])
    assert same_run(golden.read_run(folder), A)
    golden.write_run(folder, B)
    assert sorted(p.name for p in folder.iterdir()) == ["metrics.parquet", "state.parquet", "trace.parquet"]
    assert same_run(golden.read_run(folder), B)


def _interrupted_after_commit(folder: Path, run, drop_trace: bool = False) -> None:
    """Do what write_run does up to and including its commit record, then stop (as if killed)."""
    import uuid

    meta = json.dumps(run.meta.to_json(), sort_keys=True).encode()
    run_id = uuid.uuid4().hex
    tables = {"metrics.parquet": golden_format.metrics_table(run), "state.parquet": golden_format.state_table(run)}
    if not drop_trace:
        tables["trace.parquet"] = golden_format.trace_table(run)
    temps = {k: atomic.write_temp(folder, k, golden_format.parquet_writer(k, golden_format.seal(k, t, meta, run_id)))
             for k, t in tables.items()}
    os.replace(temps.pop("metrics.parquet"), folder / "metrics.parquet")  # killed after the first rename
    record = {"run_id": run_id, "replace": {k: p.name for k, p in temps.items()} | {"metrics.parquet": ".tmp-metrics.parquet.1.0123456789ab"},
              "remove": ["trace.parquet"] if drop_trace else []}
    (folder / atomic.COMMIT_FILE).write_text(json.dumps(record))


@pytest.mark.parametrize("drop_trace", [False, True])
def test_a_write_killed_after_its_commit_reads_whole_and_is_completed_by_the_next_write(folder, drop_trace):
    expected = make_run("B", with_trace=not drop_trace)
    _interrupted_after_commit(folder, expected, drop_trace)
    assert file_tag(folder / "state.parquet") == "run A"  # on disk: a mixed set ...
    assert same_run(golden.read_run(folder), expected)  # ... that readers see as the committed write, whole
    golden.write_run(folder, make_run("C"))  # the next write completes the switch, then writes its own set
    assert same_run(golden.read_run(folder), make_run("C"))
    assert sorted(p.name for p in folder.iterdir()) == ["metrics.parquet", "state.parquet", "trace.parquet"]


@pytest.mark.parametrize("record", [
    b"not json", b"[]", b'{"run_id": "x", "replace": {"metrics.parquet": "../../../etc/passwd"}, "remove": []}',
    b'{"run_id": "x", "replace": {"../outside": ".tmp-../outside.1"}, "remove": []}',
    b'{"run_id": "x", "replace": {}, "remove": ["../../important"]}', b"[" * 100000,
])
def test_a_hostile_commit_record_is_refused_naming_it(folder, record):
    (folder / atomic.COMMIT_FILE).write_bytes(record)
    _corrupt(folder, folder / atomic.COMMIT_FILE, "")
    golden.write_run(folder, B)  # a bless replaces it without following it
    assert same_run(golden.read_run(folder), B) and not (folder / atomic.COMMIT_FILE).exists()


# -- symlinks, folders, sizes ----------------------------------------------------------------------


def test_a_golden_file_that_is_a_symlink_leading_outside_is_refused(folder, tmp_path):
    outside = tmp_path / "elsewhere.parquet"
    outside.write_bytes((folder / "state.parquet").read_bytes())
    (folder / "state.parquet").unlink()
    (folder / "state.parquet").symlink_to(outside)
    _corrupt(folder, folder / "state.parquet", "symbolic link")


def test_a_symlinked_golden_folder_or_parent_folder_is_refused(tmp_path):
    root = tmp_path / "golden"
    real = tmp_path / "outside" / "test_bakery.py"
    golden.write_run(real / "test_proofing", A)
    root.mkdir()
    (root / "tests").mkdir()
    (root / "tests" / "test_bakery.py").symlink_to(real, target_is_directory=True)
    through_parent = root / "tests" / "test_bakery.py" / "test_proofing"
    with pytest.raises(GoldenCorruptError, match="symbolic link") as info:
        golden.read_run(through_parent, root=root)
    assert info.value.path == str(root / "tests" / "test_bakery.py")
    (root / "tests" / "test_direct").symlink_to(real / "test_proofing", target_is_directory=True)
    with pytest.raises(GoldenCorruptError, match="symbolic link"):
        golden.read_run(root / "tests" / "test_direct")
    # and a bless through the link writes nothing outside the golden dir
    before = snapshot(tmp_path / "outside")
    with pytest.raises(GoldenCorruptError, match="symbolic link"):
        golden.write_run(through_parent, B, root=root)
    with pytest.raises(GoldenCorruptError, match="symbolic link"):
        golden.write_run(root / "tests" / "test_direct", B)
    assert snapshot(tmp_path / "outside") == before


def test_a_folder_where_a_golden_file_belongs_is_refused_for_reading_and_writing(folder):
    (folder / "trace.parquet").unlink()
    (folder / "trace.parquet").mkdir()
    _corrupt(folder, folder / "trace.parquet", "not a regular file")
    with pytest.raises(GoldenCorruptError, match="not a regular file"):
        golden.write_run(folder, B)
    assert (folder / "trace.parquet").is_dir() and file_tag(folder / "metrics.parquet") == "run A"


def test_files_over_the_size_limit_are_refused_before_loading(folder, monkeypatch):
    size = (folder / "state.parquet").stat().st_size
    opened = []
    real = pq.ParquetFile
    monkeypatch.setattr(pq, "ParquetFile", lambda *a, **k: opened.append(a) or real(*a, **k))
    assert (folder / "metrics.parquet").stat().st_size > 100
    _corrupt(folder, folder / "metrics.parquet", "over the 100-byte limit", "trainguard_max_file_mib", max_bytes=100)
    assert opened == []  # refused on its size alone: pyarrow never opened it
    assert golden.read_run(folder, max_bytes=size + 10_000) is not None


def test_ini_value_of_the_size_limit():
    from trainguard.core.errors import UsageError

    assert golden_format.max_bytes_from_ini("") == 32 * 1024 * 1024
    assert golden_format.max_bytes_from_ini("2") == 2 * 1024 * 1024
    assert golden_format.max_bytes_from_ini("0.5") == 512 * 1024
    for bad in ("0", "-1", "nan", "inf", "lots"):
        with pytest.raises(UsageError, match="trainguard_max_file_mib"):
            golden_format.max_bytes_from_ini(bad)


def test_declared_uncompressed_sizes_and_value_counts_are_limited(tmp_path):
    run = make_run("A", with_trace=False)
    zeros = np.zeros(60_000)
    run.tensors["oven.bias"] = TensorRecord("oven.bias", "buffer", "float64", (60_000,), "0" * 64,
                                                   0.0, 0.0, 0.0, 0.0, 0, values=zeros)
    golden.write_run(tmp_path / "g", run)
    path = tmp_path / "g" / "state.parquet"
    file_size = path.stat().st_size
    assert file_size < 60_000  # zeros compress to almost nothing ...
    limit = max(file_size, (tmp_path / "g" / "metrics.parquet").stat().st_size) + 1
    with pytest.raises(GoldenCorruptError) as info:  # ... but decoding them would take 480 kB
        golden.read_run(tmp_path / "g", max_bytes=limit)
    assert info.value.path == str(path) and "would decode to" in str(info.value)
    assert same_run(golden.read_run(tmp_path / "g"), run)


# -- hostile inputs, each named and handled without a traceback --------------------------------------


def _footer_claims(path: Path, length: int) -> None:
    data = bytearray(path.read_bytes())
    data[-8:-4] = struct.pack("<I", length)  # Apache Parquet spec: 4-byte little-endian footer length, then "PAR1"
    path.write_bytes(bytes(data))


def _set_state_cells(path: Path, **cells) -> None:
    table = pq.read_table(path)
    for column, value in cells.items():
        arr = table.column(column).to_pylist()
        arr[0] = value
        table = table.set_column(table.schema.get_field_index(column), column, pa.array(arr, table.schema.field(column).type))
    rewrite(path, table, reseal=True)


def _set_meta(path: Path, text: bytes) -> None:
    rewrite(path, metadata={b"trainguard.meta": text}, reseal=True)


HOSTILE = {
    "truncated to 0 bytes": ("state.parquet", lambda p: p.write_bytes(b""), "not a readable Parquet file"),
    "truncated to 7 bytes": ("state.parquet", lambda p: p.write_bytes(p.read_bytes()[:7]), "not a readable Parquet file"),
    "truncated by half": ("metrics.parquet", lambda p: p.write_bytes(p.read_bytes()[: len(p.read_bytes()) // 2]), "Parquet"),
    "footer claims 2 GiB": ("state.parquet", lambda p: _footer_claims(p, 0x7FFFFFFF), "not a readable Parquet file"),
    "footer claims 0 bytes": ("trace.parquet", lambda p: _footer_claims(p, 0), "not a readable Parquet file"),
    "a flipped byte in the data": ("trace.parquet", lambda p: p.write_bytes(bytes([b ^ 0x10 if i == 100 else b for i, b in enumerate(p.read_bytes())])), ""),
    "not parquet at all": ("metrics.parquet", lambda p: p.write_bytes(b"PAR1" + b"\x00" * 64 + b"PAR1"), "not a readable Parquet file"),
    "column missing": ("metrics.parquet", lambda p: rewrite(p, pq.read_table(p).drop_columns(["value"]), reseal=True), "has no column 'value'"),
    "column of the wrong type": ("metrics.parquet", lambda p: rewrite(p, pq.read_table(p).set_column(1, "step", pa.array([1.5] * pq.read_table(p).num_rows)), reseal=True), "column 'step' has type double, expected int64"),
    "an extra column": ("metrics.parquet", lambda p: rewrite(p, pq.read_table(p).append_column("note", pa.array(["x"] * pq.read_table(p).num_rows)), reseal=True), "columns trainguard does not write"),
    "metadata JSON nested 100000 deep": ("metrics.parquet", lambda p: _set_meta(p, b"[" * 100000 + b"]" * 100000), "not valid JSON"),
    "metadata JSON nested 500 deep": ("metrics.parquet", lambda p: _set_meta(p, b'{"a":' * 500 + b"1" + b"}" * 500), "nested deeper"),
    "metadata not JSON": ("metrics.parquet", lambda p: _set_meta(p, b"\xff\xfe{"), "not valid JSON"),
    "metadata a JSON list": ("metrics.parquet", lambda p: _set_meta(p, b"[1, 2]"), "not a JSON object"),
    "metadata of the wrong types": ("metrics.parquet", lambda p: _set_meta(p, b'{"tolerances": 5}'), "'tolerances' of the wrong type"),
    "format version garbage": ("metrics.parquet", lambda p: rewrite(p, metadata={b"trainguard.format_version": b"1e9999"}), "unreadable format version"),
    "format version 0": ("metrics.parquet", lambda p: rewrite(p, metadata={b"trainguard.format_version": b"0"}), "invalid format version"),
    "digest removed": ("state.parquet", lambda p: rewrite(p, metadata={b"trainguard.digest": b""}), "digest"),
    "huge numel claimed": ("state.parquet", lambda p: _set_state_cells(p, shape=[2**40, 2**40], numel=2**62), "does not match numel"),
    "values list longer than numel": ("state.parquet", lambda p: _set_state_cells(p, values=[1.0] * 25), "stored values for 24 elements"),
    "negative shape": ("state.parquet", lambda p: _set_state_cells(p, shape=[-4, -6]), "invalid shape"),
    "null tensor name": ("state.parquet", lambda p: _set_state_cells(p, name=None), "no tensor name"),
    "unknown trace stage": ("trace.parquet", lambda p: rewrite(p, pq.read_table(p).set_column(1, "stage", pa.array(["baking"] * pq.read_table(p).num_rows)), reseal=True), "unknown stage"),
    "sketch of a million values": ("state.parquet", lambda p: _set_state_cells(p, sketch=[0.0] * 5000), "trainguard writes at most 4096"),
}


def test_hostile_inputs_each_give_a_named_error_and_no_write(tmp_path):
    handled = []
    for label, (name, damage, phrase) in HOSTILE.items():
        target = tmp_path / label.replace(" ", "_") / "test_proofing"
        golden.write_run(target, A)
        damage(target / name)
        before = snapshot(target)
        try:
            golden.read_run(target)
        except TrainguardError as exc:
            assert str(target) in str(exc), (label, exc)
            assert phrase in str(exc), (label, exc)
            handled.append(label)
        assert snapshot(target) == before, label
    print(f"\nhostile inputs: {len(HOSTILE)} tried, {len(handled)} handled with a named error")
    assert len(handled) == len(HOSTILE)


# -- the ini option, end to end ----------------------------------------------------------------------

SCALE_TEST = '''
import pytest
import torch


@pytest.mark.trainguard(seed=3)
def test_scale_reading(trajectory):
    model = torch.nn.Linear(3, 1)
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    flour = torch.randn(8, 3)
    for step in range(3):
        opt.zero_grad()
        loss = model(flour).pow(2).mean()
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss)
    trajectory.state(model, optimizer=opt)
'''


@pytest.mark.slow
def test_ini_max_file_mib_refuses_large_goldens_in_a_real_run(pytester):
    pytester.makepyfile(test_scale=SCALE_TEST)
    args = ("-p", "no:cacheprovider", "-p", "no:xdist", "-p", "no:hypothesispytest")
    assert pytester.runpytest_subprocess(*args, "--trainguard-bless", "--trainguard-reason", "first").ret == 0
    pytester.makeini("[pytest]\ntrainguard_max_file_mib = 0.0001\n")  # 104 bytes: smaller than any golden file
    result = pytester.runpytest_subprocess(*args)
    assert result.ret == 1
    out = result.stdout.str()
    assert "over the 104-byte limit for golden files" in out and "metrics.parquet" in out
    assert "trainguard_max_file_mib" in out  # the fix names the option
    assert "Traceback" not in out


def test_a_format_2_golden_is_read_without_its_trace_and_upgraded_to_current(tmp_path, monkeypatch, capsys):
    """Format 3 numbers trace events in call order; a format-2 trace grouped them by stage, so it is
    left out when read (the report says why) and dropped by upgrade-goldens; metrics and state stay."""
    from trainguard.core import golden_format
    from trainguard.core.comparison import compare
    from trainguard.core.tolerance import Policy

    root = tmp_path / "golden"
    target = root / "t" / "test_oven"
    with monkeypatch.context() as m:
        m.setattr(golden_format, "FORMAT_VERSION", 2)
        golden.write_run(target, A)
    assert pq.ParquetFile(target / "trace.parquet").schema_arrow.metadata[b"trainguard.format_version"] == b"2"
    back = golden.read_run(target)
    assert back.meta["format_version"] == 2 and back.trace is None and same_run(back, replace(A, trace=None))
    cmp = compare(back, A, Policy())
    assert cmp.outcome == "identical" and cmp.trace is None
    assert cmp.trace_note.startswith("trace: not compared, the golden's trace is in format 2")
    assert main(["upgrade-goldens", str(root)]) == 0
    assert "upgraded from format 2 (its trace was dropped" in capsys.readouterr().out
    assert sorted(p.name for p in target.iterdir()) == ["metrics.parquet", "state.parquet"]
    assert golden.read_run(target).meta["format_version"] == golden_format.FORMAT_VERSION == 4


# -- format 4: per-column digests and the light read ---------------------------------------------


def _edit_first_value(path: Path, reseal: bool = False) -> None:
    """Change one stored value of the first state row (its checksum column left as it was)."""
    table = pq.read_table(path)
    cells = table.column("values").to_pylist()
    first = next(i for i, c in enumerate(cells) if c)
    cells[first] = [cells[first][0] + 1.0] + cells[first][1:]
    index = table.schema.get_field_index("values")
    rewrite(path, table.set_column(index, "values", pa.array(cells, table.schema.field("values").type)), reseal=reseal)


def test_a_light_read_leaves_stored_values_undecoded_and_still_verifies_what_it_reads(folder):
    store = golden.GoldenStore(folder.parent.parent.parent)
    light = store.read(folder, light=True)
    assert light.trace is None  # the trace file is not read at all
    assert all(rec.values is None for rec in light.tensors.values())
    full = store.read(folder)
    assert {n: r.sha256 for n, r in light.tensors.items()} == {n: r.sha256 for n, r in full.tensors.items()}
    assert any(rec.values is not None for rec in full.tensors.values()) and full.trace
    # An edited checksum column is caught by the light read too (its column digest no longer matches).
    table = pq.read_table(folder / "state.parquet")
    sums = table.column("sha256").to_pylist()
    sums[0] = "0" * 64
    rewrite(folder / "state.parquet", table.set_column(table.schema.get_field_index("sha256"), "sha256", pa.array(sums)))
    with pytest.raises(GoldenError, match="for column 'sha256'"):
        store.read(folder, light=True)


def test_an_edited_stored_value_is_caught_whenever_values_are_read(folder):
    """The light read skips the values column, so it cannot see an edit there; any read that uses the
    values (a check that found a checksum differing, `trainguard show`, audit) decodes and verifies it."""
    _edit_first_value(folder / "state.parquet")
    store = golden.GoldenStore(folder.parent.parent.parent)
    store.read(folder, light=True)  # not decoded, not used: nothing to verify
    _corrupt(folder, folder / "state.parquet", "for column 'values'", "tampering or corruption")


def test_column_digests_are_sealed_by_the_file_digest(folder):
    """Editing a value and its column digest, without recomputing the file's digest, is caught before
    anything is decoded; recomputing both (`reseal`) is what a deliberate edit takes (no signature)."""
    path = folder / "state.parquet"
    meta = dict(pq.ParquetFile(path).schema_arrow.metadata)
    _edit_first_value(path)
    table = pq.read_table(path)
    meta[b"trainguard.columns"] = golden_format.columns_entry("state.parquet", table)
    pq.write_table(table.replace_schema_metadata(meta), path)
    _corrupt(folder, path, "does not match the SHA-256 digest stored in it: its content or metadata was changed")
    pq.write_table(table.replace_schema_metadata(golden_format.reseal("state.parquet", table, meta)), path)
    assert golden.read_run(folder).tensors  # resealed: reads again (why golden changes need review)
