"""Per-step trace (`trajectory.watch`) and stage attribution (`compare_traces`).

Two kinds of tests:

- fast unit tests of `compare_traces` on hand-made `TraceEntry` lists, and of the
  `watch` usage errors and hook removal on a real (tiny) model;
- one end-to-end scenario: an invented greenhouse vent forecaster is blessed once, then
  re-run with one planted change per guarded test (selected by the environment variable
  GREENHOUSE_PLANTS). Each plant touches exactly one stage at a known step, so the expected
  "first divergence" is known from how training works, not from trainguard's output.
"""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
import torch

from trainguard.core.attribution import MAX_NAMES, compare_traces
from trainguard.core.capture import Trajectory
from trainguard.core.errors import UsageError
from trainguard.core.records import TraceEntry
from trainguard.core.tolerance import Tolerance
from trainguard.core.trace import Tracer
from trainguard.core.verdicts import CHANGED, CLOSE, IDENTICAL

TOL = Tolerance(rtol=1e-5, atol=1e-8)


# -- compare_traces on synthetic traces --------------------------------------------------


def entry(step: int, stage: str, name: str, value: float = 1.0, call: int = 0, sha: str | None = None,
          shape: tuple[int, ...] = (2,), dtype: str = "float32") -> TraceEntry:
    """A trace entry whose checksum and statistics are derived from one number."""
    sha = sha if sha is not None else np.float64(value).tobytes().hex()
    return TraceEntry(step, stage, 0, call, name, dtype, shape, sha, value, value, value, abs(value), 0)


def greenhouse_trace(steps: int = 5) -> list[TraceEntry]:
    """A plain loop's trace, numbered the way `Tracer` numbers events: per step the model's
    inputs (event 0), its outputs (1), the loss (2), the gradients (3), the update (4)."""
    out = []
    for s in range(steps):
        out += [
            entry(s, "data", "input.0", 10.0 + s, call=0),
            entry(s, "forward", "output", 20.0 + s, call=1),
            entry(s, "forward", "loss", 0.5 / (s + 1), call=2),
            entry(s, "backward", "grad vent.weight", -0.25 + s, call=3),
            entry(s, "backward", "grad vent.bias", 0.125 + s, call=3),
            entry(s, "update", "vent.weight", 3.0 + s, call=4),
            entry(s, "update", "vent.bias", 4.0 + s, call=4),
            entry(s, "update", "state vent.weight.momentum_buffer", 5.0 + s, call=4),
        ]
    return out


def replaced(trace: list[TraceEntry], step: int, name: str, value: float, call: int | None = None) -> list[TraceEntry]:
    out = []
    for e in trace:
        if e.step == step and e.name == name and call in (None, e.call):
            e = entry(e.step, e.stage, e.name, value, call=e.call, shape=e.shape, dtype=e.dtype)
        out.append(e)
    return out


def test_identical_traces_have_no_divergence():
    golden = greenhouse_trace()
    diff = compare_traces(golden, list(golden), TOL)
    assert diff.verdict == IDENTICAL
    assert diff.first_bitwise is None and diff.first_change is None
    assert diff.groups == 5 * 5  # 5 steps x 5 events
    assert diff.summary() == "trace: all 25 events identical"


def test_update_change_names_step_stage_tensors_and_clean_earlier_stages():
    golden = greenhouse_trace()
    new = replaced(golden, 3, "vent.weight", 3.5)
    new = replaced(new, 3, "state vent.weight.momentum_buffer", 9.0)
    # later steps differ as well (a changed update propagates); the first one must be reported
    new = replaced(new, 4, "input.0", 99.0)
    diff = compare_traces(golden, new, TOL)
    assert diff.verdict == CHANGED
    assert (diff.first_change.step, diff.first_change.stage) == (3, "update")
    assert diff.first_change.names == ["vent.weight", "state vent.weight.momentum_buffer"]
    assert diff.summary() == ("first divergence: step 3, stage update (vent.weight, state vent.weight.momentum_buffer); "
                              "data, forward and backward identical up to there")


