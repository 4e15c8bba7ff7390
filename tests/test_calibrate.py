"""`trainguard calibrate`: spread analysis and proposal on synthetic runs (fast), and the
command end to end on a generated project (slow: each calibration starts 11 pytest processes).

The generated project is an invented greenhouse whose vent controller learns how far to
open the roof vents. One test is seeded and deterministic; the other has a "flaky
anemometer": from step 2 on, a number from the OS entropy pool (os.urandom) scales the
reported loss by up to 1e-3, relative. That noise is 100x the default rtol (1e-5), so the
default tolerance fails, and a calibrated one must cover it.
"""

from __future__ import annotations

import hashlib
import re
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pytest_output import generated_project, run_pytest

from trainguard.core import paths
from trainguard.core import store as golden
from trainguard.core.comparison import compare
from trainguard.core.guard import check
from trainguard.core.records import MetricSeries, Run, TensorRecord
from trainguard.core.settings import calibrated_policy
from trainguard.core.tolerance import DEFAULT_ATOL, DEFAULT_RTOL, Policy, Tolerance
from trainguard.core.verdicts import CHANGED, CLOSE
from trainguard.skins.cli import main
from trainguard.tools.calibrate import plan, power_settings, thread_counts, write_calibration
from trainguard.tools.calibration import RecordedRun, RunSpec, Setting, analyse, round_up

# -- synthetic runs ----------------------------------------------------------------------------

BASELINE = Setting("baseline", "as configured", (), (("PYTHONHASHSEED", "0"),))
THREADS1 = Setting("threads=1", "--trainguard-threads 1", ("--trainguard-threads", "1"))


def _tensor(name: str, values) -> TensorRecord:
    v = np.asarray(values, dtype=np.float64)
    return TensorRecord(name, "parameter", "float64", (v.size,), hashlib.sha256(v.tobytes()).hexdigest(),
                        float(v.min()), float(v.max()), float(v.mean()), float(np.linalg.norm(v)), 0, v)


def _run(label: str, setting: Setting, metrics: dict, weights, seed: int = 5) -> RecordedRun:
    run = Run(metrics={k: MetricSeries(np.arange(len(v)), v) for k, v in metrics.items()},
              tensors={"vent.weight": _tensor("vent.weight", weights)},
              meta={"nodeid": "test_vents.py::test_vent", "seed": seed,
                    "tolerances": {"rtol": DEFAULT_RTOL, "atol": DEFAULT_ATOL, "exact": False, "metrics": {}}})
    return RecordedRun(RunSpec(label, setting), run, Path("."))


def test_round_up_to_one_significant_digit():
    assert round_up(2.3e-5) == 3e-05
    assert round_up(3e-5) == 3e-05  # already one digit: unchanged, not bumped by float error
    assert round_up(9.2e-3) == 0.01
    assert round_up(1.0) == 1.0
    assert round_up(1.7e-2) == 0.02


def test_identical_runs_are_bitwise_deterministic():
    m = {"loss": [0.9, 0.5, 0.25]}
    runs = [_run("baseline 1", BASELINE, m, [0.1, -0.2]), _run("baseline 2", BASELINE, m, [0.1, -0.2]),
            _run("threads=1", THREADS1, m, [0.1, -0.2])]
    cal = analyse("test_vents.py::test_vent", runs)
    assert cal.bitwise and cal.fixed_difference is None and cal.proposal is None
    assert cal.marker_line(exact=True) == "@pytest.mark.trainguard(seed=5, exact=True)"


def test_thread_only_difference_is_not_called_nondeterministic():
    runs = [_run("baseline 1", BASELINE, {"loss": [0.9, 0.5, 0.25]}, [0.1, -0.2]),
            _run("baseline 2", BASELINE, {"loss": [0.9, 0.5, 0.25]}, [0.1, -0.2]),
            _run("threads=1", THREADS1, {"loss": [0.9, 0.5, 0.25 * (1 + 3.5e-7)]}, [0.1, -0.2 * (1 + 2e-7)])]
    cal = analyse("test_vents.py::test_vent", runs)
    assert not cal.bitwise and cal.fixed_difference is None
    assert cal.per_run["baseline 2"] is None
    assert cal.per_run["threads=1"].where == "metric 'loss' at step 2"
    # The overall pair comes from the state: vent.weight[1] = -0.2 (above the entry's RMS 0.158)
    # moved by 2e-7 of itself -> 10 x 2e-7 -> rtol 2e-06; nothing left for atol.
    assert cal.proposal.rtol == 2e-06 and cal.proposal.atol == DEFAULT_ATOL
    # The loss gets its own: its step-2 value 0.25 is above a tenth of the series' RMS (0.061,
    # recomputed here with NumPy), so its spread counts against its own size: 10 x 3.5e-7.
    loss = np.array([0.9, 0.5, 0.25])
    assert 0.25 > 0.1 * float(np.sqrt(np.mean(loss ** 2)))
    own = cal.metric_proposals["loss"]
    assert own.rtol == round_up(10 * 3.5e-7) and own.kept_atol and own.atol == DEFAULT_ATOL
    assert cal.marker_line() == (f'@pytest.mark.trainguard(seed=5, rtol=2e-06, atol=1e-08, metrics={{"loss": '
                                 f'{{"rtol": {own.rtol:g}, "atol": {own.atol:g}}}}})')


