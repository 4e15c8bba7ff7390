"""Unit tests of recording (`Trajectory`), the golden store and the comparison, without pytester.

The scenarios are invented: a bakery's oven-temperature regressor and a tram depot's
arrival-delay model, each a few parameters big so that every test runs in milliseconds.
Expected values are written out by hand or computed independently of trainguard (NumPy,
torch, pyarrow, hashlib), never read back from the code under test.
"""

from __future__ import annotations

import hashlib
import math
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import torch

from trainguard import (
    GoldenCorruptError,
    GoldenMissingError,
    Policy,
    Tolerance,
    Trajectory,
    UsageError,
    compare,
    read_run,
    write_run,
)
from trainguard.core import golden_format
from trainguard.core.verdicts import CHANGED, CLOSE, IDENTICAL

# -- helpers -------------------------------------------------------------------------


def _oven_model(seed: int = 3) -> torch.nn.Module:
    torch.manual_seed(seed)
    return torch.nn.Sequential(torch.nn.Linear(3, 2), torch.nn.Tanh(), torch.nn.Linear(2, 1))


def _oven_batch(seed: int = 4) -> tuple[torch.Tensor, torch.Tensor]:
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(8, 3, generator=g)  # dough mass, proofing minutes, room temperature (scaled)
    y = torch.randn(8, 1, generator=g)  # oven temperature offset
    return x, y


def _train(model: torch.nn.Module, opt: torch.optim.Optimizer, steps: int = 3) -> list[float]:
    x, y = _oven_batch()
    losses = []
    for _ in range(steps):
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(model(x), y)
        loss.backward()
        opt.step()
        losses.append(loss.item())
    return losses


def _recorded(steps=(0, 1, 2, 3), loss=(1.0, 0.5, 0.25, 0.125), weight=(1.0, 2.0, 3.0)) -> Trajectory:
    t = Trajectory()
    for s, v in zip(steps, loss):
        t.log(s, loss=v)
    t.state(weight=torch.tensor(weight, dtype=torch.float64))
    return t


# -- metrics -------------------------------------------------------------------------


@pytest.mark.parametrize(
    "value, expected",
    [
        (3, 3.0),
        (0.1, 0.1),
        (True, 1.0),
        (torch.tensor(0.1, dtype=torch.float32), float(np.float32(0.1))),  # float32 widened exactly
        (torch.tensor(0.1, dtype=torch.float64), 0.1),
        (torch.tensor([2.5]), 2.5),  # one-element 1-d tensor, e.g. loss.view(1)
        (torch.tensor(7, dtype=torch.int64), 7.0),
        (np.float32(0.1), float(np.float32(0.1))),
        (np.float64(-4.25), -4.25),
        (np.int16(-9), -9.0),
        (np.array(1.5), 1.5),  # 0-d array
    ],
    ids=lambda v: type(v).__name__,
)
def test_log_converts_scalars_to_float(value, expected):
    t = Trajectory()
    t.log(0, loss=value)
    series = t.to_run().metrics["loss"]
    assert series.values.dtype == np.float64
    assert series.values.tolist() == [expected]
    assert series.steps.tolist() == [0]


def test_log_keeps_a_tensor_with_grad_without_touching_the_graph():
    w = torch.tensor([1.0, 2.0], requires_grad=True)
    loss = (w * w).sum()
    t = Trajectory()
    t.log(0, loss=loss)
    loss.backward()  # the graph is still usable after logging
    assert w.grad.tolist() == [2.0, 4.0]
    assert t.to_run().metrics["loss"].values.tolist() == [5.0]


def test_log_accepts_integer_tensor_steps_and_per_metric_step_sets():
    t = Trajectory()
    t.log(torch.tensor(0), loss=1.0, lr=0.1)
    t.log(5, loss=0.8)
    t.log(np.int64(10), loss=0.6, lr=0.01)
    run = t.to_run()
    assert run.metrics["loss"].steps.tolist() == [0, 5, 10]
    assert run.metrics["lr"].steps.tolist() == [0, 10]
    assert run.metrics["lr"].values.tolist() == [0.1, 0.01]


