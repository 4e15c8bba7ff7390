"""Comparing a new run with its golden.

Every metric and tensor ends in one of three verdicts: identical (same bits), close
(bits differ, values within tolerance) or changed. The run's outcome is the worst
verdict. The comparison only computes; `report` turns it into text.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .attribution import TraceDiff, compare_traces
from .golden_format import TRACE_FORMAT
from .meta import GoldenMeta
from .records import MetricSeries, Run, TensorRecord
from .tolerance import Policy, SketchEstimate, Tolerance, bitwise_equal, judge, within
from .verdicts import CHANGED, CLOSE, IDENTICAL, worst


@dataclass
class MetricDiff:
    name: str
    verdict: str
    tolerance: Tolerance
    steps_compared: int = 0
    steps_off: int = 0
    first_step: int | None = None  # first step outside tolerance (or first non-identical step when close)
    golden: float = math.nan
    new: float = math.nan
    abs_diff: float = math.nan
    rel_diff: float = math.nan
    allowed: float = math.nan  # atol + rtol * |golden| at first_step
    max_abs: float = 0.0  # largest |new - golden| over the compared steps (relative size: rel_diff at first_step)
    missing_steps: list[int] = field(default_factory=list)
    added_steps: list[int] = field(default_factory=list)
    note: str = ""  # e.g. "diverged to NaN at step 12", "metric missing"
    structural: bool = False  # logged by one side only: reported as a structure change, not a value


@dataclass
class TensorDiff:
    name: str
    kind: str
    verdict: str
    reasons: list[str] = field(default_factory=list)
    max_abs: float = math.nan
    max_rel: float = math.nan
    basis: str = ""  # "values" or "statistics"
    elements_off: int = 0
    numel: int = 0
    golden_value: float | None = None  # set for one-element entries (hyperparameters, step counts)
    new_value: float | None = None
    sketch_distance: float | None = None  # estimated L2 distance, when only sketches were stored
    sketch_allowed: float | None = None
    scale: float = math.nan  # largest finite |golden| among the compared numbers: max_abs / scale is scale-free
    judged_by: str = ""  # when not the policy's pair: "float16's default rtol=..., atol=..." or "exact (int64)"
    structural: bool = False  # recorded by one side only: reported as a structure change, not a value
    estimate: SketchEstimate | None = None  # large tensors: the estimated largest elementwise difference


#: What a structure change is about (`StructureChange.what`).
METRIC, ENTRY, GROUP_KEY = "metric", "state entry", "param-group key"


@dataclass
class StructureChange:
    """A name present on one side only: a metric, a state entry or a param-group key added or
    removed, or an entry renamed (same bits under another name)."""

    what: str  # METRIC, ENTRY or GROUP_KEY
    change: str  # "added", "removed" or "renamed"
    name: str
    kind: str = ""  # state entries: parameter, buffer, optimizer, named
    new_name: str = ""  # renamed: the name in the new run
    verdict: str = CHANGED  # CLOSE for a param-group key under a tolerance: a note, not a failure

    def describe(self) -> str:
        what = f"{self.what} ({self.kind})" if self.what == ENTRY and self.kind else self.what
        if self.change == "renamed":
            return f"{what} renamed: {self.name} -> {self.new_name} (same bits)"
        return f"{what} {self.change}: {self.name}"


def structure_reason(changes: list[StructureChange], limit: int = 4) -> str:
    """`2 state entries added: a, b; 1 metric removed: acc`: the one line a summary row needs."""
    groups: dict[tuple[str, str], list[str]] = {}
    for c in changes:
        name = f"{c.name} -> {c.new_name}" if c.change == "renamed" else c.name
        groups.setdefault((c.what, c.change), []).append(name)
    parts = []
    for (what, change), names in groups.items():
        plural = what if len(names) == 1 else ("state entries" if what == ENTRY else what + "s")
        shown = ", ".join(names[:limit]) + (f" and {len(names) - limit} more" if len(names) > limit else "")
        parts.append(f"{len(names)} {plural} {change}: {shown}")
    return "; ".join(parts)


@dataclass
class Comparison:
    outcome: str
    metrics: list[MetricDiff]
    tensors: list[TensorDiff]
    policy: Policy
    golden_meta: GoldenMeta = field(default_factory=GoldenMeta)
    new_meta: GoldenMeta = field(default_factory=GoldenMeta)
    trace: TraceDiff | None = None  # when both runs carry a trace
    trace_note: str = ""  # why the new run's trace was not compared (the golden has none, or an old one)
    structure: list[StructureChange] = field(default_factory=list)  # names on one side only
    numbers: str = IDENTICAL  # the worst verdict over the numbers both sides hold

    @property
    def structure_verdict(self) -> str:
        return worst(c.verdict for c in self.structure)

    @property
    def failed(self) -> bool:
        return self.outcome == CHANGED


def _rel(abs_diff: np.ndarray, golden: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # tiny goldens: rel may overflow to inf
        rel = abs_diff / np.abs(golden)
    return np.where(abs_diff == 0, 0.0, rel)


def _nonfinite_word(x: float) -> str:
    return "NaN" if math.isnan(x) else ("+Inf" if x > 0 else "-Inf")


def _fill_metric_difference(diff: MetricDiff, common: np.ndarray, g: np.ndarray, n: np.ndarray, same: np.ndarray,
                            tol: Tolerance, exact: bool) -> None:
    """Verdict, first step off and sizes of a metric whose bits differ somewhere.

    Written as a few in-place passes over the arrays (a million-step trajectory compares in
    about the time numpy.isclose takes); non-finite values take a slower path only when present.
    """
    absd = np.subtract(n, g)
    with np.errstate(invalid="ignore", over="ignore"):
        np.abs(absd, out=absd)
        gabs = np.abs(g)
        largest = absd.max()
        if np.isfinite(largest):  # no NaN or Inf on either side
            if exact:
                ok = same
            else:
                allowed = gabs * tol.rtol
                allowed += tol.atol
                ok = absd <= allowed  # identical bits give 0 <= allowed: no need to OR in `same`
            diff.max_abs = float(largest)
        else:
            ok = same if exact else (same | within(g, n, tol))
            finite = np.isfinite(absd)
            if finite.any():
                diff.max_abs = float(absd[finite].max())
            nf = np.flatnonzero(~np.isfinite(n) & np.isfinite(g))
            if nf.size:
                k = int(nf[0])
                diff.note = f"diverged to {_nonfinite_word(float(n[k]))} at step {int(common[k])}"
    diff.steps_off = int(ok.size - np.count_nonzero(ok))
    first = int(np.argmin(ok)) if diff.steps_off else int(np.argmin(same))
    diff.first_step = int(common[first])
    diff.golden, diff.new = float(g[first]), float(n[first])
    diff.abs_diff = float(abs(diff.new - diff.golden)) if math.isfinite(diff.new - diff.golden) else math.nan
    diff.rel_diff = float(_rel(np.array([diff.abs_diff]), np.array([diff.golden]))[0])
    diff.allowed = 0.0 if exact else tol.atol + tol.rtol * abs(diff.golden)
    diff.verdict = CHANGED if diff.steps_off else CLOSE


def compare_metric(name: str, golden: MetricSeries | None, new: MetricSeries | None, policy: Policy) -> MetricDiff:
    tol = policy.for_metric(name)
    if golden is None or new is None:
        return MetricDiff(name, CHANGED, tol, note="not logged by the new run" if new is None else "not in the golden",
                          structural=True)
    if np.array_equal(golden.steps, new.steps):  # the usual case: no sorting, no gathering
        common, g, n = golden.steps, golden.values, new.values
        diff = MetricDiff(name, IDENTICAL, tol, steps_compared=int(common.size))
    else:
        common, gi, ni = np.intersect1d(golden.steps, new.steps, assume_unique=True, return_indices=True)
        diff = MetricDiff(name, IDENTICAL, tol, steps_compared=int(common.size))
        diff.missing_steps = [int(s) for s in np.setdiff1d(golden.steps, new.steps, assume_unique=True)]
        diff.added_steps = [int(s) for s in np.setdiff1d(new.steps, golden.steps, assume_unique=True)]
        g = golden.values[gi]
        n = new.values[ni]
    same = bitwise_equal(g, n)
    if not same.all():
        _fill_metric_difference(diff, common, g, n, same, tol, policy.exact)
    if diff.missing_steps or diff.added_steps:
        diff.verdict = CHANGED
    return diff


def compare_tensor(name: str, golden: TensorRecord | None, new: TensorRecord | None, policy: Policy) -> TensorDiff:
    if golden is None or new is None:
        present = golden or new
        assert present is not None
        reason = "not recorded by the new run" if new is None else "not in the golden"
        # A param-group key that comes or goes is optimizer bookkeeping: a note under a tolerance
        # (see `_structure`), a change under exact=True; any other entry on one side only is a change.
        verdict = CLOSE if present.kind == "hyperparameter" and not policy.exact else CHANGED
        return TensorDiff(name, present.kind, verdict, [reason], numel=present.numel, structural=True)
    j = judge(golden, new, policy.default, exact=policy.exact)
    diff = TensorDiff(name, golden.kind, j.verdict, j.reasons, basis=j.basis, numel=golden.numel,
                      sketch_distance=j.sketch_distance, sketch_allowed=j.sketch_allowed, judged_by=j.judged_by)
    if j.golden is None or j.new is None:  # bits or structure decided
        return diff
    g, n = j.golden, j.new
    diff.elements_off = j.elements_off
    if j.estimate is not None:
        # Only sketches were stored: the statistics' differences say nothing about single elements
        # (a min that did not move hides a weight that did), so the sizes shown are the estimate's.
        diff.estimate = j.estimate
        diff.max_abs, diff.max_rel, diff.scale = j.estimate.largest, math.nan, j.estimate.scale
    else:
        with np.errstate(invalid="ignore", over="ignore"):
            absd = np.abs(n - g)
        finite = np.isfinite(absd)
        if finite.any():
            diff.max_abs = float(absd[finite].max())
            diff.max_rel = float(_rel(absd[finite], g[finite]).max())
            diff.scale = float(np.abs(g[finite]).max())
    if diff.basis == "values" and g.size == 1:
        diff.golden_value, diff.new_value = float(g[0]), float(n[0])
    nonfinite_new = int(np.sum(~np.isfinite(n) & np.isfinite(g)))
    if nonfinite_new and diff.basis == "values":
        diff.reasons.append(f"{nonfinite_new} value(s) became non-finite")
    return diff


def compare(golden: Run, new: Run, policy: Policy) -> Comparison:
    """Compare `new` against `golden` under `policy`. Never raises for differences.

    Parameters
    ----------
    golden : Run
        The reference (the rule is asymmetric: |new - golden| <= atol + rtol * |golden|).
    new : Run
        The run to judge.
    policy : Policy
        Tolerances (overall, per metric) or `exact=True` for bitwise identity.

    Returns
    -------
    Comparison
        Per metric and state entry a verdict (identical, within tolerance, changed) with the
        first step off and the sizes of the differences; `outcome` is the worst of them, and
        `trace` says where two traced runs part.

    Examples
    --------
    >>> import numpy as np
    >>> g = Run(metrics={"loss": MetricSeries([0, 1], [1.0, 0.5])})
    >>> n = Run(metrics={"loss": MetricSeries([0, 1], [1.0, 0.5000001])})
    >>> compare(g, n, Policy()).outcome
    'within tolerance'
    """
    metrics = [
        compare_metric(name, golden.metrics.get(name), new.metrics.get(name), policy)
        for name in sorted(set(golden.metrics) | set(new.metrics))
    ]
    tensors = [
        compare_tensor(name, golden.tensors.get(name), new.tensors.get(name), policy)
        for name in sorted(set(golden.tensors) | set(new.tensors))
    ]
    structure = _structure(golden, new, metrics, tensors)
    numbers = worst([m.verdict for m in metrics if not m.structural] + [t.verdict for t in tensors if not t.structural])
    outcome = worst([numbers] + [c.verdict for c in structure])
    trace, note = None, ""
    if golden.trace is not None and new.trace is not None:
        trace = compare_traces(golden.trace, new.trace, policy.default, exact=policy.exact)
    elif new.trace is not None:
        version = golden.meta.format_version
        note = ("trace: not compared, the golden's trace is in format "
                f"{version}, which orders events another way; re-bless to record one"
                if version is not None and version < TRACE_FORMAT else "trace: not compared, the golden has none; re-bless to record one")
    return Comparison(outcome, metrics, tensors, policy, golden_meta=golden.meta, new_meta=new.meta, trace=trace,
                      trace_note=note, structure=structure, numbers=numbers)


def _structure(golden: Run, new: Run, metrics: list[MetricDiff], tensors: list[TensorDiff]) -> list[StructureChange]:
    """Names on one side only, as structure changes; an entry whose bits reappear under one other name is renamed.

    A param-group key (a hyperparameter entry) that comes or goes is a note under a tolerance:
    optimizer libraries add bookkeeping keys (a step counter, an lr snapshot) that no update
    reads, and whether the numbers moved is judged on the numbers. Under `exact=True` it is a change
    (`compare_tensor` gives the verdict; it is carried over here).
    """
    out = [StructureChange(METRIC, "removed" if new.metrics.get(m.name) is None else "added", m.name)
           for m in metrics if m.structural]
    removed = [t for t in tensors if t.structural and new.tensors.get(t.name) is None]
    added = [t for t in tensors if t.structural and golden.tensors.get(t.name) is None]

    def identity(rec: TensorRecord) -> tuple[str, str, tuple[int, ...]]:
        return rec.sha256, rec.dtype, tuple(rec.shape)

    by_bits: dict[tuple[str, str, tuple[int, ...]], list[TensorDiff]] = {}
    for t in added:
        by_bits.setdefault(identity(new.tensors[t.name]), []).append(t)
    renamed_to: dict[str, str] = {}
    for t in removed:
        match = by_bits.get(identity(golden.tensors[t.name]), [])
        if len(match) == 1 and t.kind != "hyperparameter":
            renamed_to[t.name] = match.pop().name
    taken = set(renamed_to.values())
    for t in removed + added:
        if t.name in taken:
            continue
        if t.name in renamed_to:
            out.append(StructureChange(ENTRY, "renamed", t.name, t.kind, new_name=renamed_to[t.name]))
        elif t.kind == "hyperparameter":
            out.append(StructureChange(GROUP_KEY, "removed" if t in removed else "added", t.name, verdict=t.verdict))
        else:
            out.append(StructureChange(ENTRY, "removed" if t in removed else "added", t.name, t.kind))
    return out
