"""Turning comparisons into text a person can act on.

A failure report answers, in order: which metric left its tolerance and at which step,
by how much; which tensors changed and how much; what else differs in the environment;
and which command re-blesses if the change was intended.
"""

from __future__ import annotations

import math
import shlex
from typing import TYPE_CHECKING, Any, Mapping, Sequence

from .comparison import Comparison, structure_reason
from .text import fmt, join_names, short, table, untrusted
from .verdicts import CHANGED, CLOSE, IDENTICAL, NO_GOLDEN, NONDETERMINISTIC, UNREADABLE, rank

if TYPE_CHECKING:
    from .outcome import GuardResult

#: Most rows of one kind shown in a report before the rest is summarised.
MAX_ROWS = 20


def _steps_text(steps: list[int]) -> str:
    if len(steps) <= 6:
        return ", ".join(str(s) for s in steps)
    return f"{steps[0]}, {steps[1]}, {steps[2]} ... {steps[-1]} ({len(steps)} steps)"


def environment_changes(golden_fp: Mapping[str, Any] | None, new_fp: Mapping[str, Any] | None) -> list[str]:
    """Differences between two fingerprints as `path: old -> new` lines (computed with deepdiff)."""
    if not golden_fp or not new_fp or golden_fp == new_fp:  # the common case: no diff to compute
        return []
    from deepdiff import DeepDiff

    dd = DeepDiff(golden_fp, new_fp, ignore_order=False, view="tree")
    lines: list[str] = []
    for kind in ("values_changed", "type_changes"):
        for item in dd.get(kind, []):
            lines.append(f"{_dd_path(item)}: {_plain(item.t1)} -> {_plain(item.t2)}")
    for kind in ("dictionary_item_added", "iterable_item_added"):
        for item in dd.get(kind, []):
            if not _imported_only(item):
                lines.append(f"{_dd_path(item)}: (absent) -> {_plain(item.t2)}")
    for kind in ("dictionary_item_removed", "iterable_item_removed"):
        for item in dd.get(kind, []):
            if not _imported_only(item):
                lines.append(f"{_dd_path(item)}: {_plain(item.t1)} -> (absent)")
    return sorted(lines)


#: Always recorded; any other `packages` entry is a library the process happened to import by then.
_CORE_PACKAGES = ("torch", "numpy", "pyarrow", "trainguard")


def _imported_only(item: Any) -> bool:
    """A library one run had imported and the other had not: it says what was loaded, not what changed
    (a report plugin, or an earlier test, imports more), so only version changes of libraries both runs
    imported are reported."""
    parts = item.path(output_format="list")
    return len(parts) == 2 and parts[0] == "packages" and parts[1] not in _CORE_PACKAGES


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
    head = f"outcome: {cmp.outcome}   tolerance: {p.describe()}"
    if cmp.structure:
        word = cmp.structure_verdict if cmp.structure_verdict == CHANGED else "notes only"
        head = (f"outcome: {cmp.outcome} (structure: {word}; numbers: {cmp.numbers})   "
                f"tolerance: {p.describe()}")
    out.append(head)
    traced = ([f"trace entry {word}: {name} (from step {step}, stage {stage})"
               for word, items in (("removed", cmp.trace.removed), ("added", cmp.trace.added))
               for step, stage, name in items] if cmp.trace is not None else [])
    if cmp.structure or traced:
        lines = [c.describe() + (" (a note: optimizer bookkeeping no update reads; the numbers decide)"
                                 if c.verdict != CHANGED else "") for c in cmp.structure] + traced
        out.append("")
        out.append("structure (names on one side only; their values are not compared):")
        out.extend(f"  {untrusted(line)}" for line in lines[:MAX_ROWS])
        if len(lines) > MAX_ROWS:
            out.append(f"  ... and {len(lines) - MAX_ROWS} more")
    if cmp.trace is not None:
        out.append(cmp.trace.summary())
    elif cmp.trace_note:
        out.append(cmp.trace_note)

    metric_rows = []
    identical_metrics = 0
    for m in cmp.metrics:
        if m.verdict == IDENTICAL:
            identical_metrics += 1
            continue
        if m.structural:  # listed under structure
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
    for t in sorted(cmp.tensors, key=lambda t: (-rank(t.verdict), t.name)):
        if t.verdict == IDENTICAL:
            identical_tensors += 1
            continue
        if t.structural:  # listed under structure
            continue
        off = f"{t.elements_off}/{t.numel}" if t.basis == "values" else "-"
        reasons = list(t.reasons)
        if t.golden_value is not None:
            reasons.append(f"value {fmt(t.golden_value)} -> {fmt(t.new_value)}")
        sizes = [short(t.max_abs), short(t.max_rel)] if t.basis else ["-", "-"]
        if t.estimate is not None:
            e = t.estimate
            sizes = [f"~{short(e.largest)} +-{short(e.bound)} (est.)", "-"]
            reasons.append(f"est. largest elementwise diff {short(e.largest)} +- {short(e.bound)} "
                           f"(any element allowed {short(e.allowed)})")
        if t.sketch_distance is not None:
            reasons.append(f"est. L2 distance {short(t.sketch_distance)} (allowed {short(t.sketch_allowed or 0.0)})")
        if t.judged_by:
            reasons.append(f"judged by {t.judged_by}")
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