@pytest.mark.parametrize("stage, name, expected_tail", [
    ("data", "input.0", ""),
    ("forward", "loss", "; the step's earlier events (data, forward) identical"),  # the outputs' event came first
    ("backward", "grad vent.bias", "; data and forward identical up to there"),
])
def test_each_stage_is_named_with_the_stages_before_it(stage, name, expected_tail):
    golden = greenhouse_trace()
    # Plant the change at step 2, and also change every later stage of that step: the
    # earliest stage in training order must win, whatever order the entries come in.
    new = replaced(golden, 2, name, 123.0)
    new = replaced(new, 2, "vent.bias", 77.0)
    diff = compare_traces(golden, list(reversed(new)), TOL)
    assert diff.summary() == f"first divergence: step 2, stage {stage} ({name}){expected_tail}"


def test_earlier_step_beats_earlier_stage():
    golden = greenhouse_trace()
    new = replaced(golden, 1, "vent.bias", 40.0)  # step 1, update
    new = replaced(new, 2, "input.0", 41.0)  # step 2, data
    diff = compare_traces(golden, new, TOL)
    assert (diff.first_change.step, diff.first_change.stage) == (1, "update")


def test_within_tolerance_only_reports_bitwise_prefix():
    golden = greenhouse_trace()
    new = [entry(e.step, e.stage, e.name, e.min * (1 + 1e-9) if e.step >= 4 else e.min, call=e.call) for e in golden]
    diff = compare_traces(golden, new, TOL)
    assert diff.verdict == CLOSE
    assert diff.first_change is None
    assert (diff.first_bitwise.step, diff.first_bitwise.stage) == (4, "data")
    assert diff.summary() == "trace: bitwise identical up to step 4, stage data (input.0); within tolerance after"
    # exact mode: the same bits-only difference is a change
    exact = compare_traces(golden, new, TOL, exact=True)
    assert exact.verdict == CHANGED
    assert (exact.first_change.step, exact.first_change.stage) == (4, "data")


def test_within_tolerance_then_change_reports_both_points():
    golden = greenhouse_trace()
    new = replaced(golden, 1, "output", 21.0 * (1 + 1e-9))  # close at step 1, forward
    new = replaced(new, 3, "grad vent.weight", 50.0)  # changed at step 3, backward
    diff = compare_traces(golden, new, TOL)
    assert diff.verdict == CHANGED
    assert diff.summary() == ("first divergence: step 3, stage backward (grad vent.weight); bitwise identical up to "
                              "step 1, stage forward (output), within tolerance from there to the divergence")


def test_missing_entry_shape_and_dtype_changes_are_changes():
    golden = greenhouse_trace(2)
    # An entry missing from an event both runs hold is structure (a parameter that stopped getting
    # a gradient, an output no longer returned), listed by name, not a divergence of values.
    missing = [e for e in golden if not (e.step >= 1 and e.name == "grad vent.bias")]
    diff = compare_traces(golden, missing, TOL)
    assert diff.first_change is None and diff.removed == [(1, "backward", "grad vent.bias")]
    assert diff.summary() == ("trace: all 10 events identical; 1 trace entry removed (first at step 1, stage backward): "
                              "grad vent.bias")
    # A whole event missing shifts the events after it: that is where the runs part.
    no_grads = [e for e in golden if not (e.step == 1 and e.stage == "backward")]
    diff = compare_traces(golden, no_grads, TOL)
    assert (diff.first_change.step, diff.first_change.stage) == (1, "backward")
    reshaped = [entry(e.step, e.stage, e.name, e.min, shape=(3,), call=e.call) if e.name == "output" else e
                for e in golden]
    assert compare_traces(golden, reshaped, TOL).first_change.stage == "forward"
    # same bits pattern in the stats but another dtype: still a change
    retyped = [TraceEntry(**{**e.__dict__, "dtype": "float64"}) if e.name == "input.0" and e.step == 1 else e
               for e in golden]
    assert (compare_traces(golden, retyped, TOL).first_change.step, "data") == (1, "data")


