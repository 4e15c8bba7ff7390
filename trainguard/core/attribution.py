"""Stage attribution: the first step, event and stage where two traces part.

Events are compared in the order they happened, step by step (see `trace`: every module
call, loss, backward and optimizer step is one event, each in one stage: init, data,
forward, backward or update). The first event whose entries differ in bits is the first
divergence; the first whose entries differ beyond tolerance is the first change. Because
every event depends only on earlier ones, the first differing event's stage names what
changed: the initial weights, the data pipeline, a model's forward pass, autograd, or an
optimizer update.
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
    event: int = 0  # the event's number within its step
    earlier: list[str] = field(default_factory=list)  # stages of the step's earlier events, first seen first


@dataclass
class TraceDiff:
    verdict: str  # worst verdict over all stages
    groups: int = 0  # events compared
    first_bitwise: StagePoint | None = None
    first_change: StagePoint | None = None
    # names one trace has and the other lacks in an event both hold (a model that stopped
    # returning some outputs): (step, stage, name), first occurrence per name
    removed: list[tuple[int, str, str]] = field(default_factory=list)
    added: list[tuple[int, str, str]] = field(default_factory=list)

    def structure(self) -> str:
        """`trace entries removed from step 0: output.past.0, output.past.1`; empty when none."""
        parts = []
        for word, items in (("removed", self.removed), ("added", self.added)):
            if items:
                parts.append(f"{len(items)} trace entr{'y' if len(items) == 1 else 'ies'} {word} "
                             f"(first at step {items[0][0]}, stage {items[0][1]}): {_names([n for _, _, n in items])}")
        return "; ".join(parts)

    def summary(self) -> str:
        """One or two lines a person reads first."""
        text = self._divergence()
        extra = self.structure()
        return text + (f"; {extra}" if extra else "")

    def _divergence(self) -> str:
        if self.first_bitwise is None:
            return f"trace: all {self.groups} events identical"
        fb, fc = self.first_bitwise, self.first_change
        if fc is None:
            return (f"trace: bitwise identical up to step {fb.step}, stage {fb.stage} "
                    f"({_names(fb.names)}); within tolerance after")
        line = f"first divergence: step {fc.step}, stage {fc.stage} ({_names(fc.names)})"
        earlier = fc.earlier
        if fb.step == fc.step and fb.event == fc.event:
            if earlier and fc.stage in earlier:  # several calls per step: say which events came before
                line += f"; the step's earlier events ({', '.join(earlier)}) identical"
            elif earlier:
                line += f"; {_join(earlier)} identical up to there"
            return line
        return (line + f"; bitwise identical up to step {fb.step}, stage {fb.stage} "
                f"({_names(fb.names)}), within tolerance from there to the divergence")


def _join(stages: list[str]) -> str:
    return stages[0] if len(stages) == 1 else ", ".join(stages[:-1]) + " and " + stages[-1]


def _names(names: list[str]) -> str:
    return join_names(names, MAX_NAMES)


def _groups(entries: Iterable[TraceEntry]) -> dict[tuple[int, int], dict[str, TraceEntry]]:
    """Entries by (step, event): the order things happened in, also with several models and closures."""
    out: dict[tuple[int, int], dict[str, TraceEntry]] = {}
    for e in entries:
        out.setdefault((e.step, e.call), {})[e.name] = e
    return out


def _stage_of(group: dict[str, TraceEntry]) -> str:
    stages = {e.stage for e in group.values()}
    return min(stages, key=lambda s: STAGE_ORDER.get(s, len(STAGES)))


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
    seen: dict[int, list[str]] = {}  # per step: stages of the events walked so far
    seen_removed: set[str] = set()
    seen_added: set[str] = set()
    for key in sorted(set(g_groups) | set(n_groups)):
        diff.groups += 1
        g, n = g_groups.get(key, {}), n_groups.get(key, {})
        stage = _stage_of(g or n)
        earlier = list(seen.setdefault(key[0], []))
        if stage not in seen[key[0]]:
            seen[key[0]].append(stage)
        common = [name for name in g if name in n]
        if common:
            # Names on one side only (outputs a model stopped returning) are structure, not
            # values: listed once by name, and the event is judged on the names both hold.
            for name in g:
                if name not in n and name not in seen_removed:
                    seen_removed.add(name)
                    diff.removed.append((key[0], stage, name))
            for name in n:
                if name not in g and name not in seen_added:
                    seen_added.add(name)
                    diff.added.append((key[0], stage, name))
            names = common
        else:  # a whole event came or went: the events after it are shifted, so this is where runs part
            names = list(g) + [k for k in n if k not in g]
        verdicts = {name: _entry_verdict(g.get(name), n.get(name), tol, exact) for name in names}
        off = [name for name, v in verdicts.items() if v != IDENTICAL]
        if not off:
            continue
        worst = CHANGED if any(v == CHANGED for v in verdicts.values()) else CLOSE
        step, event = key
        if diff.first_bitwise is None:
            diff.first_bitwise = StagePoint(step, stage, worst, off, event, earlier)
        if worst == CHANGED and diff.first_change is None:
            diff.first_change = StagePoint(step, stage, CHANGED, [n for n in off if verdicts[n] == CHANGED], event,
                                           earlier)
        if diff.verdict != CHANGED:
            diff.verdict = worst
    return diff
