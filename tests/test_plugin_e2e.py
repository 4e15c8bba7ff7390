"""End-to-end tests of the pytest plugin: real pytest runs in a subprocess (pytester).

Each run costs a torch import (~3 s), so each test below drives one small invented project
(a bakery's loaf-weight regressor, a tram depot's delay model) through several runs with
many guarded tests per file, and checks per-test outcomes and messages. Every project
lives in its own pytester folder, so the tests are independent of cwd and of each other
(safe under xdist). Expected values come from the scenario (e.g. PyTorch's documented SGD
update), never from trainguard's own output.
"""

from __future__ import annotations

import json
import re
import shlex
from pathlib import Path

import pytest
from pytest_output import outcomes, sections

pytestmark = pytest.mark.slow

# -- the generated project ---------------------------------------------------------------

CONFTEST = '''
import random

import numpy as np
import torch

# Global state as it is before any test of the session runs (read by the unguarded checker test).
BEFORE = {
    "threads": torch.get_num_threads(),
    "dtype": torch.get_default_dtype(),
    "anomaly": torch.is_anomaly_enabled(),
    "deterministic": torch.are_deterministic_algorithms_enabled(),
    "py_random": random.getstate(),
    "np_random": np.random.get_state(),
    "torch_rng": torch.get_rng_state().clone(),
}
'''

HELPERS = '''
"""A tiny bakery model: predict loaf weight offsets from four dough measurements."""
import json
import pathlib

import torch

HERE = pathlib.Path(__file__).parent


def knob(name, default):
    """Per-run settings the outer test writes to knobs.json between runs."""
    path = HERE / "knobs.json"
    knobs = json.loads(path.read_text()) if path.exists() else {}
    return knobs.get(name, default)


def bake(trajectory, momentum=0.9, steps=6, lr=0.05, noise=0.0, nan_from=None, extra_metric=None):
    model = torch.nn.Sequential(torch.nn.Linear(4, 8), torch.nn.Tanh(), torch.nn.Linear(8, 1))
    opt = torch.optim.SGD(model.parameters(), lr=lr, momentum=momentum)
    x = torch.randn(32, 4)
    y = x @ torch.tensor([[0.5], [-1.0], [0.25], [2.0]]) + 0.1 * torch.randn(32, 1)
    for step in range(steps):
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(model(x), y)
        loss.backward()
        opt.step()
        value = loss.item() * (1.0 + noise)
        if nan_from is not None and step >= nan_from:
            value = float("nan")
        trajectory.log(step, loss=value)
    trajectory.state(model, optimizer=opt)
    return model
'''

BAKERY_TESTS = '''
import random

import numpy as np
import pytest
import torch

from bakery import bake, knob
from conftest import BEFORE


@pytest.mark.trainguard(seed=7)
def test_sgd(trajectory):
    bake(trajectory, momentum=knob("sgd_momentum", 0.9))


@pytest.mark.parametrize("flour", ["rye", "spelt"])
@pytest.mark.trainguard(seed=3)
def test_flour(trajectory, flour):
    bake(trajectory, steps={"rye": 3, "spelt": 5}[flour])


@pytest.mark.trainguard(seed=7)
def test_noise_tolerance(trajectory):
    bake(trajectory, noise=knob("tiny_noise", 0.0))


@pytest.mark.trainguard(seed=7, exact=True)
def test_noise_exact(trajectory):
    bake(trajectory, noise=knob("tiny_noise", 0.0))


@pytest.mark.trainguard(seed=7, metrics={"loss": {"rtol": 1e-2}})
def test_loss_override(trajectory):
    bake(trajectory, noise=knob("visible_noise", 0.0))


@pytest.mark.trainguard(seed=7)
def test_no_override(trajectory):
    bake(trajectory, noise=knob("visible_noise", 0.0))


@pytest.mark.trainguard(seed=7)
def test_nan_divergence(trajectory):
    bake(trajectory, nan_from=knob("nan_from", None))


@pytest.mark.trainguard(seed=7)
def test_nan_both_sides(trajectory):
    bake(trajectory, nan_from=4)


@pytest.mark.trainguard(seed=2)
def test_truncated(trajectory):
    bake(trajectory, steps=3)


@pytest.mark.trainguard(seed=2)
def test_future(trajectory):
    bake(trajectory, steps=3)


@pytest.mark.trainguard(seed=11)
def test_mutates_globals(trajectory):
    bake(trajectory, steps=2)
    torch.set_num_threads(2 if torch.get_num_threads() != 2 else 1)
    torch.set_default_dtype(torch.float64)
    torch.set_anomaly_enabled(True)
    torch.use_deterministic_algorithms(False)
    random.random()
    np.random.rand(3)
    torch.rand(3)


def test_zz_globals_restored():
    # runs last in this file, after every guarded test above
    assert torch.get_num_threads() == BEFORE["threads"]
    assert torch.get_default_dtype() == BEFORE["dtype"]
    assert torch.is_anomaly_enabled() == BEFORE["anomaly"]
    assert torch.are_deterministic_algorithms_enabled() == BEFORE["deterministic"]
    assert random.getstate() == BEFORE["py_random"]
    now, before = np.random.get_state(), BEFORE["np_random"]
    assert now[0] == before[0] and np.array_equal(now[1], before[1]) and now[2:] == before[2:]
    assert torch.equal(torch.get_rng_state(), BEFORE["torch_rng"])
'''