def test_closure_evaluations_are_walked_in_call_order():
    """L-BFGS: evaluation 0's backward comes before evaluation 1's forward; the update after all."""
    golden = []
    for k in range(3):
        sfx = "" if k == 0 else f"@{k}"
        golden += [entry(0, "data", "input.0" + sfx, 1.0, call=3 * k), entry(0, "forward", "loss" + sfx, 2.0 + k, call=3 * k + 1),
                   entry(0, "backward", "grad vent.weight" + sfx, 3.0 + k, call=3 * k + 2)]
    golden += [entry(0, "update", "vent.weight", 7.0, call=9)]
    # A backward change in evaluation 1 moves the parameters, so evaluation 2's forward and the update differ too.
    new = replaced(golden, 0, "grad vent.weight@1", 30.0)
    new = replaced(new, 0, "loss@2", 40.0)
    new = replaced(new, 0, "vent.weight", 70.0)
    # Entries listed stage-first (all forwards before all backwards) must not change the answer.
    order = {"data": 0, "forward": 1, "backward": 2, "update": 3}
    new.sort(key=lambda e: order[e.stage])
    diff = compare_traces(golden, new, TOL)
    assert (diff.first_change.step, diff.first_change.stage, diff.first_change.names) == (0, "backward", ["grad vent.weight@1"])
    # And a change only in the update (after three clean evaluations) is attributed to the update.
    only_update = replaced(golden, 0, "vent.weight", 70.0)
    assert compare_traces(golden, only_update, TOL).first_change.stage == "update"


def test_long_name_lists_are_cut():
    golden = [entry(0, "update", f"bed{i}.weight", float(i)) for i in range(MAX_NAMES + 3)]
    new = [entry(0, "update", f"bed{i}.weight", float(i) + 100) for i in range(MAX_NAMES + 3)]  # one event
    text = compare_traces(golden, new, TOL).summary()
    assert text.startswith("first divergence: step 0, stage update (bed0.weight, bed1.weight")
    assert f"bed{MAX_NAMES - 1}.weight and 3 more)" in text and f"bed{MAX_NAMES}.weight" not in text


# -- watch: usage errors and hook removal, in-process --------------------------------------


def _vent_model_and_opt():
    model = torch.nn.Sequential(torch.nn.Linear(3, 4), torch.nn.Tanh(), torch.nn.Linear(4, 1))
    return model, torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)


def _hooks(model, opt) -> int:
    return (len(model._forward_hooks) + len(model._forward_pre_hooks) + len(opt._optimizer_step_pre_hooks)
            + len(opt._optimizer_step_post_hooks))


def test_watch_wrong_types_is_a_clear_usage_error():
    original = torch.Tensor.backward
    model, opt = _vent_model_and_opt()
    traj = Trajectory()
    with pytest.raises(UsageError, match=r"trajectory.watch: model must be a torch.nn.Module, got SGD"):
        traj.watch(opt, model)
    with pytest.raises(UsageError, match=r"trajectory.watch: optimizer must be a torch.optim.Optimizer, got str"):
        traj.watch(model, "adam")
    # nothing was hooked by the failed calls, and a correct call still works afterwards
    assert torch.Tensor.backward is original and _hooks(model, opt) == 0
    traj.watch(model, opt)
    try:
        assert torch.Tensor.backward is not original and _hooks(model, opt) == 4
    finally:
        traj.close()
    assert torch.Tensor.backward is original and _hooks(model, opt) == 0


