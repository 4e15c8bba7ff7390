"""The fingerprint sees the machine (CPU, dispatch settings, libraries in use), and a report whose
differences are rounding drift on another machine says so first, with the remedies."""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from trainguard.core.comparison import compare
from trainguard.core.environment import fingerprint
from trainguard.core.meta import GoldenMeta
from trainguard.core.records import MetricSeries, Run, TensorRecord
from trainguard.core.report import drift, environment_changes, failure_report
from trainguard.core.tolerance import Policy


@pytest.mark.skipif(not Path("/proc/cpuinfo").is_file(), reason="Linux /proc/cpuinfo")
def test_fingerprint_names_the_cpu_as_proc_cpuinfo_does(monkeypatch):
    monkeypatch.setenv("MKL_DEPOT_PROBE", "1")  # any MKL_* variable steers oneMKL, so it is recorded
    fp = fingerprint()
    first = Path("/proc/cpuinfo").read_text().split("\n\n")[0]
    fields = dict((k.strip(), v.strip()) for k, _, v in (line.partition(":") for line in first.splitlines()))
    assert fp["cpu"]["vendor"] == fields["vendor_id"] and fp["cpu"]["model_name"] == fields["model name"]
    assert set(fp["cpu"]["flags"]) <= set(fields["flags"].split())
    assert fp["cpu"]["cores"] == os.cpu_count()
    assert fp["env"]["MKL_DEPOT_PROBE"] == "1"
    import torch

    if "Math Kernel Library" in torch.__config__.show():
        assert "Math Kernel Library" in fp["libraries"]["mkl"]


_PROBE = "import json, depot_optim; from trainguard.core.environment import fingerprint; " \
         "print(json.dumps(fingerprint()))"


def _install(site: Path, version: str) -> None:
    """A tiny local package (an invented tram-depot optimizer library) that depends on NumPy."""
    for old in site.glob("depot_optim-*.dist-info"):
        for f in old.iterdir():
            f.unlink()
        old.rmdir()
    (site / "depot_optim.py").write_text("STEP = 1\n")
    info = site / f"depot_optim-{version}.dist-info"
    info.mkdir(parents=True)
    (info / "METADATA").write_text(f"Metadata-Version: 2.1\nName: depot-optim\nVersion: {version}\n"
                                   "Requires-Dist: numpy\n")
    (info / "top_level.txt").write_text("depot_optim\n")


def test_an_upgraded_library_the_test_imported_shows_in_the_fingerprint_diff(tmp_path):
    site = tmp_path / "site"
    site.mkdir()
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(site), os.environ.get("PYTHONPATH", "")])}
    prints = []
    for version in ("0.1", "0.2"):
        _install(site, version)
        done = subprocess.run([sys.executable, "-c", _PROBE], env=env, capture_output=True, text=True, timeout=120)
        assert done.returncode == 0, done.stderr
        prints.append(json.loads(done.stdout))
    assert prints[0]["packages"]["depot-optim"] == "0.1"
    assert "packages.depot-optim: 0.1 -> 0.2" in environment_changes(prints[0], prints[1])


def _record(name: str, kind: str, values: np.ndarray) -> TensorRecord:
    """A state entry as trainguard records one (hashlib for the checksum, NumPy for the statistics)."""
    v = np.ascontiguousarray(values, dtype=np.float64)
    finite = v[np.isfinite(v)]
    return TensorRecord(name, kind, "float64", v.shape, hashlib.sha256(v.tobytes()).hexdigest(), float(finite.min()),
                        float(finite.max()), float(finite.mean()), float(np.linalg.norm(finite)), 0, values=v.ravel())


def _run(scale: float, cpu: str, momentum: float = 0.9) -> Run:
    rng = np.random.default_rng(5)
    w = rng.normal(size=64) * (1 + scale)
    loss = np.linspace(1.0, 0.2, 10) * (1 + scale)
    fp = {"cpu": {"vendor": cpu}, "packages": {"torch": "2.13.0"}}
    return Run(metrics={"loss": MetricSeries(np.arange(10), loss)},
               tensors={"w": _record("w", "parameter", w),
                        "param_groups.0.momentum": _record("param_groups.0.momentum", "hyperparameter",
                                                           np.array([momentum]))},
               meta=GoldenMeta(fingerprint=fp))


def test_a_report_of_rounding_drift_on_another_cpu_leads_with_the_machine():
    # 5e-5 of every value: the size this project's goldens drifted by between an Intel and an AMD CPU
    cmp = compare(_run(0.0, "GenuineIntel"), _run(5e-5, "AuthenticAMD"), Policy())
    assert cmp.failed and drift(cmp) is not None and drift(cmp) < 1e-4
    text = failure_report("t.py::test_depot", "golden/t", cmp, "pytest --trainguard-bless t.py::test_depot")
    lines = text.splitlines()
    assert lines[1].startswith("only the machine or its libraries changed (cpu.vendor: GenuineIntel -> AuthenticAMD)")
    assert "--trainguard-portable" in lines[2] and "trainguard calibrate" in lines[2]
    assert "to accept this machine's numbers instead, re-bless it:" in text