GUARDED = [
    "test_sgd", "test_flour[rye]", "test_flour[spelt]", "test_noise_tolerance", "test_noise_exact",
    "test_loss_override", "test_no_override", "test_nan_divergence", "test_nan_both_sides", "test_truncated",
    "test_future", "test_mutates_globals",
]

# -- helpers -------------------------------------------------------------------------------

#: Frames of library internals that must never reach the user for an error trainguard explains.
_LIBRARY_FRAME = re.compile(r"(site-packages|dist-packages)[/\\](torch|pyarrow|numpy)[/\\]")


def assert_no_library_traceback(text: str) -> None:
    assert "Traceback (most recent call last)" not in text
    assert not _LIBRARY_FRAME.search(text), _LIBRARY_FRAME.search(text)
    assert "pyarrow.lib." not in text and "ArrowInvalid" not in text


def snapshot(folder: Path) -> dict[str, tuple[bytes, int]]:
    return {str(p.relative_to(folder)): (p.read_bytes(), p.stat().st_mtime_ns)
            for p in sorted(folder.rglob("*")) if p.is_file()}


def set_knobs(pytester: pytest.Pytester, **knobs: object) -> None:
    (pytester.path / "knobs.json").write_text(json.dumps(knobs))


def run(pytester: pytest.Pytester, *args: str) -> pytest.RunResult:
    # plugins the generated projects do not use are left out: loading them costs ~1.5 s per run
    return pytester.runpytest_subprocess("-v", "-p", "no:cacheprovider", "-p", "no:hypothesispytest", "-p", "no:xdist",
                                         *args, timeout=120)


def read_run(folder: Path):
    import trainguard

    return trainguard.read_run(folder)


@pytest.fixture
def bakery(pytester: pytest.Pytester) -> pytest.Pytester:
    pytester.makeini("[pytest]\n")
    pytester.makeconftest(CONFTEST)
    pytester.makepyfile(bakery=HELPERS)
    return pytester


# -- the life of a golden: bless, pass, re-bless, change -----------------------------------


