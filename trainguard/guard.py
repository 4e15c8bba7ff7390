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
#: Outcomes of a bless.
BLESSED_NEW = "new"
BLESSED_CHANGED = "changed"
BLESSED_UNCHANGED = "unchanged"

CHECK_OUTCOMES = (IDENTICAL, CLOSE, CHANGED, NO_GOLDEN, UNREADABLE)
BLESS_OUTCOMES = (BLESSED_NEW, BLESSED_CHANGED, BLESSED_UNCHANGED)


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

    @property
    def failed(self) -> bool:
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
          use_calibrated: bool = True) -> GuardResult:
    """Compare `run` against the golden in `folder`. Never writes anything.

    With `use_calibrated`, tolerances stored in the golden by `trainguard calibrate --write`
    replace `policy`'s defaults (the caller passes False when the marker set them itself).
    """
    shown = display_path(folder, base)
    try:
        reference = golden.read_run(folder, max_bytes=max_bytes)
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


def bless(nodeid: str, run: Run, folder: Path, policy: Policy, base: Path | None = None) -> GuardResult:
    """Write `run` as the golden in `folder`, unless the golden already holds the same bits."""
    shown = display_path(folder, base)
    outcome = BLESSED_NEW
    if golden.exists(folder):
        outcome = BLESSED_CHANGED
        try:
            previous = golden.read_run(folder)
        except TrainguardError:  # an unreadable golden is simply replaced by a bless
            previous = None
        if previous is not None and _same_golden(previous, run, policy):
            return GuardResult(nodeid, shown, BLESSED_UNCHANGED, blessing=True)
        if previous is not None and "calibrated" in previous.meta and "calibrated" not in run.meta:
            # Calibrated tolerances measure the machine's noise floor, not the behaviour being
            # re-blessed: keep them (re-run `trainguard calibrate --write` to refresh them).
            run.meta = {**run.meta, "calibrated": previous.meta["calibrated"]}
    golden.write_run(folder, run)
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
