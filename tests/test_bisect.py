"""`trainguard bisect`: real git histories, real pytest runs at each commit.

The invented project is a ropeway's haul-winch energy model (kWh per trip from load,
speed and gradient), trained with SGD and momentum under one guarded test. Its history
(built once per module, copied for each test) has 19 commits:

     1  add model and guarded test            11  BROKEN: syntax error in winch.py
     2  bless goldens (momentum 0.9)   <good  12  fix it
     3  heater helper                         13  notes
     4  notes                                 14  re-bless: golden for momentum 0.93 (goldens only)
     5  refactor (same numbers)               15  heater docs
     6  BROKEN: syntax error in winch.py      16  BROKEN: test imports a module that does not exist
     7  fix it                                17  fix it
     8  goldens only: tampered golden         18  release notes
     9  PLANTED: momentum 0.9 -> 0.93         19  changelog                  <bad (HEAD, branch main)
    10  heater tests

The right answer is commit 9. Reading goldens from each checked-out commit instead of the
frozen reference would blame commit 8 (its tampered golden) and find commit 19 passing
(commit 14 re-blessed the new behaviour), so the test also proves the reference is frozen.
Each pytest step costs a torch import (~3 s), so the module runs about a dozen of them.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from trainguard.tools.bisect import STEP_BAD, STEP_GOOD, STEP_SKIP, classify, failures_section, unfreeze

pytestmark = pytest.mark.slow

NODEID = "test_winch.py::test_winch_energy"

WINCH = '''"""Energy model of an invented ropeway's haul winch: kWh per trip from load, speed and gradient."""
import torch

MOMENTUM = {momentum}
LR = 0.05
N_FEATURES = {features}


def trips(n=48{broken}):
    x = torch.rand(n, N_FEATURES)
    y = x @ torch.tensor([[1.5], [0.8], [2.2]]) + 0.3 + 0.05 * torch.randn(n, 1)
    return x, y


def train(trajectory, steps=8):
    model = torch.nn.Sequential(torch.nn.Linear(N_FEATURES, 6), torch.nn.Tanh(), torch.nn.Linear(6, 1))
    opt = torch.optim.SGD(model.parameters(), lr=LR, momentum=MOMENTUM)
    x, y = trips()
    for step in range(steps):
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(model(x), y)
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss.item())
    trajectory.state(model, optimizer=opt)
'''

TEST_WINCH = '''import pytest

import winch
{extra_import}

@pytest.mark.trainguard(seed=7)
def test_winch_energy(trajectory):
    winch.train(trajectory)


def test_heater_is_not_guarded():
    assert 2 + 2 == 4
