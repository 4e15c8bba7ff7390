"""The project's own guarded suite: real torch optimizers on small seeded problems.

Invented scenario: the (made-up) Lindenhof tram depot wants to predict the energy its
trams draw on a run from synthetic features (load factor, outside temperature, number of
stops, gradient of the line, auxiliary heating). All data are generated here from a fixed
seed; nothing is downloaded. Goldens live in guarded/golden/, blessed in portable mode (guarded/pytest.ini).

Besides being guarded, each test asserts that training actually improved the loss, so
a broken optimizer setup cannot be blessed silently.
"""

from __future__ import annotations

import pytest
import torch

N_RUNS, N_FEATURES, STEPS = 96, 5, 25


def depot_data() -> tuple[torch.Tensor, torch.Tensor]:
    """Synthetic tram runs: features and energy use (kWh, centred and scaled; invented)."""
    features = torch.randn(N_RUNS, N_FEATURES)
    true_weights = torch.tensor([1.8, -0.6, 0.9, 1.2, 0.4])  # invented relationship
    energy = features @ true_weights + 0.3 * torch.tanh(features[:, 0] * features[:, 2])
    energy = energy + 0.05 * torch.randn(N_RUNS)
    return features, energy.unsqueeze(1)


def depot_model() -> torch.nn.Module:
    return torch.nn.Sequential(torch.nn.Linear(N_FEATURES, 8), torch.nn.Tanh(), torch.nn.Linear(8, 1))


def train(trajectory, make_optimizer) -> tuple[float, float]:
    features, energy = depot_data()
    model = depot_model()
    opt = make_optimizer(model.parameters())
    losses = []
    for step in range(STEPS):
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(model(features), energy)
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss)
        losses.append(loss.item())
    trajectory.state(model, optimizer=opt)
    return losses[0], losses[-1]


@pytest.mark.trainguard(seed=101)
def test_depot_sgd(trajectory):
    first, last = train(trajectory, lambda p: torch.optim.SGD(p, lr=0.05))
    assert last < first


@pytest.mark.trainguard(seed=102)
def test_depot_sgd_momentum(trajectory):
    first, last = train(trajectory, lambda p: torch.optim.SGD(p, lr=0.05, momentum=0.9))
    assert last < 0.5 * first


@pytest.mark.trainguard(seed=103)
def test_depot_sgd_nesterov(trajectory):
    first, last = train(trajectory, lambda p: torch.optim.SGD(p, lr=0.05, momentum=0.9, nesterov=True))
    assert last < 0.5 * first


@pytest.mark.trainguard(seed=104)
def test_depot_adam(trajectory):
    first, last = train(trajectory, lambda p: torch.optim.Adam(p, lr=0.03))
    assert last < 0.5 * first


@pytest.mark.trainguard(seed=105)
def test_depot_adamw(trajectory):
    first, last = train(trajectory, lambda p: torch.optim.AdamW(p, lr=0.03, weight_decay=0.05))
    assert last < 0.5 * first


@pytest.mark.trainguard(seed=106)
def test_depot_rmsprop(trajectory):
    first, last = train(trajectory, lambda p: torch.optim.RMSprop(p, lr=0.01, momentum=0.5))
    assert last < 0.5 * first


class RosenbrockPoint(torch.nn.Module):
    def __init__(self) -> None:
        super().__init__()
        # Start (-1.2, 1): the customary starting point for Rosenbrock's function
        # (recalled from memory; common practice in optimisation texts).
        self.xy = torch.nn.Parameter(torch.tensor([-1.2, 1.0], dtype=torch.float64))


def rosenbrock(xy: torch.Tensor) -> torch.Tensor:
    # Rosenbrock (1960): f(x, y) = (1 - x)^2 + 100 (y - x^2)^2, minimum 0 at (1, 1).
    x, y = xy[0], xy[1]
    return (1 - x) ** 2 + 100 * (y - x**2) ** 2


@pytest.mark.trainguard(seed=107)
def test_lbfgs_rosenbrock(trajectory):
    point = RosenbrockPoint()
    opt = torch.optim.LBFGS(point.parameters(), lr=1, max_iter=20, history_size=10, line_search_fn="strong_wolfe")

    def closure():
        opt.zero_grad()
        value = rosenbrock(point.xy)
        value.backward()
        return value

    for step in range(8):
        opt.step(closure)
        trajectory.log(step, loss=rosenbrock(point.xy))
    trajectory.state(point, optimizer=opt)
    # Rosenbrock (1960): the minimum is 0 at (1, 1); L-BFGS should get there.
    final = rosenbrock(point.xy).item()
    assert final < 1e-10
    assert torch.allclose(point.xy.detach(), torch.tensor([1.0, 1.0], dtype=torch.float64), atol=1e-5)
