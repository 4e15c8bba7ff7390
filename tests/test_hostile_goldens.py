"""Goldens crafted by a hostile pull request: memory bombs, silent off-switches, downgrades,
hidden temp files, links, quadratic parsing, log and Markdown injection.

Every file here carries a *valid* content digest where the attack needs one (recomputed as
anyone who reads the format's documentation can), so the defences tested are the ones that
do not rely on the digest. Figures printed with -s go into the closing notes.
"""

from __future__ import annotations

import errno
import json
import os
import subprocess
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from golden_samples import make_run, rewrite, snapshot

from trainguard.core import golden_format
from trainguard.core import store as golden
from trainguard.core.errors import GoldenCorruptError, GoldenError, TrainguardError
from trainguard.core.meta import GoldenMeta
from trainguard.core.paths import golden_folder
from trainguard.core.records import MetricSeries, Run, TensorRecord
from trainguard.core.text import md_escape, safe_output, untrusted
from trainguard.skins.cli import main

MiB = 1024 * 1024
#: The decoded-size limit at the default file size limit; the "under the limit" bombs fill 95 % of it.
LIMIT = golden_format.read_limits(golden_format.DEFAULT_MAX_FILE_BYTES)["decoded"]


# -- memory bombs --------------------------------------------------------------------------------

def _sealed_write(path: Path, kind: str, table: pa.Table, meta: dict, row_group_size: int | None = None) -> None:
    """Write `table` as a golden file with a valid digest, encoded as compactly as Parquet allows
    (dictionary + RLE for every column): what a bomb's author would do."""
    sealed = golden_format.seal(kind, table, json.dumps(meta, sort_keys=True).encode(), "0" * 32)
    pq.write_table(sealed, path, compression="zstd", use_dictionary=True, row_group_size=row_group_size)


def _state_bomb(folder: Path, elements: int, rows: int = 1) -> None:
    """One tensor row (or several) whose stored values are `elements` zeros: a few KiB on disk."""
    per_row = elements // rows
    schema = golden_format.schema_of(golden_format.STATE_FILE)
    zeros = pa.array(np.zeros(per_row))
    values = pa.ListArray.from_arrays(pa.array(np.arange(0, (rows + 1) * per_row, per_row, dtype=np.int32)),
                                      pa.concat_arrays([zeros] * rows))
    cols = {"name": [f"w{i}" for i in range(rows)], "kind": ["parameter"] * rows, "dtype": ["float64"] * rows,
            "shape": [[per_row]] * rows, "numel": [per_row] * rows, "sha256": ["0" * 64] * rows,
            "min": [0.0] * rows, "max": [0.0] * rows, "mean": [0.0] * rows, "l2": [0.0] * rows,
            "nonfinite": [0] * rows, "sketch": [None] * rows}
    arrays = [values if f.name == "values" else pa.array(cols[f.name], f.type) for f in schema]
    folder.mkdir(parents=True, exist_ok=True)
    _sealed_write(folder / "state.parquet", golden_format.STATE_FILE, pa.Table.from_arrays(arrays, schema=schema), {})
    _metrics(folder, 3)