def test_first_difference_with_everything_fixed_is_the_earliest_step():
    ref = {"loss": [0.9, 0.5, 0.25, 0.2], "opening": [0.3, 0.4, 0.5, 0.6]}
    other = {"loss": [0.9, 0.5, 0.25, 0.2001], "opening": [0.3, 0.4, 0.5001, 0.6]}
    cal = analyse("n", [_run("baseline 1", BASELINE, ref, [1.0]), _run("baseline 2", BASELINE, other, [1.0])])
    d = cal.fixed_difference
    assert (d.metric, d.step, d.label) == ("opening", 2, "baseline 2")
    assert (d.reference, d.value) == (0.5, 0.5001)


def test_nonfinite_against_finite_gets_no_proposal():
    runs = [_run("baseline 1", BASELINE, {"loss": [0.9, 0.5]}, [1.0]),
            _run("baseline 2", BASELINE, {"loss": [0.9, float("nan")]}, [1.0])]
    cal = analyse("n", runs)
    assert cal.proposal is None
    assert any("metric 'loss' at step 1" in p and "non-finite" in p for p in cal.problems)


@settings(max_examples=60, deadline=None)
@given(
    values=st.lists(st.one_of(st.floats(-5, 5), st.just(0.0), st.floats(-1e-6, 1e-6)), min_size=3, max_size=12),
    noise=st.lists(st.floats(-1e-3, 1e-3), min_size=24, max_size=24),
    safety=st.floats(1, 50),
)
def test_proposal_covers_every_observed_difference(values, noise, safety):
    g = np.array(values)
    n = len(g)
    # run k: relative noise plus a tiny absolute part, on metrics and on the state tensor
    runs = [_run("baseline 1", BASELINE, {"loss": g, "opening": g[::-1].copy()}, g)]
    for k in range(1, 3):
        eps = np.array(noise[(k - 1) * 12:(k - 1) * 12 + n])
        v = g * (1 + eps) + eps * 1e-9
        runs.append(_run(f"baseline {k + 1}" if k == 1 else "threads=1", BASELINE if k == 1 else THREADS1,
                         {"loss": v, "opening": v[::-1].copy()}, v))
    cal = analyse("n", runs, safety=safety)
    if cal.bitwise:
        return
    policy = cal.policy()
    for r in runs[1:]:
        cmp = compare(runs[0].run, r.run, policy)  # the plugin's own check
        assert cmp.outcome in ("identical", CLOSE), cmp
        for name, series in r.run.metrics.items():
            tol = policy.for_metric(name)
            ref = runs[0].run.metrics[name].values
            assert np.all(np.abs(series.values - ref) <= tol.atol + tol.rtol * np.abs(ref))


def test_large_entries_are_calibrated_from_statistics_and_sketch():
    """Entries too large to keep values are compared by statistics (and, where stored, a sketch
    whose distance is allowed atol * sqrt(n) + rtol * l2): the proposal must cover both."""
    def big(stats, sketch):
        rec = TensorRecord("vent.history", "named", "float32", (100000,), hashlib.sha256(repr(stats).encode()).hexdigest(),
                           *stats, 0, None)
        rec.sketch = np.array(sketch)
        return rec

    runs = [_run("baseline 1", BASELINE, {"loss": [0.5]}, [1.0]), _run("baseline 2", BASELINE, {"loss": [0.5]}, [1.0])]
    runs[0].run.tensors["vent.history"] = big((-2.0, 3.0, 0.25, 400.0), [10.0, -4.0, 7.0])
    runs[1].run.tensors["vent.history"] = big((-2.0, 3.0, 0.25 + 1e-9, 400.0), [10.0, -4.0 + 3e-3, 7.0])
    cal = analyse("n", runs)
    [spread] = cal.tensors
    assert spread.basis == "statistics"
    gap, l2 = 3e-3, 400.0
    assert gap <= cal.proposal.atol * np.sqrt(100000) + cal.proposal.rtol * l2
    assert cal.proposal.rtol == round_up(10 * gap / l2)  # the sketch gap (7.5e-6 of l2) is the largest relative spread
    assert abs(1e-9) <= cal.proposal.atol + cal.proposal.rtol * 0.25  # the mean's shift