@pytest.mark.parametrize(
    "value, phrase",
    [
        (torch.zeros(3), "got a tensor of shape (3,)"),
        (torch.zeros(1, 1), "got a tensor of shape (1, 1)"),
        (torch.zeros(0), "got a tensor of shape (0,)"),
        (np.zeros(2), "got an array of shape (2,)"),
        (torch.tensor(1 + 2j), "complex values are not metrics"),
        ("0.5", "str is not a scalar metric"),
        (None, "NoneType is not a scalar metric"),
        ([0.5], "list is not a scalar metric"),
    ],
    ids=["tensor3", "tensor1x1", "tensor0", "array2", "complex", "str", "none", "list"],
)
def test_log_rejects_non_scalars_with_a_clear_message(value, phrase):
    t = Trajectory()
    with pytest.raises(UsageError) as info:
        t.log(4, loss=value)
    assert phrase in str(info.value)
    assert "step=4" in str(info.value) and "loss" in str(info.value)
    assert t.to_run().is_empty  # nothing half-recorded


@pytest.mark.parametrize("step", [1.0, "3", True, torch.tensor(1.0), None])
def test_log_rejects_non_integer_steps(step):
    with pytest.raises(UsageError, match="step must be an integer"):
        Trajectory().log(step, loss=1.0)


def test_log_rejects_repeated_and_decreasing_steps_and_keeps_earlier_values():
    t = Trajectory()
    t.log(0, loss=1.0)
    t.log(2, loss=0.5)
    with pytest.raises(UsageError, match="already logged at step 2"):
        t.log(2, loss=0.4)
    with pytest.raises(UsageError, match="went back from step 2 to step 1"):
        t.log(1, loss=0.4)
    # a rejected call records none of its metrics, not even the valid ones
    with pytest.raises(UsageError):
        t.log(1, acc=0.9, loss=0.4)
    run = t.to_run()
    assert run.metrics["loss"].steps.tolist() == [0, 2]
    assert run.metrics["loss"].values.tolist() == [1.0, 0.5]
    assert "acc" not in run.metrics


def test_log_without_metrics_is_an_error():
    with pytest.raises(UsageError, match="no metrics given"):
        Trajectory().log(0)


# -- final state: naming ------------------------------------------------------------


def test_sgd_momentum_buffers_and_hyperparameters_are_named_after_the_module():
    model = _oven_model()
    opt = torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.9, nesterov=False)
    _train(model, opt)
    t = Trajectory()
    t.state(model, optimizer=opt)
    tensors = t.to_run().tensors
    expected_params = {"0.weight", "0.bias", "2.weight", "2.bias"}
    assert {n for n, r in tensors.items() if r.kind == "parameter"} == expected_params
    assert {n for n, r in tensors.items() if r.kind == "optimizer"} == {p + ".momentum_buffer" for p in expected_params}
    hyper = {n: r for n, r in tensors.items() if r.kind == "hyperparameter"}
    # flags (nesterov, maximize) and None entries (foreach) are not hyperparameters
    assert set(hyper) == {"param_groups.0.lr", "param_groups.0.momentum", "param_groups.0.dampening",
                          "param_groups.0.weight_decay"}
    assert hyper["param_groups.0.momentum"].values.tolist() == [0.9]
    assert hyper["param_groups.0.lr"].values.tolist() == [0.05]
    # the stored momentum buffer is the optimizer's, bit for bit
    buf = opt.state[model[0].weight]["momentum_buffer"]
    assert tensors["0.weight.momentum_buffer"].values.tolist() == buf.double().flatten().tolist()
    assert tensors["0.weight.momentum_buffer"].shape == (2, 3)
    assert tensors["0.weight.momentum_buffer"].dtype == "float32"