def test_watch_twice_is_a_usage_error_and_close_restores_everything():
    original = torch.Tensor.backward
    model, opt = _vent_model_and_opt()
    traj = Trajectory()
    traj.watch(model, opt)
    try:
        with pytest.raises(UsageError, match="already watching"):
            traj.watch(model, opt)
        # a second recorder in the same process cannot hook torch.Tensor.backward a second time
        with pytest.raises(UsageError, match="already running"):
            Trajectory().watch(*_vent_model_and_opt())
        # recording works: the weights at watch time (init), then one event each for the
        # inputs, the outputs, the loss, the gradients and the update
        x = torch.ones(2, 3)
        opt.zero_grad()
        model(x).pow(2).mean().backward()
        opt.step()
        trace = traj.to_run().trace
        events = sorted({(e.call, e.stage) for e in trace})
        assert events == [(0, "init"), (1, "data"), (2, "forward"), (3, "forward"), (4, "backward"), (5, "update")]
        assert {e.name for e in trace if e.stage == "init"} == {n for n, _ in model.named_parameters()}
        assert trace[-1].step == 0
    finally:
        traj.close()
    traj.close()  # safe twice
    assert torch.Tensor.backward is original
    assert _hooks(model, opt) == 0 and Tracer._active is None


HOOK_TESTS = '''
import pytest
import torch

from trainguard.core.trace import Tracer

ORIGINAL_BACKWARD = torch.Tensor.backward
KEPT = {}


@pytest.mark.trainguard(seed=3)
def test_body_raises_while_watching(trajectory):
    model = torch.nn.Linear(2, 1)
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    KEPT["model"], KEPT["opt"] = model, opt
    trajectory.watch(model, opt)
    assert torch.Tensor.backward is not ORIGINAL_BACKWARD
    assert model._forward_hooks and model._forward_pre_hooks
    assert opt._optimizer_step_pre_hooks and opt._optimizer_step_post_hooks
    raise RuntimeError("greenhouse sprinkler jammed")


@pytest.mark.trainguard(seed=3)
def test_watch_then_usage_error(trajectory):
    model = torch.nn.Linear(2, 1)
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    KEPT["model2"], KEPT["opt2"] = model, opt
    trajectory.watch(model, opt)
    trajectory.watch(model, opt)


def test_zz_hooks_are_gone():
    assert torch.Tensor.backward is ORIGINAL_BACKWARD
    assert Tracer._active is None
    for m, o in (("model", "opt"), ("model2", "opt2")):
        model, opt = KEPT[m], KEPT[o]
        assert not model._forward_hooks and not model._forward_pre_hooks
        assert not opt._optimizer_step_pre_hooks and not opt._optimizer_step_post_hooks
'''


def test_hooks_are_removed_after_a_failing_test(pytester: pytest.Pytester):
    pytester.makeini("[pytest]\n")
    pytester.makepyfile(test_hooks=HOOK_TESTS)
    result = pytester.runpytest_subprocess("-p", "no:cacheprovider", "-p", "no:xdist", "-p", "no:hypothesispytest",
                                           "-rA")
    result.assert_outcomes(passed=1, failed=2)
    out = result.stdout.str()
    assert "PASSED test_hooks.py::test_zz_hooks_are_gone" in out
    assert "greenhouse sprinkler jammed" in out
    assert "already watching; call it once per test" in out


# -- end to end: one planted change per stage ------------------------------------------------

