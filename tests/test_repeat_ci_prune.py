"""Repeated runs (`--trainguard-repeat`), CI strictness, `trainguard prune`, and restored globals.

Each scenario is an invented project driven through real pytest runs in a subprocess
(pytester): a greenhouse whose sensors may jitter, a bakery blessing goldens in CI, and a
bakery whose test suite lost some tests. Expected values come from the scenario (which
test reads os.urandom, which golden belongs to a deleted test), not from trainguard.

torch 2.13 on CPU has no op that warns under `torch.use_deterministic_algorithms(True,
warn_only=True)` (index_add_, scatter_add_, histc, bincount, kthvalue, put_(accumulate=True),
index_put_ with accumulate, median, pooling and interpolation backwards were all tried: the
alerts are raised by CUDA kernels only). The greenhouse's misting test therefore emits the
warning itself, with torch's wording, next to a real source of noise.
"""

from __future__ import annotations

import json
import os
import re
import shlex
import shutil

import pytest
from pytest_output import outcomes, sections

pytestmark = pytest.mark.slow


def run(pytester: pytest.Pytester, *args: str) -> pytest.RunResult:
    # plugins the generated projects do not use are left out: loading them costs time on every run
    return pytester.runpytest_subprocess("-v", "-p", "no:cacheprovider", "-p", "no:hypothesispytest", "-p", "no:xdist",
                                         *args, timeout=120)




# -- repeats: a greenhouse whose sensors may jitter ------------------------------------------

GREENHOUSE = '''
import os
import random
import time
import warnings

import numpy as np
import pytest
import torch


def grow(trajectory, model=None, jitter=None, steps=4):
    """Fit vent openings to four climate readings; `jitter` scales the loss from step 1 on."""
    model = model if model is not None else torch.nn.Linear(4, 1)
    opt = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.5)
    readings = torch.randn(24, 4)
    vents = readings @ torch.tensor([[0.3], [-0.2], [0.5], [0.1]])
    for step in range(steps):
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(model(readings), vents)
        if jitter is not None and step >= 1:
            loss = loss * (1.0 + 1e-3 * jitter())
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss)
    trajectory.state(model, optimizer=opt)


@pytest.mark.trainguard(seed=5)
def test_vent_steady(trajectory):
    # every run of the body appends what it drew first: re-seeded runs draw the same numbers
    with open("body_runs.txt", "a") as f:
        f.write(f"{torch.rand(1).item()!r} {random.random()!r} {np.random.rand()!r}\\n")
    grow(trajectory)
    # a global changed at the end of each run; the next run must start from the original again
    torch.set_default_dtype(torch.float64)


@pytest.mark.trainguard(seed=5)
def test_sensor_jitter(trajectory):
    grow(trajectory, jitter=lambda: int.from_bytes(os.urandom(4), "little") / 2**32)


@pytest.mark.trainguard(seed=5, deterministic="warn")
def test_mister_clock(trajectory):
    warnings.warn("mister_scatter_add_cpu_ does not have a deterministic implementation, but you set "
                  "'torch.use_deterministic_algorithms(True, warn_only=True)'. You can file an issue.")
    grow(trajectory, jitter=lambda: (time.perf_counter_ns() % 997) / 997)


@pytest.fixture
def tray():
    return torch.nn.Linear(4, 1)


@pytest.mark.trainguard(seed=5)
def test_seed_tray(trajectory, tray):
    grow(trajectory, model=tray, steps=2)  # trains the fixture's model: the second run continues from the first


@pytest.fixture
def logbook(trajectory):
    return trajectory


def test_logbook_indirect(logbook):
    logbook.log(0, humidity=0.6)  # gets the trajectory through a fixture: repeats cannot hand it a fresh one
'''