def test_adam_state_names():
    model = _oven_model()
    opt = torch.optim.Adam(model.parameters(), lr=1e-2, betas=(0.8, 0.95))
    _train(model, opt, steps=2)
    t = Trajectory()
    t.state(model, optimizer=opt)
    tensors = t.to_run().tensors
    for p in ("0.weight", "0.bias", "2.weight", "2.bias"):
        assert tensors[f"{p}.exp_avg"].kind == "optimizer"
        assert tensors[f"{p}.exp_avg_sq"].kind == "optimizer"
        assert tensors[f"{p}.step"].values.tolist() == [2.0]  # two optimizer steps taken
    assert tensors["param_groups.0.betas.0"].values.tolist() == [0.8]
    assert tensors["param_groups.0.betas.1"].values.tolist() == [0.95]
    assert not any(name.endswith(".amsgrad") or name.endswith(".max_exp_avg_sq") for name in tensors)


def test_lbfgs_history_lists_are_flattened_with_an_index():
    model = _oven_model()
    opt = torch.optim.LBFGS(model.parameters(), history_size=3, max_iter=4)
    x, y = _oven_batch()

    def closure():
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(model(x), y)
        loss.backward()
        return loss

    opt.step(closure)
    opt.step(closure)
    t = Trajectory()
    t.state(model, optimizer=opt)
    tensors = t.to_run().tensors
    # torch keeps L-BFGS state under the first parameter only
    history = len(opt.state[model[0].weight]["old_dirs"])
    assert history >= 1
    assert [n for n in tensors if n.startswith("0.weight.old_dirs.")] == [f"0.weight.old_dirs.{i}" for i in range(history)]
    assert [n for n in tensors if n.startswith("0.weight.old_stps.")] == [f"0.weight.old_stps.{i}" for i in range(history)]
    first_dir = opt.state[model[0].weight]["old_dirs"][0]
    assert tensors["0.weight.old_dirs.0"].values.tolist() == first_dir.double().tolist()
    assert tensors["0.weight.n_iter"].kind == "optimizer"
    assert not any(n.startswith("0.bias.") for n in tensors)


def test_tied_parameters_appear_once():
    class TiedTramModel(torch.nn.Module):
        def __init__(self):
            super().__init__()
            self.embed = torch.nn.Embedding(5, 3)  # five tram stops
            self.head = torch.nn.Linear(3, 5, bias=False)
            self.head.weight = self.embed.weight  # tied

        def forward(self, idx):
            return self.head(self.embed(idx))

    torch.manual_seed(0)
    model = TiedTramModel()
    opt = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.5)
    loss = torch.nn.functional.cross_entropy(model(torch.tensor([0, 1, 2])), torch.tensor([1, 2, 3]))
    loss.backward()
    opt.step()
    t = Trajectory()
    t.state(model, optimizer=opt)
    names = list(t.to_run().tensors)
    assert [n for n in names if n.endswith("weight")] == ["embed.weight"]
    assert [n for n in names if n.endswith("momentum_buffer")] == ["embed.weight.momentum_buffer"]


def test_parameters_outside_the_model_are_named_by_group_and_index():
    model = _oven_model()
    delay_scale = torch.nn.Parameter(torch.ones(2))  # a tram depot calibration knob, not in the model
    bias_shift = torch.nn.Parameter(torch.zeros(1))
    opt = torch.optim.SGD(
        [{"params": list(model.parameters()) + [delay_scale]}, {"params": [bias_shift], "lr": 0.5}],
        lr=0.1, momentum=0.9,
    )
    opt.zero_grad()
    (model(torch.ones(1, 3)).sum() + delay_scale.sum() * 2 + bias_shift.sum()).backward()
    opt.step()
    t = Trajectory()
    t.state(model, optimizer=opt)
    tensors = t.to_run().tensors
    assert "group0.param4.momentum_buffer" in tensors  # fifth param of group 0
    assert "group1.param0.momentum_buffer" in tensors
    assert tensors["group0.param4.momentum_buffer"].values.tolist() == [2.0, 2.0]
    assert tensors["param_groups.1.lr"].values.tolist() == [0.5]
    assert "0.weight.momentum_buffer" in tensors