GREENHOUSE_TESTS = '''
import os

import pytest
import torch
import torch.nn.functional as F

PLANTS = set(filter(None, os.environ.get("GREENHOUSE_PLANTS", "").split(",")))
NOW = {"case": None, "step": 0}


def planted(name, from_step=0):
    """True when this test's plant is selected and training has reached from_step."""
    return NOW["case"] == name and name in PLANTS and NOW["step"] >= from_step


class VentGate(torch.autograd.Function):
    """tanh with a hand-written backward: d tanh(x)/dx = 1 - tanh(x)**2."""

    @staticmethod
    def forward(ctx, x):
        y = torch.tanh(x)
        ctx.save_for_backward(y)
        return y

    @staticmethod
    def backward(ctx, grad):
        (y,) = ctx.saved_tensors
        slope = 1 - y * y
        if planted("backward", 2) or planted("lbfgs_backward", 1):
            slope = slope * 1.25  # the planted bug: a wrong derivative, forward untouched
        return grad * slope


class VentForecaster(torch.nn.Module):
    """Humidity, temperature, light -> how far to open the roof vents."""

    def __init__(self):
        super().__init__()
        self.fc1 = torch.nn.Linear(3, 6)
        self.fc2 = torch.nn.Linear(6, 1)

    def forward(self, x):
        h = self.fc1(x)
        h = torch.sigmoid(h) if planted("activation", 2) else VentGate.apply(h)
        return self.fc2(h)


def readings(dtype=torch.float32):
    g = torch.Generator().manual_seed(2024)
    x = torch.randn(48, 3, generator=g)
    y = (x @ torch.tensor([[0.6], [-0.3], [0.8]]) + 0.05 * torch.randn(48, 1, generator=g)).tanh()
    return x.to(dtype), y.to(dtype)


def batch(step, x, y):
    order = [0, 1, 2, 3, 4, 5]
    if planted("order", 3):
        order = [0, 1, 2, 4, 3, 5]  # the planted bug: two batches swapped from step 3 on
    i = order[step % 6]
    xb, yb = x[8 * i: 8 * i + 8], y[8 * i: 8 * i + 8]
    if planted("augment", 5):
        # the planted bug: a sensor-jitter augmentation switched on from step 5
        xb = xb + 0.01 * torch.sin(torch.arange(xb.numel(), dtype=xb.dtype)).reshape(xb.shape)
    if planted("tiny", 4):
        xb = xb * (1 + 1e-9)  # harmless: far inside the default tolerance
    return xb, yb


@pytest.mark.trainguard(seed=5)
@pytest.mark.parametrize("case", ["order", "augment", "activation", "loss_sum", "backward", "momentum", "decay", "tiny"])
def test_vent_forecaster(trajectory, case):
    NOW["case"], NOW["step"] = case, 0
    dtype = torch.float64 if case == "tiny" else torch.float32
    model = VentForecaster().to(dtype)
    opt = torch.optim.SGD(model.parameters(), lr=0.05,
                          momentum=0.8 if planted("momentum") else 0.9,
                          weight_decay=0.05 if planted("decay") else 0.0)
    trajectory.watch(model, opt)
    x, y = readings(dtype)
    for step in range(8):
        NOW["step"] = step
        xb, yb = batch(step, x, y)
        opt.zero_grad()
        out = model(xb)
        loss = F.mse_loss(out, yb, reduction="sum" if planted("loss_sum", 4) else "mean")
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss)
    trajectory.state(model, optimizer=opt)


@pytest.mark.trainguard(seed=6)
def test_vent_forecaster_lbfgs(trajectory):
    NOW["case"], NOW["step"] = "lbfgs_backward", 0
    model = VentForecaster()
    opt = torch.optim.LBFGS(model.parameters(), lr=0.5, max_iter=3, history_size=4)
    trajectory.watch(model, opt)
    x, y = readings()

    def closure():
        opt.zero_grad()
        loss = F.mse_loss(model(x), y)
        loss.backward()
        return loss

    for step in range(4):
        NOW["step"] = step
        loss = opt.step(closure)
        trajectory.log(step, loss=loss)
    trajectory.state(model, optimizer=opt)
'''