def _with_residue(run: Run, residue: np.ndarray) -> Run:
    """The run plus a conv bias's momentum buffer in front of BatchNorm: rounding residue only."""
    tensors = dict(run.tensors, **{"conv.bias.momentum_buffer": _record("conv.bias.momentum_buffer", "optimizer",
                                                                        residue)})
    return Run(metrics=run.metrics, tensors=tensors, meta=run.meta)


def test_an_entry_of_pure_rounding_residue_still_reads_as_drift():
    # The residue moves by 100 % of itself (4e-8 against 4e-8) but by 4e-8 of the weights' scale.
    golden = _with_residue(_run(0.0, "GenuineIntel"), np.array([4e-8, -3e-8, 1e-8]))
    other = _with_residue(_run(5e-5, "AuthenticAMD"), np.array([-1e-8, 2e-8, 5e-8]))
    cmp = compare(golden, other, Policy())
    assert cmp.failed and drift(cmp) is not None and drift(cmp) < 1e-4
    # a small entry that really moved (by 1e-2 of the largest entry's scale) is no drift
    moved = _with_residue(_run(5e-5, "AuthenticAMD"), np.array([4e-8, -3e-8, 0.03]))
    assert drift(compare(golden, moved, Policy())) is None


def test_a_real_change_on_another_cpu_is_reported_as_a_change():
    moved = compare(_run(0.0, "GenuineIntel"), _run(5e-5, "AuthenticAMD", momentum=0.91), Policy())
    assert drift(moved) is None  # a hyperparameter moved: not drift, whatever else changed
    text = failure_report("t.py::test_depot", "golden/t", moved, "pytest --trainguard-bless t.py::test_depot")
    assert "only the machine" not in text and "if this change is intended, re-bless it:" in text
    big = compare(_run(0.0, "GenuineIntel"), _run(1e-2, "AuthenticAMD"), Policy())
    assert drift(big) is None  # 1 % of every value: larger than rounding drift
    same_cpu = compare(_run(0.0, "AuthenticAMD"), _run(5e-5, "AuthenticAMD"), Policy())
    assert same_cpu.failed
    assert "only the machine" not in failure_report("t.py::t", "g", same_cpu, "pytest")


def test_a_library_only_one_run_imported_is_not_reported_as_a_change():
    golden = {"packages": {"torch": "2.13.0", "depot-optim": "0.1"}}
    new = {"packages": {"torch": "2.13.0", "depot-optim": "0.1", "matplotlib": "3.11.2"}}
    assert environment_changes(golden, new) == []
    assert environment_changes({"packages": {"torch": "2.13.0"}}, {"packages": {}}) == [
        "packages.torch: 2.13.0 -> (absent)"]  # the always-recorded ones still count


SWITCHYARD = '''
import os

import pytest
import torch


@pytest.mark.trainguard(seed=1)
def test_switchyard(trajectory):
    """An invented tram switchyard: the test body sets its own thread count."""
    torch.set_num_threads(int(os.environ["YARD_THREADS"]))
    w = torch.ones(3, requires_grad=True)
    opt = torch.optim.SGD([w], lr=0.1)
    for step in range(2):
        opt.zero_grad()
        (w * torch.arange(3.0)).pow(2).sum().backward()
        opt.step()
        trajectory.log(step, loss=w.sum().item())
    trajectory.state(w=w)
'''


def test_a_thread_count_set_inside_the_test_body_is_recorded(pytester, monkeypatch):
    from trainguard.core.store import read_run

    pytester.makepyfile(test_yard=SWITCHYARD)
    monkeypatch.setenv("YARD_THREADS", "3")
    result = pytester.runpytest_subprocess("-p", "no:xdist", "-p", "no:cacheprovider", "--trainguard-bless",
                                           "--trainguard-threads=2")
    assert result.ret == 0
    fp = read_run(pytester.path / "golden" / "test_yard.py" / "test_switchyard").meta["fingerprint"]
    assert fp["threads"]["intra_op"] == 2 and fp["threads"]["intra_op_set_in_body"] == 3
    monkeypatch.setenv("YARD_THREADS", "1")
    result = pytester.runpytest_subprocess("-p", "no:xdist", "-p", "no:cacheprovider", "--trainguard-bless",
                                           "--trainguard-threads=2", "--trainguard-golden-dir=other")
    assert result.ret == 0
    other = read_run(pytester.path / "other" / "test_yard.py" / "test_switchyard").meta["fingerprint"]
    assert "threads.intra_op_set_in_body: 3 -> 1" in environment_changes(fp, other)
