"""Checking a recorded run against its golden, or blessing it: the verdict for one test.

This is the step between recording and reporting, shared by the pytest plugin and the
CLI. It knows nothing about pytest: it takes a `Run`, a golden folder and a `Policy`,
and returns a `GuardResult` whose `message` is ready to show.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from . import golden
from .comparison import CHANGED, CLOSE, IDENTICAL, Comparison, compare
from .errors import GoldenMissingError, TrainguardError
from .record import Run
from .report import failure_report
from .tolerance import Policy

#: Outcomes of a check.
NO_GOLDEN = "no golden"
UNREADABLE = "unreadable golden"
#: Outcome of `--trainguard-repeat N` when the N runs disagree among themselves (check or bless).
NONDETERMINISTIC = "nondeterministic"
#: Outcomes of a bless.
BLESSED_NEW = "new"
BLESSED_CHANGED = "changed"
BLESSED_UNCHANGED = "unchanged"


@dataclass
class GuardResult:
    nodeid: str
    folder: str
    outcome: str
    blessing: bool = False
    comparison: Comparison | None = None
    message: str = ""
    run: Run | None = None  # the new run (checks only)
    reference: Run | None = None  # the golden it was compared with, when readable
    divergence: str = ""  # one-line "where" for the summary when `comparison` alone does not say it

    @property
    def failed(self) -> bool:
        if self.outcome == NONDETERMINISTIC:  # fails checks and blesses alike: nothing was compared or written
            return True
        return not self.blessing and self.outcome in (CHANGED, NO_GOLDEN, UNREADABLE)


def display_path(folder: Path, base: Path | None) -> str:
    if base is not None:
        try:
            return os.path.relpath(folder, base)
        except ValueError:  # different drive on Windows
            pass
    return str(folder)


def check(nodeid: str, run: Run, folder: Path, policy: Policy, bless_command: str,
          base: Path | None = None, max_bytes: int = golden.DEFAULT_MAX_FILE_BYTES,
          use_calibrated: bool = True, root: Path | None = None) -> GuardResult:
    """Compare `run` against the golden in `folder`. Never writes anything.

    `root` is the golden dir: a symbolic link anywhere between it and `folder` is refused.

    With `use_calibrated`, tolerances stored in the golden by `trainguard calibrate --write`
    replace `policy`'s defaults (the caller passes False when the marker set them itself).
    """
    shown = display_path(folder, base)
    try:
        reference = golden.read_run(folder, max_bytes=max_bytes, root=root)
    except GoldenMissingError:
        return GuardResult(
            nodeid, shown, NO_GOLDEN, run=run,
            message=(f"trainguard: {nodeid} has no golden yet (looked in {shown}).\n"
                     f"A guarded test never creates its golden silently. Record it with:\n  {bless_command}"),
        )
    except TrainguardError as exc:
        return GuardResult(
            nodeid, shown, UNREADABLE, run=run,
            message=(f"trainguard: the golden of {nodeid} cannot be used:\n  {exc}\n"
                     f"It was left untouched. If you want to replace it with this run, re-bless:\n  {bless_command}"),
        )
    if use_calibrated:
        from .settings import calibrated_policy

        policy = calibrated_policy(policy, reference.meta)
    cmp = compare(reference, run, policy)
    result = GuardResult(nodeid, shown, cmp.outcome, comparison=cmp, run=run, reference=reference)
    if cmp.failed:
        result.message = failure_report(nodeid, shown, cmp, bless_command)
    return result


def bless(nodeid: str, run: Run, folder: Path, policy: Policy, base: Path | None = None,
          root: Path | None = None, max_bytes: int = golden.DEFAULT_MAX_FILE_BYTES) -> GuardResult:
    """Write `run` as the golden in `folder`, unless the golden already holds the same bits."""
    shown = display_path(folder, base)
    outcome = BLESSED_NEW
    if golden.exists(folder):
        outcome = BLESSED_CHANGED
        try:
            previous = golden.read_run(folder, max_bytes=max_bytes, root=root)
        except TrainguardError:  # an unreadable golden is simply replaced by a bless
            previous = None
        if previous is not None and _same_golden(previous, run, policy):
            return GuardResult(nodeid, shown, BLESSED_UNCHANGED, blessing=True)
        if previous is not None and "calibrated" in previous.meta and "calibrated" not in run.meta:
            # Calibrated tolerances measure the machine's noise floor, not the behaviour being
            # re-blessed: keep them (re-run `trainguard calibrate --write` to refresh them).
            run.meta = {**run.meta, "calibrated": previous.meta["calibrated"]}
    golden.write_run(folder, run, root=root)
    return GuardResult(nodeid, shown, outcome, blessing=True)


def _same_golden(previous: Run, run: Run, policy: Policy) -> bool:
    exact = Policy(default=policy.default, exact=True, metrics=policy.metrics)
    cmp = compare(previous, run, exact)
    if cmp.outcome != IDENTICAL or (previous.trace is None) != (run.trace is None):
        return False
    if cmp.trace is not None and cmp.trace.first_bitwise is not None:
        return False
    keys = ("seed", "tolerances", "deterministic")
    return all(previous.meta.get(k) == run.meta.get(k) for k in keys)


# -- repeats (--trainguard-repeat N) --------------------------------------------------------

#: Text of torch's deterministic-mode alerts (warn_only=True warns with it, True raises with it).
_DETERMINISM_ALERT = ("does not have a deterministic implementation", "use_deterministic_algorithms")


def is_determinism_alert(text: str) -> bool:
    """True for the message torch gives for an op without a deterministic implementation."""
    return any(marker in text for marker in _DETERMINISM_ALERT)


def _first_metric_difference(cmp: Comparison, index: int) -> str:
    from .report import fmt

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


def _first_tensor_difference(cmp: Comparison) -> str:
    from .report import short

    off = [t for t in cmp.tensors if t.verdict != IDENTICAL]
    if not off:
        return ""
    t = off[0]
    how = ", ".join(t.reasons) or "checksum"
    if t.max_abs == t.max_abs:  # not NaN
        how += f", max abs diff {short(t.max_abs)}"
    more = f" (and {len(off) - 1} more)" if len(off) > 1 else ""
    return f"state entry {t.name}: {how}{more}"


def check_repeats(nodeid: str, runs: list[Run], folder: Path, base: Path | None = None,
                  hints: list[str] | None = None) -> GuardResult | None:
    """Compare the runs of one test made with the same seed and settings, bit for bit.

    None when they all agree (the caller then checks or blesses the first run as usual);
    otherwise a NONDETERMINISTIC result naming the first differing run, metric and step,
    state entry and (for watched tests) trace stage, with `hints` appended.
    """
    from .tolerance import Tolerance

    exact = Policy(default=Tolerance(0.0, 0.0), exact=True)
    first = runs[0]
    differing: list[tuple[int, Comparison]] = []
    for index, other in enumerate(runs[1:], start=2):
        cmp = compare(first, other, exact)
        trace_off = cmp.trace is not None and cmp.trace.first_bitwise is not None
        if cmp.outcome != IDENTICAL or trace_off or (first.trace is None) != (other.trace is None):
            differing.append((index, cmp))
    if not differing:
        return None
    index, cmp = differing[0]
    where = [w for w in (_first_metric_difference(cmp, index), _first_tensor_difference(cmp)) if w]
    if cmp.trace is not None and cmp.trace.first_bitwise is not None:
        fb = cmp.trace.first_bitwise
        where.append(f"trace: first bitwise difference at step {fb.step}, stage {fb.stage} "
                     f"({', '.join(fb.names[:3])}{' ...' if len(fb.names) > 3 else ''})")
    if not where:
        where.append("trace recorded in one run only")
    agree = [i for i in range(2, len(runs) + 1) if i not in {d[0] for d in differing}]
    shown = display_path(folder, base)
    lines = [
        f"trainguard: {nodeid} is nondeterministic: {len(runs)} runs with the same seed and settings "
        f"in this process did not agree bit for bit.",
        f"run {index} differs from run 1 ({len(differing)} of {len(runs) - 1} repeats differ"
        + (f"; run{'s' if len(agree) > 1 else ''} {', '.join(map(str, agree))} agree{'' if len(agree) > 1 else 's'} "
           "with run 1" if agree else "") + "):",
    ]
    lines += [f"  first differing {w}" for w in where]
    lines.append(f"The golden ({shown}) was neither compared nor written: a run that differs from itself "
                 "cannot be checked against a golden.")
    lines += hints or []
    result = GuardResult(nodeid, shown, NONDETERMINISTIC, comparison=cmp, message="\n".join(lines),
                         divergence=f"run {index} vs run 1: " + "; ".join(where))
    return result