def test_keyword_modules_and_optimizers_get_the_keyword_as_prefix():
    torch.manual_seed(1)
    actor, critic = torch.nn.Linear(2, 2), torch.nn.Linear(2, 1)
    critic_opt = torch.optim.SGD(critic.parameters(), lr=0.1, momentum=0.9)
    critic(torch.ones(1, 2)).sum().backward()
    critic_opt.step()
    t = Trajectory()
    t.state(actor=actor, critic=critic, critic_opt=critic_opt, temperature=0.7, counts=np.arange(3))
    tensors = t.to_run().tensors
    assert {"actor.weight", "actor.bias", "critic.weight", "critic.bias"} <= set(tensors)
    assert tensors["critic_opt.critic.weight.momentum_buffer"].kind == "optimizer"
    assert tensors["critic_opt.param_groups.0.momentum"].values.tolist() == [0.9]
    assert tensors["temperature"].kind == "named" and tensors["temperature"].dtype == "float64"
    assert tensors["counts"].dtype == "int64" and tensors["counts"].values.tolist() == [0.0, 1.0, 2.0]
    assert not any(n.startswith("weight") or n.startswith("bias") for n in tensors)


def test_state_errors():
    t = Trajectory()
    with pytest.raises(UsageError, match="nothing to record"):
        t.state()
    with pytest.raises(UsageError, match="model must be a torch.nn.Module"):
        t.state(torch.zeros(2))
    with pytest.raises(UsageError, match="optimizer must be a torch.optim.Optimizer"):
        t.state(optimizer="sgd")
    with pytest.raises(UsageError, match="str cannot be recorded"):
        t.state(label="oven-3")
    with pytest.raises(UsageError, match="not numeric"):
        t.state(names=np.array(["rye", "spelt"]))
    t.state(weight=torch.zeros(2))
    with pytest.raises(UsageError, match="two entries are named 'weight'"):
        t.state(weight=torch.ones(2))
    # a module keyword whose parameters collide with an existing named tensor
    model = torch.nn.Linear(1, 1)
    with pytest.raises(UsageError, match="two entries are named 'weight'"):
        t.state(model)
    assert list(t.to_run().tensors) == ["weight"]
    assert t.to_run().tensors["weight"].values.tolist() == [0.0, 0.0]


def test_values_are_stored_only_up_to_max_values():
    t = Trajectory(max_values=4)
    small = torch.arange(4, dtype=torch.float32)
    large = torch.arange(5, dtype=torch.float32)
    t.state(small=small, large=large)
    tensors = t.to_run().tensors
    assert tensors["small"].values.tolist() == [0.0, 1.0, 2.0, 3.0]
    assert tensors["large"].values is None
    # statistics and checksum are kept either way (expected values computed by hand / hashlib)
    import hashlib

    assert tensors["large"].sha256 == hashlib.sha256(np.arange(5, dtype="<f4").tobytes()).hexdigest()
    assert (tensors["large"].min, tensors["large"].max, tensors["large"].mean) == (0.0, 4.0, 2.0)
    assert tensors["large"].l2 == pytest.approx(math.sqrt(0 + 1 + 4 + 9 + 16))
    assert tensors["large"].shape == (5,)


def test_nonfinite_values_are_counted_and_statistics_skip_them():
    t = Trajectory()
    t.state(w=torch.tensor([1.0, float("nan"), 3.0, float("inf")]))
    rec = t.to_run().tensors["w"]
    assert rec.nonfinite == 2
    assert (rec.min, rec.max, rec.mean) == (1.0, 3.0, 2.0)


# -- golden round trip -----------------------------------------------------------------


