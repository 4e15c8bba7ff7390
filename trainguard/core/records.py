"""The in-memory form of one guarded run: what gets stored, read back and compared.

A `Run` is the single value that flows through trainguard: the capture layer builds one,
the golden store writes and reads one, the comparison takes two. Keeping it free of torch
and pytest lets every later stage work on goldens without either.

State entries (`TensorRecord`) and trace entries (`TraceEntry`) describe a tensor the same
way: dtype, shape, SHA-256 of its bytes and one `Stats`. Their constructors keep the flat
field order of the public API; `Summarized.stats` gives the shared view that comparisons use.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Mapping, NamedTuple, Protocol

import numpy as np

if TYPE_CHECKING:
    from .meta import GoldenMeta


@dataclass(frozen=True)
class Stats:
    """float64 summary of a tensor's finite values, plus how many were not finite."""

    min: float
    max: float
    mean: float
    l2: float
    nonfinite: int

    def as_array(self) -> np.ndarray:
        """The five numbers as float64, in the order goldens store them (compared elementwise)."""
        return np.array([self.min, self.max, self.mean, self.l2, self.nonfinite], dtype=np.float64)


@dataclass
class MetricSeries:
    """One metric's values by step, steps strictly increasing."""

    steps: np.ndarray  # int64
    values: np.ndarray  # float64

    def __post_init__(self) -> None:
        self.steps = np.asarray(self.steps, dtype=np.int64)
        self.values = np.asarray(self.values, dtype=np.float64)


class Summarized(Protocol):
    """What state and trace entries share: a tensor's identity (dtype, shape, bytes) and its `Stats`."""

    dtype: str
    shape: tuple[int, ...]
    sha256: str
    min: float
    max: float
    mean: float
    l2: float
    nonfinite: int
    sketch: np.ndarray | None

    @property
    def stats(self) -> Stats:
        return Stats(self.min, self.max, self.mean, self.l2, self.nonfinite)

    @property
    def numel(self) -> int:
        return math.prod(int(d) for d in self.shape)


@dataclass
class TensorRecord(Summarized):
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


#: Training stages, in the order they first happen: `init` (the watched modules' weights when
#: `watch` was called, step 0 only), then per step data, forward, backward and update.
STAGES = ("init", "data", "forward", "backward", "update")
STAGE_ORDER = {s: i for i, s in enumerate(STAGES)}


@dataclass
class TraceEntry(Summarized):
    """One tensor seen at one event of one training step (see `trace`)."""

    step: int
    stage: str
    seq: int  # order of recording within the step
    call: int  # the event within the step: module calls, losses, backwards and optimizer steps, in call order
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


class EventPrint(NamedTuple):
    """The fingerprint of one trace event: XXH3-64 (hex) of its tensors' names, dtypes, shapes and
    bytes. Kept in memory only, to tell whether two runs of one body took the same path."""

    step: int
    stage: str
    event: int
    digest: str


@dataclass
class Run:
    """Everything recorded by one guarded test, plus the metadata stored beside it.

    `meta` is a `GoldenMeta` (a plain dict given here is validated into one); it is
    replaced as a whole, never edited in place: `run.meta = run.meta.with_(reason=...)`.
    """

    metrics: dict[str, MetricSeries] = field(default_factory=dict)
    tensors: dict[str, TensorRecord] = field(default_factory=dict)
    meta: GoldenMeta = field(default_factory=lambda: _meta_from({}))
    trace: list[TraceEntry] | None = None  # present when the test called trajectory.watch (full trace)
    prints: list[EventPrint] | None = None  # per-event fingerprints of a watched test (never stored)

    def __setattr__(self, name: str, value: Any) -> None:
        if name == "meta":
            value = _meta_from(value)
        object.__setattr__(self, name, value)

    @property
    def is_empty(self) -> bool:
        return not self.metrics and not self.tensors


def _meta_from(value: Mapping[str, Any]) -> GoldenMeta:
    from .meta import GoldenMeta

    return value if isinstance(value, GoldenMeta) else GoldenMeta.from_json(value)


def nonfinite_parts(run: Run) -> list[str]:
    """Metrics and entries holding NaN or Inf, each with where: `loss (NaN from step 3)`, `fc.weight (2 values)`.

    A golden blessed with them passes only against the same NaNs; a bless should say so.
    """
    out = []
    for name, series in sorted(run.metrics.items()):
        bad = np.flatnonzero(~np.isfinite(series.values))
        if bad.size:
            value = float(series.values[bad[0]])
            word = "NaN" if value != value else ("+Inf" if value > 0 else "-Inf")
            out.append(f"{name} ({word} from step {int(series.steps[bad[0]])})")
    for name, rec in sorted(run.tensors.items()):
        if rec.nonfinite:
            out.append(f"{name} ({rec.nonfinite} value{'s' if rec.nonfinite != 1 else ''})")
    return out
