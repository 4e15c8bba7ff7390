"""Results folders (`--trainguard-results`, `trainguard bless --from`), `trainguard diff`,
and report folders (`--trainguard-report`: summary.md, summary.json, plots).

One invented project (an orchard's apple-yield forecaster, four guarded tests) is blessed
and re-run with a change switched on by the environment variable ORCHARD_CHANGE:

- test_yield_steady: never changes (identical); its golden's fingerprint is edited to
  claim another torch version, so its report row must show the environment change;
- test_yield_pruned: SGD momentum 0.9 -> 0.8 (changed, with a trace);
- test_yield_drift: inputs scaled by 1 + 1e-9 from step 4 in float64 (within tolerance);
- test_yield_sapling: its golden is deleted after blessing (no golden).

The pytest runs are made once per module (subprocesses, each pays a torch import); every
test that mutates goldens works on its own copy of the project.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path
from types import SimpleNamespace
from urllib.parse import unquote

import pyarrow.parquet as pq
import pytest

from trainguard.core import golden_format
from trainguard.core import store as golden_store
from trainguard.core.paths import golden_folder
from trainguard.skins.cli import main

pytestmark = pytest.mark.slow

ORCHARD_TESTS = '''
import os

import pytest
import torch
import torch.nn.functional as F

CHANGE = os.environ.get("ORCHARD_CHANGE") == "1"


def rows(dtype=torch.float32):
    g = torch.Generator().manual_seed(99)
    x = torch.randn(40, 4, generator=g)  # rainfall, sun hours, frost nights, tree age
    y = x @ torch.tensor([[0.4], [0.7], [-0.5], [0.2]]) + 0.1 * torch.randn(40, 1, generator=g)
    return x.to(dtype), y.to(dtype)


def train(trajectory, momentum=0.9, dtype=torch.float32, nudge_from=None, watch=False):
    model = torch.nn.Sequential(torch.nn.Linear(4, 5), torch.nn.Tanh(), torch.nn.Linear(5, 1)).to(dtype)
    opt = torch.optim.SGD(model.parameters(), lr=0.05, momentum=momentum)
    if watch:
        trajectory.watch(model, opt)
    x, y = rows(dtype)
    for step in range(10):
        xb, yb = x[4 * step: 4 * step + 4], y[4 * step: 4 * step + 4]
        if nudge_from is not None and step >= nudge_from:
            xb = xb * (1 + 1e-9)
        opt.zero_grad()
        loss = F.mse_loss(model(xb), yb)
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss, lr=opt.param_groups[0]["lr"])
    trajectory.state(model, optimizer=opt)


@pytest.mark.trainguard(seed=1)
def test_yield_steady(trajectory):
    train(trajectory)


@pytest.mark.trainguard(seed=2)
def test_yield_pruned(trajectory):
    train(trajectory, momentum=0.8 if CHANGE else 0.9, watch=True)


@pytest.mark.trainguard(seed=3)
def test_yield_drift(trajectory):
    train(trajectory, dtype=torch.float64, nudge_from=4 if CHANGE else None)


@pytest.mark.trainguard(seed=4)
def test_yield_sapling(trajectory):
    train(trajectory)
'''

STEADY = "test_orchard.py::test_yield_steady"
PRUNED = "test_orchard.py::test_yield_pruned"
DRIFT = "test_orchard.py::test_yield_drift"
SAPLING = "test_orchard.py::test_yield_sapling"
FAKE_TORCH = "1.0.0+orchard"


def run_pytest(root: Path, *args: str, change: bool = False, pythonpath_first: Path | None = None,
               ) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k not in ("ORCHARD_CHANGE", "PYTEST_ADDOPTS")}
    if change:
        env["ORCHARD_CHANGE"] = "1"
    if pythonpath_first is not None:
        env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(pythonpath_first), env.get("PYTHONPATH", "")]))
    return subprocess.run(
        [sys.executable, "-m", "pytest", "-p", "no:cacheprovider", "-p", "no:xdist", "-p", "no:hypothesispytest",
         "-rA", *args],
        cwd=root, env=env, capture_output=True, text=True, timeout=300)


def set_fingerprint_torch(folder: Path, version: str) -> None:
    """Rewrite the `trainguard.meta` JSON of every Parquet file in a golden folder, keeping the format version."""
    for path in sorted(folder.glob("*.parquet")):
        table = pq.read_table(path)
        metadata = dict(table.schema.metadata)
        meta = json.loads(metadata[b"trainguard.meta"])
        meta["fingerprint"]["packages"]["torch"] = version
        metadata[b"trainguard.meta"] = json.dumps(meta, sort_keys=True).encode()
        assert metadata[b"trainguard.format_version"] == str(golden_format.FORMAT_VERSION).encode()
        # reseal: recompute the content digest, as a deliberate metadata edit must
        metadata = golden_format.reseal(path.name, table, metadata)
        pq.write_table(table.replace_schema_metadata(metadata), path)


def set_format_version(folder: Path, version: str) -> None:
    """Rewrite the files' format version and reseal their digest (which covers the version)."""
    for path in sorted(folder.glob("*.parquet")):
        table = pq.read_table(path)
        metadata = {**table.schema.metadata, b"trainguard.format_version": version.encode()}
        metadata = golden_format.reseal(path.name, table, metadata)
        pq.write_table(table.replace_schema_metadata(metadata), path)