def test_plan_varies_threads_deterministic_mode_and_hash_seed():
    meta = {"deterministic": True, "fingerprint": {"threads": {"intra_op": 4}}}
    specs, notes = plan(meta, runs=3, hash_seed="0", cpu_count=8)
    labels = [s.label for s in specs]
    assert labels == ["baseline 2", "baseline 3", "threads=1 #1", "threads=1 #2", "threads=8 #1", "threads=8 #2",
                      "nondeterministic #1", "nondeterministic #2", "hashseed=1 #1", "hashseed=1 #2",
                      "dispatch=sse4.2 #1", "dispatch=sse4.2 #2", "dispatch=mkl-compatible #1",
                      "dispatch=mkl-compatible #2"]
    power = power_settings("0")  # run after the noise, once it says they are worth running
    assert [p.key for p in power] == ["planted lr:0.001", "planted lr:0.01", "planted params:0.0001"]
    assert dict(specs[9].setting.env) == {"PYTHONHASHSEED": "1"}
    assert dict(specs[10].setting.env) == {"PYTHONHASHSEED": "0", "MKL_ENABLE_INSTRUCTIONS": "SSE4_2",
                                           "ATEN_CPU_CAPABILITY": "default", "ONEDNN_MAX_CPU_ISA": "SSE41"}
    assert dict(specs[12].setting.env)["MKL_CBWR"] == "COMPATIBLE"
    assert [p.required for p in power] == [False, True, False]
    assert power[1].args == ("--trainguard-plant=lr:0.01",) and dict(power[1].env) == {"PYTHONHASHSEED": "0"}
    assert not any(s.setting.plant for s in specs)
    assert "--trainguard-nondeterministic" in specs[6].setting.args and not notes
    assert thread_counts(2, 2) == [1, 4]  # never the baseline's own count
    assert thread_counts(1, 1) == [2, 3]
    specs, notes = plan({"deterministic": False, "fingerprint": {"threads": {"intra_op": 1}}}, 2, "0", 1)
    assert "nondeterministic" not in [s.label for s in specs] and "already turns it off" in notes[0]


def test_plan_leaves_pinned_settings_alone():
    # Portable mode pins threads and dispatch (a contradicting --trainguard-threads is a usage error).
    portable = {"deterministic": True, "fingerprint": {"threads": {"intra_op": 1}, "portable": {"pins": {}}}}
    specs, notes = plan(portable, 2, "0", 8)
    assert [s.label for s in specs] == ["baseline 2", "nondeterministic", "hashseed=1"]
    assert "portable mode, which pins both" in notes[0]
    # Off x86-64 the dispatch settings mean nothing: said, not run.
    specs, notes = plan({"fingerprint": {"threads": {"intra_op": 2}}}, 2, "0", 2, x86=False)
    assert not any(s.label.startswith("dispatch") for s in specs) and "x86-64" in notes[-1]


def test_written_calibration_is_used_by_the_check(tmp_path):
    folder = tmp_path / "golden" / "test_vents.py" / "test_vent"
    golden.write_run(folder, _run("baseline 1", BASELINE, {"loss": [0.9, 0.5, 0.25]}, [0.1, -0.2]).run)
    noisy = _run("b", BASELINE, {"loss": [0.9, 0.5, 0.25 * (1 + 3e-4)]}, [0.1, -0.2]).run
    assert check("n", noisy, folder, Policy(), "bless").outcome == CHANGED  # defaults: rtol 1e-5
    write_calibration(folder, {"rtol": 4e-3, "atol": 1e-8, "metrics": {}, "safety": 10})
    stored = golden.read_run(folder)
    assert stored.meta["calibrated"]["rtol"] == 4e-3 and stored.meta["seed"] == 5
    assert calibrated_policy(Policy(), stored.meta).default == Tolerance(4e-3, 1e-8)
    assert check("n", noisy, folder, Policy(), "bless").outcome == CLOSE
    write_calibration(folder, None)  # removing it restores the defaults
    assert "calibrated" not in golden.read_run(folder).meta


# -- end to end ---------------------------------------------------------------------------------