def test_bless_check_rebless_and_changes(bakery: pytest.Pytester) -> None:
    pytester = bakery
    pytester.makepyfile(test_bakery=BAKERY_TESTS)
    golden = pytester.path / "golden" / "test_bakery.py"

    # 1. bless: every guarded test gets a new golden, with the reason stored
    result = run(pytester, "--trainguard-bless", "--trainguard-reason", "first bake of the season")
    result.assert_outcomes(passed=len(GUARDED) + 1)
    result.stdout.fnmatch_lines([
        "*= trainguard =*",
        f"goldens blessed: {len(GUARDED)} ({len(GUARDED)} new)",
        "  new       test_bakery.py::test_sgd -> golden/test_bakery.py/test_sgd",
    ])
    for name in GUARDED:
        assert sorted(p.name for p in (golden / name).iterdir()) == ["metrics.parquet", "state.parquet"], name
    sgd = read_run(golden / "test_sgd")
    assert sgd.meta["reason"] == "first bake of the season"
    assert sgd.meta["seed"] == 7 and sgd.meta["nodeid"] == "test_bakery.py::test_sgd"
    assert sgd.metrics["loss"].steps.tolist() == [0, 1, 2, 3, 4, 5]
    # parametrized tests: one folder per parameter, each with its own run
    assert read_run(golden / "test_flour[rye]").metrics["loss"].steps.tolist() == [0, 1, 2]
    assert read_run(golden / "test_flour[spelt]").metrics["loss"].steps.tolist() == [0, 1, 2, 3, 4]

    # 2. check: everything identical; the marker is registered (no warning, --strict-markers ok)
    result = run(pytester, "--strict-markers", "-W", "error::pytest.PytestUnknownMarkWarning")
    result.assert_outcomes(passed=len(GUARDED) + 1)
    result.stdout.fnmatch_lines([f"guarded tests checked: {len(GUARDED)} ({len(GUARDED)} identical)"])
    assert "PytestUnknownMarkWarning" not in result.stdout.str()
    assert "Unknown pytest.mark" not in result.stdout.str()

    # 3. re-bless an unchanged run: reported unchanged, files not rewritten
    before = snapshot(golden)
    result = run(pytester, "--trainguard-bless", "--trainguard-reason", "nothing changed")
    result.assert_outcomes(passed=len(GUARDED) + 1)
    result.stdout.fnmatch_lines([f"goldens blessed: {len(GUARDED)} ({len(GUARDED)} unchanged)",
                                 "  unchanged test_bakery.py::test_sgd -> golden/test_bakery.py/test_sgd"])
    assert snapshot(golden) == before  # same bytes, same mtimes
    assert read_run(golden / "test_sgd").meta["reason"] == "first bake of the season"

    # 4. changes: momentum 0.9 -> 0.91, tiny and visible noise on the loss, NaN divergence;
    #    one golden truncated, one stamped with a newer format version (as a future trainguard would)
    set_knobs(pytester, sgd_momentum=0.91, tiny_noise=1e-9, visible_noise=1e-4, nan_from=3)
    spoil_goldens(golden)
    before = snapshot(golden)
    result = run(pytester)
    got = outcomes(result)
    failing = {"test_sgd", "test_noise_exact", "test_no_override", "test_nan_divergence", "test_truncated",
               "test_future"}
    assert got == {f"test_bakery.py::{n}": ("FAILED" if n in failing else "PASSED")
                   for n in GUARDED + ["test_zz_globals_restored"]}
    result.stdout.fnmatch_lines([
        "guarded tests checked: 12 (4 identical, 2 within tolerance, 4 changed, 2 unreadable golden)",
        "  changed           test_bakery.py::test_sgd",
        "  within tolerance  test_bakery.py::test_noise_tolerance",
        "  within tolerance  test_bakery.py::test_loss_override",
    ])
    report = sections(result)

    sgd_report = report["test_sgd"]
    # PyTorch's SGD (torch.optim.SGD docs): the first update uses the buffer b_1 = g_1, so momentum
    # first matters in the second update. `bake` logs at step k the loss computed before update k
    # (counting from 0): steps 0 and 1 see parameters momentum has not touched, step 2 is the first to move.
    assert re.search(r"^\s+loss\s+changed\s+2 \(first step off\)", sgd_report, re.M), sgd_report
    assert re.search(r"^\s+param_groups\.0\.momentum\s+hyperparameter\s+changed\s.*value 0\.9 -> 0\.91",
                     sgd_report, re.M), sgd_report
    for tensor in ("0.weight.momentum_buffer", "2.bias.momentum_buffer", "0.weight"):
        assert re.search(rf"^\s+{re.escape(tensor)}\s+\w+\s+changed\s", sgd_report, re.M), (tensor, sgd_report)
    assert "golden blessed" in sgd_report and "reason: first bake of the season" in sgd_report
    assert ("pytest --trainguard-bless --trainguard-reason 'describe the intended change' test_bakery.py::test_sgd"
            in sgd_report)

    exact = report["test_noise_exact"]
    assert "tolerance: exact (bitwise; from marker)" in exact
    assert re.search(r"^\s+loss\s+changed\s+0 \(first step off\)", exact, re.M), exact
    assert re.search(r"^\s+loss\s+changed\s.*\b6/6 steps off", report["test_no_override"], re.M)
    assert "diverged to NaN at step 3" in report["test_nan_divergence"]
    assert re.search(r"^\s+loss\s+changed\s+3 \(first step off\)", report["test_nan_divergence"], re.M)

    truncated = report["test_truncated"]
    assert "golden/test_bakery.py/test_truncated/metrics.parquet" in truncated
    assert "is not a readable Parquet file" in truncated
    assert "It was left untouched" in truncated
    assert ("pytest --trainguard-bless --trainguard-reason 'describe the intended change' "
            "test_bakery.py::test_truncated") in truncated
    future = report["test_future"]
    assert "golden/test_bakery.py/test_future/metrics.parquet" in future
    assert "written in golden format 99" in future
    assert "upgrade trainguard" in future

    for name in failing:
        assert_no_library_traceback(report[name])
    # a failed check never rewrites the golden, not even an unusable one
    assert snapshot(golden) == before


