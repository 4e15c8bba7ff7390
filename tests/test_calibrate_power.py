"""Tolerances that keep their power: the proposal rule, planted changes, calibrate --from.

The fast tests use synthetic runs and torch's own optimizers; the slow ones calibrate an
invented bakery's oven CNN (with BatchNorm) end to end, and a greenhouse test from result
folders of two imitated CI runners.
"""

from __future__ import annotations

import hashlib
import re
from pathlib import Path

import numpy as np
import pytest
from pytest_output import generated_project, run_pytest

from trainguard.core import paths
from trainguard.core import store as golden
from trainguard.core.comparison import compare
from trainguard.core.errors import UsageError
from trainguard.core.guard import check
from trainguard.core.planting import Plant, parse, planted
from trainguard.core.records import MetricSeries, Run, TensorRecord
from trainguard.core.settings import calibrated_policy
from trainguard.core.tolerance import DEFAULT_ATOL, DEFAULT_RTOL, Policy
from trainguard.core.verdicts import CHANGED, CLOSE, IDENTICAL, UNREADABLE
from trainguard.skins.cli import main
from trainguard.tools.calibration import RecordedRun, RunSpec, Setting, analyse, round_up

BASELINE = Setting("baseline", "as configured", (), (("PYTHONHASHSEED", "0"),))
THREADS1 = Setting("threads=1", "--trainguard-threads 1", ("--trainguard-threads", "1"))
LR1 = Setting("planted lr:0.01", "lr x 1.01", ("--trainguard-plant=lr:0.01",), plant="lr:0.01", required=True)


def _tensor(name: str, values) -> TensorRecord:
    v = np.asarray(values, dtype=np.float64)
    return TensorRecord(name, "optimizer", "float32", (v.size,), hashlib.sha256(v.tobytes()).hexdigest(),
                        float(v.min()), float(v.max()), float(v.mean()), float(np.linalg.norm(v)), 0, v)


def _run(label: str, setting: Setting, loss, tensors: dict) -> RecordedRun:
    run = Run(metrics={"loss": MetricSeries(np.arange(len(loss)), loss)},
              tensors={k: _tensor(k, v) for k, v in tensors.items()},
              meta={"nodeid": "test_oven.py::test_oven", "seed": 2,
                    "tolerances": {"rtol": DEFAULT_RTOL, "atol": DEFAULT_ATOL, "exact": False, "metrics": {}}})
    return RecordedRun(RunSpec(label, setting), run, Path("."))


# -- the proposal rule -------------------------------------------------------------------------

WEIGHTS = np.array([0.31, -0.12, 0.27, -0.45])
# A conv bias's momentum buffer in front of BatchNorm: zero in exact arithmetic, so it holds
# rounding residue only (the case that made the earlier rule propose rtol=8).
RESIDUE = np.array([1.1e-9, -2.0e-9, 3.2e-9, -0.7e-9])


def _noisy_runs():
    ref = _run("baseline 1", BASELINE, [0.9, 0.6, 0.4], {"fc.weight": WEIGHTS, "conv.bias.momentum_buffer": RESIDUE})
    same = _run("baseline 2", BASELINE, [0.9, 0.6, 0.4], {"fc.weight": WEIGHTS, "conv.bias.momentum_buffer": RESIDUE})
    noisy = _run("threads=1", THREADS1, [0.9, 0.6, 0.4 * (1 + 3e-7)],
                 {"fc.weight": WEIGHTS * (1 + 5e-7), "conv.bias.momentum_buffer": RESIDUE * 1.77})
    return [ref, same, noisy]


def test_near_zero_residue_cannot_inflate_rtol():
    runs = _noisy_runs()
    cal = analyse("n", runs)
    # The earlier rule divided each spread by its own value: 0.77 x safety 10 -> rtol 8.
    assert np.max(np.abs(RESIDUE * 0.77) / np.abs(RESIDUE)) == pytest.approx(0.77)
    p = cal.proposal
    assert p.raw_rtol == pytest.approx(5e-7) and p.rtol == round_up(10 * p.raw_rtol)  # the weights' noise
    assert p.rtol < 1e-5
    assert p.rtol_where.startswith("fc.weight[")
    assert p.atol_where.startswith("conv.bias.momentum_buffer[")  # the residue went to atol
    assert p.atol <= 1e-7
    # still covers every observed difference (the plugin's own check)
    for r in runs[1:]:
        assert compare(runs[0].run, r.run, cal.policy()).outcome in (IDENTICAL, CLOSE)


