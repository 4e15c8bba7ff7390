"""End to end through the real plugin: what a guarded run records matches published math.

Each test generates a guarded test file, runs pytest on it in a subprocess with
`--trainguard-bless`, reads the golden back, and compares what was recorded against
closed forms and update rules taken from the literature or PyTorch's documentation,
computed here by hand in NumPy. Several checks share one subprocess (torch import costs
seconds).
"""

from __future__ import annotations

import numpy as np
import pytest

import trainguard

# An invented least-squares problem (six made-up readings of three features), float64.
X = [
    [1.0, 0.5, -1.0],
    [0.3, -1.2, 2.0],
    [-0.7, 0.8, 0.1],
    [1.5, 0.0, 0.4],
    [0.2, 1.1, -0.6],
    [-1.0, -0.4, 0.9],
]
Y = [0.7, -1.1, 0.4, 1.9, -0.2, 0.05]
W0 = [0.3, -0.2, 0.5]
MOMENTUM_LR, MU, MOMENTUM_STEPS = 0.2, 0.9, 6

# Gradient descent on f(x) = sum_i a_i x_i^2 / 2 (one coordinate per curvature a_i).
GD_A = [0.5, 2.0, 15.0, 25.0]  # lr*a = 0.05, 0.2, 1.5 (oscillating), 2.5 (diverging)
GD_X0 = [3.0, -1.0, 0.5, 0.01]
GD_LR, GD_STEPS = 0.1, 20

# Adam's first step: gradient of sum_i c_i * w_i is c; magnitudes from 1e3 down to below eps.
ADAM_C = [1000.0, -3.0, 0.25, -1e-3, 1e-9, 0.0]
ADAM_W0 = [0.5, -0.5, 1.0, 2.0, -1.0, 0.0]
ADAM_LR = 0.01

GENERATED = f'''
import os
import pytest
import torch

X = torch.tensor({X!r}, dtype=torch.float64)
Y = torch.tensor({Y!r}, dtype=torch.float64)


class Vec(torch.nn.Module):
    def __init__(self, values):
        super().__init__()
        self.w = torch.nn.Parameter(torch.tensor(values, dtype=torch.float64))


@pytest.mark.trainguard(seed=1)
def test_gd_quadratic(trajectory):
    a = torch.tensor({GD_A!r}, dtype=torch.float64)
    model = Vec({GD_X0!r})
    opt = torch.optim.SGD(model.parameters(), lr={GD_LR!r})
    for k in range({GD_STEPS} + 1):
        x = model.w.detach()
        trajectory.log(k, **{{f"x{{i}}": x[i] for i in range(len(x))}})
        if k == {GD_STEPS}:
            break
        opt.zero_grad()
        loss = 0.5 * (a * model.w ** 2).sum()
        loss.backward()
        opt.step()
    trajectory.state(model, optimizer=opt)


def _lsq_run(trajectory, nesterov):
    model = Vec({W0!r})
    opt = torch.optim.SGD(model.parameters(), lr={MOMENTUM_LR!r}, momentum={MU!r}, nesterov=nesterov)
    for k in range({MOMENTUM_STEPS}):
        opt.zero_grad()
        loss = 0.5 * ((X @ model.w - Y) ** 2).mean()
        loss.backward()
        opt.step()
        trajectory.log(k, loss=loss)
    trajectory.state(model, optimizer=opt)


@pytest.mark.trainguard(seed=2)
def test_sgd_momentum(trajectory):
    _lsq_run(trajectory, nesterov=False)


@pytest.mark.trainguard(seed=3)
def test_sgd_nesterov(trajectory):
    _lsq_run(trajectory, nesterov=True)


@pytest.mark.trainguard(seed=4)
def test_adam_first_step(trajectory):
    c = torch.tensor({ADAM_C!r}, dtype=torch.float64)
    model = Vec({ADAM_W0!r})
    opt = torch.optim.Adam(model.parameters(), lr={ADAM_LR!r})
    opt.zero_grad()
    loss = (c * model.w).sum()
    loss.backward()
    opt.step()
    trajectory.log(0, loss=loss)
    trajectory.state(model, optimizer=opt)


def _adam_family(trajectory, weight_decay):
    # Blessed with Adam; TG_FAMILY=adamw swaps in AdamW with the same hyperparameters.
    family = os.environ.get("TG_FAMILY", "adam")
    model = Vec({W0!r})
    if family == "adamw":
        opt = torch.optim.AdamW(model.parameters(), lr=0.05, weight_decay=float(weight_decay))
    else:  # Adam's default weight_decay is the int 0; AdamW above gets the float 0.0
        opt = torch.optim.Adam(model.parameters(), lr=0.05, weight_decay=weight_decay)
    for k in range(5):
        opt.zero_grad()
        loss = 0.5 * ((X @ model.w - Y) ** 2).mean()
        loss.backward()
        opt.step()
        trajectory.log(k, loss=loss)
    trajectory.state(model, optimizer=opt)


@pytest.mark.trainguard(seed=5)
def test_adam_family_no_decay(trajectory):
    _adam_family(trajectory, weight_decay=0)


@pytest.mark.trainguard(seed=6)
def test_adam_family_decay(trajectory):
    _adam_family(trajectory, weight_decay=0.1)
'''

