"""The files users copy into their CI (ci/): the check script and the re-bless script, end to end."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

CI = Path(__file__).resolve().parent.parent / "ci"

GUARDED = '''
import os, pytest, torch

@pytest.mark.trainguard(seed=4)
def test_tram_heating(trajectory):
    # Invented: a made-up tram depot's cabin-heating model, one weight per sensor.
    w = torch.nn.Parameter(torch.tensor([0.5, -0.25, 1.0]))
    opt = torch.optim.SGD([w], lr=0.1, momentum=float(os.environ.get("DEPOT_MOMENTUM", "0.9")))
    x = torch.tensor([[1.0, 2.0, 0.5], [0.5, -1.0, 2.0]])
    y = torch.tensor([1.0, 0.0])
    for step in range(8):
        opt.zero_grad()
        loss = ((x @ w - y) ** 2).mean()
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss)
    trajectory.state(optimizer=opt, w=w)
'''


def _run(cmd, cwd, **env):
    full = dict(os.environ, PYTHON=sys.executable, **env)
    full.pop("CI", None)
    return subprocess.run(cmd, cwd=cwd, env=full, capture_output=True, text=True, timeout=300)


@pytest.mark.slow
def test_check_then_rebless_from_artifact(tmp_path):
    (tmp_path / "pytest.ini").write_text("[pytest]\ntrainguard_golden_dir = golden\naddopts = -p no:cacheprovider\n")
    (tmp_path / "test_depot.py").write_text(GUARDED)
    blessed = _run([sys.executable, "-m", "pytest", "--trainguard-bless", "--trainguard-reason", "baseline"], tmp_path)
    assert blessed.returncode == 0, blessed.stdout

    ok = _run(["bash", str(CI / "trainguard-check.sh")], tmp_path)
    assert ok.returncode == 0, ok.stdout + ok.stderr
    assert "1 identical" in ok.stdout
    assert not any((tmp_path / "trainguard-results").iterdir())  # identical runs leave no results

    changed = _run(["bash", str(CI / "trainguard-check.sh")], tmp_path, DEPOT_MOMENTUM="0.8")
    assert changed.returncode == 1, changed.stdout
    assert "| `test_depot.py::test_tram_heating` | **changed** |" in changed.stdout  # summary.md is printed
    assert "trainguard-rebless.sh --from" in changed.stdout
    results = tmp_path / "trainguard-results"
    assert (results / "test_depot.py" / "test_tram_heating" / "metrics.parquet").is_file()

    no_reason = _run(["bash", str(CI / "trainguard-rebless.sh"), "--from", str(results)], tmp_path)
    assert no_reason.returncode == 2 and "--reason" in no_reason.stderr

    adopted = _run(["bash", str(CI / "trainguard-rebless.sh"), "--from", str(results), "--reason", "momentum 0.8"],
                   tmp_path)
    assert adopted.returncode == 0, adopted.stdout + adopted.stderr
    assert "changed" in adopted.stdout and "test_depot.py::test_tram_heating" in adopted.stdout

    after = _run(["bash", str(CI / "trainguard-check.sh")], tmp_path, DEPOT_MOMENTUM="0.8")
    assert after.returncode == 0, after.stdout
    from trainguard import read_run

    assert read_run(tmp_path / "golden" / "test_depot.py" / "test_tram_heating").meta["reason"] == "momentum 0.8"


def test_workflow_example_uses_the_scripts():
    text = (CI / "github-actions-trainguard.yml").read_text()
    assert "pull_request" in text
    assert "bash ci/trainguard-check.sh" in text
    assert text.count("actions/upload-artifact") == 2
    assert 'torch==' in text.split("trainguard[report]")[0]  # torch is installed before the package