def test_repeat_finds_nondeterministic_tests_and_passes_deterministic_ones(pytester: pytest.Pytester) -> None:
    pytester.makeini("[pytest]\n")
    pytester.makepyfile(test_greenhouse=GREENHOUSE)
    golden = pytester.path / "golden" / "test_greenhouse.py"

    result = run(pytester, "--trainguard-bless", "--trainguard-reason", "spring", "--trainguard-repeat", "3")
    assert outcomes(result) == {
        "test_greenhouse.py::test_vent_steady": "PASSED",
        "test_greenhouse.py::test_sensor_jitter": "FAILED",
        "test_greenhouse.py::test_mister_clock": "FAILED",
        "test_greenhouse.py::test_seed_tray": "FAILED",
        "test_greenhouse.py::test_logbook_indirect": "FAILED",
    }
    # the body ran three times, each time re-seeded to the same state
    lines = (pytester.path / "body_runs.txt").read_text().splitlines()
    assert len(lines) == 3 and len(set(lines)) == 1
    # only the deterministic test got a golden; nondeterministic runs are never blessed
    assert (golden / "test_vent_steady" / "metrics.parquet").is_file()
    assert sorted(p.name for p in golden.iterdir()) == ["test_vent_steady"]

    text = sections(result)
    jitter = text["test_sensor_jitter"]
    assert "test_greenhouse.py::test_sensor_jitter is nondeterministic: 3 runs" in jitter
    assert "first differing metric loss at step 1:" in jitter  # the jitter starts at step 1
    assert "first differing state entry " in jitter  # the scaled loss moves the weights too
    assert "neither compared nor written" in jitter
    assert "os.urandom" in jitter and "torch reported no op without a deterministic implementation" in jitter
    assert "fixtures (" not in jitter

    mister = text["test_mister_clock"]
    assert "first differing metric loss at step 1:" in mister
    assert "hint: torch warned during the runs that ops ran without a deterministic implementation" in mister
    assert re.search(r"UserWarning: mister_scatter_add_cpu_ does not have a deterministic implementation.*"
                     r"\(test_greenhouse\.py:\d+\)", mister)
    assert "torch reported no op" not in mister
    # the warning still reaches pytest's warnings summary, once
    result.stdout.fnmatch_lines(["*= warnings summary =*", "test_greenhouse.py::test_mister_clock",
                                 "*test_greenhouse.py:*: UserWarning: mister_scatter_add_cpu_ does not have*"])
    assert re.search(r"4 failed, 1 passed, 1 warning in", result.stdout.lines[-1])

    tray = text["test_seed_tray"]
    assert "first differing metric loss at step 0:" in tray  # run 2 starts from run 1's trained model
    assert "fixtures (tray) were set up once and shared by all runs" in tray

    assert "--trainguard-repeat gives each run a fresh 'trajectory' argument, but this test gets the trajectory " \
        "through another fixture" in text["test_logbook_indirect"]

    result.stdout.fnmatch_lines([
        "guarded tests checked: 3 (3 nondeterministic)",
        "  nondeterministic  test_greenhouse.py::test_sensor_jitter",
        "goldens blessed: 1 (1 new)",
    ])

    # checking: the deterministic test matches its golden on all three runs; a report counts the rest
    result = run(pytester, "--trainguard-repeat", "3", "--trainguard-report=report", "--trainguard-results=res")
    assert outcomes(result)["test_greenhouse.py::test_vent_steady"] == "PASSED"
    result.assert_outcomes(passed=1, failed=4)
    result.stdout.fnmatch_lines(["guarded tests checked: 4 (1 identical, 3 nondeterministic)"])
    assert len((pytester.path / "body_runs.txt").read_text().splitlines()) == 6
    summary = (pytester.path / "report" / "summary.md").read_text()
    assert "1 identical" in summary and "3 nondeterministic" in summary
    row = next(line for line in summary.splitlines() if "test_sensor_jitter" in line)
    assert "**nondeterministic**" in row and "run 2 vs run 1: metric loss at step 1" in row
    rows = json.loads((pytester.path / "report" / "summary.json").read_text())["rows"]
    assert sorted(r["outcome"] for r in rows) == ["identical"] + ["nondeterministic"] * 3
    assert not (pytester.path / "res").exists()  # a run that differs from itself is no result to adopt

    result = run(pytester, "--trainguard-repeat", "0")
    assert result.ret == pytest.ExitCode.USAGE_ERROR
    result.stderr.fnmatch_lines(["*--trainguard-repeat 0: N must be at least 1*"])


