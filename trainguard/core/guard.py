"""The verdict for one guarded test: check a recorded run against its golden, or bless it.

This is the step between recording and reporting, shared by the pytest plugin and the
CLI. It knows nothing about pytest: `settle` takes what a skin knows about one finished
test (a `GuardRequest`: the run, the settings, the stores, the fix commands) and does the
rest of the pipeline (metadata, repeats, bless or check, results folder, summary row).
`check`, `bless` and `check_repeats` return data; `report` renders it.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Callable, Sequence

from . import dispatch, planting
from .comparison import Comparison, compare
from .errors import GoldenMissingError, TrainguardError, UsageError
from .fixes import FixCommands
from .meta import MAX_NAMES, GoldenMeta, utc_stamp
from .outcome import GuardResult
from .records import Run, nonfinite_parts
from .report import first_metric_difference, first_tensor_difference, render_result
from .report_files import row_for
from .retrace import departure
from .settings import GuardSettings, calibrated_policy
from .store import GoldenStore
from .tolerance import Policy, Tolerance
from .verdicts import (
    BLESSED_CHANGED,
    BLESSED_NEW,
    BLESSED_UNCHANGED,
    CHANGED,
    IDENTICAL,
    NO_GOLDEN,
    NONDETERMINISTIC,
    UNREADABLE,
)


def display_path(folder: Path, base: Path | None) -> str:
    if base is not None:
        try:
            return os.path.relpath(folder, base)
        except ValueError:  # different drive on Windows
            pass
    return str(folder)


def check(nodeid: str, run: Run, folder: Path, policy: Policy, bless_command: str | None = None,
          base: Path | None = None, use_calibrated: bool = True, store: GoldenStore | None = None,
          light: Run | None = None) -> GuardResult:
    """Compare `run` against the golden in `folder`. Never writes anything.

    Parameters
    ----------
    nodeid : str
        The test, as messages name it.
    run : Run
        The new run, with its metadata.
    folder : Path
        The golden folder (in `store`, whose root, size limit and link rules apply).
    policy : Policy
        The tolerances in force. With `use_calibrated`, tolerances stored in the golden by
        `trainguard calibrate --write` replace its defaults (False when the marker set them).
    bless_command : str, optional
        The command that re-blesses the test; when given, `message` is rendered with it.

    Returns
    -------
    GuardResult
        outcome identical, within tolerance, changed, no golden or unreadable golden.
    """
    store = store if store is not None else GoldenStore(folder)
    shown = display_path(folder, base)
    try:
        reference = light if light is not None else store.read(folder, light=True)
    except GoldenMissingError:
        result = GuardResult(nodeid, shown, NO_GOLDEN, run=run)
    except TrainguardError as exc:
        result = GuardResult(nodeid, shown, UNREADABLE, run=run, error=str(exc))
    else:
        why = planting.golden_problem(reference.meta.get("fingerprint"))
        if why:
            why += "; re-bless it"
        else:
            why = dispatch.mismatch(reference.meta.get("fingerprint"), run.meta.get("fingerprint"))
        if why:
            result = GuardResult(nodeid, shown, UNREADABLE, run=run, error=f"{shown}: {why}")
        else:
            if use_calibrated:
                policy = calibrated_policy(policy, reference.meta)
            cmp = compare(reference, run, policy)
            if cmp.outcome != IDENTICAL:
                # Something differs: read the whole golden, stored values and trace included, for
                # the verdict's details (the light read above is all a bit-identical run needs).
                reference = store.read(folder)
                cmp = compare(reference, run, policy)
            elif run.trace is not None and store.has_trace(folder):
                cmp = replace(cmp, trace_note="")  # not read, not needed: every checksum matched
            result = GuardResult(nodeid, shown, cmp.outcome, comparison=cmp, run=run, reference=reference)
    if bless_command is not None:
        result.message = render_result(result, bless_command)
    return result


def bless(nodeid: str, run: Run, folder: Path, policy: Policy, base: Path | None = None,
          store: GoldenStore | None = None) -> GuardResult:
    """Write `run` as the golden in `folder`, unless the golden already holds the same bits.

    Returns a blessing `GuardResult`: outcome new, changed or unchanged (an unchanged golden
    is not rewritten). Calibrated tolerances of the golden it replaces are kept.
    """
    store = store if store is not None else GoldenStore(folder)
    shown = display_path(folder, base)
    outcome = BLESSED_NEW
    if store.exists(folder):
        outcome = BLESSED_CHANGED
        try:
            previous: Run | None = store.read(folder)
        except TrainguardError:  # an unreadable golden is simply replaced by a bless
            previous = None
        if previous is not None and _same_golden(previous, run, policy):
            return GuardResult(nodeid, shown, BLESSED_UNCHANGED, blessing=True)
        if previous is not None and "calibrated" in previous.meta and "calibrated" not in run.meta:
            # Calibrated tolerances measure the machine's noise floor, not the behaviour being
            # re-blessed: keep them (re-run `trainguard calibrate --write` to refresh them).
            run = replace(run, meta=run.meta.with_(calibrated=previous.meta["calibrated"]))
    store.write(folder, run)
    return GuardResult(nodeid, shown, outcome, blessing=True)


def _same_golden(previous: Run, run: Run, policy: Policy) -> bool:
    exact = Policy(default=policy.default, exact=True, metrics=policy.metrics)
    cmp = compare(previous, run, exact)
    if cmp.outcome != IDENTICAL or (previous.trace is None) != (run.trace is None):
        return False
    if cmp.trace is not None and cmp.trace.first_bitwise is not None:
        return False
    keys = ("seed", "tolerances", "deterministic")
    if dispatch.mismatch(previous.meta.get("fingerprint"), run.meta.get("fingerprint")):
        return False  # same bits, but blessed in the other mode: rewrite it so the mode is recorded
    if planting.golden_problem(previous.meta.get("fingerprint")):
        return False  # calibrate's scratch (a plant without effect): rewrite it as a real golden
    return all(previous.meta.get(k) == run.meta.get(k) for k in keys)


# -- repeats (--trainguard-repeat N) --------------------------------------------------------


def check_repeats(nodeid: str, runs: list[Run], folder: Path, base: Path | None = None) -> GuardResult | None:
    """Compare the runs of one test made with the same seed and settings, bit for bit.

    None when they all agree (the caller then checks or blesses the first run as usual);
    otherwise a NONDETERMINISTIC result naming the first differing run, metric and step,
    state entry and (for watched tests) trace stage.
    """
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
    where = [w for w in (first_metric_difference(cmp, index), first_tensor_difference(cmp)) if w]
    if cmp.trace is not None and cmp.trace.first_bitwise is not None:
        fb = cmp.trace.first_bitwise
        where.append(f"trace: first bitwise difference at step {fb.step}, stage {fb.stage} "
                     f"({', '.join(fb.names[:3])}{' ...' if len(fb.names) > 3 else ''})")
    if not where:
        where.append("trace recorded in one run only")
    agree = [i for i in range(2, len(runs) + 1) if i not in {d[0] for d in differing}]
    return GuardResult(nodeid, display_path(folder, base), NONDETERMINISTIC, comparison=cmp, where=where,
                       runs=len(runs), differing_run=index, differing=len(differing), agreeing=agree,
                       divergence=f"run {index} vs run 1: " + "; ".join(where))


# -- one finished guarded test, start to end ------------------------------------------------


@dataclass(frozen=True)
class GuardRequest:
    """What a skin knows about one finished guarded test; `settle` does the rest."""

    nodeid: str
    run: Run  # as recorded, without metadata
    settings: GuardSettings
    fingerprint: dict[str, Any]
    max_values: int
    golden: GoldenStore
    commands: FixCommands
    bless: bool = False
    reason: str = ""
    base: Path | None = None  # folder paths in messages are shown relative to it (pytest's rootdir)
    repeats: Sequence[Run] = ()  # further runs of the body (--trainguard-repeat)
    repeat_hints: Sequence[str] = ()  # what to look at when the repeats disagree
    results: GoldenStore | None = None  # --trainguard-results: where runs that did not match go
    report_dir: Path | None = None  # --trainguard-report: plots of changed trajectories go here
    ci: str | None = None  # the CI variable's value in a CI run, else None
    #: Re-runs the test body with the full trace (the run has a light one): called by `settle` when a
    #: check fails, or finds the run within tolerance while results are kept (see `retrace`).
    retrace: Callable[[], Run] | None = None
    #: The golden as a light read made before the body ran (`Trajectory.known` came from it), reused by the check.
    reference: Run | None = None


def with_stored_values(run: Run, golden: Run | None) -> Run:
    """`run` with the stored values of entries recorded by hashing alone (bits equal to the golden's,
    see `Trajectory.known`) copied from `golden`, read whole, so a run written as a golden is complete."""
    if golden is None:
        return run
    tensors = dict(run.tensors)
    for name, rec in run.tensors.items():
        ref = golden.tensors.get(name)
        if rec.values is None and ref is not None and ref.values is not None and ref.sha256 == rec.sha256:
            tensors[name] = replace(rec, values=ref.values)
    return replace(run, tensors=tensors)


def _needs_full_trace(request: GuardRequest, run: Run, result: GuardResult) -> bool:
    """A light-traced run gets its full trace when a report will show where it departs (a failed
    check), or when it is kept in a results folder (from which it may be blessed)."""
    if request.retrace is None or run.trace is not None or run.prints is None or result.comparison is None:
        return False
    return result.outcome == CHANGED or (request.results is not None and result.outcome != IDENTICAL)


def settle(request: GuardRequest) -> tuple[GuardResult, dict[str, Any]]:
    """Metadata, repeats, bless or check, results folder and summary row for one guarded test.

    Returns the result (its `message` rendered when it fails the test) and the summary row.
    Raises `UsageError` when the test recorded nothing or its marker names unknown metrics.
    """
    nodeid, settings = request.nodeid, request.settings
    if request.run.is_empty:
        raise UsageError(f"{nodeid}: the guarded test recorded nothing; call trajectory.log(step, loss=...) "
                         "or trajectory.state(model, optimizer=opt) in it")
    unknown = sorted(set(settings.policy.metrics or {}) - set(request.run.metrics))
    if unknown:
        raise UsageError(f"{nodeid}: the marker's metrics= names {', '.join(map(repr, unknown))}, which the test "
                         f"never logged (logged: {', '.join(request.run.metrics) or 'none'}); fix the name in the marker")
    nonfinite = nonfinite_parts(request.run) if request.bless else []
    run = replace(request.run, meta=GoldenMeta(
        nodeid=nodeid, seed=settings.seed, deterministic=settings.deterministic,
        tolerances=settings.policy.to_json(), max_values=request.max_values, fingerprint=request.fingerprint,
        blessed_at=utc_stamp(), reason=request.reason, nonfinite=tuple(nonfinite[:MAX_NAMES]) or None))
    store = request.golden
    folder = store.folder(nodeid)
    result = None
    if request.repeats:
        result = check_repeats(nodeid, [run, *request.repeats], folder, base=request.base)
    if result is None and request.bless:
        result = bless(nodeid, run, folder, settings.policy, base=request.base, store=store)
        if nonfinite:  # passes later only against the same NaNs: a reviewer should know it was blessed
            result.warning = (f"blessed with non-finite values: {', '.join(nonfinite[:5])}"
                              + (f" and {len(nonfinite) - 5} more" if len(nonfinite) > 5 else ""))
    elif result is None:
        result = check(nodeid, run, folder, settings.policy, base=request.base,
                       use_calibrated=not settings.marker_tolerance, store=store, light=request.reference)
        if _needs_full_trace(request, run, result):
            assert request.retrace is not None
            again = request.retrace()
            parted = departure(run, again)
            if not parted:
                run = replace(run, trace=again.trace)
                result = check(nodeid, run, folder, settings.policy, base=request.base,
                               use_calibrated=not settings.marker_tolerance, store=store)
            elif result.comparison is not None:
                result.comparison.trace_note = (
                    "trace: not recorded; the test body, run again with the full trace, did not reproduce this run "
                    f"({parted}): the test is nondeterministic; find out why with --trainguard-repeat 3")
    result.message = render_result(result, request.commands.bless(nodeid), hints=request.repeat_hints,
                                   ci=request.ci)
    if request.results is not None and not request.bless and result.outcome not in (IDENTICAL, NONDETERMINISTIC):
        request.results.write(request.results.folder(nodeid), with_stored_values(run, result.reference))
    return result, row_for(result, request.report_dir)
