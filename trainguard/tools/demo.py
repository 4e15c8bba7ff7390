"""`trainguard demo`: the whole loop on an invented example, in a scratch folder.

A made-up bakery on Larkspur Lane trains a small network that predicts how long a dough
must proof. Its guarded suite trains it with six optimizers. The demo blesses the suite,
checks it again (everything identical), then applies an "upgrade" that changes behaviour
(SGD momentum 0.9 -> 0.91, Adam's L2 weight decay swapped for AdamW's decoupled decay)
and shows the reports. It exits 0 when exactly the affected tests fail.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import tempfile
import textwrap
from pathlib import Path

from . import pytest_runs

BAKERY_MODEL = '''\
"""The Larkspur Lane bakery (invented): predict a dough's proofing time.

Features, all scaled to [0, 1]: dough temperature, room humidity, hydration, yeast share.
The "true" proofing time is an invented formula plus seeded noise; nothing is downloaded.
"""
import torch


def proofing_data(n=256, seed=2024):
    g = torch.Generator().manual_seed(seed)
    x = torch.rand(n, 4, generator=g)
    minutes = (95 - 40 * x[:, 0] + 12 * x[:, 1] - 8 * x[:, 2] - 30 * x[:, 3]
               + 6 * x[:, 0] * x[:, 3] + 3 * torch.randn(n, generator=g))
    return x, ((minutes - 60) / 20).unsqueeze(1)


def build_model():
    return torch.nn.Sequential(torch.nn.Linear(4, 16), torch.nn.Tanh(), torch.nn.Linear(16, 1))


def batch(x, y, step, size=32):
    # A fresh shuffle every epoch, from a generator seeded by the epoch number.
    per_epoch = x.shape[0] // size
    epoch, k = divmod(step, per_epoch)
    order = torch.randperm(x.shape[0], generator=torch.Generator().manual_seed(epoch))
    idx = order[k * size:(k + 1) * size]
    return x[idx], y[idx]


def train(model, opt, trajectory, steps=40):
    x, y = proofing_data()
    trajectory.watch(model, opt)  # per-step trace: the report names the first step and stage that differ
    for step in range(steps):
        xb, yb = batch(x, y, step)
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(model(xb), yb)
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss, lr=opt.param_groups[0]["lr"])
    trajectory.state(model, optimizer=opt)
'''

RECIPE = '''\
"""Training settings of the bakery's model: the knobs an upgrade might turn."""
MOMENTUM = {momentum}
WEIGHT_DECAY = 0.01
DECAY_STYLE = "{decay}"  # "l2": Adam adds decay to the gradient; "decoupled": AdamW
'''

TEST_BAKERY = '''\
import pytest
import torch

import recipe
from bakery_model import build_model, proofing_data, train


@pytest.mark.trainguard(seed=11)
def test_proofing_sgd(trajectory):
    model = build_model()
    train(model, torch.optim.SGD(model.parameters(), lr=0.1), trajectory)


@pytest.mark.trainguard(seed=11)
def test_proofing_sgd_momentum(trajectory):
    model = build_model()
    train(model, torch.optim.SGD(model.parameters(), lr=0.05, momentum=recipe.MOMENTUM), trajectory)


@pytest.mark.trainguard(seed=11)
def test_proofing_nesterov(trajectory):
    model = build_model()
    train(model, torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.8, nesterov=True), trajectory)


@pytest.mark.trainguard(seed=11)
def test_proofing_adam(trajectory):
    model = build_model()
    train(model, torch.optim.Adam(model.parameters(), lr=0.01), trajectory)


@pytest.mark.trainguard(seed=11)
def test_proofing_adam_weight_decay(trajectory):
    model = build_model()
    if recipe.DECAY_STYLE == "l2":
        opt = torch.optim.Adam(model.parameters(), lr=0.01, weight_decay=recipe.WEIGHT_DECAY)
    else:
        opt = torch.optim.AdamW(model.parameters(), lr=0.01, weight_decay=recipe.WEIGHT_DECAY)
    train(model, opt, trajectory)


@pytest.mark.trainguard(seed=11)
def test_proofing_lbfgs(trajectory):
    model = build_model()
    x, y = proofing_data()
    opt = torch.optim.LBFGS(model.parameters(), lr=0.5, max_iter=5, history_size=4)

    def closure():
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(model(x), y)
        loss.backward()
        return loss

    for step in range(8):
        loss = opt.step(closure)
        trajectory.log(step, loss=loss)
    trajectory.state(model, optimizer=opt)
