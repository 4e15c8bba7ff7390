"""Parallel and sharded runs: pytest-xdist (-n 2, --dist loadgroup), --trainguard-shard K/N, merge-reports.

One invented project (a canal lock's chamber, gate, pump and basin models) with 14 guarded
tests (parametrized ones, a class, traced ones with `trajectory.watch`, one guarded by the
fixture alone, ids with '/' and spaces) and 6 unguarded tests; 3 groups of tests carry
`@pytest.mark.xdist_group`. The expected node ids are written out below, not taken from
trainguard's output. The helper module imports torch only inside its function, so
collection-only runs (the shard tests) cost no torch import.

Costs: each run that executes guarded tests imports torch (~3 s per process, and every
xdist worker is a process), so one test does all the runs that need goldens: 6 runs, 9 torch
imports. The rest collects only, or calls the CLI in-process.
"""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path
from urllib.parse import unquote

import pytest

# Imported here, not inside the tests: pytester restores sys.modules after each test, and
# NumPy cannot be imported a second time in one process.
import trainguard
from trainguard.core import paths
from trainguard.core import store as golden
from trainguard.core.comparison import compare
from trainguard.core.report_files import write_report
from trainguard.core.tolerance import Policy
from trainguard.skins import cli

pytestmark = pytest.mark.slow

HELPER = '''
"""An invented canal lock: small models of chamber level, gates, pumps and basins."""
import json
import pathlib

HERE = pathlib.Path(__file__).parent


def knob(name, default):
    """Planted changes: knobs.json (written by the outer test) overrides one test's settings."""
    path = HERE / "knobs.json"
    return json.loads(path.read_text()).get(name, default) if path.exists() else default


def train(trajectory, name, optimizer="sgd", lr=0.05, steps=5, width=4, watch=False):
    import torch

    momentum = knob(name, 0.9)
    noise = knob(name + ":noise", 0.0)
    model = torch.nn.Sequential(torch.nn.Linear(3, width), torch.nn.Tanh(), torch.nn.Linear(width, 1))
    if optimizer == "sgd":
        opt = torch.optim.SGD(model.parameters(), lr=lr, momentum=momentum)
    else:
        opt = torch.optim.Adam(model.parameters(), lr=lr, betas=(momentum, 0.999))
    if watch:
        trajectory.watch(model, opt)
    readings = torch.randn(24, 3)  # upstream level, gate opening, pump rate
    level = readings @ torch.tensor([[0.6], [-0.3], [0.8]]) + 0.05 * torch.randn(24, 1)
    for step in range(steps):
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(model(readings), level)
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss.item() * (1.0 + noise))
    trajectory.state(model, optimizer=opt)
'''

CONFTEST = '''
import os

import pytest


@pytest.hookimpl(trylast=True)
def pytest_collection_modifyitems(config, items):
    """With CANAL_MIMIC_LOADGROUP set, do on xdist workers what pytest-xdist's --dist loadgroup
    does with pytest < 9.2 (xdist/remote.py, WorkerInteractor.pytest_collection_modifyitems):
    append "@<group>" to the node id of every xdist_group test. (With pytest 9.2 xdist's
    assignment to item._nodeid no longer reaches the node id.)"""
    if not os.environ.get("CANAL_MIMIC_LOADGROUP") or not hasattr(config, "workerinput"):
        return
    for item in items:
        groups = sorted({str(m.args[0]) for m in item.iter_markers("xdist_group")})
        if not groups or "@" in item.nodeid:
            continue
        renamed = item.nodeid + "@" + "_".join(groups)
        if hasattr(item, "_id"):
            from _pytest.nodeid import coerce_node_id

            item._id = coerce_node_id(renamed)
        else:
            item._nodeid = renamed
'''