def test_write_read_round_trip_is_equal(tmp_path):
    model = _oven_model()
    opt = torch.optim.Adam(model.parameters(), lr=1e-2)
    losses = _train(model, opt)
    t = Trajectory(max_values=4)
    for step, loss in enumerate(losses):
        t.log(step * 10, loss=loss, lr=0.01)
    t.log(40, loss=float("nan"))
    t.state(model, optimizer=opt, shift=torch.tensor([float("nan"), -0.0]), big=torch.arange(6.0))
    run = t.to_run()
    run.meta = {"seed": 7, "reason": "new proofing schedule", "fingerprint": {"a": [1, 2]}}
    folder = tmp_path / "oven" / "golden"
    write_run(folder, run)
    assert sorted(p.name for p in folder.iterdir()) == ["metrics.parquet", "state.parquet"]

    back = read_run(folder)
    assert set(back.metrics) == set(run.metrics)
    for name, series in run.metrics.items():
        assert back.metrics[name].steps.tolist() == series.steps.tolist()
        np.testing.assert_array_equal(back.metrics[name].values, series.values)  # NaN == NaN here
    assert list(back.tensors) == list(run.tensors)
    for name, rec in run.tensors.items():
        got = back.tensors[name]
        for field in ("name", "kind", "dtype", "shape", "sha256", "nonfinite"):
            assert getattr(got, field) == getattr(rec, field), (name, field)
        for field in ("min", "max", "mean", "l2"):
            np.testing.assert_array_equal(getattr(got, field), getattr(rec, field))
        if rec.values is None:
            assert got.values is None
        else:
            assert got.values.tobytes() == rec.values.tobytes()  # bit-exact, -0.0 and NaN included
        if rec.sketch is None:
            assert got.sketch is None
        else:
            assert got.sketch.tobytes() == rec.sketch.tobytes()
    assert back.tensors["big"].values is None
    assert back.tensors["big"].sketch is not None  # too large for values: a sketch stands in
    assert {k: back.meta[k] for k in run.meta} == run.meta
    assert back.meta["format_version"] == golden_format.FORMAT_VERSION == 4
    # the round trip compares as identical
    assert compare(run, back, Policy(exact=True)).outcome == IDENTICAL
    # the stored layout is the documented one (read with pyarrow directly)
    table = pq.read_table(folder / "metrics.parquet")
    assert table.schema.names == ["metric", "step", "value"]
    assert table.num_rows == 4 + 3  # loss at 0, 10, 20, 40 and lr at 0, 10, 20


def test_read_missing_folder_raises_missing(tmp_path):
    with pytest.raises(GoldenMissingError) as info:
        read_run(tmp_path / "nothing-here")
    assert "nothing-here" in str(info.value)


# -- comparison ------------------------------------------------------------------------


def test_compare_identical():
    cmp = compare(_recorded().to_run(), _recorded().to_run(), Policy())
    assert cmp.outcome == IDENTICAL
    assert [m.verdict for m in cmp.metrics] == [IDENTICAL]
    assert [t.verdict for t in cmp.tensors] == [IDENTICAL]


def test_compare_within_tolerance_and_exact():
    golden = _recorded().to_run()
    new = _recorded(loss=(1.0, 0.5 * (1 + 1e-9), 0.25, 0.125)).to_run()
    cmp = compare(golden, new, Policy())
    assert cmp.outcome == CLOSE
    m = cmp.metrics[0]
    assert m.verdict == CLOSE and m.first_step == 1 and m.steps_off == 0
    assert m.rel_diff == pytest.approx(1e-9, rel=1e-3)
    exact = compare(golden, new, Policy(exact=True))
    assert exact.outcome == CHANGED
    assert exact.metrics[0].first_step == 1 and exact.metrics[0].steps_off == 1