#: Largest scale-free difference (|new - golden| over the entry's own magnitude) still read as the
#: rounding drift another CPU or library build produces. Common practice, no single source: float32
#: rounding (IEEE 754 binary32 epsilon 2**-23, about 1.19e-7) grows over tens of optimizer steps to
#: 1e-6..1e-4 (this project saw at most 3.7e-4 across CPUs), while a 1 % hyperparameter change is 1e-2.
DRIFT_SIZE = 1e-3
#: Fingerprint parts whose change can move float bits without any change of the training code.
_MACHINE_PARTS = ("cpu", "cpu_capability", "libraries", "packages", "torch_build", "threads", "env",
                  "parallel_backend", "device", "python", "machine", "os")


def drift(cmp: Comparison) -> float | None:
    """The largest scale-free difference when every difference looks like rounding drift, else None.

    None when anything structural changed (a metric, step or entry missing or added, a dtype or shape),
    a hyperparameter or other one-number entry moved, a value became non-finite, or a difference
    exceeds `DRIFT_SIZE`.
    """
    largest = 0.0
    if any(c.verdict == CHANGED for c in cmp.structure):
        return None
    for m in cmp.metrics:
        if m.verdict == IDENTICAL or m.structural:
            continue
        if m.first_step is None or m.missing_steps or m.added_steps or m.note or not math.isfinite(m.rel_diff):
            return None
        scale = abs(m.golden) or 1.0
        largest = max(largest, m.max_abs / scale, m.rel_diff)
    moved = [t for t in cmp.tensors if t.verdict != IDENTICAL and not t.structural]
    # An entry that is itself rounding residue (a bias's gradient in front of a normalisation layer:
    # zero in exact arithmetic) moves by 100 % of its own size; it is measured against a floor of
    # DRIFT_SIZE times the largest entry that moved instead.
    floor = DRIFT_SIZE * max((t.scale for t in moved if math.isfinite(t.scale)), default=0.0)
    for t in moved:
        if t.kind == "hyperparameter" or t.golden_value is not None or any(r != "checksum" for r in t.reasons):
            return None
        scale = max(t.scale, floor) if math.isfinite(t.scale) else math.nan
        if not (math.isfinite(t.max_abs) and math.isfinite(scale)) or scale == 0:
            return None
        largest = max(largest, t.max_abs / scale)
    return largest if largest <= DRIFT_SIZE else None


def machine_changes(cmp: Comparison) -> list[str]:
    """The fingerprint differences that concern the machine or the libraries, not the test's settings."""
    lines = environment_changes(cmp.golden_meta.get("fingerprint"), cmp.new_meta.get("fingerprint"))
    return [line for line in lines if line.split(".", 1)[0].split(":", 1)[0] in _MACHINE_PARTS]


def failure_report(nodeid: str, folder: str, cmp: Comparison, bless_command: str) -> str:
    """The report of a changed test: where it changed, by how much, and the command that re-blesses it.

    When only the machine or libraries changed and every difference is of rounding-drift size,
    the report leads with that and with the remedies, instead of asking for a re-bless.
    """
    head = [f"trainguard: {nodeid} changed against its golden {folder}"]
    meta = cmp.golden_meta
    size = drift(cmp)
    machine = machine_changes(cmp) if size is not None else []
    if machine:
        shown = "; ".join(untrusted(line) for line in machine[:4]) + (f"; and {len(machine) - 4} more"
                                                                       if len(machine) > 4 else "")
        head.append(f"only the machine or its libraries changed ({shown}), and these differences are of the size "
                    f"rounding drift produces (max {short(size or 0.0)} of each value's magnitude).")
        head.append("remedies: bless and check in portable mode (--trainguard-portable, or ini trainguard_portable = "
                    "true), which pins kernel dispatch so goldens hold across CPUs; or measure the spread with "
                    f"trainguard calibrate {shlex.quote(nodeid)} --write, which stores a tolerance.")
    if meta.get("blessed_at"):
        reason = untrusted(meta.get("reason") or "(no reason given)")
        head.append(f"golden blessed {untrusted(meta['blessed_at'])}, reason: {reason}")
    fix = ("to accept this machine's numbers instead, re-bless it" if machine
           else "if this change is intended, re-bless it")
    return "\n".join(head) + "\n\n" + describe_comparison(cmp) + f"\n\n{fix}:\n  {bless_command}"