TEST_FILE = "test_optim_math.py"


def _golden(pytester: pytest.Pytester, test: str):
    return trainguard.read_run(trainguard.golden_folder(pytester.path / "golden", f"{TEST_FILE}::{test}"))


def _values(run, name: str) -> np.ndarray:
    rec = run.tensors[name]
    assert rec.values is not None, name
    return rec.values


def _lsq_grad(w: np.ndarray) -> np.ndarray:
    # gradient of 0.5 * mean((X w - y)^2) = X^T (X w - y) / n (hand derivation)
    x, y = np.asarray(X), np.asarray(Y)
    return x.T @ (x @ w - y) / len(y)


def _lsq_loss(w: np.ndarray) -> float:
    x, y = np.asarray(X), np.asarray(Y)
    return float(0.5 * np.mean((x @ w - y) ** 2))


def _sgd_momentum_by_hand(nesterov: bool):
    """PyTorch docs, torch.optim.SGD algorithm (dampening 0, no weight decay):
    b_1 = g_1, b_t = mu * b_{t-1} + g_t; Nesterov: g_t <- g_t + mu * b_t, else g_t <- b_t;
    p_t = p_{t-1} - lr * g_t. The Nesterov form follows Sutskever et al. (2013)."""
    w = np.asarray(W0, dtype=np.float64)
    b = None
    losses = []
    for _ in range(MOMENTUM_STEPS):
        losses.append(_lsq_loss(w))  # loss is logged before the step, at the current w
        g = _lsq_grad(w)
        b = g.copy() if b is None else MU * b + g
        direction = g + MU * b if nesterov else b
        w = w - MOMENTUM_LR * direction
    return w, b, np.array(losses)


@pytest.fixture
def generated(pytester: pytest.Pytester, monkeypatch: pytest.MonkeyPatch) -> pytest.Pytester:
    pytester.makeini("[pytest]\n")  # pins rootdir, so goldens go to <pytester.path>/golden
    pytester.makepyfile(**{TEST_FILE[:-3]: GENERATED})
    monkeypatch.setenv("TG_FAMILY", "adam")
    result = pytester.runpytest_subprocess("--trainguard-bless", "--trainguard-reason", "math check", "-q", "-p", "no:cacheprovider")
    result.assert_outcomes(passed=6)
    return pytester