def snapshot(folder: Path) -> dict[str, bytes]:
    """Every file below `folder`, by relative path, as bytes."""
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def orchard(tmp_path_factory):
    root = tmp_path_factory.mktemp("orchard")
    (root / "pytest.ini").write_text("[pytest]\ntrainguard_golden_dir = goldens\n")
    (root / "test_orchard.py").write_text(ORCHARD_TESTS)
    blessed = run_pytest(root, "--trainguard-bless", "--trainguard-reason", "spring baseline")
    assert blessed.returncode == 0, blessed.stdout + blessed.stderr
    goldens = root / "goldens"
    shutil.rmtree(golden_folder(goldens, SAPLING))
    set_fingerprint_torch(golden_folder(goldens, STEADY), FAKE_TORCH)
    before = snapshot(goldens)

    checked = run_pytest(root, "--trainguard-results=results", "--trainguard-report=report", change=True)

    # A stub that hides matplotlib: first on PYTHONPATH, so `import matplotlib` raises ImportError.
    stub = tmp_path_factory.mktemp("no-matplotlib")
    (stub / "matplotlib").mkdir()
    (stub / "matplotlib" / "__init__.py").write_text('raise ImportError("matplotlib hidden by the orchard test")\n')
    no_plots = run_pytest(root, "--trainguard-report=report-no-plots", change=True, pythonpath_first=stub)
    assert snapshot(goldens) == before, "a checking run must never write goldens"
    return SimpleNamespace(root=root, goldens=goldens, results=root / "results", report=root / "report",
                           checked=checked, no_plots=no_plots, before=before)


def project_copy(orchard, tmp_path: Path) -> Path:
    copy = tmp_path / "orchard"
    shutil.copytree(orchard.root, copy)
    return copy


# -- --trainguard-results ----------------------------------------------------------------------


def test_results_hold_every_run_that_was_not_bitwise_identical(orchard):
    out = orchard.checked.stdout
    assert orchard.checked.returncode == 1, out + orchard.checked.stderr
    assert f"PASSED {STEADY}" in out and f"PASSED {DRIFT}" in out
    assert f"FAILED {PRUNED}" in out and f"FAILED {SAPLING}" in out
    found = {golden_store.read_run(f).meta["nodeid"]: f for f in golden_store.find_goldens(orchard.results)}
    # changed, within tolerance and no golden are saved; the identical one is not
    assert set(found) == {PRUNED, DRIFT, SAPLING}
    for nodeid, folder in found.items():
        assert folder == golden_folder(orchard.results, nodeid)  # the golden layout
        assert (folder / "metrics.parquet").is_file() and (folder / "state.parquet").is_file()
    assert (found[PRUNED] / "trace.parquet").is_file()  # the trace travels with the result
    # the saved run is the new one: momentum 0.8 in the result, 0.9 in the golden
    new = golden_store.read_run(found[PRUNED]).tensors["param_groups.0.momentum"].values
    old = golden_store.read_run(golden_folder(orchard.goldens, PRUNED)).tensors["param_groups.0.momentum"].values
    assert (list(old), list(new)) == ([0.9], [0.8])


# -- trainguard diff ---------------------------------------------------------------------------