def spoil_goldens(golden: Path) -> None:
    import pyarrow.parquet as pq

    truncated = golden / "test_truncated" / "metrics.parquet"
    truncated.write_bytes(truncated.read_bytes()[:100])
    for name in ("metrics.parquet", "state.parquet"):
        path = golden / "test_future" / name
        table = pq.read_table(path)
        meta = dict(table.schema.metadata)
        meta[b"trainguard.format_version"] = b"99"
        pq.write_table(table.replace_schema_metadata(meta), path)


# -- missing golden, --trainguard-golden-dir ------------------------------------------------


DEPOT_TESTS = '''
import pytest
import torch


@pytest.mark.trainguard(seed=5)
def test_tram_delay(trajectory):
    delays = torch.randn(16, 2)  # minutes late at two stops
    model = torch.nn.Linear(2, 1)
    opt = torch.optim.Adam(model.parameters(), lr=0.1)
    for step in range(4):
        opt.zero_grad()
        loss = model(delays).pow(2).mean()
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss)
    trajectory.state(model, optimizer=opt)
'''


def test_missing_golden_prints_the_exact_bless_command(pytester: pytest.Pytester) -> None:
    pytester.makeini("[pytest]\n")
    pytester.makepyfile(test_depot=DEPOT_TESTS)
    store = "store/tram goldens"  # a space, so the command must quote it

    result = run(pytester, f"--trainguard-golden-dir={store}")
    result.assert_outcomes(failed=1)
    text = sections(result)["test_tram_delay"]
    command = ("pytest --trainguard-bless --trainguard-reason 'describe the intended change' "
               "'--trainguard-golden-dir=store/tram goldens' test_depot.py::test_tram_delay")
    assert "has no golden yet" in text and "never creates its golden silently" in text
    assert command in text
    assert_no_library_traceback(text)
    result.stdout.fnmatch_lines(["guarded tests checked: 1 (1 no golden)"])
    assert not (pytester.path / "store").exists()
    assert not (pytester.path / "golden").exists()

    # the printed command, run as printed, records the golden in the chosen folder
    argv = shlex.split(command)
    assert argv[0] == "pytest"
    result = run(pytester, *argv[1:])
    result.assert_outcomes(passed=1)
    folder = pytester.path / "store" / "tram goldens" / "test_depot.py" / "test_tram_delay"
    run_back = read_run(folder)
    assert run_back.meta["reason"] == "describe the intended change"
    assert run_back.metrics["loss"].steps.tolist() == [0, 1, 2, 3]
    assert "weight.exp_avg" in run_back.tensors
    assert not (pytester.path / "golden").exists()


# -- ini options ----------------------------------------------------------------------------


OVEN_TESTS = '''
import pytest
import torch

from bakery import knob


def oven_run(trajectory, scale_weight=False):
    model = torch.nn.Linear(4, 4)  # weight: 16 elements, bias: 4
    x = torch.randn(8, 4)
    loss = model(x).pow(2).mean() + 10.0  # loaves short of the order, around ten
    trajectory.log(0, loss=loss.item() * (1 + knob("loss_noise", 0.0)), queue=knob("queue", 0.0))
    if scale_weight:
        with torch.no_grad():
            model.weight.mul_(knob("weight_scale", 1.0))
    trajectory.state(model)


@pytest.mark.trainguard(seed=1)
def test_ini_tolerance(trajectory):
    oven_run(trajectory)


@pytest.mark.trainguard(seed=1, rtol=1e-6)
def test_marker_beats_ini(trajectory):
    oven_run(trajectory)


@pytest.mark.trainguard(seed=2)
def test_large_tensor(trajectory):
    oven_run(trajectory, scale_weight=True)
'''


