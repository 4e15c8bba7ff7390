"""Verdicts on the shapes of real training code: two networks, bookkeeping keys, outputs, initialisation.

Each scenario is an invented training loop run twice in this process, once as blessed and once
with one planted change, recorded with `Trajectory` and judged with `compare` exactly as the
plugin does. The expected verdict and stage come from a ground truth computed here with plain
torch (hooks of our own, `torch.equal` on the tensors), not from trainguard's output.
"""

from __future__ import annotations

from dataclasses import replace

import pytest
import torch
import torch.nn.functional as F
from golden_samples import watched_fit

from trainguard.core.capture import Trajectory
from trainguard.core.comparison import compare
from trainguard.core.outcome import GuardResult
from trainguard.core.report import describe_comparison
from trainguard.core.report_files import row_for
from trainguard.core.tolerance import Policy
from trainguard.core.verdicts import CHANGED, CLOSE, IDENTICAL

# -- a two-network adversarial loop: a bakery's crust-pattern generator and its critic --------------


class Crust(torch.nn.Module):
    """Noise -> an 8-value crust pattern."""

    def __init__(self) -> None:
        super().__init__()
        self.body = torch.nn.Sequential(torch.nn.Linear(4, 16), torch.nn.Tanh(), torch.nn.Linear(16, 8))

    def forward(self, z):
        return self.body(z)


class Critic(torch.nn.Module):
    """A crust pattern -> how real it looks (a logit)."""

    def __init__(self) -> None:
        super().__init__()
        self.body = torch.nn.Sequential(torch.nn.Linear(8, 16), torch.nn.LeakyReLU(0.2), torch.nn.Linear(16, 1))

    def forward(self, x):
        return self.body(x)


def bakery_gan(plant: str = "", watch: bool = True, steps: int = 4, probe: dict | None = None) -> Trajectory:
    """Run the loop; `probe` (ground truth) collects every critic input and crust output per step with plain hooks."""
    torch.manual_seed(11)
    g, d = Crust(), Critic()
    g_opt = torch.optim.Adam(g.parameters(), lr=2e-3 * (1.1 if plant == "g_lr" else 1.0), betas=(0.5, 0.999))
    d_opt = torch.optim.SGD(d.parameters(), lr=0.05, momentum=0.9)
    traj = Trajectory()
    if watch:
        traj.watch(generator=(g, g_opt), critic=(d, d_opt))
    handles = []
    if probe is not None:
        handles.append(d.register_forward_pre_hook(lambda m, a: probe.setdefault("critic_in", []).append(a[0].detach().clone())))
        handles.append(g.register_forward_hook(lambda m, a, o: probe.setdefault("crust_out", []).append(o.detach().clone())))
    real_source = torch.Generator().manual_seed(3)
    for step in range(steps):
        real = torch.randn(6, 8, generator=real_source) * 0.5 + 1.0
        z = torch.randn(6, 4)
        d_opt.zero_grad()
        loss_real = F.binary_cross_entropy_with_logits(d(real), torch.ones(6, 1))
        loss_real.backward()
        fake = g(z)
        shown = fake.detach()
        if plant == "fake_scale" and step >= 2:
            shown = shown * 0.9  # the planted bug: the critic sees a rescaled fake batch
        loss_fake = F.binary_cross_entropy_with_logits(d(shown), torch.zeros(6, 1))
        loss_fake.backward()
        d_opt.step()
        g_opt.zero_grad()
        loss_g = F.binary_cross_entropy_with_logits(d(fake), torch.ones(6, 1))
        loss_g.backward()
        g_opt.step()
        traj.log(step, loss_d=loss_real + loss_fake, loss_g=loss_g)
    traj.close()
    for h in handles:
        h.remove()
    traj.state(generator=g, critic=d, g_opt=g_opt, d_opt=d_opt)
    return traj


def test_adding_or_removing_watch_leaves_the_golden_identical():
    """Item 1: state names depend only on what `state` is given, never on `watch`."""
    watched, plain = bakery_gan(watch=True).to_run(), bakery_gan(watch=False).to_run()
    assert list(watched.tensors) == list(plain.tensors)
    assert [t.sha256 for t in watched.tensors.values()] == [t.sha256 for t in plain.tensors.values()]
    assert "d_opt.critic.body.0.weight.momentum_buffer" in watched.tensors  # the keyword prefixes of `state`
    assert "g_opt.generator.body.0.weight.exp_avg" in watched.tensors
    # golden without watch, new run with it (and the reverse): identical, nothing missing or added
    assert compare(plain, replace(watched, trace=None), Policy(exact=True)).outcome == IDENTICAL
    cmp = compare(plain, watched, Policy())
    assert cmp.outcome == IDENTICAL and not cmp.structure
    assert cmp.trace_note.startswith("trace: not compared, the golden has none")