def test_compare_changed_reports_first_step_outside_tolerance():
    golden = _recorded().to_run()
    # step 1 slightly off (within), steps 2 and 3 far off
    new = _recorded(loss=(1.0, 0.5 + 1e-12, 0.3, 0.2)).to_run()
    cmp = compare(golden, new, Policy(default=Tolerance(rtol=1e-3, atol=0.0)))
    m = cmp.metrics[0]
    assert cmp.outcome == CHANGED
    assert (m.verdict, m.first_step, m.steps_off, m.steps_compared) == (CHANGED, 2, 2, 4)
    assert (m.golden, m.new) == (0.25, 0.3)
    assert m.allowed == pytest.approx(0.25e-3)


def test_per_metric_tolerance_overrides_default():
    t1, t2 = Trajectory(), Trajectory()
    t1.log(0, loss=1.0, acc=0.5)
    t2.log(0, loss=1.001, acc=0.5005)
    policy = Policy(default=Tolerance(rtol=1e-5, atol=0.0), metrics={"loss": Tolerance(rtol=1e-2, atol=0.0)})
    cmp = compare(t1.to_run(), t2.to_run(), policy)
    verdicts = {m.name: m.verdict for m in cmp.metrics}
    assert verdicts == {"loss": CLOSE, "acc": CHANGED}


def test_compare_tensor_changed_and_within():
    golden = _recorded().to_run()
    close = _recorded(weight=(1.0, 2.0 * (1 + 1e-9), 3.0)).to_run()
    far = _recorded(weight=(1.0, 2.5, 3.0)).to_run()
    assert compare(golden, close, Policy()).tensors[0].verdict == CLOSE
    diff = compare(golden, far, Policy()).tensors[0]
    assert diff.verdict == CHANGED and diff.elements_off == 1 and diff.basis == "values"
    assert diff.max_abs == pytest.approx(0.5)


def test_compare_large_tensors_use_statistics():
    def rec(scale):
        t = Trajectory(max_values=2)
        t.state(weight=torch.arange(10, dtype=torch.float64) * scale)
        return t.to_run()

    diff = compare(rec(1.0), rec(1.5), Policy()).tensors[0]
    assert diff.verdict == CHANGED and diff.basis == "statistics+sketch"


def test_missing_and_added_steps_are_changes():
    golden = _recorded(steps=(0, 1, 2, 3)).to_run()
    new = _recorded(steps=(0, 1, 3, 4), loss=(1.0, 0.5, 0.125, 0.1)).to_run()
    m = compare(golden, new, Policy()).metrics[0]
    assert m.verdict == CHANGED
    assert m.missing_steps == [2] and m.added_steps == [4]
    assert m.steps_off == 0  # the common steps themselves agree


def test_missing_metric_and_tensor_are_changes():
    golden = _recorded().to_run()
    t = Trajectory()
    t.log(0, acc=1.0)
    t.state(bias=torch.zeros(1))
    cmp = compare(golden, t.to_run(), Policy())
    notes = {m.name: (m.verdict, m.note) for m in cmp.metrics}
    assert notes == {"acc": (CHANGED, "not in the golden"), "loss": (CHANGED, "not logged by the new run")}
    reasons = {d.name: d.reasons for d in cmp.tensors}
    assert reasons == {"bias": ["not in the golden"], "weight": ["not recorded by the new run"]}


def test_nan_divergence_and_same_nan():
    golden = _recorded(loss=(1.0, 0.5, 0.25, 0.125)).to_run()
    diverged = _recorded(loss=(1.0, 0.5, float("nan"), float("nan"))).to_run()
    m = compare(golden, diverged, Policy(default=Tolerance(rtol=1e6, atol=1e6))).metrics[0]
    assert m.verdict == CHANGED and m.note == "diverged to NaN at step 2"
    both = _recorded(loss=(1.0, float("nan"), float("nan"), 0.1)).to_run()
    assert compare(both, _recorded(loss=(1.0, float("nan"), float("nan"), 0.1)).to_run(), Policy()).outcome == IDENTICAL


# -- corrupt goldens -------------------------------------------------------------------