def test_diff_prints_the_plugins_report_and_exits_1_on_change(orchard, capsys):
    g, r = golden_folder(orchard.goldens, PRUNED), golden_folder(orchard.results, PRUNED)
    assert main(["diff", str(g), str(r)]) == 1
    out = capsys.readouterr().out
    assert "first divergence: step 1, stage update (" in out  # momentum: b_1 = g_1 (PyTorch SGD docs)
    assert "data, forward and backward identical up to there" in out
    assert re.search(r"^\s+metric\s+verdict\s+step", out, re.M) and re.search(r"^\s+tensor\s+kind\s+verdict", out, re.M)
    assert re.search(r"param_groups\.0\.momentum\s+hyperparameter\s+changed.*value 0\.9 -> 0\.8", out)
    # The body (everything after the header line) is exactly what the plugin printed for the test.
    body = out.splitlines()[1:]
    assert len(body) > 8
    plugin_out = orchard.checked.stdout
    # Only the tolerance's source differs: the plugin knows it came from the defaults, diff that the
    # reference golden recorded it.
    assert "tolerance: rtol=1e-05, atol=1e-08 (from golden)" in out
    assert "tolerance: rtol=1e-05, atol=1e-08 (from default)" in str(plugin_out)
    missing = [line for line in body if line not in plugin_out and "(from golden)" not in line]
    assert not missing, f"diff lines not in the plugin's report: {missing}"


def test_diff_exit_0_within_tolerance_and_the_tolerance_options(orchard, capsys):
    g, r = golden_folder(orchard.goldens, DRIFT), golden_folder(orchard.results, DRIFT)
    assert main(["diff", str(g), str(r)]) == 0
    assert "outcome: within tolerance   tolerance: rtol=1e-05, atol=1e-08" in capsys.readouterr().out
    assert main(["diff", str(g), str(r), "--exact"]) == 1
    assert "outcome: changed   tolerance: exact (bitwise; from command line)" in capsys.readouterr().out
    # 1e-9 relative drift fails a 1e-12 relative tolerance without absolute slack ...
    assert main(["diff", str(g), str(r), "--rtol", "1e-12", "--atol", "0"]) == 1
    assert "tolerance: rtol=1e-12, atol=0 (from command line)" in capsys.readouterr().out
    # ... and a tolerance wide enough to hide the momentum change is refused, not applied.
    pg, pr = golden_folder(orchard.goldens, PRUNED), golden_folder(orchard.results, PRUNED)
    assert main(["diff", str(pg), str(pr), "--rtol", "1e6", "--atol", "10"]) == 2
    assert "looser than trainguard allows" in capsys.readouterr().err
    # identical folders
    assert main(["diff", str(g), str(g)]) == 0
    assert "outcome: identical" in capsys.readouterr().out


# -- trainguard bless --from -------------------------------------------------------------------


def test_bless_from_errors_never_touch_goldens(orchard, tmp_path, capsys):
    root = project_copy(orchard, tmp_path)
    goldens, results = root / "goldens", root / "results"
    before = snapshot(goldens)

    def refused(*args: str) -> str:
        assert main(["bless", "--golden-dir", str(goldens), *args]) == 2
        captured = capsys.readouterr()
        assert "Traceback" not in captured.err
        assert snapshot(goldens) == before, f"goldens modified by failing 'bless {' '.join(args)}'"
        return captured.err

    err = refused("--from", str(root / "no-such-results"))
    assert "no such results folder" in err and "no-such-results" in err
    (root / "empty-results").mkdir()
    err = refused("--from", str(root / "empty-results"))
    assert "holds no results" in err and "--trainguard-results" in err
    err = refused("--from", str(results), "test_orchard.py::test_yield_windfall")
    assert "test_yield_windfall" in err and PRUNED in err  # names the unknown id and lists the known ones

    # One result from another format version spoils the whole adoption, including the good ones.
    bad = root / "mixed-results"
    shutil.copytree(results, bad)
    set_format_version(golden_folder(bad, SAPLING), "2")
    err = refused("--from", str(bad))
    assert "format 2" in err and "test_yield_sapling" in err

    # --dry-run lists what would change and writes nothing
    assert main(["bless", "--from", str(results), "--golden-dir", str(goldens), "--dry-run"]) == 0
    out = capsys.readouterr().out
    assert "would adopt 3 result(s)" in out and all(n in out for n in (PRUNED, DRIFT, SAPLING))
    assert snapshot(goldens) == before