'''


def winch(momentum: str = "0.9", features: str = "3", broken: bool = False) -> str:
    return WINCH.format(momentum=momentum, features=features, broken=":" if broken else "")


def env_for(tmp: Path | None = None) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items()
           if not k.startswith(("PYTEST_", "GIT_")) and k not in ("PYTHONDONTWRITEBYTECODE",)}
    env.update(GIT_AUTHOR_NAME="Ropeway Lab", GIT_AUTHOR_EMAIL="lab@ropeway.invalid",
               GIT_COMMITTER_NAME="Ropeway Lab", GIT_COMMITTER_EMAIL="lab@ropeway.invalid",
               GIT_CONFIG_NOSYSTEM="1", GIT_CONFIG_GLOBAL=os.devnull)
    if tmp is not None:
        tmp.mkdir(exist_ok=True)
        env["TMPDIR"] = str(tmp)
    return env


def git(repo: Path, *args: str, check: bool = True) -> subprocess.CompletedProcess[str]:
    return subprocess.run(["git", *args], cwd=repo, capture_output=True, text=True, env=env_for(), check=check)


def commit(repo: Path, message: str, files: dict[str, str] | None = None) -> str:
    for name, text in (files or {}).items():
        (repo / name).write_text(text, encoding="utf-8")
    git(repo, "add", "-A")
    git(repo, "commit", "--quiet", "-m", message)
    return git(repo, "rev-parse", "HEAD").stdout.strip()


def pytest_in(repo: Path, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "pytest", "-p", "no:cacheprovider", "-q", *args], cwd=repo,
                          capture_output=True, text=True, env=env_for())


@pytest.fixture(scope="module")
def history(tmp_path_factory) -> dict[str, object]:
    """The 19-commit repository described above; returns its path and the sha of every numbered commit."""
    from trainguard.core import records
    from trainguard.core import store as golden

    repo = tmp_path_factory.mktemp("ropeway") / "repo"
    repo.mkdir()
    git(repo, "init", "--quiet", "-b", "main")
    shas: dict[int, str] = {}
    shas[1] = commit(repo, "Add winch energy model and its guarded test", {
        "pytest.ini": "[pytest]\ntrainguard_golden_dir = golden\n",
        ".gitignore": ".pytest_cache/\n__pycache__/\n",
        "winch.py": winch(),
        "test_winch.py": TEST_WINCH.format(extra_import=""),
    })
    bless = pytest_in(repo, "--trainguard-bless", "--trainguard-reason", "first goldens", "test_winch.py")
    assert bless.returncode == 0, bless.stdout + bless.stderr
    folder = repo / "golden" / "test_winch.py" / "test_winch_energy"
    assert golden.exists(folder)
    shas[2] = commit(repo, "Bless winch goldens")
    shas[3] = commit(repo, "Add cabin heater helper", {"heater.py": "def watts(celsius):\n    return 40 * celsius\n"})
    shas[4] = commit(repo, "Document winch units", {"NOTES.txt": "energy in kWh per trip\n"})
    shas[5] = commit(repo, "Name the feature count", {"winch.py": winch(features="int('3')")})
    shas[6] = commit(repo, "Start a new trip loader (broken)", {"winch.py": winch(broken=True)})
    shas[7] = commit(repo, "Fix the trip loader", {"winch.py": winch()})
    # goldens only: a golden whose loss is 1% off, with another reason (tree goldens would blame this commit)
    run = golden.read_run(folder)
    run.metrics["loss"] = records.MetricSeries(run.metrics["loss"].steps, run.metrics["loss"].values * 1.01)
    run.meta = run.meta.with_(reason="tolerance review")  # GoldenMeta is immutable: replaced, not edited
    golden.write_run(folder, run)
    shas[8] = commit(repo, "Re-bless winch golden after tolerance review")
    shas[9] = commit(repo, "Tune winch momentum for smoother starts", {"winch.py": winch(momentum="0.93")})
    reblessed = repo.parent / "golden-093"
    rebless = pytest_in(repo, "--trainguard-bless", f"--trainguard-golden-dir={reblessed}", "test_winch.py")
    assert rebless.returncode == 0, rebless.stdout + rebless.stderr
    shas[10] = commit(repo, "Add heater tests", {"test_heater.py": "import heater\n\n\ndef test_watts():\n"
                                                                   "    assert heater.watts(2) == 80\n"})
    shas[11] = commit(repo, "Tidy winch imports (broken)", {"winch.py": winch(momentum="0.93", broken=True)})
    shas[12] = commit(repo, "Fix winch typo", {"winch.py": winch(momentum="0.93")})
    shas[13] = commit(repo, "Notes on cabin heating", {"NOTES.txt": "energy in kWh per trip\nheater in W\n"})
    shutil.rmtree(repo / "golden")
    shutil.copytree(reblessed, repo / "golden")
    shas[14] = commit(repo, "Accept new winch behaviour (re-bless)")
    shas[15] = commit(repo, "Heater docs", {"HEATER.txt": "40 W per degree\n"})
    shas[16] = commit(repo, "Split winch helpers (broken)",
                      {"test_winch.py": TEST_WINCH.format(extra_import="import winch_helpers")})
    shas[17] = commit(repo, "Add the missing helper module", {"winch_helpers.py": "SPARE = 1\n"})
    shas[18] = commit(repo, "Release notes", {"RELEASE.txt": "0.2: smoother starts\n"})
    shas[19] = commit(repo, "Changelog", {"CHANGELOG.txt": "see RELEASE.txt\n"})
    assert git(repo, "status", "--porcelain").stdout == ""
    return {"repo": repo, "shas": shas}


@pytest.fixture
def repo(history, tmp_path) -> Path:
    copy = tmp_path / "repo"
    shutil.copytree(history["repo"], copy, symlinks=True)
    return copy


def bisect(repo: Path, tmp: Path, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "trainguard.skins.cli", "bisect", *args], cwd=repo,
                          capture_output=True, text=True, env=env_for(tmp), timeout=300)


def assert_untouched(repo: Path, tmp: Path | None = None) -> None:
    """On branch main at its last commit, clean, no bisect running, and bisect's temporary folder removed."""
    assert git(repo, "symbolic-ref", "--short", "HEAD").stdout.strip() == "main"
    assert git(repo, "rev-parse", "HEAD").stdout == git(repo, "rev-parse", "main").stdout
    assert git(repo, "status", "--porcelain").stdout == ""
    assert not (repo / ".git" / "BISECT_LOG").exists() and not (repo / ".git" / "BISECT_START").exists()
    assert git(repo, "bisect", "log", check=False).returncode != 0
    if tmp is not None:
        assert [p.name for p in tmp.iterdir() if p.name.startswith("trainguard-bisect-")] == []


# -- the search ------------------------------------------------------------------------


def test_bisect_names_the_planted_commit_and_restores_the_repo(history, repo, tmp_path):
    shas = history["shas"]
    tmp = tmp_path / "tmp"
    proc = bisect(repo, tmp, "--good", shas[2], "--bad", "main", NODEID)
    out = proc.stdout
    assert proc.returncode == 0, out + proc.stderr
    assert "Traceback" not in out + proc.stderr
    assert f"first bad commit: {shas[9]} Tune winch momentum for smoother starts" in out
    # the range checks: the bad end fails, the good end passes
    assert f"{shas[19][:12]} bad" in out and f"{shas[2][:12]} good" in out
    # nothing before the planted commit was blamed. On this history git tests 10 (the midpoint), then 6, whose
    # syntax error is skipped; to name 9 it must have seen 8 (goldens only) pass against the frozen reference
    for n in range(3, 9):
        assert f"{shas[n][:12]} bad" not in out
    assert f"{shas[6][:12]} untestable pytest exit 4" in out and "SyntaxError" in out
    assert f"{shas[8][:12]} good" in out
    # the divergence from summary.json: the loss moves at step 2, the first step momentum acts on
    line = next(line for line in out.splitlines() if line.strip().startswith(NODEID))
    assert "changed" in line and "loss at step 2" in line
    # pytest's failure report at that commit, with the hyperparameter that moved
    assert f"pytest failures at {shas[9][:12]}:" in out
    assert "param_groups.0.momentum" in out and "0.9 -> 0.93" in out
    # ... whose re-bless hint names the real golden dir, not the temporary copy that is gone by now
    assert "trainguard-bisect-" not in out.split("first bad commit:")[1]
    assert f"pytest --trainguard-bless --trainguard-reason 'describe the intended change' {NODEID}" in out
    assert_untouched(repo, tmp)


def test_ctrl_c_ends_the_bisect_and_restores_the_branch(history, repo, tmp_path):
    tmp = tmp_path / "tmp"
    proc = subprocess.Popen([sys.executable, "-m", "trainguard.skins.cli", "bisect", "--good", history["shas"][2],
                             "--bad", "main", NODEID], cwd=repo, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env=env_for(tmp), start_new_session=True)
    try:
        deadline = time.monotonic() + 120
        while not (repo / ".git" / "BISECT_START").exists():  # the range is checked, `git bisect run` is on
            assert proc.poll() is None, proc.communicate()
            assert time.monotonic() < deadline, "git bisect never started"
            time.sleep(0.1)
        time.sleep(1.0)  # into the first step's pytest run
        os.killpg(proc.pid, signal.SIGINT)  # what Ctrl-C in a terminal does: the whole foreground group
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 130, out + err
    assert "interrupted" in err and "Traceback" not in err
    assert "back on main, no bisect in progress" in out
    assert_untouched(repo, tmp)


# -- refusals --------------------------------------------------------------------------


def test_dirty_work_tree_is_refused_and_left_alone(history, repo, tmp_path):
    (repo / "winch.py").write_text(winch(momentum="0.95"), encoding="utf-8")
    (repo / "scratch.txt").write_text("untracked files are fine\n", encoding="utf-8")
    proc = bisect(repo, tmp_path / "tmp", "--good", history["shas"][2], "--bad", "main", NODEID)
    assert proc.returncode == 2
    assert "uncommitted changes" in proc.stderr and "M winch.py" in proc.stderr and "scratch.txt" not in proc.stderr
    assert "git stash" in proc.stderr and "Traceback" not in proc.stderr
    assert "MOMENTUM = 0.95" in (repo / "winch.py").read_text()  # the change is still there
    assert git(repo, "symbolic-ref", "--short", "HEAD").stdout.strip() == "main"
    assert not (repo / ".git" / "BISECT_START").exists()


def test_refuses_outside_git_and_during_a_bisect(history, repo, tmp_path):
    elsewhere = tmp_path / "not-a-repo"
    elsewhere.mkdir()
    proc = bisect(elsewhere, tmp_path / "tmp", "--good", "HEAD~1", "--bad", "HEAD", NODEID)
    assert proc.returncode == 2 and "is not inside a git repository" in proc.stderr
    git(repo, "bisect", "start", "main", history["shas"][2])
    proc = bisect(repo, tmp_path / "tmp", "--good", history["shas"][2], "--bad", "main", NODEID)
    assert proc.returncode == 2 and "git bisect is already in progress" in proc.stderr
    assert "git bisect reset" in proc.stderr
    assert (repo / ".git" / "BISECT_START").exists()  # the user's own bisect is not ended for them
    proc = bisect(repo, tmp_path / "tmp", "--good", "no-such-tag", "--bad", "main", NODEID)
    assert proc.returncode == 2


def test_unknown_revision_swapped_range_and_failing_setup(history, repo, tmp_path):
    proc = bisect(repo, tmp_path / "tmp", "--good", "v9.9", "--bad", "main", NODEID)
    assert proc.returncode == 2 and "the good revision 'v9.9' is not a commit" in proc.stderr
    proc = bisect(repo, tmp_path / "tmp", "--good", "main", "--bad", history["shas"][2], NODEID)
    assert proc.returncode == 2 and "swap --good and --bad" in proc.stderr
    # a set-up command that fails makes the bad end untestable: said, with the command to reproduce it
    proc = bisect(repo, tmp_path / "tmp", "--good", history["shas"][2], "--bad", "main", "--setup", "exit 3", NODEID)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert "the bad revision main cannot be tested: setup command exited 3" in proc.stderr
    assert "reproduce with: git checkout main && exit 3" in proc.stderr
    assert_untouched(repo, tmp_path / "tmp")


def test_good_revision_that_already_fails(history, repo, tmp_path):
    """Commit 9's own golden is the tampered one of commit 8, which commit 9 does not match."""
    shas = history["shas"]
    proc = bisect(repo, tmp_path / "tmp", "--good", shas[9], "--bad", "main", NODEID)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert f"the good revision {shas[9]} already fails against the reference" in proc.stderr
    assert f"{NODEID}: loss at step 0" in proc.stderr  # the 1% offset shows from the first step
    assert "Traceback" not in proc.stderr
    assert_untouched(repo, tmp_path / "tmp")


def test_bad_revision_that_matches_the_work_tree_reference(history, repo, tmp_path):
    """With --reference worktree the goldens are commit 14's re-blessed ones, which main matches."""
    proc = bisect(repo, tmp_path / "tmp", "--good", history["shas"][2], "--bad", "main", "--reference", "worktree",
                  NODEID)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert "the bad revision main matches the reference (1 identical)" in proc.stderr
    assert "goldens of the work tree at main" in proc.stdout
    assert_untouched(repo, tmp_path / "tmp")


def test_unknown_node_id(history, repo, tmp_path):
    proc = bisect(repo, tmp_path / "tmp", "--good", history["shas"][2], "--bad", "main",
                  "test_winch.py::test_winch_energy_v2")
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert "pytest found none of the selected tests at the bad revision main" in proc.stderr
    assert "test_winch.py::test_winch_energy_v2" in proc.stderr and "not found" in proc.stderr
    assert "--collect-only" in proc.stderr and "Traceback" not in proc.stderr
    assert_untouched(repo, tmp_path / "tmp")


# -- the step's verdicts and the failure excerpt ---------------------------------------------


def _summary(*outcomes: str) -> dict:
    return {"format": 1, "rows": [{"nodeid": f"t.py::t{i}", "outcome": o, "divergence": "", "environment": [],
                                   "plot": None, "blessing": False} for i, o in enumerate(outcomes)]}


def test_classify_maps_pytest_and_trainguard_outcomes_to_bisect_exit_codes():
    assert classify(0, _summary("identical", "within tolerance"))[0] == STEP_GOOD
    assert classify(1, _summary("identical", "changed"))[0] == STEP_BAD
    assert classify(1, _summary("changed", "no golden"))[0] == STEP_BAD  # a change is evidence enough
    assert classify(1, _summary("identical", "no golden"))[0] == STEP_SKIP
    assert classify(1, _summary("unreadable golden"))[0] == STEP_SKIP
    assert classify(1, _summary("identical"))[0] == STEP_SKIP  # something failed without a verdict
    assert classify(0, _summary())[0] == STEP_SKIP  # no guarded test ran
    assert classify(0, None)[0] == STEP_SKIP  # no summary.json
    for code in (2, 3, 4, 5):
        assert classify(code, _summary("changed"))[0] == STEP_SKIP
    assert classify(1, _summary("changed", "changed"))[1] == "2 changed"


def test_failures_section_stops_at_the_next_header():
    output = "\n".join([
        "F.", "=================================== FAILURES ===================================",
        "_______________________________ test_winch_energy ______________________________",
        "trainguard: test_winch.py::test_winch_energy changed against its golden",
        "================================== trainguard ==================================",
        "1 changed", "=========================== short test summary info ============================",
    ])
    assert failures_section(output) == [
        "_______________________________ test_winch_energy ______________________________",
        "trainguard: test_winch.py::test_winch_energy changed against its golden",
    ]
    assert failures_section("1 passed in 0.1s") == []
    long = "=== FAILURES ===\n" + "\n".join(f"line {i}" for i in range(10))
    assert failures_section(long, max_lines=3) == ["line 0", "line 1", "line 2", "... (7 more lines)"]


def test_failure_report_points_at_the_real_golden_dir_not_the_frozen_copy():
    work = Path("/tmp/trainguard-bisect-ab12cd")
    lines = [
        "trainguard: t.py::t changed against its golden ../../trainguard-bisect-ab12cd/reference/golden/t.py/t",
        "  pytest --trainguard-bless --trainguard-reason 'why' "
        "--trainguard-golden-dir=/tmp/trainguard-bisect-ab12cd/reference/golden t.py::t",
    ]
    assert unfreeze(lines, work, "golden", explicit=False) == [
        "trainguard: t.py::t changed against its golden golden/t.py/t",
        "  pytest --trainguard-bless --trainguard-reason 'why' t.py::t",
    ]
    assert unfreeze(lines[1:], work, "ml/goldens", explicit=True) == [
        "  pytest --trainguard-bless --trainguard-reason 'why' --trainguard-golden-dir=ml/goldens t.py::t",
    ]