CHAMBERS = '''
import pytest

from canal import train


@pytest.mark.trainguard(seed=1)
def test_fill_north(trajectory):
    train(trajectory, "fill_north")


@pytest.mark.xdist_group("gates")
@pytest.mark.trainguard(seed=2)
def test_gate_upper(trajectory):
    train(trajectory, "gate_upper", optimizer="adam", watch=True)


@pytest.mark.xdist_group("gates")
@pytest.mark.trainguard(seed=3)
def test_gate_lower(trajectory):
    train(trajectory, "gate_lower", watch=True)


@pytest.mark.trainguard(seed=4)
@pytest.mark.parametrize("lr", [0.01, 0.05, 0.1])
def test_drain_rate(trajectory, lr):
    train(trajectory, f"drain_rate_{lr}", lr=lr)


def test_plain_gate_names():
    assert sorted(["upper", "lower"]) == ["lower", "upper"]


def test_plain_water_balance():
    inflow, outflow = 12.5, 12.5
    assert inflow - outflow == 0
'''

PUMPS = '''
import pytest

from canal import train


class TestPumps:
    @pytest.mark.trainguard(seed=5)
    def test_pump_east(self, trajectory):
        train(trajectory, "pump_east", optimizer="adam")

    @pytest.mark.xdist_group("pumps")
    @pytest.mark.trainguard(seed=6)
    def test_pump_west(self, trajectory):
        train(trajectory, "pump_west")

    def test_plain_pump_count(self):
        assert len(["east", "west"]) == 2


@pytest.mark.trainguard(seed=7)
@pytest.mark.parametrize("width", [2, 6], ids=["narrow", "wide"])
def test_sluice(trajectory, width):
    train(trajectory, f"sluice_{width}", width=width, watch=True)


def test_overflow_fixture_only(trajectory):
    train(trajectory, "overflow")


@pytest.mark.parametrize("cycles", [1, 2, 3])
def test_plain_gate_cycles(cycles):
    assert cycles * 2 % 2 == 0
'''

BASINS = '''
import pytest

from canal import train


@pytest.mark.trainguard(seed=8)
@pytest.mark.parametrize("basin", ["a/b", "dock 9"])
def test_basin_level(trajectory, basin):
    train(trajectory, f"basin_{basin}")


@pytest.mark.xdist_group("pumps")
@pytest.mark.trainguard(seed=9)
def test_basin_pump(trajectory):
    train(trajectory, "basin_pump", optimizer="adam")
'''

WHARF = '''
import pytest

from canal import train


@pytest.mark.trainguard(seed=10)
@pytest.mark.parametrize("berth", [1, 2, 3])
def test_wharf_berth(trajectory, berth):
    train(trajectory, f"berth_{berth}")
'''

MARKED = [
    "test_chambers.py::test_fill_north",
    "test_chambers.py::test_gate_upper",
    "test_chambers.py::test_gate_lower",
    "test_chambers.py::test_drain_rate[0.01]",
    "test_chambers.py::test_drain_rate[0.05]",
    "test_chambers.py::test_drain_rate[0.1]",
    "test_pumps.py::TestPumps::test_pump_east",
    "test_pumps.py::TestPumps::test_pump_west",
    "test_pumps.py::test_sluice[narrow]",
    "test_pumps.py::test_sluice[wide]",
    "test_basins.py::test_basin_level[a/b]",
    "test_basins.py::test_basin_level[dock 9]",
    "test_basins.py::test_basin_pump",
]
#: Guarded by the fixture alone (no marker): not selected by -m trainguard.
FIXTURE_ONLY = ["test_pumps.py::test_overflow_fixture_only"]
GUARDED = sorted(MARKED + FIXTURE_ONLY)
UNGUARDED = sorted([
    "test_chambers.py::test_plain_gate_names",
    "test_chambers.py::test_plain_water_balance",
    "test_pumps.py::TestPumps::test_plain_pump_count",
    "test_pumps.py::test_plain_gate_cycles[1]",
    "test_pumps.py::test_plain_gate_cycles[2]",
    "test_pumps.py::test_plain_gate_cycles[3]",
])
TRACED = {"test_chambers.py::test_gate_upper", "test_chambers.py::test_gate_lower",
          "test_pumps.py::test_sluice[narrow]", "test_pumps.py::test_sluice[wide]"}
