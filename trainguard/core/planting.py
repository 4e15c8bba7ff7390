"""Planted changes: small, real behaviour changes that prove a tolerance still has power.

A tolerance wide enough to absorb noise may also absorb real changes. `trainguard calibrate`
therefore runs the test a few more times with a change planted that a reviewer would want
caught (the learning rate of every optimizer a little higher, or the parameters nudged once),
and reports whether the proposed tolerance still fails them. The changes go through torch's
global optimizer step hooks (`torch.optim.optimizer.register_optimizer_step_pre_hook` and
`..._post_hook`), so they reach every `torch.optim.Optimizer`, custom subclasses included,
without touching the test's code.

A run with a planted change records it in its fingerprint (`planted`), and a golden that
carries one is never used as a reference: it is calibration scratch, not a golden.
"""

from __future__ import annotations

import contextlib
import math
import re
from dataclasses import dataclass
from typing import Any, Iterator, Mapping

from .errors import UsageError

#: Fingerprint key of a run made with a planted change.
FINGERPRINT_KEY = "planted"

_KINDS = {
    "lr": "every optimizer's learning rate scaled by 1 + {size:g} at every step",
    "params": "every optimized parameter scaled by 1 + {size:g} once, after the first optimizer step",
}
_SPEC = re.compile(r"^(lr|params):([0-9.eE+-]+)$")


@dataclass(frozen=True)
class Plant:
    """One planted change: `kind` ("lr" or "params") and its relative `size`."""

    kind: str
    size: float

    @property
    def spec(self) -> str:
        """The text form `--trainguard-plant` takes and fingerprints record: `lr:0.01`."""
        return f"{self.kind}:{self.size:g}"

    def describe(self) -> str:
        return _KINDS[self.kind].format(size=self.size)


def parse(spec: str) -> Plant:
    """`lr:0.01` -> Plant("lr", 0.01); a relative size in (0, 1)."""
    m = _SPEC.match(spec.strip())
    size = float("nan")
    if m:
        with contextlib.suppress(ValueError):
            size = float(m.group(2))
    if not m or not (math.isfinite(size) and 0 < size < 1):
        raise UsageError(f"--trainguard-plant={spec}: expected lr:SIZE or params:SIZE with 0 < SIZE < 1, "
                         "e.g. lr:0.01 (the learning rate 1 % higher)")
    return Plant(m.group(1), size)


@contextlib.contextmanager
def planted(plant: Plant | None) -> Iterator[None]:
    """Install the change for the duration of one test body (nothing with None)."""
    if plant is None:
        yield
        return
    from torch.optim.optimizer import register_optimizer_step_post_hook, register_optimizer_step_pre_hook

    saved: dict[int, list[Any]] = {}
    nudged: set[int] = set()

    def pre(optimizer: Any, args: Any, kwargs: Any) -> None:
        if plant.kind == "lr":
            saved[id(optimizer)] = [group.get("lr") for group in optimizer.param_groups]
            for group in optimizer.param_groups:
                if group.get("lr") is not None:
                    group["lr"] = group["lr"] * (1 + plant.size)

    def post(optimizer: Any, args: Any, kwargs: Any) -> None:
        if plant.kind == "lr":
            for group, lr in zip(optimizer.param_groups, saved.pop(id(optimizer), [])):
                group["lr"] = lr  # restored: schedulers and the recorded state see the original value
        elif id(optimizer) not in nudged:
            import torch

            nudged.add(id(optimizer))
            with torch.no_grad():
                for group in optimizer.param_groups:
                    for p in group["params"]:
                        p.mul_(1 + plant.size)

    handles = [register_optimizer_step_pre_hook(pre), register_optimizer_step_post_hook(post)]
    try:
        yield
    finally:
        for h in handles:
            h.remove()


def golden_problem(fingerprint: Any) -> str:
    """Why a golden cannot be a reference because it was recorded with a planted change ('' when it can)."""
    if isinstance(fingerprint, Mapping) and fingerprint.get(FINGERPRINT_KEY):
        return (f"it was recorded with a planted change ({fingerprint[FINGERPRINT_KEY]}) by trainguard calibrate's "
                "power check; such a run is calibration scratch, not a golden")
    return ""
