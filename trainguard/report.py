"""Turning comparisons into text a person can act on.

A failure report answers, in order: which metric left its tolerance and at which step,
by how much; which tensors changed and how much; what else differs in the environment;
and which command re-blesses if the change was intended.
"""

from __future__ import annotations

import math
from typing import Any, Iterable, Sequence

from .comparison import CHANGED, CLOSE, IDENTICAL, Comparison

#: Most rows of one kind shown in a report before the rest is summarised.
MAX_ROWS = 20


def table(headers: Sequence[str], rows: Iterable[Sequence[Any]], indent: str = "  ") -> str:
    """A plain-text table with left-aligned columns (no dependency on pandas)."""
    rows = [[_cell(c) for c in row] for row in rows]
    widths = [len(h) for h in headers]
    for row in rows:
        widths = [max(w, len(c)) for w, c in zip(widths, row)]
    lines = [indent + "  ".join(h.ljust(w) for h, w in zip(headers, widths)).rstrip()]
    for row in rows:
        lines.append(indent + "  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip())
    return "\n".join(lines)


def _cell(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return fmt(value)
    return str(value)


def fmt(x: float) -> str:
    """Numbers with enough digits to see a difference in float32 data (9 significant)."""
    if x is None:
        return "-"
    if isinstance(x, float) and math.isnan(x):
        return "nan"
    if isinstance(x, float) and math.isinf(x):
        return "inf" if x > 0 else "-inf"
    if x == 0:
        return "0"
    if isinstance(x, int):
        return str(x)
    return f"{x:.9g}"


def short(x: float) -> str:
    if isinstance(x, float) and (math.isnan(x) or math.isinf(x)):
        return fmt(x)
    return f"{x:.2e}" if x else "0"


def _steps_text(steps: list[int]) -> str:
    if len(steps) <= 6:
        return ", ".join(str(s) for s in steps)
    return f"{steps[0]}, {steps[1]}, {steps[2]} ... {steps[-1]} ({len(steps)} steps)"


def environment_changes(golden_fp: dict[str, Any] | None, new_fp: dict[str, Any] | None) -> list[str]:
    """Differences between two fingerprints as `path: old -> new` lines (computed with deepdiff)."""
    if not golden_fp or not new_fp:
        return []
    from deepdiff import DeepDiff

    dd = DeepDiff(golden_fp, new_fp, ignore_order=False, view="tree")
    lines: list[str] = []
    for kind in ("values_changed", "type_changes"):
        for item in dd.get(kind, []):
            lines.append(f"{_dd_path(item)}: {_plain(item.t1)} -> {_plain(item.t2)}")
    for kind in ("dictionary_item_added", "iterable_item_added"):
        for item in dd.get(kind, []):
            lines.append(f"{_dd_path(item)}: (absent) -> {_plain(item.t2)}")
    for kind in ("dictionary_item_removed", "iterable_item_removed"):
        for item in dd.get(kind, []):
            lines.append(f"{_dd_path(item)}: {_plain(item.t1)} -> (absent)")
    return sorted(lines)


def _dd_path(item: Any) -> str:
    parts = item.path(output_format="list")
    return ".".join(str(p) for p in parts)


def _plain(value: Any) -> str:
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k}: {v}" for k, v in value.items()) + "}"
    return str(value)


def describe_comparison(cmp: Comparison) -> str:
    """The body of a report: metric table, tensor table, environment changes."""
    out: list[str] = []
    p = cmp.policy
    mode = "exact (bitwise)" if p.exact else p.default.describe()
    out.append(f"outcome: {cmp.outcome}   tolerance: {mode}")
    if cmp.trace is not None:
        out.append(cmp.trace.summary())

    metric_rows = []
    identical_metrics = 0
    for m in cmp.metrics:
        if m.verdict == IDENTICAL:
            identical_metrics += 1
            continue
        if m.first_step is None:
            metric_rows.append([m.name, m.verdict, "-", "-", "-", "-", "-", "-", m.note])
            continue
        notes = [m.note] if m.note else []
        if m.verdict == CHANGED and m.steps_off:
            notes.append(f"{m.steps_off}/{m.steps_compared} steps off")
        if m.missing_steps:
            notes.append(f"missing steps {_steps_text(m.missing_steps)}")
        if m.added_steps:
            notes.append(f"added steps {_steps_text(m.added_steps)}")
        tol = "bitwise" if p.exact else f"{short(m.allowed)}"
        label = "first step off" if m.verdict == CHANGED and m.steps_off else "first step differing"
        metric_rows.append(
            [m.name, m.verdict, f"{m.first_step} ({label})", fmt(m.golden), fmt(m.new),
             short(m.abs_diff), short(m.rel_diff), tol, "; ".join(notes)]
        )
    if metric_rows:
        out.append("")
        out.append("metrics:")
        out.append(table(["metric", "verdict", "step", "golden", "new", "abs diff", "rel diff", "allowed", "notes"],
                         metric_rows[:MAX_ROWS]))
        if len(metric_rows) > MAX_ROWS:
            out.append(f"  ... and {len(metric_rows) - MAX_ROWS} more metrics")
    if cmp.metrics:
        out.append(f"  ({identical_metrics} of {len(cmp.metrics)} metrics identical)")

    tensor_rows = []
    identical_tensors = 0
    for t in sorted(cmp.tensors, key=lambda t: (-_rank(t.verdict), t.name)):
        if t.verdict == IDENTICAL:
            identical_tensors += 1
            continue
        off = f"{t.elements_off}/{t.numel}" if t.basis == "values" else "-"
        reasons = list(t.reasons)
        if t.golden_value is not None:
            reasons.append(f"value {fmt(t.golden_value)} -> {fmt(t.new_value)}")
        sizes = [short(t.max_abs), short(t.max_rel)] if t.basis else ["-", "-"]
        if t.sketch_distance is not None:
            reasons.append(f"est. L2 distance {short(t.sketch_distance)} (allowed {short(t.sketch_allowed)})")
        tensor_rows.append([t.name, t.kind, t.verdict, ", ".join(reasons), *sizes, off, t.basis or "-"])
    if tensor_rows:
        out.append("")
        out.append("state:")
        out.append(table(["tensor", "kind", "verdict", "what differs", "max abs diff", "max rel diff", "elements off",
                          "from"], tensor_rows[:MAX_ROWS]))
        if len(tensor_rows) > MAX_ROWS:
            out.append(f"  ... and {len(tensor_rows) - MAX_ROWS} more tensors")
    if cmp.tensors:
        out.append(f"  ({identical_tensors} of {len(cmp.tensors)} state entries identical)")

    env = environment_changes(cmp.golden_meta.get("fingerprint"), cmp.new_meta.get("fingerprint"))
    out.append("")
    if env:
        out.append("environment differs from the golden's:")
        out.extend(f"  {line}" for line in env)
    else:
        out.append("environment: same as the golden's")
    return "\n".join(out)


def _rank(verdict: str) -> int:
    return {IDENTICAL: 0, CLOSE: 1, CHANGED: 2}[verdict]


def failure_report(nodeid: str, folder: str, cmp: Comparison, bless_command: str) -> str:
    head = [f"trainguard: {nodeid} changed against its golden {folder}"]
    meta = cmp.golden_meta
    if meta.get("blessed_at"):
        reason = meta.get("reason") or "(no reason given)"
        head.append(f"golden blessed {meta['blessed_at']}, reason: {reason}")
    return "\n".join(head) + "\n\n" + describe_comparison(cmp) + (
        f"\n\nif this change is intended, re-bless it:\n  {bless_command}"
    )