#: Planted changes for the check runs: three behaviour changes, one change far inside tolerance.
PLANTED = {"fill_north": 0.93, "gate_upper": 0.8, "basin_a/b": 0.95, "drain_rate_0.05:noise": 1e-9}
CHANGED = {"test_chambers.py::test_fill_north", "test_chambers.py::test_gate_upper",
           "test_basins.py::test_basin_level[a/b]"}
CLOSE = {"test_chambers.py::test_drain_rate[0.05]"}

#: Apache Parquet file format specification: a file starts and ends with the 4-byte magic "PAR1".
PARQUET_MAGIC = b"PAR1"
#: PNG specification (ISO/IEC 15948), section 5.2: the 8-byte signature of every PNG file.
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
USAGE_ERROR = 4  # pytest.ExitCode.USAGE_ERROR


@pytest.fixture
def canal(pytester: pytest.Pytester) -> pytest.Pytester:
    pytester.makeini("[pytest]\n")
    pytester.makeconftest(CONFTEST)
    pytester.makepyfile(canal=HELPER, test_chambers=CHAMBERS, test_pumps=PUMPS, test_basins=BASINS)
    return pytester


def run(pytester: pytest.Pytester, *args: str) -> pytest.RunResult:
    # hypothesis and the cache are not used by the project; loading them costs ~1 s per run
    return pytester.runpytest_subprocess("-p", "no:cacheprovider", "-p", "no:hypothesispytest", *args, timeout=180)


def text_of(result: pytest.RunResult) -> str:
    return result.stdout.str() + "\n" + result.stderr.str()


def summary_section(result: pytest.RunResult) -> list[str]:
    lines = result.stdout.lines
    starts = [i for i, line in enumerate(lines) if re.fullmatch(r"=+ trainguard =+", line)]
    assert len(starts) == 1, text_of(result)  # one terminal summary, from the controller only
    section = []
    for line in lines[starts[0] + 1:]:
        if line.startswith("=") or line.startswith("FAILED ") or line.startswith("_"):
            break
        section.append(line)
    return section


def golden_folder(root: Path, nodeid: str) -> Path:
    return paths.golden_folder(root, nodeid)


def leftover_temp_files(root: Path) -> list[Path]:
    return [p for p in root.rglob("*") if p.name.startswith(".tmp-")]


def check_golden_dir(root: Path) -> dict[str, object]:
    """Every file of every golden intact and readable; exactly one golden per guarded test."""
    found = golden.find_goldens(root)
    assert sorted(found) == sorted(golden_folder(root, n) for n in GUARDED)
    runs = {}
    for nodeid in GUARDED:
        folder = golden_folder(root, nodeid)
        names = sorted(p.name for p in folder.iterdir())
        expected = ["metrics.parquet", "state.parquet"] + (["trace.parquet"] if nodeid in TRACED else [])
        assert names == sorted(expected), (nodeid, names)
        for name in names:
            data = (folder / name).read_bytes()
            assert data[:4] == PARQUET_MAGIC and data[-4:] == PARQUET_MAGIC, (folder / name)
        run_ = trainguard.read_run(folder)
        assert run_.meta["nodeid"] == nodeid  # the id as collected, never xdist's "@group" form
        assert run_.metrics["loss"].steps.tolist() == [0, 1, 2, 3, 4]
        runs[nodeid] = run_
    return runs


def assert_same_goldens(reference: dict[str, object], other: dict[str, object]) -> None:
    assert sorted(reference) == sorted(other)
    for nodeid, ref in reference.items():
        cmp = compare(ref, other[nodeid], Policy(exact=True))
        assert cmp.outcome == "identical", nodeid
        assert (ref.trace is None) == (other[nodeid].trace is None), nodeid
        if cmp.trace is not None:
            assert cmp.trace.first_bitwise is None, nodeid


def blessed_lines(section: list[str]) -> dict[str, str]:
    found = {}
    for line in section[1:]:
        m = re.fullmatch(r"\s+(new|changed|unchanged)\s+(.+?) -> (.+)", line)
        assert m, line
        assert m.group(2) not in found, f"{m.group(2)} listed twice"
        found[m.group(2)] = m.group(1)
    return found


# -- blessing and checking in parallel, shards of the check, and merging their reports -------------