def test_noisy_metric_does_not_loosen_the_state():
    ref = _run("baseline 1", BASELINE, [0.9, 0.6, 0.4], {"fc.weight": WEIGHTS})
    jitter = _run("baseline 2", BASELINE, [0.9, 0.6 * (1 + 2e-4), 0.4], {"fc.weight": WEIGHTS})
    cal = analyse("n", [ref, jitter])
    assert cal.proposal.kept_rtol and cal.proposal.rtol == DEFAULT_RTOL  # the state never moved
    assert cal.metric_proposals["loss"].rtol >= 1e-3  # the loss carries its own noise
    # a 1e-4 change of the weights is still caught
    moved = _run("x", BASELINE, [0.9, 0.6, 0.4], {"fc.weight": WEIGHTS * (1 + 1e-4)})
    assert compare(ref.run, moved.run, cal.policy()).outcome == CHANGED


def test_power_checks_report_caught_and_missed_changes():
    runs = _noisy_runs()
    caught = _run("planted lr:0.01", LR1, [0.9, 0.6 * (1 + 1e-3), 0.4 * (1 + 3e-3)],
                  {"fc.weight": WEIGHTS * (1 + 1e-3), "conv.bias.momentum_buffer": RESIDUE})
    cal = analyse("n", [*runs, caught])
    [check_] = cal.power
    assert check_.effect and check_.caught and check_.where == "metric 'loss' at step 1" and check_.step == 1
    assert not cal.missed()
    assert cal.per_run.keys() == {"baseline 2", "threads=1"}  # planted runs take no part in the spread

    missed = _run("planted lr:0.01", LR1, [0.9, 0.6, 0.4 * (1 + 3e-7)],
                  {"fc.weight": WEIGHTS * (1 + 1e-6), "conv.bias.momentum_buffer": RESIDUE})
    cal = analyse("n", [*runs, missed])
    assert [p.label for p in cal.missed()] == ["planted lr:0.01"]
    assert any(re.match(r"rtol=\S+ \(overall\) from fc\.weight\[", line) for line in cal.forcing())

    no_effect = _run("planted lr:0.01", LR1, [0.9, 0.6, 0.4], {"fc.weight": WEIGHTS,
                                                              "conv.bias.momentum_buffer": RESIDUE})
    cal = analyse("n", [*runs, no_effect])
    assert not cal.power[0].effect and not cal.missed()


# -- calibrate --from: what a folder must hold ---------------------------------------------------


def test_folders_from_other_runners_are_checked_before_use(tmp_path):
    from trainguard.core.errors import TrainguardError
    from trainguard.tools.calibrate import read_folders

    base = _noisy_runs()[0].run
    node = "test_oven.py::test_oven"

    def runner(name: str, **meta) -> str:
        run = Run(metrics=base.metrics, tensors=base.tensors, meta=base.meta.with_(**meta))
        golden.write_run(paths.golden_folder(tmp_path / name, node), run)
        return str(tmp_path / name)

    good = [runner("golden"), runner("ci-1", fingerprint={"cpu": {"model_name": "Tram Depot CPU 9000"}})]
    runs = read_folders(node, good, 2)
    assert [r.spec.label for r in runs] == ["golden", "ci-1"]
    assert runs[1].spec.setting.description.endswith("recorded on Tram Depot CPU 9000")
    cases = {
        "ci-other": (dict(nodeid="test_oven.py::test_other"), "holds a run of test_oven.py::test_other"),
        "ci-seed": (dict(seed=3), "was recorded with seed 3, this test runs with seed 2"),
        "ci-planted": (dict(fingerprint={"planted": "lr:0.01"}), "planted change (lr:0.01)"),
        "ci-pinned": (dict(fingerprint={"portable": {"pins": {}}}), "differ in portable mode"),
    }
    for name, (meta, message) in cases.items():
        with pytest.raises(TrainguardError, match=re.escape(message)):
            read_folders(node, [good[0], runner(name, **meta)], 2)
    (tmp_path / "ci-none").mkdir()
    with pytest.raises(TrainguardError, match="holds no run of test_oven.py::test_oven"):
        read_folders(node, [good[0], str(tmp_path / "ci-none")], 2)
    with pytest.raises(TrainguardError, match="no such folder"):
        read_folders(node, [good[0], str(tmp_path / "missing")], 2)


