"""`trainguard audit --since REV`: the review aid for golden changes in a pull request.

A made-up tram depot's guarded suite is committed, then changed the ways a pull request can
change what the guard accepts; the audit must list each change, flag the loosening ones and
exit 1 for them, and print Markdown that a pull-request comment can carry safely.
"""

from __future__ import annotations

import subprocess
from dataclasses import replace
from pathlib import Path

import pytest
from golden_samples import make_run

from trainguard.core import store as golden
from trainguard.core.paths import golden_folder
from trainguard.skins.cli import main

GIT = ["git", "-c", "user.name=Depot", "-c", "user.email=depot@example.invalid", "-c", "commit.gpgsign=false"]

TESTS_BEFORE = '''
import pytest

@pytest.mark.trainguard(seed=1, rtol=1e-5)
def test_brake_sgd(trajectory): ...

@pytest.mark.trainguard(seed=2, rtol=1e-4, atol=1e-7)
def test_brake_adam(trajectory): ...

@pytest.mark.trainguard(seed=3, exact=True)
def test_brake_exact(trajectory): ...

class TestDoors:
    @pytest.mark.trainguard(seed=4)
    def test_door_close(self, trajectory): ...
'''

TESTS_AFTER = '''
import pytest

@pytest.mark.trainguard(seed=1, rtol=1e-2)
def test_brake_sgd(trajectory): ...

@pytest.mark.trainguard(seed=2, rtol=1e-6, atol=1e-7)
def test_brake_adam(trajectory): ...

@pytest.mark.trainguard(seed=3)
def test_brake_exact(trajectory): ...

class TestDoors:
    def test_door_close(self, trajectory): ...
'''


def _git(repo: Path, *args: str) -> None:
    subprocess.run([*GIT, "-C", str(repo), *args], check=True, capture_output=True)


@pytest.fixture
def depot(tmp_path, monkeypatch):
    repo = tmp_path / "depot"
    repo.mkdir()
    _git(repo, "init", "-q")
    (repo / "pyproject.toml").write_text('[tool.pytest.ini_options]\ntrainguard_golden_dir = "golden"\n')
    (repo / "test_brakes.py").write_text(TESTS_BEFORE)
    root = repo / "golden"
    for name, tag in (("test_brake_sgd", "A"), ("test_brake_adam", "B"), ("test_brake_exact", "A")):
        run = make_run(tag, with_trace=False)
        nodeid = f"test_brakes.py::{name}"
        run = replace(run, meta=run.meta.with_(nodeid=nodeid, reason="first bless",
                                               tolerances={"rtol": 1e-5, "atol": 1e-8, "exact": False, "metrics": {}}))
        golden.write_run(golden_folder(root, nodeid), run, root=root)
    _git(repo, "add", "-A")
    _git(repo, "commit", "-qm", "depot goldens")
    monkeypatch.chdir(repo)
    return repo


def test_audit_of_an_unchanged_tree_is_quiet(depot, capsys):
    assert main(["audit", "--since", "HEAD"]) == 0
    assert "no golden, tolerance or marker changed" in capsys.readouterr().out


def test_audit_lists_every_change_and_exits_1_on_loosening(depot, capsys):
    root = depot / "golden"
    sgd = golden_folder(root, "test_brakes.py::test_brake_sgd")
    adam = golden_folder(root, "test_brakes.py::test_brake_adam")
    exact = golden_folder(root, "test_brakes.py::test_brake_exact")
    # re-bless sgd with a calibrated tolerance (looser than the recorded default) and one metric dropped
    run = golden.read_run(sgd)
    metrics = dict(run.metrics)
    dropped = sorted(metrics)[0]
    del metrics[dropped]
    run = replace(run, metrics=metrics, meta=run.meta.with_(reason="brake pads \u2013 new supplier\r::error::x",
                                                            calibrated={"rtol": 1e-3, "atol": 1e-6}))
    golden.write_run(sgd, run, root=root)
    golden.GoldenStore(root).remove(adam)  # a golden removed
    new = replace(make_run("B", with_trace=False), meta=make_run("B").meta.with_(
        nodeid="test_brakes.py::test_brake_new", reason="new brake test"))
    golden.write_run(golden_folder(root, "test_brakes.py::test_brake_new"), new, root=root)  # a golden added
    (exact / ".tmp-state.parquet.77.0123456789ab").write_bytes(b"PAR1")  # a stray temp file
    (depot / "test_brakes.py").write_text(TESTS_AFTER)

    assert main(["audit", "--since", "HEAD"]) == 1
    out = capsys.readouterr().out
    rows = {line.split()[1] + " " + line.split()[2]: line for line in out.splitlines() if line.startswith("  !")}
    assert any("golden removed" in r and "test_brake_adam" in r for r in rows.values()), out
    assert "re-blessed" in out and "test_brake_sgd" in out and "golden added" in out
    assert "brake pads" in out and "\\r::error::x" in out  # the reason, escaped (no raw CR, no workflow command)
    assert "\r" not in out and "\n::error" not in out
    assert "metrics gone" in out and dropped in out
    assert "tolerance looser" in out and "rtol (calibrated): 1e-05 -> 0.001" in out
    assert "marker rtol: 1e-05 -> 0.01" in out  # the marker of test_brake_sgd loosened
    assert "exact=True removed" in out
    assert "marker removed" in out and "TestDoors::test_door_close" in out
    assert "tolerance tighter" in out and "marker rtol: 0.0001 -> 1e-06" in out  # listed, not flagged
    assert "unexpected file" in out and ".tmp-state.parquet" in out
    flagged = [line for line in out.splitlines() if line.startswith("  !")]
    assert not any("tighter" in line for line in flagged)
    assert "need a second look" in out


def test_audit_markdown_for_a_pull_request_comment(depot, capsys, tmp_path):
    sgd = golden_folder(depot / "golden", "test_brakes.py::test_brake_sgd")
    run = golden.read_run(sgd)
    run = replace(run, meta=run.meta.with_(reason="pads | <img src=x> `tick` [link](http://x)"),
                  metrics={k: replace(v, values=v.values + 1.0) for k, v in run.metrics.items()})
    golden.write_run(sgd, run, root=depot / "golden")
    out_file = tmp_path / "audit.md"
    assert main(["audit", "--since", "HEAD", "--markdown", "--output", str(out_file)]) == 0
    md = out_file.read_text()
    assert md.startswith("## trainguard audit")
    table = [line for line in md.splitlines() if line.startswith("| ")]
    assert len({line.count(" | ") for line in table}) == 1  # every row keeps the four columns (GFM tables)
    assert "<img" not in md and "&lt;img" in md and "\\[link\\]" in md and "\\|" in md


def test_audit_refuses_a_revision_that_does_not_exist(depot, capsys):
    assert main(["audit", "--since", "no-such-branch"]) == 2
    assert "does not name a commit" in capsys.readouterr().err
    assert main(["audit", "--since=--exec=rm"]) == 2  # never passed to git as an option


def test_audit_outside_a_git_work_tree(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "golden").mkdir()
    assert main(["audit", "--since", "HEAD", "--golden-dir", "golden"]) == 2
    assert "not inside a git work tree" in capsys.readouterr().err


def test_ci_scripts_run_the_audit():
    here = Path(__file__).resolve().parents[1] / "ci"
    check = (here / "trainguard-check.sh").read_text()
    workflow = (here / "github-actions-trainguard.yml").read_text()
    assert "trainguard audit --since" in check and "trainguard audit" in workflow