def test_recorded_runs_match_published_update_rules(generated: pytest.Pytester, monkeypatch: pytest.MonkeyPatch):
    pytester = generated

    # 1. Gradient descent on f(x) = a x^2 / 2: x_k = (1 - lr a)^k x_0
    #    (Nocedal & Wright, Numerical Optimization, 2nd ed., steepest descent on a quadratic).
    run = _golden(pytester, "test_gd_quadratic")
    a, x0 = np.asarray(GD_A), np.asarray(GD_X0)
    k = np.arange(GD_STEPS + 1)
    for i in range(len(GD_A)):
        series = run.metrics[f"x{i}"]
        np.testing.assert_array_equal(series.steps, k)
        closed_form = (1 - GD_LR * a[i]) ** k * x0[i]
        # float64 rounding over 20 multiplications: a few ulps; bound is common practice.
        np.testing.assert_allclose(series.values, closed_form, rtol=1e-12, atol=0)
    np.testing.assert_allclose(_values(run, "w"), (1 - GD_LR * a) ** GD_STEPS * x0, rtol=1e-12, atol=0)
    assert abs(run.metrics["x3"].values[-1]) > 1e3 * abs(GD_X0[3])  # |1 - lr*a| = 1.5 > 1 diverges: 1.5**20 ~ 3325
    assert _values(run, "param_groups.0.lr")[0] == GD_LR
    assert _values(run, "param_groups.0.momentum")[0] == 0

    # 2. SGD with momentum / Nesterov momentum vs. the update rule computed by hand.
    for test, nesterov in (("test_sgd_momentum", False), ("test_sgd_nesterov", True)):
        run = _golden(pytester, test)
        w, b, losses = _sgd_momentum_by_hand(nesterov)
        # torch and NumPy sum in different orders: agreement to ~1e-15; bound is common practice.
        np.testing.assert_allclose(_values(run, "w"), w, rtol=1e-11, atol=1e-13, err_msg=test)
        np.testing.assert_allclose(_values(run, "w.momentum_buffer"), b, rtol=1e-11, atol=1e-13, err_msg=test)
        np.testing.assert_allclose(run.metrics["loss"].values, losses, rtol=1e-11, atol=1e-13, err_msg=test)
        assert _values(run, "param_groups.0.momentum")[0] == MU
    # the two variants really differ (else the Nesterov check would prove nothing)
    plain = _values(_golden(pytester, "test_sgd_momentum"), "w")
    nest = _values(_golden(pytester, "test_sgd_nesterov"), "w")
    assert np.max(np.abs(plain - nest)) > 1e-3

    # 3. Adam's first step (Kingma & Ba 2015, Algorithm 1, defaults beta1=0.9, beta2=0.999,
    #    eps=1e-8): m_1 = (1-beta1) g, v_1 = (1-beta2) g^2, bias-corrected m^ = g, v^ = g^2,
    #    so theta_1 = theta_0 - lr * g / (|g| + eps).
    run = _golden(pytester, "test_adam_first_step")
    g = np.asarray(ADAM_C)
    beta1, beta2, eps = 0.9, 0.999, 1e-8
    expected = np.asarray(ADAM_W0) - ADAM_LR * g / (np.abs(g) + eps)
    np.testing.assert_allclose(_values(run, "w"), expected, rtol=1e-12, atol=1e-17)
    np.testing.assert_allclose(_values(run, "w.exp_avg"), (1 - beta1) * g, rtol=1e-12, atol=0)
    np.testing.assert_allclose(_values(run, "w.exp_avg_sq"), (1 - beta2) * g**2, rtol=1e-12, atol=0)
    assert _values(run, "w.step")[0] == 1
    # the step is about lr * sign(g) whenever |g| >> eps, whatever the gradient's scale
    moved = np.asarray(ADAM_W0) - _values(run, "w")
    np.testing.assert_allclose(moved[:4], ADAM_LR * np.sign(g[:4]), rtol=1e-5)
    assert abs(moved[4]) < ADAM_LR * 0.1  # |g| = 1e-9 < eps: the step shrinks (eps dominates)
    assert moved[5] == 0.0  # g = 0: no move
    for key, value in (("lr", ADAM_LR), ("betas.0", beta1), ("betas.1", beta2), ("eps", eps)):
        assert _values(run, f"param_groups.0.{key}")[0] == value, key

    # 4. Adam vs AdamW (Loshchilov & Hutter 2019): identical with weight_decay = 0, different
    #    (L2 in the gradient vs decoupled decay) with weight_decay > 0. Both optimizers record
    #    the same numeric hyperparameter keys at torch 2.13 (lr, betas, eps, weight_decay;
    #    the boolean 'decoupled_weight_decay' flag, which differs, is not recorded).
    #    AdamW gets weight_decay=0.0 (float) where Adam had the int 0: hyperparameters are
    #    recorded as float64, so the same number in another Python type is not a change.
    monkeypatch.setenv("TG_FAMILY", "adamw")
    result = pytester.runpytest_subprocess("-q", "-p", "no:cacheprovider")
    result.assert_outcomes(passed=5, failed=1)
    out = result.stdout.str()
    failed_lines = [line for line in result.stdout.lines if line.startswith("FAILED")]
    assert len(failed_lines) == 1 and "test_adam_family_decay" in failed_lines[0], failed_lines
    assert "changed" in out
    # the five unchanged tests, AdamW(weight_decay=0) among them, match their goldens bit for bit
    assert "5 identical" in out, out
