"""The in-memory form of one guarded run: what gets stored, read back and compared.

A `Run` is the single value that flows through trainguard: the capture layer builds one,
the golden store writes and reads one, the comparison takes two. Keeping it free of torch
and pytest lets every later stage work on goldens without either.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np


@dataclass
class MetricSeries:
    """One metric's values by step, steps strictly increasing."""

    steps: np.ndarray  # int64
    values: np.ndarray  # float64

    def __post_init__(self) -> None:
        self.steps = np.asarray(self.steps, dtype=np.int64)
        self.values = np.asarray(self.values, dtype=np.float64)


@dataclass
class TensorRecord:
    """What a golden keeps of one tensor or number of the final state."""

    name: str
    kind: str  # "parameter", "buffer", "optimizer", "hyperparameter" or "named"
    dtype: str
    shape: tuple[int, ...]
    sha256: str
    min: float
    max: float
    mean: float
    l2: float
    nonfinite: int
    values: np.ndarray | None = None  # flat float64, None when over the stored-values limit
    sketch: np.ndarray | None = None  # count-sketch (checksum.STATE_SKETCH floats) when values are not stored

    @property
    def numel(self) -> int:
        n = 1
        for d in self.shape:
            n *= int(d)
        return n


#: Training stages of one optimizer step, in the order they happen.
STAGES = ("data", "forward", "backward", "update")
STAGE_ORDER = {s: i for i, s in enumerate(STAGES)}


@dataclass
class TraceEntry:
    """One tensor seen at one stage of one optimizer step (see `trace`)."""

    step: int
    stage: str
    seq: int  # order of recording within the step
    call: int  # forward/backward evaluation within the step (several for closure optimizers such as L-BFGS)
    name: str
    dtype: str
    shape: tuple[int, ...]
    sha256: str
    min: float
    max: float
    mean: float
    l2: float
    nonfinite: int
    sketch: np.ndarray | None = None  # small count-sketch: sees reorderings that statistics miss


@dataclass
class Run:
    """Everything recorded by one guarded test, plus the metadata stored beside it."""

    metrics: dict[str, MetricSeries] = field(default_factory=dict)
    tensors: dict[str, TensorRecord] = field(default_factory=dict)
    meta: dict[str, Any] = field(default_factory=dict)
    trace: list[TraceEntry] | None = None  # present when the test called trajectory.watch

    @property
    def is_empty(self) -> bool:
        return not self.metrics and not self.tensors