def test_a_rescaled_fake_batch_is_attributed_to_the_critics_second_call():
    """Item 2: every call of every watched module is its own event, in call order."""
    truth_g: dict = {}
    truth_p: dict = {}
    golden = bakery_gan(probe=truth_g).to_run()
    new = bakery_gan("fake_scale", probe=truth_p).to_run()
    # Ground truth from plain hooks: the critic runs 3 times a step (real, fake, generator's turn);
    # the first input that differs is the critic's 2nd call of step 2, and every crust output and
    # critic input before it is bit-identical.
    first = next(i for i, (a, b) in enumerate(zip(truth_g["critic_in"], truth_p["critic_in"])) if not torch.equal(a, b))
    assert divmod(first, 3) == (2, 1)
    assert all(torch.equal(a, b) for a, b in zip(truth_g["crust_out"][:3], truth_p["crust_out"][:3]))
    cmp = compare(golden, new, Policy())
    assert cmp.outcome == CHANGED
    fc = cmp.trace.first_change
    assert (fc.step, fc.stage, fc.names) == (2, "data", ["critic.input.0@1"])
    assert cmp.trace.summary() == ("first divergence: step 2, stage data (critic.input.0@1); "
                                   "the step's earlier events (data, forward, backward) identical")


def test_a_generator_change_is_not_blamed_on_the_critic():
    """Item 2: two optimizers; the critic's update of step 0 comes first and is identical."""
    golden, new = bakery_gan().to_run(), bakery_gan("g_lr").to_run()
    fc = compare(golden, new, Policy()).trace.first_change
    assert (fc.step, fc.stage) == (0, "update")
    assert fc.names and all(n.startswith(("generator.", "state generator.")) for n in fc.names)
    # ground truth: after step 0 of both runs, the critic's weights are equal, the generator's are not
    before = [e for e in golden.trace if e.step == 0 and e.stage == "update"]
    assert {e.name.split(".")[0] for e in before} == {"critic", "state critic", "generator", "state generator"}


def test_three_backwards_in_a_step_are_three_events():
    """Item 2: each gradient belongs to the backward that produced it."""
    run = bakery_gan(steps=1).to_run()
    backward = [(e.call, e.name) for e in run.trace if e.stage == "backward"]
    events = sorted({c for c, _ in backward})
    assert len(events) == 3
    assert {n for c, n in backward if c == events[0]} == {f"grad critic.body.{i}.{p}" for i in (0, 2)
                                                         for p in ("weight", "bias")}
    # the generator's gradients appear only after the third backward (loss_g), the only one reaching it
    assert not any(n.startswith("grad generator") for c, n in backward if c in events[:2])
    assert any(n.startswith("grad generator") for c, n in backward if c == events[2])


# -- initialisation: a kiln controller with a custom init --------------------------------------------


def kiln(plant: str = "") -> Trajectory:
    torch.manual_seed(5)
    model = torch.nn.Sequential(torch.nn.Linear(3, 6), torch.nn.ReLU(), torch.nn.Linear(6, 1))
    if plant != "no_init":
        torch.nn.init.orthogonal_(model[0].weight, gain=0.5)  # the custom initialisation
        torch.nn.init.zeros_(model[0].bias)
    temps = torch.linspace(-1, 1, 30).reshape(10, 3)
    return watched_fit(model, torch.optim.SGD(model.parameters(), lr=0.05), lambda: (model(temps) - 0.3).pow(2).mean())


def test_a_dropped_custom_initialisation_is_reported_as_init():
    """Item 3: the weights at `watch` time are stage init, before step 0's data."""
    golden, new = kiln().to_run(), kiln("no_init").to_run()
    fc = compare(golden, new, Policy()).trace.first_change
    assert (fc.step, fc.stage) == (0, "init")
    assert fc.names == ["0.weight", "0.bias"]  # ground truth: the only tensors the custom init touched
    assert compare(golden, new, Policy()).trace.summary().startswith("first divergence: step 0, stage init (0.weight, 0.bias)")


# -- structure: bookkeeping keys, removed outputs, removed buffers ----------------------------------


class NotingSGD(torch.optim.SGD):
    """An optimizer library's SGD that notes the lr it started with in each param group (read by nothing)."""

    def __init__(self, params, **kwargs):
        super().__init__(params, **kwargs)
        for group in self.param_groups:
            group["lr_at_start"] = group["lr"]