def render_result(result: GuardResult, bless_command: str, hints: Sequence[str] = (), ci: str | None = None) -> str:
    """The message a failing guarded test shows; empty when the outcome passes the test.

    `bless_command` is pasted where the fix is a (re-)bless; `hints` follow a nondeterministic
    outcome; `ci` (the CI variable's value in a CI run) explains that goldens are never made there.
    """
    nodeid, shown = result.nodeid, result.folder
    if result.outcome == NONDETERMINISTIC:
        agree = result.agreeing
        lines = [
            f"trainguard: {nodeid} is nondeterministic: {result.runs} runs with the same seed and settings "
            f"in this process did not agree bit for bit.",
            f"run {result.differing_run} differs from run 1 ({result.differing} of {result.runs - 1} repeats differ"
            + (f"; run{'s' if len(agree) > 1 else ''} {', '.join(map(str, agree))} agree{'' if len(agree) > 1 else 's'} "
               "with run 1" if agree else "") + "):",
        ]
        lines += [f"  first differing {w}" for w in result.where]
        lines.append(f"The golden ({shown}) was neither compared nor written: a run that differs from itself "
                     "cannot be checked against a golden.")
        return "\n".join([*lines, *hints])
    if result.blessing:
        return ""
    if result.outcome == NO_GOLDEN:
        message = (f"trainguard: {nodeid} has no golden yet (looked in {shown}).\n"
                   f"A guarded test never creates its golden silently. Record it with:\n  {bless_command}")
        if ci is not None:
            message += (f"\nThis is a CI run (the CI environment variable is {ci!r}): goldens are never created "
                        "in CI. Run the command above on your machine, review the new golden and commit it "
                        f"(git add {shlex.quote(shown)}).")
        return message
    if result.outcome == UNREADABLE:
        return (f"trainguard: the golden of {nodeid} cannot be used:\n  {result.error}\n"
                f"It was left untouched. If you want to replace it with this run, re-bless:\n  {bless_command}")
    if result.outcome == CHANGED and result.comparison is not None:
        return failure_report(nodeid, shown, result.comparison, bless_command)
    return ""


# -- one-line answers to "where did it change?" ------------------------------------------


def first_divergence(cmp: Comparison | None) -> str:
    """The one-line answer to "where did it change?" (summary rows, bisect): structure changes
    first (`2 state entries added: a, b`), then where the numbers part."""
    if cmp is None:
        return ""
    numbers = _numbers_divergence(cmp)
    if cmp.structure:
        reason = structure_reason(cmp.structure)
        if cmp.structure_verdict != CHANGED:
            reason = "note: " + reason
        return reason + (f"; {numbers}" if numbers else f"; numbers {cmp.numbers}")
    return numbers


def _numbers_divergence(cmp: Comparison) -> str:
    if cmp.trace is not None and (cmp.trace.first_bitwise is not None or cmp.trace.structure()):
        return cmp.trace.summary()
    for m in cmp.metrics:
        if m.verdict == CHANGED and not m.structural:
            if m.first_step is None:
                return f"metric {m.name}: {m.note}"
            text = (f"{m.name} at step {m.first_step}: {m.golden:.9g} -> {m.new:.9g} "
                    f"(rel {short(m.rel_diff)}, allowed {short(m.allowed)})")
            return text + (f"; {m.note}" if m.note else "")
    changed = [t.name for t in cmp.tensors if t.verdict == CHANGED and not t.structural]
    if changed:
        return "state: " + join_names(changed, 4)
    for m in cmp.metrics:
        if m.verdict == CLOSE:
            return f"{m.name} first differs at step {m.first_step} (within tolerance)"
    return ""


def first_metric_difference(cmp: Comparison, index: int) -> str:
    """The earliest differing metric step between run 1 and run `index` of a repeated test."""
    off = [m for m in cmp.metrics if m.verdict != IDENTICAL]
    if not off:
        return ""
    # the earliest step over all metrics; metrics missing a step or missing altogether come last
    m = min(off, key=lambda m: (m.first_step is None, m.first_step or 0, m.name))
    if m.first_step is None:
        extra = m.note or ", ".join(filter(None, [
            f"steps {m.missing_steps[:5]} missing" if m.missing_steps else "",
            f"steps {m.added_steps[:5]} added" if m.added_steps else ""]))
        return f"metric {m.name}: {extra}"
    return f"metric {m.name} at step {m.first_step}: {fmt(m.golden)} in run 1, {fmt(m.new)} in run {index}"


def first_tensor_difference(cmp: Comparison) -> str:
    """The first differing state entry of a repeated test, and how many more differ."""
    off = [t for t in cmp.tensors if t.verdict != IDENTICAL]
    if not off:
        return ""
    t = off[0]
    how = ", ".join(t.reasons) or "checksum"
    if t.max_abs == t.max_abs:  # not NaN
        how += f", max abs diff {short(t.max_abs)}"
    more = f" (and {len(off) - 1} more)" if len(off) > 1 else ""
    return f"state entry {t.name}: {how}{more}"