#: What each plant must be attributed to. Reasoning, per plant:
#: - order/augment change only the batch fed from step 3/5 on: stage data at that step.
#: - activation (from step 2) changes the outputs (and hence the loss, one event later): forward at step 2.
#: - loss_sum (from step 4) keeps the outputs (an earlier forward event), changes only the loss: forward at step 4.
#: - backward (from step 2): VentGate's forward is unchanged, its derivative is not; only
#:   fc1 lies below VentGate, so only fc1's gradients change (fc2's gradient is h^T dL/dout).
#: - momentum 0.9 -> 0.8: PyTorch's SGD documentation (torch.optim.SGD, algorithm box) sets
#:   b_1 = g_1 at the first step and b_t = mu * b_{t-1} + (1 - dampening) g_t after, so the
#:   momentum value first matters at step 1, in the update.
#: - weight decay: g_t + lambda * theta is used from the first step (same docs): update at step 0,
#:   after step 0's init event (the weights before training, which decay does not touch).
#: - lbfgs_backward (from step 1): evaluation 0 of step 1 already has wrong gradients; the
#:   parameters move within the step, so later evaluations' forwards differ too, but those
#:   come after that backward in call order.
EXPECTED = {
    "test_vent_forecaster[order]": "first divergence: step 3, stage data (input.0)",
    "test_vent_forecaster[augment]": "first divergence: step 5, stage data (input.0)",
    "test_vent_forecaster[activation]": "first divergence: step 2, stage forward (output); "
                                        "data identical up to there",
    "test_vent_forecaster[loss_sum]": "first divergence: step 4, stage forward (loss); the step's earlier events "
                                      "(data, forward) identical",
    "test_vent_forecaster[backward]": "first divergence: step 2, stage backward (grad fc1.weight, grad fc1.bias); "
                                      "data and forward identical up to there",
    "test_vent_forecaster[momentum]": "first divergence: step 1, stage update (fc1.weight, fc1.bias, fc2.weight, "
                                      "fc2.bias, state fc1.weight.momentum_buffer, state fc1.bias.momentum_buffer "
                                      "and 2 more); data, forward and backward identical up to there",
    "test_vent_forecaster[decay]": "first divergence: step 0, stage update (fc1.weight, fc1.bias, fc2.weight, "
                                   "fc2.bias, state fc1.weight.momentum_buffer, state fc1.bias.momentum_buffer "
                                   "and 2 more); init, data, forward and backward identical up to there",
    "test_vent_forecaster_lbfgs": "first divergence: step 1, stage backward (grad fc1.weight, grad fc1.bias); "
                                  "data and forward identical up to there",
}
ALL_PLANTS = "order,augment,activation,loss_sum,backward,momentum,decay,tiny,lbfgs_backward"


def _junit(path: Path) -> dict[str, tuple[str, str]]:
    """Outcome and failure text per test name from pytest's own JUnit XML (our own file, safe to parse)."""
    out = {}
    for case in ET.parse(path).getroot().iter("testcase"):
        failure = case.find("failure")
        if failure is not None:
            out[case.get("name")] = ("failed", (failure.get("message") or "") + "\n" + (failure.text or ""))
        else:
            out[case.get("name")] = ("passed", "")
    return out


