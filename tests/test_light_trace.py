"""The check-time trace: one fingerprint per event, and the full trace only when a verdict needs it.

In-process checks compare the light and the full trace of the same body event by event; the
pytester scenarios (a tram depot's brake controller, invented) check the second run a failing
check makes, the note when that run takes another path, and the full trace a results folder
keeps. Ground truths are computed beside each check: XXH3-64 through the `xxhash` package
(the reference implementation's Python binding) and plain torch.
"""

from __future__ import annotations

import json

import pyarrow.parquet as pq
import pytest
import torch
import xxhash
from golden_samples import watched_fit

from trainguard.core.capture import Trajectory
from trainguard.core.retrace import departure


def depot(light: bool, lr: float = 0.05) -> Trajectory:
    """Three watched steps of a brake-pressure regressor (made-up sensor data)."""
    torch.manual_seed(11)
    model = torch.nn.Sequential(torch.nn.Linear(4, 8), torch.nn.Tanh(), torch.nn.Linear(8, 1))
    opt = torch.optim.Adam(model.parameters(), lr=lr)
    readings = torch.linspace(-2, 2, 40).reshape(10, 4)
    target = readings[:, :1] * 0.3 - 0.1
    return watched_fit(model, opt, lambda: torch.nn.functional.mse_loss(model(readings), target), light=light)


def test_a_light_trace_keeps_one_fingerprint_per_event_and_the_full_trace_the_same_ones():
    light, full = depot(light=True).to_run(), depot(light=False).to_run()
    assert light.trace is None and light.prints
    assert full.trace and full.prints == light.prints  # the same fingerprints: a re-run can be checked
    events = sorted({(e.step, e.call) for e in full.trace})
    assert [(p.step, p.event) for p in light.prints] == events  # one fingerprint per event, in order
    stages = {(e.step, e.call): e.stage for e in full.trace}
    assert all(p.stage == stages[(p.step, p.event)] for p in light.prints)
    assert departure(light, full) == ""


def test_an_event_fingerprint_is_xxh3_over_names_dtypes_shapes_and_the_bytes_that_decide_the_path():
    """Recomputed with the xxhash package: the init event of a Linear(4, 8) + Linear(8, 1) (bytes included),
    and its first backward event (names, dtypes, shapes only)."""
    torch.manual_seed(11)
    model = torch.nn.Sequential(torch.nn.Linear(4, 8), torch.nn.Tanh(), torch.nn.Linear(8, 1))
    expected = xxhash.xxh3_64()
    for name, param in model.named_parameters():
        expected.update(f"{name}\0{param.dtype}\0{tuple(param.shape)}\0".encode())
        expected.update(param.detach().numpy().tobytes())
    traj = Trajectory(light_trace=True)
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    traj.watch(model, opt)
    model(torch.ones(2, 4)).pow(2).mean().backward()
    grads = xxhash.xxh3_64()  # a gradient event: names, dtypes and shapes only (they reach the update's bytes)
    for name, param in model.named_parameters():
        grads.update(f"grad {name}\0{param.grad.dtype}\0{tuple(param.grad.shape)}\0".encode())
    opt.step()
    traj.close()
    prints = traj.to_run().prints
    first = prints[0]
    assert (first.step, first.stage, first.event) == (0, "init", 0)
    assert first.digest == expected.hexdigest()
    backward = next(p for p in prints if p.stage == "backward")
    assert backward.digest == grads.hexdigest()


def test_departure_names_where_a_second_run_parts():
    one, other = depot(light=True).to_run(), depot(light=True, lr=0.051).to_run()
    assert departure(one, other) == "metric loss differs from step 1"  # Adam's first step moves by lr
    other.metrics = one.metrics
    assert departure(one, other).startswith("the trace parts at step 0, stage update")
    assert "recorded nothing" in departure(one, Trajectory().to_run())


# -- through pytest -------------------------------------------------------------------------------