VENTS = '''
"""An invented greenhouse: a vent controller learns how far to open the roof vents from
three sensor readings (inside temperature, outside temperature, humidity)."""
import os
import struct

import pytest
import torch


def readings(n=24):
    g = torch.Generator().manual_seed(11)
    x = torch.rand(n, 3, generator=g)
    y = (0.6 * x[:, :1] - 0.3 * x[:, 1:2] + 0.1 * x[:, 2:]).clamp(0, 1)
    return x, y


def train(trajectory, jitter=0.0, jitter_from=2, steps=6):
    model = torch.nn.Linear(3, 1)
    opt = torch.optim.SGD(model.parameters(), lr=0.2, momentum=0.5)
    x, y = readings()
    for step in range(steps):
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(model(x), y)
        loss.backward()
        opt.step()
        reported = loss.item()
        if jitter and step >= jitter_from:
            # the flaky anemometer: a number from the OS entropy pool nudges the reported loss
            u = struct.unpack("<I", os.urandom(4))[0] / 2**32 * 2 - 1
            reported *= 1 + jitter * u
        trajectory.log(step, loss=reported, opening=model(x).mean().item())
    trajectory.state(model, optimizer=opt)


@pytest.mark.trainguard(seed=7)
def test_vent_steady(trajectory):
    train(trajectory)


@pytest.mark.trainguard(seed=8)
def test_vent_flaky_anemometer(trajectory):
    train(trajectory, jitter=1e-4)


@pytest.mark.trainguard(seed=8)
def test_vent_gusty_anemometer(trajectory):
    train(trajectory, jitter=3e-2)
'''

STEADY = "test_vents.py::test_vent_steady"
FLAKY = "test_vents.py::test_vent_flaky_anemometer"
GUSTY = "test_vents.py::test_vent_gusty_anemometer"


@pytest.fixture
def greenhouse(tmp_path, monkeypatch):
    return generated_project(tmp_path, monkeypatch, {"test_vents.py": VENTS})


@pytest.mark.slow
def test_calibrate_refuses_to_store_a_tolerance_over_the_calibrated_cap(greenhouse, capsys):
    # 3 % jitter is no rounding noise: storing its tolerance would switch the test off for real changes.
    # Measured across a golden and one CI runner's results folder (calibrate --from).
    assert run_pytest(greenhouse, "--trainguard-bless", GUSTY).returncode == 0
    assert run_pytest(greenhouse, "--trainguard-results=ci-runner", GUSTY).returncode == 1
    folder = paths.golden_folder(greenhouse / "golden", GUSTY)
    before = {p.name: p.read_bytes() for p in folder.iterdir()}
    assert main(["calibrate", GUSTY, "--from", "golden", "ci-runner", "--write", "--jobs", "2"]) == 1
    out = capsys.readouterr().out
    assert "nothing written" in out and "looser than a calibrated tolerance may be" in out
    # the power checks are not run for a proposal that cannot be stored anyway
    assert "note: power checks skipped: the proposal is looser than a calibrated tolerance may be" in out
    assert "planted" not in out
    assert {p.name: p.read_bytes() for p in folder.iterdir()} == before
    assert "calibrated" not in golden.read_run(folder).meta


@pytest.mark.slow
def test_calibrate_deterministic_test(greenhouse, capsys):
    # --write without a golden stops after the first run and names the bless command
    assert main(["calibrate", STEADY, "--write", "--jobs", "2"]) == 2
    err = capsys.readouterr().err
    assert f"--write: {STEADY} has no golden in golden/test_vents.py/test_vent_steady" in err
    assert f"pytest --trainguard-bless --trainguard-reason 'describe the intended change' {STEADY}" in err
    assert "done: baseline 2" not in err and "Traceback" not in err

    # In portable mode (kernel dispatch and threads pinned, so not varied) the steady test is
    # bitwise deterministic on any x86-64 machine; unpinned, another CPU's kernels may move its bits.
    (greenhouse / "pytest.ini").write_text("[pytest]\ntrainguard_golden_dir = golden\ntrainguard_portable = true\n")
    assert main(["calibrate", STEADY, "--jobs", "2"]) == 0
    out = capsys.readouterr().out
    assert "BITWISE DETERMINISTIC under all variations" in out
    assert "not varied: the test runs in portable mode, which pins both" in out
    for label in ("baseline 2", "nondeterministic", "hashseed=1"):
        assert re.search(rf"^  {re.escape(label)} .*bitwise identical$", out, re.M), label
    assert "@pytest.mark.trainguard(seed=7)\n" in out and "@pytest.mark.trainguard(seed=7, exact=True)" in out
    assert "NOT DETERMINISTIC" not in out
    # the power checks are judged under the current tolerance, and it catches all three
    assert "each judged under the current tolerance" in out
    assert len(re.findall(r"^  planted \S+ .*CAUGHT, first in metric", out, re.M)) == 3, out