'''

PYTEST_INI = """\
[pytest]
trainguard_golden_dir = golden
"""

EXPECTED_FAILURES = ("test_proofing_sgd_momentum", "test_proofing_adam_weight_decay")
ALL_TESTS = ("test_proofing_sgd", "test_proofing_sgd_momentum", "test_proofing_nesterov", "test_proofing_adam",
             "test_proofing_adam_weight_decay", "test_proofing_lbfgs")


def _write_suite(folder: Path, momentum: float, decay: str) -> None:
    (folder / "bakery_model.py").write_text(BAKERY_MODEL)
    (folder / "recipe.py").write_text(RECIPE.format(momentum=momentum, decay=decay))
    (folder / "test_bakery.py").write_text(TEST_BAKERY)
    (folder / "pytest.ini").write_text(PYTEST_INI)


def _pytest(folder: Path, *args: str) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ)
    # Load exactly this trainguard (also when run from a source checkout) and no other plugins.
    env["PYTEST_DISABLE_PLUGIN_AUTOLOAD"] = "1"
    package_parent = str(Path(__file__).resolve().parents[2])
    env["PYTHONPATH"] = os.pathsep.join([package_parent] + [p for p in [env.get("PYTHONPATH")] if p])
    env.pop("CI", None)
    cmd = pytest_runs.pytest_argv("-o", "console_output_style=classic", *args, plugin="trainguard.skins.plugin")
    return pytest_runs.run(cmd, folder, env)


def _say(text: str = "") -> None:
    print(text, flush=True)


def _indent(text: str) -> str:
    return textwrap.indent(text.rstrip(), "    ")


def run_demo(keep: str | None = None) -> int:
    if keep:
        folder = Path(keep).resolve()
        if folder.exists() and any(folder.iterdir()):
            _say(f"trainguard demo: {folder} is not empty; give an empty or new folder to --keep")
            return 2
        folder.mkdir(parents=True, exist_ok=True)
        return _run(folder)
    folder = Path(tempfile.mkdtemp(prefix="trainguard-demo-"))
    try:
        return _run(folder)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def _run(folder: Path) -> int:
    _say("trainguard demo: the (invented) Larkspur Lane bakery predicts proofing times with a small")
    _say("network, trained in six guarded tests: SGD, SGD+momentum, Nesterov, Adam, Adam with weight decay, L-BFGS.")
    _say(f"working folder: {folder}")
    _write_suite(folder, momentum=0.9, decay="l2")

    _say("\n[1/3] bless the goldens:  pytest --trainguard-bless --trainguard-reason 'first goldens'")
    first = _pytest(folder, "--trainguard-bless", "--trainguard-reason", "first goldens")
    _say(_indent(pytest_runs.from_section(first.stdout, "trainguard")))
    if first.returncode != 0:
        _say("demo failed: the bless run did not pass:\n" + _indent(first.stdout + first.stderr))
        return 1

    _say("\n[2/3] check against them:  pytest")
    second = _pytest(folder)
    _say(_indent(pytest_runs.from_section(second.stdout, "trainguard")))
    if second.returncode != 0:
        _say("demo failed: the unchanged suite did not match its goldens:\n" + _indent(second.stdout))
        return 1

    _say("\n[3/3] an 'upgrade' lands: recipe.MOMENTUM 0.9 -> 0.91, and Adam's L2 weight decay becomes AdamW's")
    _say("      decoupled weight decay. Four tests are untouched; two must fail with a report:  pytest")
    _write_suite(folder, momentum=0.91, decay="decoupled")
    third = _pytest(folder)
    _say(_indent(pytest_runs.from_section(third.stdout, "FAILURES")))
    failed = pytest_runs.failed_tests(third.stdout)
    if third.returncode == 1 and failed == set(EXPECTED_FAILURES):
        _say("\ndemo finished as expected: the two behaviour changes were caught, the four unaffected tests passed.")
        _say("If such a change were intended, you would re-bless with the command each report ends with.")
        return 0
    _say(f"\ndemo did NOT behave as expected: failed tests {sorted(failed)}, expected {sorted(EXPECTED_FAILURES)}")
    _say(_indent(third.stdout + third.stderr))
    return 1