# -- planting, checked against torch's own optimizers -------------------------------------------


def _train(lr: float, plant: Plant | None, steps: int = 3):
    import torch

    torch.manual_seed(0)
    model = torch.nn.Linear(3, 2)
    opt = torch.optim.SGD(model.parameters(), lr=lr, momentum=0.9)
    x = torch.randn(8, 3)
    seen_lr = []
    with planted(plant):
        for _ in range(steps):
            opt.zero_grad()
            model(x).pow(2).mean().backward()
            opt.step()
            seen_lr.append(opt.param_groups[0]["lr"])
    return [p.detach().clone() for p in model.parameters()], seen_lr


def test_planted_learning_rate_equals_a_higher_learning_rate():
    import torch

    base = 0.05
    planted_params, seen = _train(base, parse("lr:0.01"))
    direct, _ = _train(base * (1 + 0.01), None)
    assert all(torch.equal(a, b) for a, b in zip(planted_params, direct))  # bit for bit
    assert seen == [base] * 3  # restored after every step: schedulers and the state see the original
    plain, _ = _train(base, None)
    assert not any(torch.equal(a, b) for a, b in zip(planted_params, plain))
    after, _ = _train(base, None)  # the hooks are gone after the block
    assert all(torch.equal(a, b) for a, b in zip(after, plain))


def test_planted_parameter_nudge_happens_once():
    import torch

    one, _ = _train(0.05, None, steps=1)
    nudged, _ = _train(0.05, parse("params:0.0001"), steps=1)
    assert all(torch.equal(n, o * (1 + 0.0001)) for n, o in zip(nudged, one))


@pytest.mark.parametrize("spec", ["lr", "lr:0", "lr:1.5", "momentum:0.1", "lr:nan", "lr:-0.01"])
def test_plant_spec_is_validated(spec):
    with pytest.raises(UsageError, match="expected lr:SIZE or params:SIZE"):
        parse(spec)


def test_a_golden_with_a_planted_change_is_never_a_reference(tmp_path):
    folder = tmp_path / "golden" / "t"
    run = _noisy_runs()[0].run
    golden.write_run(folder, Run(metrics=run.metrics, tensors=run.tensors,
                                 meta=run.meta.with_(fingerprint={"planted": "lr:0.01"})))
    result = check("n", run, folder, Policy(), "bless")
    assert result.outcome == UNREADABLE and "planted change (lr:0.01)" in result.error


def test_a_bless_replaces_a_planted_golden_even_with_the_same_bits(tmp_path):
    from trainguard.core.guard import bless
    from trainguard.core.verdicts import BLESSED_CHANGED

    folder = tmp_path / "golden" / "t"
    run = _noisy_runs()[0].run
    golden.write_run(folder, Run(metrics=run.metrics, tensors=run.tensors,
                                 meta=run.meta.with_(fingerprint={"planted": "params:0.0001"})))
    result = bless("n", Run(metrics=run.metrics, tensors=run.tensors, meta=run.meta.with_(fingerprint={})), folder,
                   Policy())
    assert result.outcome == BLESSED_CHANGED
    assert "planted" not in golden.read_run(folder).meta["fingerprint"]


def test_plugin_refuses_a_plant_outside_a_bless(tmp_path):
    (tmp_path / "test_x.py").write_text("def test_x():\n    pass\n")
    proc = run_pytest(tmp_path, "--trainguard-plant=lr:0.01")
    assert proc.returncode == 4
    assert "only goes with --trainguard-bless into a scratch folder" in proc.stderr


