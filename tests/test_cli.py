"""The `trainguard` command: show, env, demo, and its error handling; plus plugin import cost."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from trainguard import MetricSeries, Run, TensorRecord, write_run
from trainguard.skins.cli import main


def _golden(folder: Path, reason: str = "greenhouse baseline") -> Path:
    run = Run(
        metrics={"loss": MetricSeries([0, 1, 2], [0.75, 0.5, 0.25]), "lr": MetricSeries([0, 2], [0.1, 0.05])},
        tensors={
            "fc.weight": TensorRecord("fc.weight", "parameter", "float32", (2, 2), "ab" * 32, -1.0, 2.0, 0.5, 2.5, 0,
                                      np.array([-1.0, 0.0, 1.0, 2.0])),
        },
        meta={"nodeid": "tests/test_greenhouse.py::test_vent", "seed": 3, "reason": reason,
              "tolerances": {"rtol": 1e-5, "atol": 1e-8, "exact": False, "metrics": {}},
              "fingerprint": {"packages": {"torch": "9.9.9"}}},
    )
    write_run(folder, run)
    return folder


def test_show_golden_folder(tmp_path, capsys):
    folder = _golden(tmp_path / "g" / "test_vent")
    assert main(["show", str(folder)]) == 0
    out = capsys.readouterr().out
    assert "greenhouse baseline" in out
    assert "tests/test_greenhouse.py::test_vent" in out
    assert "packages.torch" in out and "9.9.9" in out
    # metric summary: loss has 3 steps from 0 to 2, first value 0.75, last 0.25
    loss_line = next(line for line in out.splitlines() if line.strip().startswith("loss"))
    assert loss_line.split()[1:5] == ["3", "0", "2", "0.75"]
    assert "fc.weight" in out and "2x2" in out


def test_show_single_file_and_listing(tmp_path, capsys):
    _golden(tmp_path / "g" / "a")
    _golden(tmp_path / "g" / "b" / "c", reason="second")
    assert main(["show", str(tmp_path / "g" / "a" / "state.parquet")]) == 0
    out = capsys.readouterr().out
    assert "fc.weight" in out and "metrics (" not in out
    assert main(["show", str(tmp_path / "g")]) == 0
    out = capsys.readouterr().out
    assert "2 golden folder(s)" in out and "second" in out


def test_show_errors_exit_2_without_traceback(tmp_path, capsys):
    assert main(["show", str(tmp_path / "nowhere")]) == 2
    err = capsys.readouterr().err
    assert "no such file or folder" in err and "Traceback" not in err
    bad = tmp_path / "bad"
    bad.mkdir()
    (bad / "metrics.parquet").write_bytes(b"PAR1 this is not parquet PAR1")
    (bad / "state.parquet").write_bytes(b"")
    assert main(["show", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "metrics.parquet" in err and "not a readable Parquet file" in err


def test_env_json_matches_installed_versions(capsys):
    import numpy
    import torch

    assert main(["env", "--json"]) == 0
    fp = json.loads(capsys.readouterr().out)
    assert fp["packages"]["torch"] == str(torch.__version__)
    assert fp["packages"]["numpy"] == numpy.__version__
    assert fp["threads"]["intra_op"] == torch.get_num_threads()
    assert main(["env"]) == 0
    assert "cpu_capability" in capsys.readouterr().out


def test_no_command_prints_help(capsys):
    assert main([]) == 2
    assert "demo" in capsys.readouterr().out


def test_plugin_import_is_cheap():
    code = ("import sys, trainguard, trainguard.skins.plugin; "
            "print(sorted(m for m in ('torch', 'numpy', 'pyarrow', 'pandas', 'matplotlib', 'deepdiff') "
            "if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


@pytest.mark.slow
def test_demo_runs_end_to_end(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "trainguard.skins.cli", "demo", "--keep", str(tmp_path / "demo")],
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    out = proc.stdout
    assert "6 (6 new)" in out and "6 (6 identical)" in out
    assert "demo finished as expected" in out
    assert "param_groups.0.momentum" in out and "0.9 -> 0.91" in out
    # SGD's first momentum buffer is the gradient itself (PyTorch SGD docs), so step 0 matches
    # and the update of step 1 is the first to differ; decoupled decay changes step 0's update.
    assert "first divergence: step 1, stage update" in out
    assert "first divergence: step 0, stage update" in out
    assert (tmp_path / "demo" / "golden" / "test_bakery.py" / "test_proofing_lbfgs" / "state.parquet").is_file()


def test_public_api_names_survive_submodule_imports():
    """`trainguard.compare` and `trainguard.fingerprint` are functions, whatever was imported before."""
    code = ("import trainguard.core.comparison, trainguard.core.environment, trainguard.core.guard, trainguard\n"
            "from trainguard import compare, fingerprint, check, bless\n"
            "print(all(callable(f) and not isinstance(f, type(trainguard)) for f in (compare, fingerprint, check, bless)))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "True"