def report_rows(folder: Path) -> list[dict]:
    payload = json.loads((folder / "summary.json").read_text())
    return payload["rows"]


def plot_links(md: str) -> list[str]:
    return re.findall(r"\(\[plot\]\(([^)]+)\)\)", md)


def assert_report(folder: Path, nodeids: list[str]) -> list[dict]:
    """summary.md/summary.json: one row per guarded test, plots (valid PNG, valid links) for changed ones."""
    rows = report_rows(folder)
    assert sorted(r["nodeid"] for r in rows) == sorted(nodeids)  # none missing, no duplicates
    by_id = {r["nodeid"]: r for r in rows}
    for nodeid in nodeids:
        expected = "changed" if nodeid in CHANGED else "within tolerance" if nodeid in CLOSE else "identical"
        assert by_id[nodeid]["outcome"] == expected, nodeid
        assert bool(by_id[nodeid]["plot"]) == (nodeid in CHANGED), nodeid
    md = (folder / "summary.md").read_text()
    for nodeid in nodeids:
        assert md.count(f"`{nodeid}`") == 1, nodeid
    links = plot_links(md)
    assert len(links) == len(CHANGED & set(nodeids))
    for link in links:
        target = folder / unquote(link)
        assert target.is_file(), link
        assert target.read_bytes()[:8] == PNG_SIGNATURE
    assert sorted(p.name for p in folder.iterdir()) == ["plots", "summary.json", "summary.md"][
        (0 if links else 1):]
    assert leftover_temp_files(folder) == []
    return rows


