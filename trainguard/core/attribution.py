"""Stage attribution: the first step and stage where two traces part.

Stages are compared in training order, step by step: data -> forward -> backward ->
update. The first (step, stage) whose entries differ in bits is the first divergence; the
first whose entries differ beyond tolerance is the first change. Because every stage
depends only on earlier ones, the first differing stage names what changed: the data
pipeline, the model's forward pass, autograd, or the optimizer update.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Iterable

from .records import STAGE_ORDER, STAGES, TraceEntry
from .text import join_names
from .tolerance import Tolerance, judge
from .verdicts import CHANGED, CLOSE, IDENTICAL

#: Tensors named in a divergence line before the rest is counted.
MAX_NAMES = 6


@dataclass
class StagePoint:
    step: int
    stage: str
    verdict: str  # CLOSE or CHANGED
    names: list[str] = field(default_factory=list)


@dataclass
class TraceDiff:
    verdict: str  # worst verdict over all stages
    groups: int = 0
    first_bitwise: StagePoint | None = None
    first_change: StagePoint | None = None

    def summary(self) -> str:
        """One or two lines a person reads first."""
        if self.first_bitwise is None:
            return f"trace: all {self.groups} step/stage groups identical"
        fb, fc = self.first_bitwise, self.first_change
        if fc is None:
            return (f"trace: bitwise identical up to step {fb.step}, stage {fb.stage} "
                    f"({_names(fb.names)}); within tolerance after")
        line = f"first divergence: step {fc.step}, stage {fc.stage} ({_names(fc.names)})"
        earlier = list(STAGES[: STAGE_ORDER[fc.stage]])
        if fb.step == fc.step and fb.stage == fc.stage:
            if earlier:
                line += f"; {_join(earlier)} identical up to there"
            return line
        return (line + f"; bitwise identical up to step {fb.step}, stage {fb.stage} "
                f"({_names(fb.names)}), within tolerance from there to the divergence")


def _join(stages: list[str]) -> str:
    return stages[0] if len(stages) == 1 else ", ".join(stages[:-1]) + " and " + stages[-1]


def _names(names: list[str]) -> str:
    return join_names(names, MAX_NAMES)


def _groups(entries: Iterable[TraceEntry]) -> dict[tuple[int, int, int, int], dict[str, TraceEntry]]:
    """Entries by (step, is-update, evaluation, stage): training order, also for closure optimizers."""
    out: dict[tuple[int, int, int, int], dict[str, TraceEntry]] = {}
    for e in entries:
        order = STAGE_ORDER.get(e.stage, len(STAGES))
        out.setdefault((e.step, int(e.stage == "update"), e.call, order), {})[e.name] = e
    return out


def _entry_verdict(g: TraceEntry | None, n: TraceEntry | None, tol: Tolerance, exact: bool) -> str:
    # Statistics cannot see a reordering (a shuffled batch has the same min, max, mean and
    # norm); the position-hashed sketch that `judge` also checks can.
    if g is None or n is None:
        return CHANGED
    return judge(g, n, tol, exact).verdict


def compare_traces(golden: list[TraceEntry], new: list[TraceEntry], tol: Tolerance, exact: bool = False) -> TraceDiff:
    """Walk both traces in training order; note the first bitwise and the first tolerance divergence."""
    g_groups, n_groups = _groups(golden), _groups(new)
    diff = TraceDiff(IDENTICAL)
    for key in sorted(set(g_groups) | set(n_groups)):
        diff.groups += 1
        g, n = g_groups.get(key, {}), n_groups.get(key, {})
        verdicts = {name: _entry_verdict(g.get(name), n.get(name), tol, exact) for name in list(g) + [
            k for k in n if k not in g]}
        off = [name for name, v in verdicts.items() if v != IDENTICAL]
        if not off:
            continue
        worst = CHANGED if any(v == CHANGED for v in verdicts.values()) else CLOSE
        step, stage = key[0], STAGES[key[3]] if key[3] < len(STAGES) else "other"
        if diff.first_bitwise is None:
            diff.first_bitwise = StagePoint(step, stage, worst, off)
        if worst == CHANGED and diff.first_change is None:
            diff.first_change = StagePoint(step, stage, CHANGED, [n for n in off if verdicts[n] == CHANGED])
        if diff.verdict != CHANGED:
            diff.verdict = worst
    return diff