def test_ini_options(pytester: pytest.Pytester) -> None:
    import pyarrow.parquet as pq

    pytester.makeini("[pytest]\ntrainguard_golden_dir = ini goldens/oven\ntrainguard_rtol = 0.2\n"
                     "trainguard_atol = 0.05\ntrainguard_max_values = 10\n")
    pytester.makepyfile(bakery=HELPERS, test_oven=OVEN_TESTS)
    result = run(pytester, "--trainguard-bless")
    result.assert_outcomes(passed=3)
    root = pytester.path / "ini goldens" / "oven" / "test_oven.py"
    assert not (pytester.path / "golden").exists()

    # max_values = 10: the 16-element weight keeps no values, the 4-element bias does
    # (read with pyarrow directly, not through trainguard)
    rows = {r["name"]: r for r in pq.read_table(root / "test_large_tensor" / "state.parquet").to_pylist()}
    assert rows["weight"]["values"] is None and rows["weight"]["numel"] == 16
    assert rows["bias"]["values"] is not None and len(rows["bias"]["values"]) == 4
    meta = read_run(root / "test_ini_tolerance").meta
    assert (meta["tolerances"]["rtol"], meta["tolerances"]["atol"], meta["max_values"]) == (0.2, 0.05, 10)
    assert read_run(root / "test_marker_beats_ini").meta["tolerances"]["rtol"] == 1e-6

    # loss ~10 goes 10% off (inside ini rtol 0.2, far outside atol 0.05 and the default rtol 1e-5),
    # queue 0 -> 0.03 (only ini atol 0.05 allows it), weight x3 (outside any of these)
    set_knobs(pytester, loss_noise=0.1, queue=0.03, weight_scale=3.0)
    result = run(pytester)
    assert outcomes(result) == {"test_oven.py::test_ini_tolerance": "PASSED",
                                "test_oven.py::test_marker_beats_ini": "FAILED",
                                "test_oven.py::test_large_tensor": "FAILED"}
    result.stdout.fnmatch_lines(["guarded tests checked: 3 (1 within tolerance, 2 changed)",
                                 "  within tolerance  test_oven.py::test_ini_tolerance"])
    report = sections(result)
    assert "test_ini_tolerance" not in report
    text = report["test_large_tensor"]
    assert "tolerance: rtol=0.2, atol=0.05" in text
    assert re.search(r"^\s+loss\s+within tolerance\s", text, re.M), text
    assert re.search(r"^\s+queue\s+within tolerance\s", text, re.M), text
    # the weight's values were not kept: the verdict comes from its statistics and sketch
    assert re.search(r"^\s+weight\s+parameter\s+changed\s.*\bstatistics\+sketch$", text, re.M), text
    assert not re.search(r"^\s+bias\s", text, re.M)  # untouched, identical
    marker = report["test_marker_beats_ini"]
    assert re.search(r"^\s+loss\s+changed\s", marker, re.M), marker  # marker rtol 1e-6 wins over ini 0.2


# -- bad input --------------------------------------------------------------------------------


BAD_TESTS = '''
import pytest
import torch


@pytest.mark.trainguard(sead=1)
def test_unknown_kw(trajectory):
    trajectory.log(0, loss=1.0)


@pytest.mark.trainguard(seed="7")
def test_seed_str(trajectory):
    trajectory.log(0, loss=1.0)


@pytest.mark.trainguard(rtol=-1e-3)
def test_negative_rtol(trajectory):
    trajectory.log(0, loss=1.0)


@pytest.mark.trainguard(7)
def test_positional(trajectory):
    trajectory.log(0, loss=1.0)


@pytest.mark.trainguard(metrics={"los": {"rtol": 1e-3}})
def test_metrics_unlogged(trajectory):
    trajectory.log(0, loss=1.0)


@pytest.mark.trainguard
def test_nonscalar(trajectory):
    trajectory.log(0, loss=torch.ones(3))


@pytest.mark.trainguard
def test_decreasing(trajectory):
    trajectory.log(1, loss=1.0)
    trajectory.log(0, loss=0.5)


@pytest.mark.trainguard
def test_repeated(trajectory):
    trajectory.log(1, loss=1.0)
    trajectory.log(1, loss=0.5)


@pytest.mark.trainguard
def test_duplicate_names(trajectory):
    model = torch.nn.Linear(2, 1)
    trajectory.state(model, weight=torch.zeros(2))


@pytest.mark.trainguard
def test_state_nothing(trajectory):
    trajectory.state()


@pytest.mark.trainguard
def test_records_nothing(trajectory):
    pass


@pytest.mark.trainguard(seed=1)
def test_marker_without_fixture():
    assert True


def test_plain_test_unaffected():
    assert torch.zeros(1).sum().item() == 0.0
'''