def test_bless_from_adopts_results_then_a_plain_run_passes(orchard, tmp_path, capsys, monkeypatch):
    root = project_copy(orchard, tmp_path)
    goldens, results = root / "goldens", root / "results"
    before = snapshot(goldens)
    pruned_rel = str(golden_folder(goldens, PRUNED).relative_to(goldens))

    # Selected by node id: only that golden changes.
    assert main(["bless", "--from", str(results), "--golden-dir", str(goldens), PRUNED,
                 "--reason", "pruning schedule changed"]) == 0
    out = capsys.readouterr().out
    assert "adopted 1 result(s)" in out and re.search(rf"changed\s+{re.escape(PRUNED)}", out)
    after = snapshot(goldens)
    touched = {k for k in set(before) | set(after) if before.get(k) != after.get(k)}
    assert touched and all(k.startswith(pruned_rel + os.sep) for k in touched)
    adopted = golden_store.read_run(golden_folder(goldens, PRUNED))
    assert adopted.meta["reason"] == "pruning schedule changed"
    assert list(adopted.tensors["param_groups.0.momentum"].values) == [0.8]

    # The rest, found through the project's ini (trainguard_golden_dir = goldens) from its folder.
    monkeypatch.chdir(root)
    assert main(["bless", "--from", "results"]) == 0
    out = capsys.readouterr().out
    assert re.search(rf"new\s+{re.escape(SAPLING)}", out) and re.search(rf"changed\s+{re.escape(DRIFT)}", out)
    assert golden_store.exists(golden_folder(goldens, SAPLING))

    rerun = run_pytest(root, change=True)
    assert rerun.returncode == 0, rerun.stdout + rerun.stderr
    assert "guarded tests checked: 4 (4 identical)" in rerun.stdout


# -- --trainguard-report -----------------------------------------------------------------------


def split_row(line: str) -> list[str]:
    """Cells of a Markdown table row; `\\|` is an escaped pipe inside a cell (GFM tables spec)."""
    assert line.startswith("|") and line.endswith("|"), line
    return [c.strip().replace("\\|", "|") for c in re.split(r"(?<!\\)\|", line[1:-1])]


def test_summary_md_is_a_markdown_table_with_one_row_per_test(orchard):
    text = (orchard.report / "summary.md").read_text(encoding="utf-8")
    lines = text.splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("|"))
    table = []
    for line in lines[start:]:
        if not line.startswith("|"):
            break
        table.append(line)
    # GitHub Flavored Markdown spec, "Tables (extension)": a header row, a delimiter row of
    # cells made of dashes (optionally with colons), then body rows with the same cell count.
    header, delimiter, body = split_row(table[0]), split_row(table[1]), [split_row(t) for t in table[2:]]
    assert header == ["test", "outcome", "first divergence", "environment changes"]
    assert all(re.fullmatch(r":?-{3,}:?", c) for c in delimiter) and len(delimiter) == len(header)
    assert all(len(r) == len(header) for r in body)
    rows = {r[0].strip("`"): r for r in body}
    assert set(rows) == {STEADY, PRUNED, DRIFT, SAPLING}
    assert "changed" in rows[PRUNED][1] and rows[SAPLING][1] == "no golden"
    assert rows[DRIFT][1] == "within tolerance" and rows[STEADY][1] == "identical"
    assert rows[PRUNED][2].startswith("first divergence: step 1, stage update (")
    import torch

    assert f"packages.torch: {FAKE_TORCH} -> {torch.__version__}" in rows[STEADY][3]
    assert rows[PRUNED][3] == "-"

    # The plot link of the changed test points at a PNG file (PNG spec, 5.2: the signature
    # is the eight bytes 137 80 78 71 13 10 26 10).
    links = re.findall(r"\[plot\]\(([^)]+)\)", rows[PRUNED][2])
    assert len(links) == 1
    png = orchard.report / unquote(links[0])
    assert png.is_file() and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "[plot]" not in rows[SAPLING][2] + rows[DRIFT][2] + rows[STEADY][2]


def test_summary_json_carries_the_same_rows(orchard):
    payload = json.loads((orchard.report / "summary.json").read_text(encoding="utf-8"))
    rows = {r["nodeid"]: r for r in payload["rows"]}
    assert {k: r["outcome"] for k, r in rows.items()} == {
        STEADY: "identical", PRUNED: "changed", DRIFT: "within tolerance", SAPLING: "no golden"}
    assert (orchard.report / rows[PRUNED]["plot"]).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert rows[STEADY]["plot"] is None
    assert any(e.startswith("packages.torch: ") for e in rows[STEADY]["environment"])
    assert rows[PRUNED]["divergence"].startswith("first divergence: step 1, stage update")


def test_report_without_matplotlib_says_how_to_get_plots(orchard):
    run = orchard.no_plots
    combined = run.stdout + run.stderr
    assert run.returncode == 1, combined  # the two changed/no-golden tests fail; nothing crashes
    assert "INTERNALERROR" not in combined and "Traceback" not in combined
    assert "matplotlib hidden by the orchard test" not in combined
    report = orchard.root / "report-no-plots"
    text = (report / "summary.md").read_text(encoding="utf-8")
    assert "trainguard[report]" in text and "[plot]" not in text
    assert not (report / "plots").exists()
    assert json.loads((report / "summary.json").read_text())["rows"]