# -- CI strictness -----------------------------------------------------------------------------

LOAVES = '''
import pytest
import torch


def proof(trajectory):
    model = torch.nn.Linear(3, 1)
    opt = torch.optim.Adam(model.parameters(), lr=0.05)
    dough = torch.randn(12, 3)  # hydration, salt, minutes proofed
    for step in range(3):
        opt.zero_grad()
        loss = model(dough).pow(2).mean()
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss)
    trajectory.state(model, optimizer=opt)


@pytest.mark.trainguard(seed=2)
def test_sourdough(trajectory):
    proof(trajectory)
'''


def test_ci_requires_a_bless_reason_and_says_why_a_golden_is_missing(pytester: pytest.Pytester,
                                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    pytester.makeini("[pytest]\n")
    pytester.makepyfile(test_loaf=LOAVES, test_rye=LOAVES.replace("test_sourdough", "test_rye"))
    monkeypatch.setenv("CI", "true")

    result = run(pytester, "--trainguard-bless", "test_loaf.py")
    assert result.ret == pytest.ExitCode.USAGE_ERROR
    err = result.stderr.str()
    assert "--trainguard-bless in CI (the CI environment variable is 'true') needs an explicit --trainguard-reason" in err
    assert "Traceback" not in err
    assert not (pytester.path / "golden").exists()
    command = next(line.strip() for line in result.stderr.lines if line.strip().startswith("pytest "))
    argv = shlex.split(command)
    assert argv[0] == "pytest" and argv[-2:] == ["--trainguard-reason", "describe the intended change"]
    assert argv[-4:-2] == ["--trainguard-bless", "test_loaf.py"]  # the original arguments, in order

    # the printed command, run as printed, blesses with that reason
    result = pytester.runpytest_subprocess(*argv[1:], timeout=120)
    result.assert_outcomes(passed=1)
    import trainguard

    blessed = trainguard.read_run(pytester.path / "golden" / "test_loaf.py" / "test_sourdough")
    assert blessed.meta["reason"] == "describe the intended change"

    # checking in CI: the golden that exists matches; the missing one fails and says this is CI
    result = run(pytester)
    assert outcomes(result) == {"test_loaf.py::test_sourdough": "PASSED", "test_rye.py::test_rye": "FAILED"}
    rye = sections(result)["test_rye"]
    assert "has no golden yet" in rye
    assert "This is a CI run (the CI environment variable is 'true'): goldens are never created in CI" in rye
    assert "git add golden/test_rye.py/test_rye" in rye
    assert "pytest --trainguard-bless --trainguard-reason 'describe the intended change' test_rye.py::test_rye" in rye
    assert not (pytester.path / "golden" / "test_rye.py").exists()


@pytest.mark.parametrize("value, strict", [
    ("true", True), ("1", True), ("yes", True), ("woodpecker", True), ("FALSE", False), ("false", False),
    ("0", False), ("", False), ("  ", False), (None, False),
])
def test_ci_variable_values(value: str | None, strict: bool) -> None:
    from trainguard.core.project import ci_enabled

    assert ci_enabled({} if value is None else {"CI": value}) is strict


# -- globals: everything a guarded test may change is back for the next test -------------------

GLOBALS_CONFTEST = '''
import os
import random

import numpy as np
import torch

BEFORE = {
    "threads": torch.get_num_threads(),
    "dtype": torch.get_default_dtype(),
    "anomaly": torch.is_anomaly_enabled(),
    "anomaly_check_nan": torch.is_anomaly_check_nan_enabled(),
    "deterministic": torch.are_deterministic_algorithms_enabled(),
    "warn_only": torch.is_deterministic_algorithms_warn_only_enabled(),
    "cudnn": (torch.backends.cudnn.benchmark, torch.backends.cudnn.deterministic, torch.backends.cudnn.enabled,
              torch.backends.cudnn.allow_tf32),
    "matmul_tf32": torch.backends.cuda.matmul.allow_tf32,
    "precision": torch.get_float32_matmul_precision(),
    "cublas": os.environ.get("CUBLAS_WORKSPACE_CONFIG"),
    "py_random": random.getstate(),
    "np_random": np.random.get_state(),
    "torch_rng": torch.get_rng_state().clone(),
}
if torch.cuda.is_available():
    torch.cuda.init()
    BEFORE["cuda_rng"] = [s.clone() for s in torch.cuda.get_rng_state_all()]
'''

GLOBALS_TESTS = '''
import os
import random

import numpy as np
import pytest
import torch

from conftest import BEFORE


@pytest.mark.trainguard(seed=9)
def test_a_cellar_changes_everything(trajectory):
    # inside the guarded test trainguard's own settings are in force
    assert torch.are_deterministic_algorithms_enabled() and not torch.backends.cudnn.benchmark
    assert os.environ["CUBLAS_WORKSPACE_CONFIG"] == ":4096:8"
    model = torch.nn.Linear(2, 1)
    trajectory.log(0, loss=model(torch.ones(1, 2)).sum())
    trajectory.state(model)
    torch.set_num_threads(1 if torch.get_num_threads() != 1 else 2)
    torch.use_deterministic_algorithms(True, warn_only=True)
    torch.set_default_dtype(torch.float64)
    torch.set_anomaly_enabled(True, False)
    torch.backends.cudnn.benchmark = True
    torch.backends.cudnn.deterministic = False
    torch.backends.cudnn.enabled = False
    torch.backends.cudnn.allow_tf32 = True
    torch.backends.cuda.matmul.allow_tf32 = True
    torch.set_float32_matmul_precision("medium")
    os.environ["CUBLAS_WORKSPACE_CONFIG"] = ":16:8"
    random.random()
    np.random.rand(4)
    torch.rand(4)
    if torch.cuda.is_available():
        torch.rand(4, device="cuda")


def test_b_cellar_finds_the_world_as_it_was():
    assert torch.get_num_threads() == BEFORE["threads"]
    assert torch.get_default_dtype() == BEFORE["dtype"]
    assert torch.is_anomaly_enabled() == BEFORE["anomaly"]
    assert torch.is_anomaly_check_nan_enabled() == BEFORE["anomaly_check_nan"]
    assert torch.are_deterministic_algorithms_enabled() == BEFORE["deterministic"]
    assert torch.is_deterministic_algorithms_warn_only_enabled() == BEFORE["warn_only"]
    assert (torch.backends.cudnn.benchmark, torch.backends.cudnn.deterministic, torch.backends.cudnn.enabled,
            torch.backends.cudnn.allow_tf32) == BEFORE["cudnn"]
    assert torch.backends.cuda.matmul.allow_tf32 == BEFORE["matmul_tf32"]
    assert torch.get_float32_matmul_precision() == BEFORE["precision"]
    assert os.environ.get("CUBLAS_WORKSPACE_CONFIG") == BEFORE["cublas"]
    assert random.getstate() == BEFORE["py_random"]
    now, before = np.random.get_state(), BEFORE["np_random"]
    assert now[0] == before[0] and np.array_equal(now[1], before[1]) and now[2:] == before[2:]
    assert torch.equal(torch.get_rng_state(), BEFORE["torch_rng"])
    if "cuda_rng" in BEFORE:
        assert all(torch.equal(a, b) for a, b in zip(torch.cuda.get_rng_state_all(), BEFORE["cuda_rng"]))
'''


def test_every_global_is_restored_after_a_guarded_test_even_with_repeats(pytester: pytest.Pytester,
                                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    # unset before the run, so that trainguard sets it inside the test and must remove it again
    monkeypatch.delenv("CUBLAS_WORKSPACE_CONFIG", raising=False)
    pytester.makeini("[pytest]\n")
    pytester.makeconftest(GLOBALS_CONFTEST)
    pytester.makepyfile(test_cellar=GLOBALS_TESTS)
    # with two runs of the body, the second must also start from trainguard's settings, not from
    # what the first left behind (else its asserts fail or its run differs)
    result = run(pytester, "--trainguard-bless", "--trainguard-reason", "cellar", "--trainguard-repeat", "2")
    assert outcomes(result) == {"test_cellar.py::test_a_cellar_changes_everything": "PASSED",
                                "test_cellar.py::test_b_cellar_finds_the_world_as_it_was": "PASSED"}, \
        result.stdout.str()


# -- trainguard prune ----------------------------------------------------------------------------

PANTRY = '''
import pytest


@pytest.mark.trainguard(seed=1)
def test_flour_stock(trajectory):
    import torch
    model = torch.nn.Linear(2, 1)
    trajectory.log(0, loss=model(torch.ones(3, 2)).pow(2).mean())
    trajectory.state(model)


@pytest.mark.trainguard(seed=1)
@pytest.mark.parametrize("grain", ["oat", "barley"])
def test_grain_stock(trajectory, grain):
    import torch
    model = torch.nn.Linear(2, 1)
    trajectory.log(0, loss=model(torch.ones(3, 2) * len(grain)).pow(2).mean())
    trajectory.state(model)


def test_shelf_labels():
    assert "oat".upper() == "OAT"
'''


def test_prune_lists_and_deletes_goldens_no_test_uses(pytester: pytest.Pytester, monkeypatch: pytest.MonkeyPatch,
                                                      capsys: pytest.CaptureFixture[str],
                                                      tmp_path_factory: pytest.TempPathFactory) -> None:
    from trainguard.core import store as golden_mod
    from trainguard.skins.cli import main

    pytester.makeini("[pytest]\n")
    pytester.makepyfile(test_pantry=PANTRY)
    run(pytester, "--trainguard-bless", "--trainguard-reason", "stocktake").assert_outcomes(passed=4)
    gold = pytester.path / "golden"
    used = [gold / "test_pantry.py" / "test_flour_stock", gold / "test_pantry.py" / "test_grain_stock[oat]",
            gold / "test_pantry.py" / "test_grain_stock[barley]"]
    assert all(golden_mod.exists(f) for f in used)
    # goldens of a renamed test and of a deleted file, a stray note, and a link to goldens elsewhere
    retired = gold / "test_pantry.py" / "test_rye_stock"
    deleted_file = gold / "test_scones.py" / "TestOven" / "test_scone_rise"
    for stale in (retired, deleted_file):
        shutil.copytree(used[0], stale)
    (gold / "NOTES.txt").write_text("ask the miller about spelt\n")
    elsewhere = tmp_path_factory.mktemp("elsewhere")
    shutil.copytree(used[0], elsewhere / "test_linked")
    os.symlink(elsewhere, gold / "linked", target_is_directory=True)
    monkeypatch.chdir(pytester.path)
    capsys.readouterr()  # the bless run's echo

    assert main(["prune"]) == 1
    out = capsys.readouterr().out
    assert "5 golden folder(s) under" in out and "4 test(s) collected: 2 golden folder(s) used by no collected test" in out
    listed = [line.strip() for line in out.splitlines() if line.startswith("  ")]
    assert listed == ["golden/test_pantry.py/test_rye_stock", "golden/test_scones.py/TestOven/test_scone_rise"]
    assert "remove them with: trainguard prune --delete" in out
    assert golden_mod.exists(retired) and golden_mod.exists(deleted_file)  # listing removes nothing

    # a collection error: nothing is removed, the error is named, no traceback of ours
    pytester.makepyfile(test_broken="def test_crumbs(:\n    pass\n")
    assert main(["prune", "--delete"]) == 2
    captured = capsys.readouterr()
    assert "trainguard prune: collecting the tests failed (pytest exit status 2); nothing was removed" in captured.err
    assert "SyntaxError" in captured.err and "test_broken.py" in captured.err
    assert "Traceback" not in captured.err
    assert golden_mod.exists(retired)
    (pytester.path / "test_broken.py").unlink()

    # a selection that collects nothing would call every golden unused: refused
    assert main(["prune", "--", "-k", "no_such_pantry_item"]) == 2
    assert "collected no tests" in capsys.readouterr().err
    # --delete with any selection would delete the goldens of every unselected test: refused
    assert main(["prune", "--delete", "--", "-k", "rye"]) == 2
    assert "would delete the goldens of every test outside it" in capsys.readouterr().err
    assert golden_mod.exists(retired)

    assert main(["prune", "--delete"]) == 0
    out = capsys.readouterr().out
    assert "removed golden/test_pantry.py/test_rye_stock" in out
    assert "removed golden/test_scones.py/TestOven/test_scone_rise" in out
    assert not retired.exists() and not (gold / "test_scones.py").exists()  # empty parents go too
    assert all(golden_mod.exists(f) for f in used)
    assert (gold / "NOTES.txt").is_file()
    assert (gold / "linked").is_symlink() and golden_mod.exists(elsewhere / "test_linked")  # never followed

    assert main(["prune"]) == 0
    assert "0 golden folder(s) used by no collected test" in capsys.readouterr().out

    # trainguard's own options after the pytest arguments would go to pytest: said plainly
    assert main(["prune", "test_pantry.py", "--delete"]) == 2
    assert "--delete came after the pytest arguments" in capsys.readouterr().err


# -- repeats of watched tests: a tram depot's braking model ------------------------------------

DEPOT = '''
import os

import pytest
import torch


def brake(trajectory, noisy_sensor=False):
    """Fit braking distances of trams to speed and load; `noisy_sensor` reads the OS entropy pool."""
    model = torch.nn.Linear(2, 1)
    opt = torch.optim.SGD(model.parameters(), lr=0.05)
    trajectory.watch(model, opt)
    for step in range(3):
        x = torch.rand(16, 2)
        if noisy_sensor and step == 1:
            x = x + int.from_bytes(os.urandom(2), "little") * 1e-9
        opt.zero_grad()
        loss = (model(x) - x.sum(dim=1, keepdim=True)).pow(2).mean()
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss.item())
    trajectory.state(model, optimizer=opt)


@pytest.mark.trainguard(seed=3)
def test_brake_steady(trajectory):
    brake(trajectory)


@pytest.mark.trainguard(seed=3)
def test_brake_noisy_sensor(trajectory):
    brake(trajectory, noisy_sensor=True)
'''


def test_repeat_compares_the_traces_of_watched_tests(pytester: pytest.Pytester) -> None:
    # Used to crash ("a trace is already running in this process"): the first run's trace kept its hooks.
    pytester.makeini("[pytest]\n")
    pytester.makepyfile(test_depot=DEPOT)
    result = run(pytester, "--trainguard-bless", "--trainguard-repeat", "2")
    assert outcomes(result) == {"test_depot.py::test_brake_steady": "PASSED",
                                "test_depot.py::test_brake_noisy_sensor": "FAILED"}
    assert "Traceback" not in result.stdout.str() and "already running" not in result.stdout.str()
    noisy = sections(result)["test_brake_noisy_sensor"]
    assert "test_depot.py::test_brake_noisy_sensor is nondeterministic: 2 runs" in noisy
    assert "trace: first bitwise difference at step 1, stage data" in noisy  # the sensor, at step 1
    # the steady test's golden carries the first run's whole trace, and a repeated check matches it
    assert (pytester.path / "golden" / "test_depot.py" / "test_brake_steady" / "trace.parquet").is_file()
    result = run(pytester, "--trainguard-repeat", "2", "-k", "steady")
    result.stdout.fnmatch_lines(["guarded tests checked: 1 (1 identical)"])