BAD_EXPECTED = {
    "test_unknown_kw": ("ERROR", "@pytest.mark.trainguard: unknown argument(s) sead; the marker takes"),
    "test_seed_str": ("ERROR", "seed must be an integer from 0 to 2**32 - 1, got '7'"),
    "test_negative_rtol": ("ERROR", "rtol must be finite and >= 0, got -0.001"),
    "test_positional": ("ERROR", "takes keyword arguments only, got positional (7,)"),
    "test_metrics_unlogged": ("FAILED", "the marker's metrics= names 'los', which the test never logged (logged: loss)"),
    "test_nonscalar": ("FAILED", "got a tensor of shape (3,); metrics are scalars"),
    "test_decreasing": ("FAILED", "metric 'loss' went back from step 1 to step 0"),
    "test_repeated": ("FAILED", "metric 'loss' was already logged at step 1"),
    "test_duplicate_names": ("FAILED", "two entries are named 'weight'"),
    "test_state_nothing": ("FAILED", "trajectory.state(): nothing to record"),
    "test_records_nothing": ("FAILED", "the guarded test recorded nothing"),
    "test_marker_without_fixture": ("FAILED", "does not use the 'trajectory' fixture"),
}


def test_bad_input_gets_clear_messages(pytester: pytest.Pytester) -> None:
    pytester.makeini("[pytest]\n")
    pytester.makepyfile(test_bad=BAD_TESTS)
    result = run(pytester, "--strict-markers")
    got = outcomes(result)
    assert got == {**{f"test_bad.py::{n}": o for n, (o, _) in BAD_EXPECTED.items()},
                   "test_bad.py::test_plain_test_unaffected": "PASSED"}
    report = sections(result)
    for name, (_, phrase) in BAD_EXPECTED.items():
        text = report[name]
        assert phrase in text, (name, text)
        assert_no_library_traceback(text)
        assert "trainguard/capture.py" not in text and "trainguard/settings.py" not in text, (name, text)
    # nothing was blessed or compared, so no golden appeared
    assert not (pytester.path / "golden").exists()


KILN = '''
import pytest
import torch


@pytest.mark.trainguard(seed=4)
def test_kiln_overheats(trajectory):
    """An invented pottery kiln whose temperature model overflows from step 1."""
    w = torch.tensor([1.0, 2.0])
    for step in range(4):
        loss = (w * torch.tensor(1e30) ** step).pow(2).sum()  # float32: 1e60 overflows to +Inf at step 1
        trajectory.log(step, loss=loss.item() if step < 2 else float("nan"))
    trajectory.state(w=w.detach(), glaze=torch.tensor([float("inf"), 1.0, float("nan")]))
'''


def test_blessing_non_finite_values_warns_and_is_stored(pytester: pytest.Pytester) -> None:
    from trainguard.core.store import read_run

    pytester.makepyfile(test_kiln=KILN)
    result = run(pytester, "--trainguard-bless")
    assert result.ret == 0
    result.stdout.fnmatch_lines([
        "goldens blessed: 1 (1 new)",
        "  new       test_kiln.py::test_kiln_overheats -> golden/test_kiln.py/test_kiln_overheats",
        "    warning: blessed with non-finite values: loss (+Inf from step 1), glaze (2 values)",
    ])
    meta = read_run(pytester.path / "golden" / "test_kiln.py" / "test_kiln_overheats").meta
    assert meta["nonfinite"] == ("loss (+Inf from step 1)", "glaze (2 values)")
    # the same non-finite values match themselves on a check (NaN with NaN, +Inf with +Inf)
    run(pytester).stdout.fnmatch_lines(["guarded tests checked: 1 (1 identical)"])