# -- end to end ---------------------------------------------------------------------------------

OVEN = '''
"""An invented bakery: a small CNN reads 8x8 thermal images of loaves in the oven and says
whether each loaf is done."""
import os

import pytest
import torch

BN_MOMENTUM = float(os.environ.get("OVEN_BN_MOMENTUM", "0.1"))


def loaves(n=32):
    g = torch.Generator().manual_seed(5)
    x = torch.randn(n, 1, 8, 8, generator=g)
    y = (x[:, 0, 2:6, 2:6].mean(dim=(1, 2)) > 0).long()
    return x, y


def train(trajectory, steps=8, lr=0.05, jitter=0.0, state=True):
    model = torch.nn.Sequential(
        torch.nn.Conv2d(1, 4, 3, padding=1), torch.nn.BatchNorm2d(4, momentum=BN_MOMENTUM), torch.nn.ReLU(),
        torch.nn.Flatten(), torch.nn.Linear(4 * 8 * 8, 2))
    opt = torch.optim.SGD(model.parameters(), lr=lr, momentum=0.9)
    x, y = loaves()
    for step in range(steps):
        opt.zero_grad()
        out = model(x)
        loss = torch.nn.functional.cross_entropy(out, y)
        loss.backward()
        opt.step()
        reported = loss.item()
        if jitter:  # a flaky oven thermometer: the OS entropy pool nudges the reported loss
            reported *= 1 + jitter * (int.from_bytes(os.urandom(4), "little") / 2**32 * 2 - 1)
        trajectory.log(step, loss=reported, accuracy=(out.argmax(1) == y).float().mean().item())
    if state:
        trajectory.state(model, optimizer=opt)


@pytest.mark.trainguard(seed=2)
def test_oven_cnn(trajectory):
    train(trajectory)


@pytest.mark.trainguard(seed=2)
def test_oven_noisy_log(trajectory):
    # the reported loss is jittered, the state is not
    train(trajectory, steps=3, jitter=1e-4)


@pytest.mark.trainguard(seed=2)
def test_oven_flaky_thermometer(trajectory):
    # only a noisy loss is guarded: a tolerance that covers the noise cannot see a small lr change
    # (it moves this loss by 7.7e-4 of itself at step 2; the jitter apart by up to 8e-4)
    train(trajectory, steps=3, lr=0.01, jitter=4e-4, state=False)
'''

CNN = "test_oven.py::test_oven_cnn"
LOOSE = "test_oven.py::test_oven_flaky_thermometer"
NOISY = "test_oven.py::test_oven_noisy_log"


@pytest.fixture
def bakery(tmp_path, monkeypatch):
    monkeypatch.delenv("OVEN_BN_MOMENTUM", raising=False)
    return generated_project(tmp_path, monkeypatch, {"test_oven.py": OVEN})


def _power_row(out: str, spec: str) -> str:
    """The row of the power table (the last line naming the planted run; the first is in the run table)."""
    rows = re.findall(rf"^  planted {re.escape(spec)} .*$", out, re.M)
    assert rows, out
    return str(rows[-1])


@pytest.mark.slow
def test_calibrated_cnn_with_batchnorm_keeps_its_power(bakery, capsys):
    assert run_pytest(bakery, "--trainguard-bless", CNN).returncode == 0
    assert main(["calibrate", CNN, "--write", "--jobs", "2"]) == 0
    out = capsys.readouterr().out
    for label in ("threads=", "dispatch=sse4.2", "dispatch=mkl-compatible", "nondeterministic"):
        assert re.search(rf"^  {re.escape(label)}", out, re.M), label
    assert "CAUGHT" in _power_row(out, "lr:0.01") and "(required)" in _power_row(out, "lr:0.01")
    assert "CAUGHT" in _power_row(out, "lr:0.001")
    stored = golden.read_run(paths.golden_folder(bakery / "golden", CNN)).meta
    cal = stored["calibrated"]
    assert cal["rtol"] <= 1e-3 and cal["atol"] <= 1e-5, cal
    assert {p["plant"]: p["caught"] for p in cal["power"]}["lr:0.01"] is True
    # What the earlier rule let through now fails: BatchNorm momentum 0.1 -> 0.12.
    proc = run_pytest(bakery, CNN, env={"OVEN_BN_MOMENTUM": "0.12"})
    assert proc.returncode == 1 and "running_mean" in proc.stdout, proc.stdout
    assert calibrated_policy(Policy(), stored).source == "calibrated"