@pytest.mark.slow
def test_calibrate_noisy_test_writes_tolerance_that_passes(greenhouse, capsys):
    # Portable mode: threads and dispatch are pinned, so only the anemometer's jitter varies (and
    # the plan is shorter; test_calibrate_power.py runs the unpinned plan on a CNN).
    (greenhouse / "pytest.ini").write_text("[pytest]\ntrainguard_golden_dir = golden\ntrainguard_portable = true\n")
    assert run_pytest(greenhouse, "--trainguard-bless", FLAKY).returncode == 0
    folder = paths.golden_folder(greenhouse / "golden", FLAKY)
    blessed = golden.read_run(folder)

    assert main(["calibrate", FLAKY, "--write", "--jobs", "2", "--keep-runs", "kept"]) == 0
    out = capsys.readouterr().out
    assert "NOT DETERMINISTIC even with everything fixed: baseline 1 and baseline 2" in out
    assert "first difference: metric 'loss' at step 2" in out  # the anemometer starts at step 2
    # the loss carries the jitter and gets its own pair; the overall pair comes from the state
    marker = re.search(r'^  @pytest\.mark\.trainguard\(seed=8, rtol=([0-9.e+-]+), atol=([0-9.e+-]+), metrics=\{.*'
                       r'"loss": \{"rtol": ([0-9.e+-]+), "atol": ([0-9.e+-]+)\}.*\}\)$', out, re.M)
    assert marker, out
    rtol, atol, loss_rtol, loss_atol = (float(marker.group(i)) for i in range(1, 5))
    assert "safety factor 10" in out
    assert loss_rtol >= 1e-4 and rtol < loss_rtol  # the jitter (1e-4) does not loosen the state

    # stored where the comparison picks it up, with the marker line's numbers; data untouched
    stored = golden.read_run(folder)
    cal = stored.meta["calibrated"]
    assert (cal["rtol"], cal["atol"]) == (rtol, atol)
    assert cal["metrics"]["loss"] == {"rtol": loss_rtol, "atol": loss_atol}
    assert cal["safety"] == 10 and {p["plant"]: p["caught"] for p in cal["power"]}["lr:0.01"] is True
    assert stored.meta["seed"] == 8 and np.array_equal(stored.metrics["loss"].values, blessed.metrics["loss"].values)
    assert {t.sha256 for t in stored.tensors.values()} == {t.sha256 for t in blessed.tensors.values()}

    # every kept noise run: outside the default tolerance, inside the calibrated one, each observed
    # |diff| of the loss from baseline 1 within its atol + rtol * |baseline 1|; every planted run fails
    kept = {p.name: golden.read_run(paths.golden_folder(p, FLAKY)) for p in (greenhouse / "kept").iterdir()}
    planted_runs = [k for k in kept if k.startswith("planted")]
    assert len(planted_runs) == 3
    assert set(kept) - set(planted_runs) == {"baseline-1", "baseline-2", "hashseed=1", "nondeterministic"}
    ref = kept["baseline-1"]
    calibrated = calibrated_policy(Policy(), stored.meta)
    for name, run in kept.items():
        if name in planted_runs:
            assert compare(stored, run, calibrated).outcome == CHANGED, name
            continue
        g, v = ref.metrics["loss"].values, run.metrics["loss"].values
        assert np.all(np.abs(v - g) <= loss_atol + loss_rtol * np.abs(g))
        assert compare(stored, run, calibrated).outcome in ("identical", CLOSE)
        assert compare(stored, run, Policy()).outcome == CHANGED  # 1e-4 jitter vs rtol 1e-5

    proc = run_pytest(greenhouse, FLAKY)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "within tolerance" in proc.stdout


@pytest.mark.slow
def test_calibrate_unknown_test_is_a_clear_error(greenhouse, capsys):
    assert main(["calibrate", "test_vents.py::test_no_such_vent", "--jobs", "2"]) == 2
    err = capsys.readouterr().err
    assert "test_vents.py::test_no_such_vent: pytest found no such test" in err
    assert "python -m pytest --collect-only -q" in err and "Traceback" not in err
    assert main(["calibrate", STEADY, "--runs", "1"]) == 2
    assert "--runs must be at least 2" in capsys.readouterr().err