def greenhouse(opt_class=torch.optim.SGD, outputs: str = "all", norm: bool = True) -> Trajectory:
    """A greenhouse climate model returning a dict of outputs (humidity, and a cached hidden state)."""

    class Climate(torch.nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.enc = torch.nn.Linear(4, 5)
            self.norm = torch.nn.BatchNorm1d(5) if norm else torch.nn.Identity()
            self.head = torch.nn.Linear(5, 1)

        def forward(self, x):
            h = self.norm(self.enc(x)).relu()
            out = {"humidity": self.head(h)}
            if outputs == "all":
                out["cache"] = (h, h.sum(1))  # what a newer library release stopped returning
            return out

    torch.manual_seed(2)
    model = Climate()
    x = torch.linspace(0, 1, 32).reshape(8, 4)
    return watched_fit(model, opt_class(model.parameters(), lr=0.1, momentum=0.5),
                       lambda: model(x)["humidity"].pow(2).mean())


def _row(golden, new, policy: Policy | None = None) -> tuple[object, dict]:
    cmp = compare(golden, new, policy or Policy())
    result = GuardResult("test_greenhouse.py::test_climate", "golden/x", cmp.outcome, comparison=cmp)
    return cmp, row_for(result)


def test_a_bookkeeping_param_group_key_is_a_note_under_a_tolerance_and_a_change_when_exact():
    """Item 4: a key no update reads, with every number identical."""
    golden, new = greenhouse().to_run(), greenhouse(NotingSGD).to_run()
    cmp, row = _row(golden, new)
    assert cmp.outcome == CLOSE and cmp.numbers == IDENTICAL  # passes
    assert [(c.what, c.change, c.name) for c in cmp.structure] == [
        ("param-group key", "added", "param_groups.0.lr_at_start")]
    assert row["divergence"].startswith("note: 1 param-group key added: param_groups.0.lr_at_start")
    text = describe_comparison(cmp)
    assert "structure (names on one side only" in text and "a note: optimizer bookkeeping" in text
    exact, row = _row(golden, new, Policy(exact=True))
    assert exact.outcome == CHANGED and row["divergence"].startswith("1 param-group key added")


def test_removed_outputs_are_removed_not_diverged():
    """Item 4: a model that stops returning outputs; every number otherwise identical."""
    golden, new = greenhouse().to_run(), greenhouse(outputs="humidity only").to_run()
    cmp, row = _row(golden, new)
    assert cmp.outcome == IDENTICAL and cmp.trace.first_bitwise is None
    assert [n for _, _, n in cmp.trace.removed] == ["output.cache.0", "output.cache.1"]
    assert "first divergence" not in row["divergence"]
    assert "2 trace entries removed (first at step 0, stage forward): output.cache.0, output.cache.1" in row["divergence"]
    text = describe_comparison(cmp)  # under the structure heading, by name
    assert "structure (names on one side only" in text
    assert "trace entry removed: output.cache.0 (from step 0, stage forward)" in text


def test_a_removed_buffer_is_a_structure_change_named_in_the_row():
    """Item 4: BatchNorm taken out: its parameters and buffers are removed, not diverged."""
    golden, new = greenhouse().to_run(), greenhouse(norm=False).to_run()
    cmp, row = _row(golden, new)
    assert cmp.outcome == CHANGED
    removed = {c.name: c.kind for c in cmp.structure if c.change == "removed"}
    assert removed["norm.running_mean"] == "buffer" and removed["norm.weight"] == "parameter"
    assert row["divergence"].startswith("7 state entries removed: norm.bias, norm.bias.momentum_buffer")
    text = describe_comparison(cmp)
    assert "state entry (buffer) removed: norm.running_mean" in text
    assert "not recorded by the new run" not in text  # not in the table of values


def test_a_renamed_entry_with_the_same_bits_is_reported_as_renamed():
    golden = greenhouse().to_run()
    moved = dict(golden.tensors)
    moved["head.w"] = replace(moved.pop("head.weight"), name="head.w")
    cmp, row = _row(golden, replace(golden, tensors=moved))
    assert cmp.outcome == CHANGED and cmp.numbers == IDENTICAL
    assert [c.describe() for c in cmp.structure] == ["state entry (parameter) renamed: head.weight -> head.w (same bits)"]
    assert row["divergence"] == "1 state entry renamed: head.weight -> head.w; numbers identical"


@pytest.mark.parametrize("plant", ["", "g_lr"])
def test_traces_with_two_networks_round_trip_through_a_golden(tmp_path, plant):
    from trainguard.core import store as golden

    run = bakery_gan(plant).to_run()
    golden.write_run(tmp_path / "g", run)
    back = golden.read_run(tmp_path / "g")
    assert [(e.step, e.call, e.stage, e.name, e.sha256) for e in back.trace] == \
        [(e.step, e.call, e.stage, e.name, e.sha256) for e in run.trace]


# -- a model above the stored-values limit: a tram depot's timetable network -----------------------


def tram_depot(plant: str = "") -> tuple[Trajectory, torch.nn.Module]:
    """Linear(320, 256) holds 81,920 weights, more than trainguard_max_values (65,536): only a sketch is kept."""
    torch.manual_seed(8)
    model = torch.nn.Sequential(torch.nn.Linear(320, 256), torch.nn.Tanh(), torch.nn.Linear(256, 4))
    opt = torch.optim.Adam(model.parameters(), lr=1e-3)
    traj = Trajectory()
    x = torch.linspace(-1, 1, 16 * 320).reshape(16, 320)
    y = torch.linspace(0, 1, 64).reshape(16, 4)
    for step in range(3):
        opt.zero_grad()
        loss = F.mse_loss(model(x), y)
        loss.backward()
        opt.step()
        traj.log(step, loss=loss)
    if plant == "patched":  # the planted bug: a checkpoint patch that rewrote three weights
        with torch.no_grad():
            flat = model[0].weight.view(-1)
            flat[[7, 40_000, 81_000]] += torch.tensor([3e-5, -4e-5, 5e-5])
    traj.state(model, optimizer=opt)
    return traj, model


def test_a_few_weights_patched_in_a_large_layer_are_a_change():
    (golden, gm), (new, nm) = tram_depot(), tram_depot("patched")
    g, n = golden.to_run(), new.to_run()
    assert g.tensors["0.weight"].values is None  # over the limit: sketch only
    cmp = compare(g, n, Policy())
    # ground truth: the elementwise rule on the two layers, with NumPy
    import numpy as np

    from trainguard.core.tolerance import Tolerance, within

    a, b = gm[0].weight.detach().double().numpy().ravel(), nm[0].weight.detach().double().numpy().ravel()
    truly_off = int((~within(a, b, Tolerance())).sum())
    assert truly_off == 3
    d = next(t for t in cmp.tensors if t.name == "0.weight")
    assert cmp.outcome == d.verdict == CHANGED
    assert d.estimate.largest == pytest.approx(float(np.abs(a - b).max()), abs=d.estimate.bound + 1e-12)
    assert "(est.)" in describe_comparison(cmp)
    unchanged = compare(g, tram_depot()[0].to_run(), Policy())
    assert unchanged.outcome == IDENTICAL


# -- a model returning a tuple and a dict: both kinds of outputs are traced by name -----------------


def test_tuple_and_dict_outputs_are_traced_by_name_and_an_output_change_is_forward():
    def run(scale: float):
        torch.manual_seed(4)

        class Oven(torch.nn.Module):
            def __init__(self) -> None:
                super().__init__()
                self.fc = torch.nn.Linear(3, 2)

            def forward(self, x):
                h = self.fc(x)
                return h, {"crust": h.sum(1) * scale, "crumb": h.mean(1)}

        model = Oven()
        opt = torch.optim.SGD(model.parameters(), lr=0.1)
        traj = Trajectory()
        traj.watch(model, opt)
        opt.zero_grad()
        h, parts = model(torch.ones(4, 3))
        (h.pow(2).mean() + parts["crumb"].mean()).backward()
        opt.step()
        traj.close()
        traj.state(model, optimizer=opt)
        return traj.to_run()

    golden, new = run(1.0), run(2.0)  # the "crust" output doubled; nothing reads it in training
    names = {e.name for e in golden.trace if e.stage == "forward"}
    assert {"output.0", "output.1.crust", "output.1.crumb", "loss"} <= names
    cmp = compare(golden, new, Policy())
    assert cmp.outcome == IDENTICAL  # the weights and loss do not depend on "crust"
    fc = cmp.trace.first_change
    assert (fc.step, fc.stage, fc.names) == (0, "forward", ["output.1.crust"])


def test_watch_usage_errors_name_the_keyword_and_the_fix():
    from trainguard.core.errors import UsageError

    g, d = Crust(), Critic()
    opt = torch.optim.SGD(g.parameters(), lr=0.1)
    traj = Trajectory()
    with pytest.raises(UsageError, match=r"trajectory.watch\(critic=...\): give a module or a \(module, optimizer\) pair"):
        traj.watch(generator=(g, opt), critic="d")
    with pytest.raises(UsageError, match=r"trajectory.watch\(critic=...\): optimizer must be a torch.optim.Optimizer"):
        traj.watch(critic=(d, "sgd"))
    with pytest.raises(UsageError, match="no optimizer given; a training step ends when the watched optimizers"):
        traj.watch(critic=d)
    with pytest.raises(UsageError, match="not both"):
        traj.watch(g, opt, critic=d)
    with pytest.raises(UsageError, match="nothing to watch"):
        traj.watch()
    traj.watch(generator=(g, opt), critic=d)  # a module alone beside a pair is fine
    traj.close()