@pytest.fixture
def golden_folder(tmp_path) -> Path:
    folder = tmp_path / "depot" / "test_delay"
    run = _recorded().to_run()
    run.meta = {"seed": 1}
    write_run(folder, run)
    return folder


def _rewrite_metrics(folder: Path, table: pa.Table) -> None:
    original = pq.read_table(folder / "metrics.parquet")
    metadata = dict(original.schema.metadata)  # keep trainguard's version stamp and run id
    # reseal: recompute the content digest, so the checks behind the digest are reached
    metadata = golden_format.reseal("metrics.parquet", table, metadata)
    pq.write_table(table.replace_schema_metadata(metadata), folder / "metrics.parquet")


def _assert_corrupt(folder: Path, filename: str, phrase: str) -> None:
    with pytest.raises(GoldenCorruptError) as info:
        read_run(folder)
    message = str(info.value)
    assert str(folder / filename) in message
    assert info.value.path == str(folder / filename)
    assert phrase in message


def test_truncated_golden(golden_folder):
    path = golden_folder / "metrics.parquet"
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
    _assert_corrupt(golden_folder, "metrics.parquet", "is not a readable Parquet file")


def test_not_parquet_golden(golden_folder):
    (golden_folder / "state.parquet").write_text("loaves,rye\n12,4\n")
    _assert_corrupt(golden_folder, "state.parquet", "is not a readable Parquet file")


def test_empty_golden_file(golden_folder):
    (golden_folder / "state.parquet").write_bytes(b"")
    _assert_corrupt(golden_folder, "state.parquet", "is not a readable Parquet file")


def test_wrong_column_type(golden_folder):
    table = pa.table({"metric": ["loss"], "step": pa.array([0.0], pa.float64()), "value": [1.0]})
    _rewrite_metrics(golden_folder, table)
    _assert_corrupt(golden_folder, "metrics.parquet", "column 'step' has type double, expected int64")


def test_missing_column(golden_folder):
    table = pa.table({"metric": ["loss"], "step": pa.array([0], pa.int64())})
    _rewrite_metrics(golden_folder, table)
    _assert_corrupt(golden_folder, "metrics.parquet", "has no column 'value'")


def test_foreign_parquet_without_version(golden_folder):
    pq.write_table(pa.table({"metric": ["loss"], "step": [0], "value": [1.0]}), golden_folder / "metrics.parquet")
    _assert_corrupt(golden_folder, "metrics.parquet", "has no trainguard format version")


def test_one_of_two_files_missing(golden_folder):
    (golden_folder / "state.parquet").unlink()
    _assert_corrupt(golden_folder, "state.parquet", "is missing")


def test_decreasing_steps_in_golden(golden_folder):
    table = pa.table({"metric": ["loss", "loss"], "step": pa.array([3, 1], pa.int64()), "value": [1.0, 2.0]})
    _rewrite_metrics(golden_folder, table)
    _assert_corrupt(golden_folder, "metrics.parquet", "steps that do not strictly increase")


def test_rebless_keeps_calibrated_tolerances(tmp_path):
    from trainguard import bless, read_run

    folder = tmp_path / "golden" / "test_kiln"
    first = _recorded().to_run()
    first.meta = {"seed": 1, "calibrated": {"rtol": 2e-4, "atol": 1e-8, "metrics": {}}}
    bless("t::kiln", first, folder, Policy())
    changed = _recorded(loss=(9.0, 8.0, 7.0)).to_run()
    changed.meta = {"seed": 1}
    assert bless("t::kiln", changed, folder, Policy()).outcome == "changed"
    back = read_run(folder)
    assert back.metrics["loss"].values.tolist() == [9.0, 8.0, 7.0]
    assert back.meta["calibrated"]["rtol"] == 2e-4


@pytest.mark.parametrize("value, dtype", [(np.float32(1.5), "float32"), (np.float16(0.25), "float16"),
                                          (np.int32(7), "int32"), (np.bool_(True), "bool"), (1.5, "float64"),
                                          (7, "int64"), (True, "bool")])