def _metrics(folder: Path, rows: int, names: int = 1, long_name: int = 0) -> None:
    schema = golden_format.schema_of(golden_format.METRICS_FILE)
    idx = np.arange(rows)
    name_values = np.array([("m" * long_name) + f"{i}" for i in range(names)], dtype=object)
    folder.mkdir(parents=True, exist_ok=True)
    table = pa.Table.from_arrays([pa.array(name_values[idx % names], pa.string()),
                                  pa.array(idx // names, pa.int64()), pa.array(np.zeros(rows))], schema=schema)
    _sealed_write(folder / "metrics.parquet", golden_format.METRICS_FILE, table, {})


def _trace_bomb(folder: Path, rows: int, sketch: int) -> None:
    schema = golden_format.schema_of(golden_format.TRACE_FILE)
    sk = pa.ListArray.from_arrays(pa.array(np.arange(0, (rows + 1) * sketch, sketch, dtype=np.int32)),
                                  pa.array(np.zeros(rows * sketch)))
    cols = {"step": np.zeros(rows, np.int64), "stage": ["data"] * rows, "seq": np.zeros(rows, np.int64),
            "call": np.zeros(rows, np.int64), "name": ["x"] * rows, "dtype": ["float32"] * rows,
            "shape": [[1]] * rows, "sha256": ["0" * 64] * rows, "min": np.zeros(rows), "max": np.zeros(rows),
            "mean": np.zeros(rows), "l2": np.zeros(rows), "nonfinite": np.zeros(rows, np.int64)}
    arrays = [sk if f.name == "sketch" else pa.array(cols[f.name], f.type) for f in schema]
    folder.mkdir(parents=True, exist_ok=True)
    _sealed_write(folder / "trace.parquet", golden_format.TRACE_FILE, pa.Table.from_arrays(arrays, schema=schema), {})


_PROBE = r"""
import json, resource, sys
from pathlib import Path
from trainguard.core import golden_format
from trainguard.core.errors import TrainguardError
warm = Path(sys.argv[2])
golden_format.read_file(warm, "metrics.parquet")  # load every library the read path uses
golden_format.read_file(warm.with_name("state.parquet"), "state.parquet")
vm = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmSize:")) * 1024
resource.setrlimit(resource.RLIMIT_AS, (vm + int(sys.argv[3]), vm + int(sys.argv[3])))  # the address-space cap
def status(key):
    return next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith(key + ":"))
base = status("VmRSS")
with open("/proc/self/clear_refs", "w") as fh:  # Linux: "5" resets the peak (VmHWM) to the current RSS
    fh.write("5")
error = ""
path = Path(sys.argv[1])
try:
    golden_format.read_file(path, path.name)
except TrainguardError as exc:
    error = str(exc)
except MemoryError:
    error = "MemoryError"
peak = status("VmHWM")
print(json.dumps({"extra_mib": (peak - base) / 1024, "error": error}))
"""


def _probe(path: Path, warm: Path, cap: int = 1024 * MiB) -> dict:
    done = subprocess.run([sys.executable, "-c", _PROBE, str(path), str(warm), str(cap)], capture_output=True,
                          text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    return json.loads(done.stdout.strip().splitlines()[-1])


@pytest.fixture(scope="module")
def warm(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("warm") / "g"
    golden.write_run(folder, make_run("A", with_trace=False))
    return folder / "metrics.parquet"


@pytest.mark.slow
@pytest.mark.parametrize("label, build, name, refused", [
    # over the limits: refused from the footer and page headers, before anything is decoded
    ("state: 64 Mi zero values in one list", lambda f: _state_bomb(f, 64 * 2**20), "state.parquet", True),
    ("metrics: 32 Mi rows", lambda f: _metrics(f, 32 * 2**20, names=7), "metrics.parquet", True),
    ("trace: 120 Ki rows x 4096-value sketches", lambda f: _trace_bomb(f, 120 * 1024, 4096), "trace.parquet", True),
    ("metrics: 200 Ki names of 2 KiB each", lambda f: _metrics(f, 200 * 1024, names=200 * 1024, long_name=2048),
     "metrics.parquet", True),
    # just under the limits: decoded, and still far below 256 MiB above the baseline
    # (slot counts from parquet_bounds.ChunkBounds.decoded_bytes: 12 bytes a value, plus the raw page bytes)
    ("state: values filling 95 % of the limit", lambda f: _state_bomb(f, int(0.95 * LIMIT / 12)), "state.parquet",
     False),
    ("metrics: rows filling 90 % of the limit", lambda f: _metrics(f, int(0.9 * LIMIT / 52), names=7),
     "metrics.parquet", False),
    ("trace: 4096-value sketches filling 95 % of the limit",
     lambda f: _trace_bomb(f, int(0.95 * LIMIT / 12 / (4096 + 14)), 4096), "trace.parquet", False),
])
def test_memory_bombs_stay_under_256_mib_above_baseline(tmp_path, warm, label, build, name, refused):
    folder = tmp_path / "bomb"
    build(folder)
    target = folder / name
    size = target.stat().st_size
    got = _probe(target, warm)
    print(f"\nbomb {label}: {size / 1024:.1f} KiB on disk, +{got['extra_mib']:.1f} MiB peak, "
          f"{'refused: ' + got['error'][:90] if got['error'] else 'read'}")
    assert got["extra_mib"] < 256, got
    assert bool(got["error"]) == refused, got
    if refused:
        assert "MemoryError" not in got["error"] and "trainguard_max_file_mib" in got["error"]


# -- linear-time metric parsing -------------------------------------------------------------------

def test_100000_metric_names_parse_in_linear_time(tmp_path):
    folder = tmp_path / "many"
    folder.mkdir()
    _metrics(folder, 200_000, names=100_000)
    start = time.perf_counter()
    metrics, _ = golden.GoldenStore(tmp_path).read_file(folder / "metrics.parquet")
    took = time.perf_counter() - start
    print(f"\n100,000 metric names, 200,000 rows: parsed in {took:.2f} s")
    assert len(metrics) == 100_000 and took < 5
    # pandas as the reference: the same series per name
    frame = pq.read_table(folder / "metrics.parquet").to_pandas()
    for name in ("0", "99999", "4242"):
        ref = frame[frame.metric == name].sort_values("step")
        assert metrics[name].steps.tolist() == ref.step.tolist()
        assert np.array_equal(metrics[name].values, ref.value.to_numpy())


# -- the silent off-switch ------------------------------------------------------------------------

OFF_SWITCHES = [b'{"calibrated": {"rtol": 1e300, "atol": 0}}', b'{"calibrated": {"rtol": "inf", "atol": 0}}',
                b'{"calibrated": {"rtol": Infinity, "atol": 0}}', b'{"calibrated": {"rtol": 1e-3, "atol": 0, '
                b'"metrics": [["loss", 1]]}}', b'{"tolerances": {"rtol": 1e6, "atol": 0, "exact": false}}',
                b'{"calibrated": {"rtol": NaN, "atol": 0}}', b'{"switch": "off"}',
                b'{"calibrated": {"rtol": 0.4, "atol": 0}}', b'{"seed": true}', b'{"fingerprint": "cpu"}']


def test_hostile_metadata_is_refused_by_every_reader(tmp_path, capsys):
    raw_exceptions = 0
    for i, text in enumerate(OFF_SWITCHES):
        folder = tmp_path / f"g{i}"
        golden.write_run(folder, make_run("A", with_trace=False))
        for name in ("metrics.parquet", "state.parquet"):
            rewrite(folder / name, metadata={b"trainguard.meta": text}, reseal=True)
        with pytest.raises(GoldenCorruptError, match="metadata"):
            golden.read_run(folder)
        for argv in (["show", str(folder)], ["diff", str(folder), str(folder)], ["show", str(folder / "state.parquet")]):
            try:
                assert main(argv) == 2, argv
            except Exception:  # noqa: BLE001 - counting what escapes is the point
                raw_exceptions += 1
            err = capsys.readouterr().err
            assert "metadata" in err and "Traceback" not in err
    print(f"\nhostile metadata cases: {len(OFF_SWITCHES)} x 4 readers, raw exceptions: {raw_exceptions}")
    assert raw_exceptions == 0


GUARDED = '''
import pytest
import torch


@pytest.mark.trainguard(seed=5)
def test_tram_brake(trajectory):
    model = torch.nn.Linear(3, 1)
    opt = torch.optim.SGD(model.parameters(), lr=0.1, momentum=MOMENTUM)
    x = torch.randn(16, 3)
    for step in range(4):
        opt.zero_grad()
        loss = model(x).pow(2).mean()
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss.item())
    trajectory.state(model, optimizer=opt)
'''


@pytest.mark.slow
def test_a_crafted_calibrated_tolerance_cannot_switch_a_test_off(pytester):
    """The momentum change 0.9 -> 0.5 passed under a crafted `calibrated` entry; now the golden is refused."""
    pytester.makepyfile(test_tram=GUARDED.replace("MOMENTUM", "0.9"))
    assert pytester.runpytest_subprocess("-p", "no:xdist", "--trainguard-bless").ret == 0
    folder = golden_folder(pytester.path / "golden", "test_tram.py::test_tram_brake")
    meta = json.loads(pq.ParquetFile(folder / "state.parquet").schema_arrow.metadata[b"trainguard.meta"])
    meta["calibrated"] = {"rtol": 1e300, "atol": 1e300}
    for name in ("metrics.parquet", "state.parquet"):
        rewrite(folder / name, metadata={b"trainguard.meta": json.dumps(meta).encode()}, reseal=True)
    pytester.makepyfile(test_tram=GUARDED.replace("MOMENTUM", "0.5"))
    result = pytester.runpytest_subprocess("-p", "no:xdist")
    result.assert_outcomes(failed=1)
    text = result.stdout.str()
    assert "cannot be used" in text and "calibrated.rtol" in text and "Traceback" not in text


def test_bless_from_never_adopts_a_calibrated_tolerance(tmp_path, capsys):
    golden_dir, results = tmp_path / "golden", tmp_path / "results"
    nodeid = "test_tram.py::test_tram_brake"
    run = make_run("A", with_trace=False)
    run = replace(run, meta=run.meta.with_(nodeid=nodeid, calibrated={"rtol": 1e-2, "atol": 1e-4}))
    golden.write_run(golden_folder(results, nodeid), run, root=results)
    assert main(["bless", "--from", str(results), "--golden-dir", str(golden_dir), "--reason", "ci run"]) == 0
    adopted = golden.read_run(golden_folder(golden_dir, nodeid))
    assert "calibrated" not in adopted.meta and adopted.meta["reason"] == "ci run"


def test_show_and_failure_reports_name_the_tolerance_in_force_and_its_source(tmp_path, capsys):
    folder = tmp_path / "g"
    run = make_run("A", with_trace=False)
    run = replace(run, meta=run.meta.with_(calibrated={"rtol": 2e-3, "atol": 1e-6},
                                           tolerances={"rtol": 1e-5, "atol": 1e-8, "exact": False, "metrics": {}}))
    golden.write_run(folder, run)
    assert main(["show", str(folder)]) == 0
    out = capsys.readouterr().out
    assert "rtol=0.002, atol=1e-06 (from calibrated)" in out and "At bless time: rtol=1e-05, atol=1e-08" in out
    other = tmp_path / "h"
    golden.write_run(other, make_run("B", with_trace=False))
    main(["diff", str(folder), str(other)])
    assert "tolerance: rtol=0.002, atol=1e-06 (from calibrated)" in capsys.readouterr().out


# -- downgrades and hidden files -----------------------------------------------------------------

def _hide_copy_of(folder: Path, source: Path) -> str:
    """Plant another golden's files as temp files plus a commit record naming them (the hidden-file attack)."""
    record = {"replace": {}, "remove": [], "run_id": "f" * 32}
    for name in ("metrics.parquet", "state.parquet"):
        hidden = f".tmp-{name}.4242.abcdefabcdef"
        (folder / hidden).write_bytes((source / name).read_bytes())
        record["replace"][name] = hidden
    (folder / ".trainguard-commit").write_text(json.dumps(record))
    return record["run_id"]


def test_hidden_temp_files_behind_a_commit_record_are_not_read(tmp_path):
    folder, other = tmp_path / "g", tmp_path / "other"
    golden.write_run(folder, make_run("A", with_trace=False))
    golden.write_run(other, make_run("B", with_trace=False))
    _hide_copy_of(folder, other)
    with pytest.raises(GoldenCorruptError, match="another write than its own"):
        golden.read_run(folder)


@pytest.mark.parametrize("record", [
    {"run_id": "../../x", "replace": {}, "remove": []},
    {"run_id": "a" * 32, "replace": {"state.parquet": ".tmp-state.parquet.evil"}, "remove": []},
    {"run_id": "a" * 32, "replace": {}, "remove": [], "also": 1},
    {"run_id": "a" * 32, "replace": {}, "remove": ["state.parquet", "state.parquet"]},
])
def test_commit_records_are_accepted_only_in_the_exact_shape_trainguard_writes(tmp_path, record):
    folder = tmp_path / "g"
    golden.write_run(folder, make_run("A", with_trace=False))
    (folder / ".trainguard-commit").write_text(json.dumps(record))
    with pytest.raises(GoldenCorruptError, match="not a valid trainguard commit record"):
        golden.read_run(folder)


# -- confinement: no write leaves the folder it belongs to -----------------------------------------

def _linked_parent(root: Path, outside: Path) -> None:
    """root/test_tram.py is a link to a folder outside: a golden below it would be written out there."""
    root.mkdir(parents=True, exist_ok=True)
    outside.mkdir()
    (root / "test_tram.py").symlink_to(outside, target_is_directory=True)


def test_no_write_path_follows_a_link(tmp_path, capsys):
    nodeid = "test_tram.py::test_tram_brake"
    outside = tmp_path / "outside"
    writes_outside = 0
    cases = 0
    # 1. a bless through a linked parent
    _linked_parent(tmp_path / "golden", outside)
    with pytest.raises(GoldenError, match="symbolic link"):
        golden.GoldenStore(tmp_path / "golden").write(golden_folder(tmp_path / "golden", nodeid), make_run("A"))
    cases += 1
    # 2. bless --from into a golden dir with a linked parent
    results = tmp_path / "results"
    run = replace(make_run("A", with_trace=False), meta=GoldenMeta(nodeid=nodeid))
    golden.write_run(golden_folder(results, nodeid), run, root=results)
    assert main(["bless", "--from", str(results), "--golden-dir", str(tmp_path / "golden"), "--reason", "x"]) == 2
    assert "symbolic link" in capsys.readouterr().err
    cases += 1
    # 3. a golden dir (or results dir) that is itself a link
    real = tmp_path / "real"
    real.mkdir()
    (tmp_path / "linked").symlink_to(real, target_is_directory=True)
    with pytest.raises(GoldenError, match="symbolic link"):
        golden.GoldenStore(tmp_path / "linked").write(golden_folder(tmp_path / "linked", nodeid), make_run("A"))
    cases += 1
    # 4. report files into a linked report dir, and a summary file that is a link
    from trainguard.core.report_files import write_report

    with pytest.raises(GoldenError, match="symbolic link"):
        write_report(tmp_path / "linked", [{"nodeid": nodeid, "outcome": "identical"}])
    report = tmp_path / "report"
    report.mkdir()
    (report / "summary.md").symlink_to(tmp_path / "victim.md")
    with pytest.raises(GoldenError, match="symbolic link"):
        write_report(report, [{"nodeid": nodeid, "outcome": "identical"}])
    cases += 2
    writes_outside = sum(1 for _ in outside.rglob("*")) + sum(1 for _ in real.rglob("*")) + \
        int((tmp_path / "victim.md").exists())
    print(f"\nlink cases: {cases}, writes outside: {writes_outside}")
    assert writes_outside == 0


def test_merging_reports_never_copies_a_linked_plot(tmp_path, capsys):
    from trainguard.core.report_files import write_report

    secret = tmp_path / "secret.txt"
    secret.write_text("api token")
    shard = tmp_path / "shard"
    write_report(shard, [{"nodeid": "t.py::a", "outcome": "changed", "plot": "plots/a.png"}])
    (shard / "plots").mkdir()
    (shard / "plots" / "a.png").symlink_to(secret)
    assert main(["merge-reports", str(shard), "--out", str(tmp_path / "merged")]) == 0
    merged = tmp_path / "merged"
    assert not (merged / "plots").exists()
    assert json.loads((merged / "summary.json").read_text())["rows"][0]["plot"] is None
    assert "api token" not in "".join(p.read_text(errors="replace") for p in merged.rglob("*") if p.is_file())


# -- disk full and file too large during a bless ---------------------------------------------------

def test_disk_full_during_a_bless_keeps_the_old_golden_and_says_what_to_free(tmp_path, monkeypatch):
    folder = tmp_path / "golden" / "g"
    golden.write_run(folder, make_run("A"))
    before = snapshot(folder)

    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(pq, "write_table", full)
    with pytest.raises(GoldenError) as info:
        golden.GoldenStore(tmp_path / "golden").write(folder, make_run("B"))
    assert "no space left" in str(info.value) and "intact" in str(info.value) and "free space" in str(info.value)
    assert snapshot(folder) == before


_EFBIG = r"""
import resource, sys
from pathlib import Path
sys.path.insert(0, sys.argv[2])
from golden_samples import make_run
from trainguard.core.store import GoldenStore
from trainguard.core.errors import GoldenError
resource.setrlimit(resource.RLIMIT_FSIZE, (2048, 2048))  # ulimit -f: files above 2 KiB fail with EFBIG
try:
    GoldenStore(sys.argv[1]).write(Path(sys.argv[1]) / "g", make_run("B"))
except GoldenError as exc:
    print(exc)
"""


def test_file_too_large_during_a_bless_is_a_message_not_a_traceback(tmp_path):
    folder = tmp_path / "golden" / "g"
    golden.write_run(folder, make_run("A"))
    before = snapshot(folder)
    done = subprocess.run([sys.executable, "-c", _EFBIG, str(tmp_path / "golden"), str(Path(__file__).parent)],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0 and "Traceback" not in done.stderr, done.stderr
    assert "could not be written" in done.stdout and "ulimit -f" in done.stdout
    assert snapshot(folder) == before


# -- output sanitising -----------------------------------------------------------------------------

INJECTIONS = ["::error::pwned", "\r\x1b[2Kall good", "ok\n::add-mask::x", "a|b<img src=x onerror=1>", "`code`](x)",
              "\u202egnp.exe", "line\u2028break", "::set-output name=x::1"]


def test_strings_from_goldens_are_escaped_before_any_output(tmp_path, capsys):
    reaching = 0
    for text in INJECTIONS:
        line = untrusted(text)  # inside a line: no control character survives
        md = md_escape(text)
        out = safe_output("report\n" + text)  # whole output: no line starts a workflow command
        for shown in (safe_output(line), out):
            if "\r" in shown or "\x1b" in shown or "\u202e" in shown or "\u2028" in shown:
                reaching += 1
            if any(part.lstrip().startswith("::") for part in shown.split("\n")):
                reaching += 1
        if "\n" in line or "<img" in md or "|" in md.replace("\\|", ""):
            reaching += 1
    print(f"\ninjection strings: {len(INJECTIONS)}, reaching output raw: {reaching}")
    assert reaching == 0


def test_names_and_reasons_from_a_golden_reach_the_terminal_escaped(tmp_path, capsys):
    folder = tmp_path / "g"
    run = make_run("A", with_trace=False)
    bad = "loss\r::error::pwned"
    run = Run(metrics={bad: MetricSeries([0, 1], [1.0, 0.5])},
              tensors={"w\x1b[31m": TensorRecord("w\x1b[31m", "parameter", "float32", (1,), "0" * 64, 1.0, 1.0,
                                                 1.0, 1.0, 0, values=np.array([1.0]))},
              meta=run.meta.with_(reason="::error::fake approval\r"))
    golden.write_run(folder, run)
    assert main(["show", str(folder)]) == 0
    out = capsys.readouterr().out
    assert "\r" not in out and "\x1b" not in out
    assert not any(line.lstrip().startswith("::") for line in out.splitlines())
    assert "loss\\r::error::pwned" in out and "\\x1b[31m" in out


def test_summary_md_escapes_table_syntax(tmp_path):
    from trainguard.core.report_files import write_report

    write_report(tmp_path, [{"nodeid": "t.py::test[a|b`c]", "outcome": "changed",
                             "divergence": "loss | <img src=x> [x](http://y)\n::error::x", "environment": []}])
    md = (tmp_path / "summary.md").read_text()
    rows = [line for line in md.splitlines() if line.startswith("| ")]
    assert len(rows) == 3 and len({r.replace("\\|", "").count("|") for r in rows}) == 1
    assert "<img" not in md and not any(line.startswith("::") for line in md.splitlines())


# -- the golden-dir option keeps node ids stable -------------------------------------------------

def test_the_two_argument_form_of_the_golden_dir_option_is_refused_with_the_fix(pytester, tmp_path):
    pytester.makepyfile(test_tram=GUARDED.replace("MOMENTUM", "0.9"))
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    result = pytester.runpytest_subprocess("-p", "no:xdist", "--trainguard-golden-dir", str(elsewhere))
    assert result.ret == 4  # pytest's usage error
    err = result.stderr.str()
    assert f"--trainguard-golden-dir={elsewhere}" in err and "rootdir" in err
    ok = pytester.runpytest_subprocess("-p", "no:xdist", f"--trainguard-golden-dir={elsewhere}", "--trainguard-bless")
    assert ok.ret == 0
    assert (elsewhere / "test_tram.py" / "test_tram_brake" / "metrics.parquet").is_file()  # node id unchanged


def test_golden_folder_mapping_is_one_to_one_for_files_but_not_for_impossible_ids():
    # The documented condition: ids naming the same file the same way map one-to-one; the two ids below
    # cannot both come from one file system (test_a.py would be a file and a folder at once).
    assert golden_folder("g", "a/b.py::c") == golden_folder("g", "a::b.py::c")
    ids = ["t.py::a", "t.py::a[1]", "t.py::A", "t.py::Cls::a", "t.py::a[x/y]", "t.py::a[x%2Fy]", "u/t.py::a",
           "t.py::a[..]", "t.py::a[]", "t.py::a[ ]"]
    assert len({golden_folder("g", i) for i in ids}) == len(ids)


def test_errors_from_store_reach_pytest_as_messages(pytester):
    pytester.makepyfile(test_tram=GUARDED.replace("MOMENTUM", "0.9"))
    real = pytester.path / "real"
    real.mkdir()
    (pytester.path / "golden").symlink_to(real, target_is_directory=True)
    result = pytester.runpytest_subprocess("-p", "no:xdist", "--trainguard-bless")
    result.assert_outcomes(failed=1)
    text = result.stdout.str()
    assert "symbolic link" in text and "give the real folder instead" in text
    assert "Traceback" not in text and not any(real.iterdir())


@pytest.mark.slow
def test_results_are_never_written_through_a_link(pytester):
    pytester.makepyfile(test_tram=GUARDED.replace("MOMENTUM", "0.9"))
    assert pytester.runpytest_subprocess("-p", "no:xdist", "--trainguard-bless").ret == 0
    outside = pytester.path / "outside"
    outside.mkdir()
    (pytester.path / "res").symlink_to(outside, target_is_directory=True)
    pytester.makepyfile(test_tram=GUARDED.replace("MOMENTUM", "0.8"))
    result = pytester.runpytest_subprocess("-p", "no:xdist", "--trainguard-results=res")
    result.assert_outcomes(failed=1)
    text = result.stdout.str()
    assert "symbolic link" in text and "Traceback" not in text
    assert not any(outside.iterdir())


def test_a_rebless_does_not_keep_a_crafted_calibrated_entry(tmp_path):
    from trainguard.core.guard import bless
    from trainguard.core.tolerance import Policy
    from trainguard.core.verdicts import BLESSED_CHANGED

    folder = tmp_path / "golden" / "g"
    golden.write_run(folder, make_run("A", with_trace=False))
    for name in ("metrics.parquet", "state.parquet"):
        rewrite(folder / name, metadata={b"trainguard.meta": b'{"calibrated": {"rtol": 1e300, "atol": 1e300}}'},
                reseal=True)
    result = bless("t.py::g", make_run("B", with_trace=False), folder, Policy(),
                   store=golden.GoldenStore(tmp_path / "golden"))
    assert result.outcome == BLESSED_CHANGED  # the unreadable golden was replaced
    assert "calibrated" not in golden.read_run(folder).meta


def test_a_light_read_bounds_every_column_it_decodes(tmp_path, monkeypatch):
    """A check's light read leaves a format-4 golden's stored values undecoded, so a values bomb costs it
    nothing; the full read a differing run triggers refuses the bomb as before. A format-3 golden has one
    digest over every column, so it is decoded whole even when light, and refused whole too."""
    store = golden.GoldenStore(tmp_path)
    _state_bomb(tmp_path / "v4", 64 * 2**20)
    light = store.read(tmp_path / "v4", light=True)
    assert light.tensors["w0"].values is None
    with pytest.raises(TrainguardError, match="trainguard_max_file_mib"):
        store.read(tmp_path / "v4")
    with monkeypatch.context() as m:
        m.setattr(golden_format, "FORMAT_VERSION", 3)
        _state_bomb(tmp_path / "v3", 64 * 2**20)
    with pytest.raises(TrainguardError, match="trainguard_max_file_mib"):
        store.read(tmp_path / "v3", light=True)