def test_bless_and_check_under_xdist_then_shards_and_merged_reports(canal: pytest.Pytester,
                                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    serial = run(canal, "-p", "no:xdist", "--trainguard-bless", "--trainguard-golden-dir=g_serial")
    assert serial.ret == 0, text_of(serial)
    serial.assert_outcomes(passed=len(GUARDED) + len(UNGUARDED))

    parallel = run(canal, "-n", "2", "--trainguard-bless")  # into golden/
    assert parallel.ret == 0, text_of(parallel)
    parallel.assert_outcomes(passed=len(GUARDED) + len(UNGUARDED))
    section = summary_section(parallel)
    assert section[0] == f"goldens blessed: {len(GUARDED)} ({len(GUARDED)} new)"
    assert blessed_lines(section) == dict.fromkeys(GUARDED, "new")

    # --dist loadgroup, with the node-id renaming pytest-xdist does there on pytest < 9.2
    monkeypatch.setenv("CANAL_MIMIC_LOADGROUP", "1")
    grouped = run(canal, "-n", "2", "--dist", "loadgroup", "-v", "--trainguard-bless",
                  "--trainguard-golden-dir=g_group")
    assert grouped.ret == 0, text_of(grouped)
    grouped.assert_outcomes(passed=len(GUARDED) + len(UNGUARDED))
    assert "test_chambers.py::test_gate_upper@gates" in grouped.stdout.str()  # the renaming took place
    assert "test_basins.py::test_basin_pump@pumps" in grouped.stdout.str()
    section = summary_section(grouped)
    assert section[0] == f"goldens blessed: {len(GUARDED)} ({len(GUARDED)} new)"
    assert blessed_lines(section) == dict.fromkeys(GUARDED, "new")  # goldens under the ids as collected

    reference = check_golden_dir(canal.path / "g_serial")
    assert_same_goldens(reference, check_golden_dir(canal.path / "golden"))
    assert_same_goldens(reference, check_golden_dir(canal.path / "g_group"))
    assert leftover_temp_files(canal.path) == []

    # -- checking the goldens blessed under -n 2, with changes planted, under -n 2: one report, one summary
    (canal.path / "knobs.json").write_text(json.dumps(PLANTED))

    checked = run(canal, "-n", "2", "--trainguard-report=rep_all", "--trainguard-results=results")
    assert checked.ret == 1, text_of(checked)
    checked.assert_outcomes(passed=len(GUARDED) + len(UNGUARDED) - len(CHANGED), failed=len(CHANGED))
    section = summary_section(checked)
    n_ident = len(GUARDED) - len(CHANGED) - len(CLOSE)
    assert section[0] == (f"guarded tests checked: {len(GUARDED)} "
                          f"({n_ident} identical, {len(CLOSE)} within tolerance, {len(CHANGED)} changed)")
    listed = [re.fullmatch(r"\s+(changed|within tolerance)\s+(\S.*)", line) for line in section[1:-1]]
    assert all(listed), section
    assert sorted((m.group(1), m.group(2)) for m in listed) == sorted(
        [("changed", n) for n in CHANGED] + [("within tolerance", n) for n in CLOSE])
    assert section[-1] == f"report: {canal.path / 'rep_all' / 'summary.md'}"
    assert assert_report(canal.path / "rep_all", GUARDED)
    # results: exactly the tests that were not bitwise identical, readable, with the new run
    results = canal.path / "results"
    assert sorted(golden.find_goldens(results)) == sorted(golden_folder(results, n) for n in CHANGED | CLOSE)
    for nodeid in CHANGED | CLOSE:
        assert trainguard.read_run(golden_folder(results, nodeid)).meta["nodeid"] == nodeid
    assert leftover_temp_files(canal.path) == []

    # -- the same check as two CI shards, each with its own report folder; guarded tests only are split
    selected = {}
    for k in (1, 2):
        shard = run(canal, "-p", "no:xdist", "-v", "--trainguard-shard", f"{k}/2", f"--trainguard-report=rep_{k}")
        ran = set(re.findall(r"^(\S+::\S+(?: \S+\])?) (?:PASSED|FAILED)", shard.stdout.str(), re.M))
        assert set(UNGUARDED) <= ran  # unguarded tests are never deselected
        selected[k] = sorted(ran & set(GUARDED))
        outcomes = shard.parseoutcomes()
        assert outcomes.get("deselected", 0) == len(GUARDED) - len(selected[k])
        assert outcomes.get("failed", 0) == len(CHANGED & set(selected[k]))
        assert_report(canal.path / f"rep_{k}", selected[k])
    assert set(selected[1]).isdisjoint(selected[2]) and sorted(selected[1] + selected[2]) == GUARDED
    assert selected[1] and selected[2]

    merged_dir = canal.path / "merged"
    assert cli.main(["merge-reports", str(canal.path / "rep_1"), str(canal.path / "rep_2"),
                     "--out", str(merged_dir)]) == 0
    merged = assert_report(merged_dir, GUARDED)
    whole = report_rows(canal.path / "rep_all")
    strip = ("plot", "plots_unavailable")
    assert ([{k: v for k, v in r.items() if k not in strip} for r in merged]
            == [{k: v for k, v in r.items() if k not in strip} for r in sorted(whole, key=lambda r: r["nodeid"])])
    assert (merged_dir / "summary.md").read_text() == (canal.path / "rep_all" / "summary.md").read_text()


def test_merge_reports_refuses_overlaps_and_foreign_folders(tmp_path: Path,
                                                            capsys: pytest.CaptureFixture[str]) -> None:
    rows_a = [{"nodeid": "test_chambers.py::test_fill_north", "outcome": "identical", "divergence": "",
               "environment": [], "plot": None, "blessing": False}]
    rows_b = [{**rows_a[0], "nodeid": "test_pumps.py::test_sluice[wide]"}]
    a, b, c = tmp_path / "a", tmp_path / "b", tmp_path / "c"
    write_report(a, rows_a)
    write_report(b, rows_b)
    write_report(c, rows_a)  # a shard that ran the same test as a: overlapping shards
    (tmp_path / "not_a_report").mkdir()
    out = tmp_path / "out"

    cases = [
        ([str(a), str(a)], "given twice"),
        ([str(a), str(tmp_path / "a" / ".." / "a")], "given twice"),
        ([str(a), str(c)], "appears in more than one report"),
        ([str(a), str(tmp_path / "not_a_report")], "summary.json: missing"),
        ([str(a), str(tmp_path / "absent")], "summary.json: missing"),
    ]
    for dirs, message in cases:
        assert cli.main(["merge-reports", *dirs, "--out", str(out)]) == 2, dirs
        err = capsys.readouterr().err
        assert err.startswith("trainguard merge-reports: ") and message in err, (dirs, err)
        assert "Traceback" not in err
        assert not out.exists(), dirs  # nothing written on error

    assert cli.main(["merge-reports", str(a), str(b), "--out", str(out)]) == 0
    assert "merged 2 row(s) from 2 report folder(s)" in capsys.readouterr().out
    assert cli.main(["merge-reports", str(a), str(out), "--out", str(out)]) == 2
    assert "output folder cannot also be a report folder" in capsys.readouterr().err


# -- shard selection ----------------------------------------------------------------------------


def collected(pytester: pytest.Pytester, *args: str) -> list[str]:
    result = run(pytester, "-p", "no:xdist", "--collect-only", "-q", *args)
    assert result.ret == 0, text_of(result)
    return sorted(line for line in result.stdout.lines if "::" in line and not line.startswith(" "))


def sha256_shard(nodeid: str, n: int) -> int:
    """README's rule, computed here from hashlib: the first 8 bytes of SHA-256(node id), big-endian, mod N, + 1."""
    return int.from_bytes(hashlib.sha256(nodeid.encode("utf-8")).digest()[:8], "big") % n + 1


def test_shards_split_guarded_tests_stably(canal: pytest.Pytester) -> None:
    assert collected(canal) == sorted(GUARDED + UNGUARDED)
    before: dict[tuple[int, int], list[str]] = {}
    for n in (2, 3):
        union: list[str] = []
        for k in range(1, n + 1):
            ids = collected(canal, "--trainguard-shard", f"{k}/{n}")
            assert set(UNGUARDED) <= set(ids)  # unguarded tests are never deselected
            guarded = sorted(set(ids) & set(GUARDED))
            assert guarded == sorted(i for i in GUARDED if sha256_shard(i, n) == k)
            before[k, n] = guarded
            union += guarded
        assert sorted(union) == GUARDED  # disjoint (no id twice) and complete
        assert all(before[k, n] for k in range(1, n + 1))  # with 14 tests no shard is empty here

    # a new test file elsewhere: every existing id keeps its shard, the new ones land somewhere
    canal.makepyfile(test_wharf=WHARF)
    new = [f"test_wharf.py::test_wharf_berth[{b}]" for b in (1, 2, 3)]
    union = []
    for k in (1, 2, 3):
        guarded = sorted(set(collected(canal, "--trainguard-shard", f"{k}/3")) - set(UNGUARDED))
        assert sorted(set(guarded) & set(GUARDED)) == before[k, 3]
        union += guarded
    assert sorted(union) == sorted(GUARDED + new)
    # ... and removing a file does not move the others either
    (canal.path / "test_basins.py").unlink()
    remaining = [i for i in GUARDED if not i.startswith("test_basins.py")]
    for k in (1, 2):
        guarded = set(collected(canal, "--trainguard-shard", f"{k}/2")) & set(remaining)
        assert sorted(guarded) == [i for i in before[k, 2] if i in remaining]

    # -m trainguard selects the tests that carry the marker (a fixture-only test needs the marker)
    assert collected(canal, "-m", "trainguard") == sorted(set(MARKED) & set(remaining) | set(new))


@pytest.mark.parametrize("xdist", [False, True], ids=["serial", "n2"])
def test_bad_shard_is_a_usage_error(canal: pytest.Pytester, xdist: bool) -> None:
    flags = ("-n", "2") if xdist else ("-p", "no:xdist")
    for raw, message in [("0/2", "K must be between 1 and N (2)"), ("3/2", "K must be between 1 and N (2)"),
                         ("x", "expected K/N"), ("1/0", "N (the number of shards) must be at least 1")]:
        result = run(canal, *flags, f"--trainguard-shard={raw}")
        assert result.ret == USAGE_ERROR, (raw, text_of(result))
        text = text_of(result)
        assert f"--trainguard-shard '{raw}': {message}" in text, text
        assert "Traceback" not in text and "INTERNALERROR" not in text