@pytest.mark.slow
def test_calibrate_from_two_runners_keeps_power_or_refuses(bakery, capsys):
    assert run_pytest(bakery, "--trainguard-bless", "-k", "noisy or thermometer").returncode == 0
    # two "CI runners": another CPU's kernel dispatch, another thread count; each saves its runs
    # (the jitter, from os.urandom at every step, keeps any run from matching bit for bit)
    runner_a = run_pytest(bakery, "--trainguard-results=ci-runner-1", "-k", "noisy or thermometer",
                          env={"ATEN_CPU_CAPABILITY": "default", "MKL_ENABLE_INSTRUCTIONS": "SSE4_2"})
    runner_b = run_pytest(bakery, "--trainguard-results=ci-runner-2", "--trainguard-threads=1", "-k", "noisy or thermometer")
    assert runner_a.returncode in (0, 1) and runner_b.returncode in (0, 1), runner_a.stdout + runner_b.stdout
    for folder in ("ci-runner-1", "ci-runner-2"):
        for test in (NOISY, LOOSE):
            assert (paths.golden_folder(bakery / folder, test) / "metrics.parquet").is_file(), (folder, test)

    # The noisy log: the loss gets its own tolerance, the state keeps a tight one, and the
    # planted 1 % learning-rate change is caught, so the proposal is written.
    assert main(["calibrate", NOISY, "--from", "golden", "ci-runner-1", "ci-runner-2", "--write", "--jobs", "2"]) == 0
    out = capsys.readouterr().out
    assert "one from each folder given" in out and "all compared with golden" in out
    for label in ("golden", "ci-runner-1", "ci-runner-2"):
        assert re.search(rf"^  {label} +read from {label}, recorded on ", out, re.M), label
    assert "CAUGHT" in _power_row(out, "lr:0.01")
    stored = golden.read_run(paths.golden_folder(bakery / "golden", NOISY))
    assert stored.meta["calibrated"]["metrics"]["loss"]["rtol"] >= 1e-4 > stored.meta["calibrated"]["rtol"]
    for folder in ("ci-runner-1", "ci-runner-2"):  # both runners now pass under what was stored
        run = golden.read_run(paths.golden_folder(bakery / folder, NOISY))
        assert compare(stored, run, calibrated_policy(Policy(), stored.meta)).outcome in (IDENTICAL, CLOSE)

    # The thermometer guards only its jittered loss: the proposal would let a 1 % learning-rate
    # change through, so nothing is written, and the report names what forced it.
    folder = paths.golden_folder(bakery / "golden", LOOSE)
    before = {p.name: p.read_bytes() for p in folder.iterdir()}
    assert main(["calibrate", LOOSE, "--from", "golden", "ci-runner-1", "ci-runner-2", "--write", "--jobs", "2"]) == 1
    out = capsys.readouterr().out
    assert "MISSED" in _power_row(out, "lr:0.01"), out
    assert "lets a 1 % learning-rate change through" in out
    assert re.search(r"^  rtol=\S+ \(loss\) from metric loss at step \d+", out, re.M), out
    assert "remedies: a longer run" in out and "exact=True" in out
    assert "nothing written" in out and "misses the planted change" in out
    assert {p.name: p.read_bytes() for p in folder.iterdir()} == before

    # bad input: one folder; a folder without the test
    assert main(["calibrate", NOISY, "--from", "golden"]) == 2
    assert "--from needs at least two folders" in capsys.readouterr().err
    (bakery / "ci-empty").mkdir()
    assert main(["calibrate", NOISY, "--from", "golden", "ci-empty", "--jobs", "2"]) == 2
    err = capsys.readouterr().err
    assert f"--from ci-empty: holds no run of {NOISY}" in err
    assert "leave ci-empty out and give the golden folder instead" in err and "Traceback" not in err