BRAKES = '''
import os
import pytest
import torch

RUNS = [0]


@pytest.mark.trainguard(seed=4)
def test_brakes(trajectory):
    RUNS[0] += 1
    # BRAKES_LR scales the learning rate; BRAKES_DRIFT makes every further run of the body differ.
    lr = 0.05 * float(os.environ.get("BRAKES_LR", "1")) * (1 + float(os.environ.get("BRAKES_DRIFT", "0")) * RUNS[0])
    model = torch.nn.Sequential(torch.nn.Linear(4, 8), torch.nn.Tanh(), torch.nn.Linear(8, 1))
    opt = torch.optim.SGD(model.parameters(), lr=lr, momentum=0.9)
    trajectory.watch(model, opt)
    readings = torch.linspace(-2, 2, 40).reshape(10, 4)
    for step in range(4):
        opt.zero_grad()
        loss = (model(readings) - readings[:, :1] * 0.3).pow(2).mean()
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss)
    trajectory.state(model, optimizer=opt)
'''


def _run(pytester: pytest.Pytester, monkeypatch: pytest.MonkeyPatch, *args: str, **env: str) -> pytest.RunResult:
    for key in ("BRAKES_LR", "BRAKES_DRIFT"):
        monkeypatch.delenv(key, raising=False)
    for key, value in env.items():
        monkeypatch.setenv(key, value)
    return pytester.runpytest_subprocess("-p", "no:cacheprovider", "-p", "no:xdist", "-p", "no:hypothesispytest",
                                         "-p", "no:randomly", *args)


@pytest.mark.slow
def test_a_failing_check_runs_the_body_again_for_the_trace_and_says_when_it_parts(pytester, monkeypatch):
    pytester.makeini("[pytest]\n")
    pytester.makepyfile(test_depot=BRAKES)
    _run(pytester, monkeypatch, "--trainguard-bless", "--trainguard-reason", "depot baseline").assert_outcomes(passed=1)
    # A real change, reproduced by the second run: the report names step and stage from the full trace.
    changed = _run(pytester, monkeypatch, BRAKES_LR="1.5")
    changed.assert_outcomes(failed=1)
    text = changed.stdout.str()
    assert "first divergence: step 0, stage update" in text
    assert "did not reproduce" not in text
    # A body that differs on every run: the second run parts from the first, and the report says so.
    drifting = _run(pytester, monkeypatch, BRAKES_LR="1.5", BRAKES_DRIFT="0.01")
    drifting.assert_outcomes(failed=1)
    text = drifting.stdout.str()
    assert "run again with the full trace, did not reproduce this run (metric loss differs from step 1)" in text
    assert "nondeterministic" in text and "--trainguard-repeat 3" in text


@pytest.mark.slow
def test_a_run_kept_in_a_results_folder_carries_its_full_trace(pytester, monkeypatch):
    pytester.makeini("[pytest]\n")
    pytester.makepyfile(test_depot=BRAKES.replace("@pytest.mark.trainguard(seed=4)",
                                                  "@pytest.mark.trainguard(seed=4, rtol=0.5, atol=1.0)"))
    _run(pytester, monkeypatch, "--trainguard-bless", "--trainguard-reason", "depot baseline").assert_outcomes(passed=1)
    within = _run(pytester, monkeypatch, "--trainguard-results=results", "--trainguard-report=report", BRAKES_LR="1.0001")
    within.assert_outcomes(passed=1)
    rows = json.loads((pytester.path / "report" / "summary.json").read_text())["rows"]
    assert [r["outcome"] for r in rows] == ["within tolerance"]
    kept = pytester.path / "results" / "test_depot.py" / "test_brakes"
    trace = pq.read_table(kept / "trace.parquet")
    assert trace.num_rows > 0 and set(trace.column("stage").to_pylist()) >= {"init", "data", "update"}
    # Entries recorded by hashing alone (bits equal to the golden's) get their stored values from the golden.
    state = pq.read_table(kept / "state.parquet").to_pylist()
    assert state and all(row["values"] is not None and len(row["values"]) == row["numel"] for row in state)