@pytest.mark.slow
def test_each_planted_change_is_attributed_to_its_stage_and_step(pytester: pytest.Pytester, monkeypatch):
    pytester.makeini("[pytest]\n")
    pytester.makepyfile(test_greenhouse=GREENHOUSE_TESTS)
    flags = ("-p", "no:cacheprovider", "-p", "no:xdist", "-p", "no:hypothesispytest")

    monkeypatch.delenv("GREENHOUSE_PLANTS", raising=False)
    blessed = pytester.runpytest_subprocess(*flags, "--trainguard-bless", "--trainguard-reason", "greenhouse baseline")
    blessed.assert_outcomes(passed=9)
    golden = pytester.path / "golden" / "test_greenhouse.py"
    assert (golden / "test_vent_forecaster[order]" / "trace.parquet").is_file()

    # The L-BFGS trace records each closure evaluation in call order, later ones with an @k suffix.
    trace = pq.read_table(golden / "test_vent_forecaster_lbfgs" / "trace.parquet").to_pylist()
    step0 = sorted((r for r in trace if r["step"] == 0), key=lambda r: r["seq"])
    names = {r["name"] for r in step0}
    evaluations = sum(1 for n in names if n == "loss" or n.startswith("loss@"))
    assert evaluations >= 2, "L-BFGS with max_iter=3 evaluates the closure more than once per step"
    for k in range(1, evaluations):
        assert {f"input.0@{k}", f"output@{k}", f"loss@{k}", f"grad fc1.weight@{k}"} <= names
    assert step0[0]["stage"] == "init" and {r["stage"] for r in trace if r["step"] > 0} >= {"data", "update"}
    events = [r["call"] for r in step0]
    assert events == sorted(events), "events are numbered in recording order"
    assert [r["stage"] for r in step0][-1] == "update"
    updated = {r["name"] for r in step0 if r["stage"] == "update"}
    # parameters and L-BFGS's own state (kept under the first parameter) after the step
    assert {"fc1.weight", "fc2.bias", "state fc1.weight.n_iter", "state fc1.weight.func_evals"} <= updated

    monkeypatch.setenv("GREENHOUSE_PLANTS", ALL_PLANTS)
    planted = pytester.runpytest_subprocess(*flags, "--junitxml=planted.xml", "--trainguard-report=report")
    results = _junit(pytester.path / "planted.xml")
    wrong = {}
    for test, expected in EXPECTED.items():
        outcome, text = results[test]
        assert outcome == "failed", f"{test} should fail with its planted change"
        if expected not in text:
            wrong[test] = next((line for line in text.splitlines() if "divergence" in line), text[:300])
    assert not wrong, "attributed wrongly:\n" + "\n".join(f"{k}: {v}" for k, v in wrong.items())
    # The tiny perturbation is within tolerance: the test passes. A passing check keeps its light
    # trace (no second run), so its row names the first metric step that differs ...
    assert results["test_vent_forecaster[tiny]"] == ("passed", "")
    planted.assert_outcomes(passed=1, failed=8)
    rows = {r["nodeid"]: r for r in json.loads((pytester.path / "report" / "summary.json").read_text())["rows"]}
    tiny = rows["test_greenhouse.py::test_vent_forecaster[tiny]"]
    assert tiny["outcome"] == "within tolerance"
    assert tiny["divergence"] == "loss first differs at step 4 (within tolerance)"
    # ... and with the full trace on every check, exactly where the bits first differ.
    full = pytester.runpytest_subprocess(*flags, "--trainguard-full-trace", "--trainguard-report=full", "-k", "tiny")
    full.assert_outcomes(passed=1)
    rows = {r["nodeid"]: r for r in json.loads((pytester.path / "full" / "summary.json").read_text())["rows"]}
    assert rows["test_greenhouse.py::test_vent_forecaster[tiny]"]["divergence"] == (
        "trace: bitwise identical up to step 4, stage data (input.0); within tolerance after")


def test_reordered_batch_is_a_data_change_not_noise():
    """A shuffled batch keeps min, max, mean and L2 norm; the position-hashed sketch still sees it."""
    import torch

    from trainguard.core import checksum
    from trainguard.core.records import TraceEntry

    x = torch.arange(32, dtype=torch.float32).reshape(8, 4) / 7.0  # invented sensor readings
    flipped = x.flip(0)

    def entry(t):
        st, sk = checksum.summarize(t, checksum.TRACE_SKETCH)
        return TraceEntry(3, "data", 0, 0, "input.0", "float32", (8, 4), checksum.sha256_hex(t),
                          st.min, st.max, st.mean, st.l2, st.nonfinite, sk)

    golden, new = entry(x), entry(flipped)
    assert (golden.min, golden.max, golden.l2) == (new.min, new.max, new.l2)  # statistics are blind to order
    diff = compare_traces([golden], [new], Tolerance(1e-5, 1e-8))
    assert diff.first_change is not None
    assert (diff.first_change.step, diff.first_change.stage) == (3, "data")
