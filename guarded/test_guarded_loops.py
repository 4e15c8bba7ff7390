"""The project's own guarded suite, part two: the other kinds of loops users guard.

- A small convolutional image classifier with BatchNorm, watched step by step: the invented
  Kornfeld bakery sorts 8x8 crumb photographs (synthetic: striped, dotted or plain) into three
  loaf kinds. BatchNorm's running statistics are buffers that training changes outside the
  optimizer, so this golden guards them too.
- A non-gradient loop in NumPy alone, no torch: simulated annealing (Kirkpatrick, Gelatt &
  Vecchi 1983, "Optimization by Simulated Annealing", Science 220(4598)) plans the invented
  Haselbach greenhouse's hourly heating over a day against an energy price and a comfort band.

Each test also asserts that its loop improved what it optimises, so a broken loop cannot be blessed.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch


def crumb_photos(rng: torch.Generator, n: int = 48) -> tuple[torch.Tensor, torch.Tensor]:
    """Synthetic 8x8 crumb photos of three loaf kinds: horizontal stripes, dots, plain; plus noise."""
    kinds = torch.arange(n) % 3
    rows = torch.arange(8).reshape(8, 1).expand(8, 8)
    cols = torch.arange(8).reshape(1, 8).expand(8, 8)
    patterns = torch.stack([(rows % 2).float(), ((rows % 3 == 0) & (cols % 3 == 0)).float(), torch.zeros(8, 8)])
    photos = patterns[kinds] + 0.3 * torch.randn(n, 8, 8, generator=rng)
    return photos.unsqueeze(1), kinds


def crumb_classifier() -> torch.nn.Module:
    return torch.nn.Sequential(
        torch.nn.Conv2d(1, 4, 3, padding=1), torch.nn.BatchNorm2d(4), torch.nn.ReLU(), torch.nn.MaxPool2d(2),
        torch.nn.Flatten(), torch.nn.Linear(4 * 4 * 4, 3),
    )


@pytest.mark.trainguard(seed=108)
def test_bakery_crumb_cnn(trajectory):
    rng = torch.Generator().manual_seed(8)
    photos, kinds = crumb_photos(rng)
    model = crumb_classifier()
    opt = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
    trajectory.watch(model, opt)
    losses = []
    for step in range(10):
        batch = torch.arange(16) + 16 * (step % 3)
        opt.zero_grad()
        loss = torch.nn.functional.cross_entropy(model(photos[batch]), kinds[batch])
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss)
        losses.append(loss.item())
    trajectory.state(model, optimizer=opt)
    assert np.mean(losses[-3:]) < 0.7 * np.mean(losses[:3])


HOURS = 24
#: Invented hourly outside temperatures (degrees C) and tariff (per kWh) for the Haselbach greenhouse.
OUTSIDE = np.array([4.0, 3.5, 3.0, 2.8, 2.6, 3.0, 4.2, 5.8, 7.5, 9.0, 10.4, 11.6,
                    12.5, 13.0, 13.2, 12.8, 11.9, 10.5, 9.0, 7.8, 6.8, 6.0, 5.2, 4.6])
PRICE = np.where((np.arange(HOURS) < 6) | (np.arange(HOURS) >= 22), 0.18, 0.31)


def greenhouse_cost(heating: np.ndarray) -> float:
    """Energy bill plus discomfort outside 16..22 degrees; the glasshouse keeps 80 % of its excess heat.

    Only +, -, *, comparisons and math.fsum (correctly rounded) are used, so the result is the same
    bits on every IEEE 754 machine: no BLAS dot, no libm function whose last bit depends on the CPU.
    """
    temp = 15.0
    discomfort = []
    for h in range(HOURS):
        temp = OUTSIDE[h] + 0.8 * (temp - OUTSIDE[h]) + 0.9 * heating[h]
        cold, hot = max(16.0 - temp, 0.0), max(temp - 22.0, 0.0)
        discomfort.append(cold * cold + hot * hot)
    return math.fsum(PRICE * heating) + 0.5 * math.fsum(discomfort)


def acceptance(delta: float, temperature: float) -> float:
    """exp(-delta / T) as (1 - x/256)**256 by eight squarings (a choice made here, not from a source):
    basic operations only, so every machine takes the same Metropolis decisions."""
    x = delta / temperature
    if x >= 256.0:
        return 0.0
    p = 1.0 - x / 256.0
    for _ in range(8):
        p = p * p
    return p


@pytest.mark.trainguard(seed=109)
def test_greenhouse_annealing(trajectory):
    rng = np.random.default_rng(1983)  # PCG64: the same stream on every platform
    heating = np.full(HOURS, 2.0)
    cost = greenhouse_cost(heating)
    first = cost
    temperature = 2.0
    for step in range(300):
        candidate = heating.copy()
        hour = int(rng.integers(HOURS))
        candidate[hour] = min(max(candidate[hour] + (rng.random() * 1.6 - 0.8), 0.0), 6.0)
        new_cost = greenhouse_cost(candidate)
        # Metropolis rule: always take a better plan, a worse one with probability exp(-delta / T)
        if new_cost < cost or rng.random() < acceptance(new_cost - cost, temperature):
            heating, cost = candidate, new_cost
        temperature *= 0.985
        if step % 10 == 9:
            trajectory.log(step, cost=cost, temperature=temperature)
    trajectory.state(heating_plan=heating, final_temperature=np.float64(temperature))
    assert cost < 0.8 * first