def test_scalars_keep_their_dtype(value, dtype):
    # NumPy's own dtype of the scalar (np.asarray(value).dtype) is the reference; Python numbers
    # become NumPy's defaults for them (float64, int64, bool).
    t = Trajectory()
    t.state(oven_temp=value)
    rec = t.to_run().tensors["oven_temp"]
    assert rec.dtype == dtype == str(np.asarray(value).dtype)
    assert rec.sha256 == hashlib.sha256(np.asarray(value).tobytes()).hexdigest()  # FIPS 180-4 via hashlib


def test_a_scalar_dtype_change_is_a_change_even_for_a_representable_value():
    a, b = Trajectory(), Trajectory()
    a.state(oven_temp=np.float32(1.5))
    b.state(oven_temp=np.float64(1.5))  # the same number, exactly representable in both
    cmp = compare(a.to_run(), b.to_run(), Policy())
    assert cmp.outcome == CHANGED and cmp.tensors[0].reasons == ["dtype float32 -> float64"]


def test_a_check_records_a_large_entry_matching_its_golden_by_hashing_alone():
    """With the golden's records known, a large entry whose SHA-256 (checked with hashlib) matches takes
    statistics and sketch from the golden: the marked statistics below prove nothing was summarized."""
    import hashlib
    from dataclasses import replace as dc_replace

    import torch

    from trainguard.core import checksum

    torch.manual_seed(2)
    weights = torch.randn(300, 400)  # 120,000 values: over the default 65,536, so a sketch stands in
    golden = Trajectory()
    golden.state(kiln_fan=weights)
    record = golden.to_run().tensors["kiln_fan"]
    assert record.values is None and record.sha256 == hashlib.sha256(weights.numpy().tobytes()).hexdigest()
    marked = dc_replace(record, min=-123.0)
    again = Trajectory()
    again.known = {"kiln_fan": marked}
    again.state(kiln_fan=weights.clone())
    assert again.to_run().tensors["kiln_fan"].min == -123.0  # same bits: the golden's derived values
    moved = weights.clone()
    moved[7, 9] += 1.0
    third = Trajectory()
    third.known = {"kiln_fan": marked}
    third.state(kiln_fan=moved)
    got = third.to_run().tensors["kiln_fan"]
    st, sketch = checksum.summarize(moved, checksum.STATE_SKETCH)
    assert got.sha256 == hashlib.sha256(moved.numpy().tobytes()).hexdigest() != record.sha256
    assert got.min == st.min == float(moved.min()) and np.array_equal(got.sketch, sketch)


def test_a_small_entry_matching_its_golden_is_hashed_alone_and_gets_its_values_back_from_the_golden():
    """Small entries keep values in a golden; a check that read the golden light has their checksums but
    not their values, so a matching entry is recorded without values and `with_stored_values` fills them
    from the golden read whole before a run is written."""
    from dataclasses import replace

    import torch

    from trainguard.core.guard import with_stored_values

    oven = torch.linspace(0, 1, 12).reshape(3, 4)
    golden = Trajectory()
    golden.state(oven=oven, lid=torch.ones(2))
    full = golden.to_run()
    light = {name: replace(rec, values=None, min=-7.0) for name, rec in full.tensors.items()}  # marked
    check = Trajectory()
    check.known = light
    check.state(oven=oven.clone(), lid=torch.zeros(2))
    run = check.to_run()
    assert run.tensors["oven"].values is None and run.tensors["oven"].min == -7.0  # hashed alone
    assert run.tensors["lid"].values.tolist() == [0.0, 0.0] and run.tensors["lid"].min == 0.0  # recorded
    filled = with_stored_values(run, full)
    assert filled.tensors["oven"].values.tolist() == oven.reshape(-1).double().tolist()
    assert filled.tensors["lid"].values.tolist() == [0.0, 0.0]
