"""`trainguard calibrate`: measure a guarded test's run-to-run noise and propose tolerances.

The test is run several times, each time in a fresh `python -m pytest` process that
blesses it into a scratch folder, under settings that must not count as behaviour
changes on this machine:

- the baseline (as configured, with Python's hash seed fixed), twice or more: two runs
  with identical settings must agree bit for bit, else something in the test reads a
  source that changes between runs (time, `os.urandom`, an unseeded generator);
- torch's intra-op thread count set to other values (`--trainguard-threads`): CPU
  reductions split their work by thread and may add in another order;
- torch's deterministic mode off (`--trainguard-nondeterministic`): kernels without a
  deterministic implementation (atomic adds, mostly on GPUs) are then allowed;
- another `PYTHONHASHSEED`: Python salts str hashes per process, so a plain `pytest`
  run iterates sets of names in an order that changes from run to run;
- another CPU's kernel dispatch (x86-64, unpinned runs only): ATen's, oneDNN's and oneMKL's
  baseline code paths, and oneMKL's all-processor CNR branch.

Then, unless no proposal could be stored, the power checks: one run per planted change
(core.planting), judged under the proposal; `--write` refuses a proposal that misses the
1 % learning-rate change. With `--from DIR...` the noise runs are read from CI's result
folders instead, and only the baseline and the power checks run here.

Everything is measured against the first baseline run. The analysis (`analyse`) and
the report (`format_report`) are pure functions of the recorded runs; only
`run_variations` starts processes. Nothing here imports pytest.
"""

from __future__ import annotations

import math
import os
import shlex
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import replace
from pathlib import Path
from typing import Any, Callable, Sequence

from ..core.errors import GoldenMissingError, TrainguardError
from ..core.project import default_golden_dir
from ..core.records import Run
from ..core.store import GoldenStore
from ..core.text import safe_output
from . import pytest_runs
from .calibration import (
    DEFAULT_RUNS,
    DEFAULT_SAFETY,
    REQUIRED_PLANT,
    Calibration,
    RecordedRun,
    RunSpec,
    Setting,
    add_power,
    analyse,
    check_golden,
    format_report,
)

__all__ = ["Calibration", "RecordedRun", "RunSpec", "Setting", "analyse", "calibrate", "plan", "thread_counts",
           "write_calibration"]


# -- planning the runs ---------------------------------------------------------------------


def base_hash_seed(environ: dict[str, str] | os._Environ[str] | None = None) -> str:
    """The PYTHONHASHSEED of the baseline: the user's when it is a number, else 0."""
    raw = (environ if environ is not None else os.environ).get("PYTHONHASHSEED", "")
    return raw if raw.isdigit() and int(raw) < 2**32 else "0"


def baseline_setting(hash_seed: str) -> Setting:
    return Setting("baseline", f"as configured, PYTHONHASHSEED={hash_seed}", (), (("PYTHONHASHSEED", hash_seed),))


def thread_counts(baseline_threads: int, cpu_count: int | None) -> list[int]:
    """Two intra-op thread counts other than the baseline's: 1 and the CPU count where possible."""
    cpus = max(1, cpu_count or 1)
    out: list[int] = []
    for n in (1, cpus, max(2, baseline_threads // 2), baseline_threads * 2, baseline_threads + 1, baseline_threads + 2):
        if n >= 1 and n != baseline_threads and n not in out:
            out.append(n)
        if len(out) == 2:
            break
    return out


#: Kernel dispatch another machine would choose, imitated on this one (each in a fresh process,
#: since the libraries read these settings when they start): ATen's and oneDNN's scalar/SSE
#: code paths with oneMKL limited to SSE4.2 (an older or other-vendor CPU), and oneMKL's
#: all-processor reproducible branch (oneMKL developer guide, "Conditional Numerical
#: Reproducibility").
DISPATCH_VARIATIONS: tuple[tuple[str, str, tuple[tuple[str, str], ...]], ...] = (
    ("dispatch=sse4.2", "another CPU's kernels: MKL_ENABLE_INSTRUCTIONS=SSE4_2 ATEN_CPU_CAPABILITY=default "
     "ONEDNN_MAX_CPU_ISA=SSE41",
     (("MKL_ENABLE_INSTRUCTIONS", "SSE4_2"), ("ATEN_CPU_CAPABILITY", "default"), ("ONEDNN_MAX_CPU_ISA", "SSE41"))),
    ("dispatch=mkl-compatible", "oneMKL's all-processor branch: MKL_CBWR=COMPATIBLE", (("MKL_CBWR", "COMPATIBLE"),)),
)

#: Planted changes (core.planting) whose detection the report shows; REQUIRED_PLANT must be caught for --write.
POWER_PLANTS = (("lr:0.001", False), (REQUIRED_PLANT, True), ("params:0.0001", False))


def power_settings(hash_seed: str) -> list[Setting]:
    """One run per planted change, with the baseline's other settings."""
    from ..core.planting import parse

    fixed_env = (("PYTHONHASHSEED", hash_seed),)
    return [Setting(f"planted {spec}", parse(spec).describe(), (f"--trainguard-plant={spec}",), fixed_env,
                    plant=spec, required=required) for spec, required in POWER_PLANTS]


def plan(baseline_meta: dict[str, Any], runs: int, hash_seed: str, cpu_count: int | None,
         x86: bool = True) -> tuple[list[RunSpec], list[str]]:
    """The runs after the first baseline run, and notes on variations left out."""
    notes: list[str] = []
    base = baseline_setting(hash_seed)
    fixed_env = (("PYTHONHASHSEED", hash_seed),)
    fp = baseline_meta.get("fingerprint") or {}
    threads = (fp.get("threads") or {}).get("intra_op")
    variations: list[Setting] = []
    portable = isinstance(fp.get("portable"), dict) and "unavailable" not in fp["portable"]
    if portable:
        notes.append("thread count and kernel dispatch not varied: the test runs in portable mode, which pins both")
    elif isinstance(threads, int) and threads >= 1:
        for n in thread_counts(threads, cpu_count):
            variations.append(Setting(f"threads={n}", f"--trainguard-threads {n} (baseline: {threads})",
                                      ("--trainguard-threads", str(n)), fixed_env))
    else:
        notes.append("thread count not varied: the baseline run recorded no intra-op thread count")
    if baseline_meta.get("deterministic") is False:
        notes.append("deterministic mode not varied: the marker already turns it off (deterministic=False)")
    else:
        variations.append(Setting("nondeterministic", "--trainguard-nondeterministic (deterministic mode off)",
                                  ("--trainguard-nondeterministic",), fixed_env))
    other_seed = str((int(hash_seed) + 1) % 2**32)
    variations.append(Setting(f"hashseed={other_seed}", f"PYTHONHASHSEED={other_seed} (another str hash salt)",
                              (), (("PYTHONHASHSEED", other_seed),)))
    if not portable and x86:
        variations += [Setting(key, text, (), (*fixed_env, *env)) for key, text, env in DISPATCH_VARIATIONS]
    elif not portable:
        notes.append("kernel dispatch not varied: the dispatch settings describe x86-64 code paths")
    specs = [RunSpec(f"baseline {i}", base) for i in range(2, runs + 1)]
    repeats = max(1, runs - 1)
    for v in variations:
        for k in range(1, repeats + 1):
            specs.append(RunSpec(v.key if repeats == 1 else f"{v.key} #{k}", v))
    return specs, notes


# -- running -------------------------------------------------------------------------------


def run_once(nodeid: str, spec: RunSpec, scratch: Path, cwd: Path) -> RecordedRun:
    """Run the test once under `spec` (blessing into `scratch/<label>`) and read what it recorded."""
    out_dir = scratch / spec.folder_name
    cmd = pytest_runs.bless_into(nodeid, out_dir, f"trainguard calibrate: {spec.setting.key}", *spec.setting.args)
    env = dict(os.environ)
    env.update(dict(spec.setting.env))
    started = time.perf_counter()
    proc = pytest_runs.run(cmd, cwd, env)
    seconds = time.perf_counter() - started
    output = (proc.stdout or "") + (proc.stderr or "")
    if proc.returncode in (4, 5):
        raise TrainguardError(
            f"{nodeid}: pytest found no such test in {cwd} (exit status {proc.returncode}):\n{pytest_runs.tail(output, 6)}\n"
            f"  list the guarded tests' node ids with: python -m pytest --collect-only -q -m trainguard")
    if proc.returncode != 0:
        raise TrainguardError(
            f"{nodeid} did not pass in calibration run '{spec.label}' ({spec.setting.description}); "
            f"pytest exited with status {proc.returncode}:\n{pytest_runs.tail(output)}\n"
            f"  reproduce it with: {pytest_runs.shell_line(cmd, spec.setting.env)}")
    scratch_store = GoldenStore(out_dir, read_only=True)
    found = scratch_store.find() if out_dir.is_dir() else []
    if not found:
        raise TrainguardError(
            f"{nodeid} ran but recorded no golden in calibration run '{spec.label}': it is not a guarded test, "
            f"or it was skipped or deselected. Guarded tests carry @pytest.mark.trainguard(seed=...) and use the "
            f"'trajectory' fixture; check with: python -m pytest -q -rs {shlex.quote(nodeid)}")
    if len(found) > 1:
        ids = [str(f.relative_to(out_dir)) for f in found]
        raise TrainguardError(
            f"{nodeid} selects {len(found)} guarded tests ({', '.join(ids[:5])}{', ...' if len(ids) > 5 else ''}); "
            f"calibrate one test at a time: give its full node id, e.g. from "
            f"python -m pytest --collect-only -q {shlex.quote(nodeid)}")
    run = scratch_store.read(found[0])
    return RecordedRun(spec, run, found[0], seconds)


def run_specs(nodeid: str, specs: Sequence[RunSpec], scratch: Path, cwd: Path, jobs: int,
              progress: Callable[[str], None] = lambda line: None) -> list[RecordedRun]:
    """Run `specs`, `jobs` at a time, each in a fresh process; in the order given."""
    def one(spec: RunSpec) -> RecordedRun:
        rec = run_once(nodeid, spec, scratch, cwd)
        progress(f"  done: {spec.label} ({rec.seconds:.1f} s)")
        return rec

    with ThreadPoolExecutor(max_workers=max(1, jobs)) as pool:
        return list(pool.map(one, specs))


def run_all(nodeid: str, runs: int, scratch: Path, cwd: Path, jobs: int,
            progress: Callable[[str], None] = lambda line: None,
            after_first: Callable[[RecordedRun], None] = lambda first: None,
            baseline_only: bool = False) -> tuple[list[RecordedRun], list[str]]:
    """The first baseline run alone (it tells the test's real node id, thread count and deterministic
    setting, and `after_first` may refuse to go on), then the noise variations, `jobs` at a time.
    With `baseline_only`, nothing follows it (calibrate --from reads the noise runs). The power
    checks run later (`run_specs(power_specs())`), once the noise says they are worth running."""
    from ..core.dispatch import baseline_problem

    hash_seed = base_hash_seed()
    first = run_once(nodeid, RunSpec("baseline 1", baseline_setting(hash_seed)), scratch, cwd)
    progress(f"  done: baseline 1 ({first.seconds:.1f} s)")
    after_first(first)
    if baseline_only:
        return [first], []
    specs, notes = plan(first.run.meta, runs, hash_seed, os.cpu_count(), x86=not baseline_problem())
    return [first, *run_specs(nodeid, specs, scratch, cwd, jobs, progress)], notes


def power_specs() -> list[RunSpec]:
    """One run per planted change, with the baseline's hash seed."""
    return [RunSpec(p.key, p) for p in power_settings(base_hash_seed())]


def skip_power(cal: Calibration) -> str:
    """Why the power checks are not worth running for this noise ('' when they are): there is no
    proposal to judge (differences no tolerance covers), or it is over the caps and cannot be stored."""
    if cal.problems:
        return "no tolerance covers the differences above, so there is nothing to judge them under"
    if cal.proposal is not None and _over_caps(cal):
        return "the proposal is looser than a calibrated tolerance may be, so it cannot be stored anyway"
    return ""


def default_jobs(cpu_count: int | None = None) -> int:
    """Runs at a time: a quarter of the CPUs, 1 to 4 (each run uses several threads itself)."""
    return max(1, min(4, (cpu_count if cpu_count is not None else (os.cpu_count() or 1)) // 4))



def read_folders(nodeid: str, folders: Sequence[str | os.PathLike[str]], seed: Any) -> list[RecordedRun]:
    """The test's run in each of `folders` (results folders from --trainguard-results, or golden folders),
    checked to be the same test, seed and dispatch mode, none of them with a planted change."""
    from ..core import dispatch, planting

    out: list[RecordedRun] = []
    first_fp: Any = None
    for i, given in enumerate(folders):
        root = Path(given)
        if not root.is_dir():
            raise TrainguardError(f"--from {given}: no such folder; give the folders --trainguard-results=DIR wrote "
                                  f"(one per CI runner), or a golden folder")
        store = GoldenStore(root, read_only=True)
        folder = store.folder(nodeid)
        if not store.exists(folder):
            raise TrainguardError(
                f"--from {given}: holds no run of {nodeid} (looked in {folder}). --trainguard-results saves only "
                f"runs that did not match their golden bit for bit, so that runner matched the golden exactly: "
                f"leave {given} out and give the golden folder instead, which stands for it")
        run = store.read(folder)  # format, digest and limits checked as for any golden
        if run.meta.nodeid and run.meta.nodeid != nodeid:
            raise TrainguardError(f"--from {given}: {folder} holds a run of {run.meta.nodeid}, not of {nodeid}")
        if run.meta.get("seed") != seed:
            raise TrainguardError(f"--from {given}: {folder} was recorded with seed {run.meta.get('seed')}, this test "
                                  f"runs with seed {seed}; runs with other seeds say nothing about noise. Re-run CI "
                                  "on the current code first")
        fp = run.meta.get("fingerprint") or {}
        why = planting.golden_problem(fp)
        if why:
            raise TrainguardError(f"--from {given}: {folder}: {why}")
        if i and dispatch.mismatch(first_fp, fp):
            raise TrainguardError(f"--from {given}: {folder} and {folders[0]} differ in portable mode (one pinned "
                                  "kernel dispatch, the other not); calibrate runs of one mode at a time")
        first_fp = first_fp if i else fp
        cpu = fp.get("cpu") if isinstance(fp.get("cpu"), dict) else {}
        where = str(cpu.get("model_name") or cpu.get("vendor") or "machine not recorded")
        label = root.name or str(given)
        if any(r.spec.label == label for r in out):
            label = str(given)
        out.append(RecordedRun(RunSpec(label, Setting("from", f"read from {given}, recorded on {where}")), run, folder))
    return out


# -- the golden ----------------------------------------------------------------------------


def bless_command(nodeid: str, golden_dir_option: str | None = None) -> str:
    return pytest_runs.PytestCommands(golden_dir_option).bless(nodeid)


def write_calibration(folder: Path, calibrated: dict[str, Any] | None, store: GoldenStore | None = None) -> Run:
    """Store (or, with None, remove) the `calibrated` entry of the golden in `folder`, as one set."""
    store = store if store is not None else GoldenStore(folder)
    run = store.read(folder)
    run = replace(run, meta=run.meta.with_(calibrated=calibrated))
    store.write(folder, run)
    return run


# -- the command ---------------------------------------------------------------------------


def calibrate(nodeid: str, runs: int = DEFAULT_RUNS, safety: float = DEFAULT_SAFETY, write: bool = False,
              golden_dir: str | os.PathLike[str] | None = None, jobs: int | None = None,
              keep_runs: str | os.PathLike[str] | None = None, cwd: str | os.PathLike[str] | None = None,
              out: Callable[[str], None] = print, golden_dir_option: str | None = None,
              sources: Sequence[str | os.PathLike[str]] = ()) -> int:
    """Run, analyse, report, and with `write` store the proposal in the golden. Returns an exit status:
    0 done, 1 no tolerance could be proposed (or written). User mistakes raise TrainguardError.

    With `sources` (calibrate --from), the noise runs are read from those folders (CI's result
    folders from other runners) instead of being run here; the power checks still run here.
    """
    if sources and len(sources) < 2:
        raise TrainguardError(f"--from needs at least two folders to measure a spread, got {len(sources)}; add the "
                              "golden folder or another runner's results folder")
    if runs < 2:
        raise TrainguardError(f"--runs must be at least 2 (two identical runs tell whether the test is deterministic "
                              f"with everything fixed), got {runs}")
    if not (math.isfinite(safety) and safety >= 1):
        raise TrainguardError(f"--safety must be a number >= 1 (below 1 the proposal would not cover the spread "
                              f"already observed), got {safety:g}")
    cwd = Path(cwd) if cwd is not None else Path.cwd()
    jobs = jobs if jobs is not None else default_jobs()
    if jobs < 1:
        raise TrainguardError(f"--jobs must be at least 1, got {jobs}")
    store = GoldenStore(Path(golden_dir) if golden_dir is not None else default_golden_dir(cwd),
                        commands=pytest_runs.PytestCommands(golden_dir_option))
    keep = Path(keep_runs) if keep_runs is not None else None
    if keep is not None and keep.exists() and (not keep.is_dir() or any(keep.iterdir())):
        raise TrainguardError(f"--keep-runs {keep}: must be an empty folder or not exist yet; choose another "
                              f"folder or remove it (rm -r {shlex.quote(str(keep))})")

    def progress(line: str) -> None:
        print(safe_output(line), file=sys.stderr, flush=True)

    def golden_of(first: RecordedRun) -> tuple[str, Path, str]:
        real = str(first.run.meta.get("nodeid") or nodeid)  # pytest's id, relative to rootdir
        folder = store.folder(real)
        shown = os.path.relpath(folder, cwd) if folder.is_absolute() else str(folder)
        return real, folder, shown

    def refuse_without_golden(first: RecordedRun) -> None:
        real, folder, shown = golden_of(first)
        if write and not store.exists(folder):
            raise TrainguardError(f"--write: {real} has no golden in {shown} to store the calibration in; bless it "
                                  f"first:\n  {bless_command(real, golden_dir_option)}\n"
                                  f"then run calibrate with --write again")

    progress(f"trainguard calibrate: running {nodeid} (baseline first, then {jobs} at a time)")
    started = time.perf_counter()

    def measure(scratch: Path) -> tuple[list[RecordedRun], Calibration]:
        recorded, notes = run_all(nodeid, runs, scratch, cwd, jobs, progress, refuse_without_golden,
                                  baseline_only=bool(sources))
        local = recorded[0]
        noise = recorded
        if sources:
            real = str(local.run.meta.get("nodeid") or nodeid)
            noise = read_folders(real, sources, local.run.meta.get("seed"))
        cal = analyse(nodeid, noise, safety, notes, power_reference=local)
        why = skip_power(cal)
        if why:
            cal.notes.append(f"power checks skipped: {why}")
            return recorded, cal
        planted = run_specs(nodeid, power_specs(), scratch, cwd, jobs, progress)
        cal.runs.extend(planted)
        add_power(cal, local, planted)
        return recorded, cal

    if keep is not None:
        keep.mkdir(parents=True, exist_ok=True)
        recorded, cal = measure(keep)
    else:
        with tempfile.TemporaryDirectory(prefix="trainguard-calibrate-") as tmp:
            recorded, cal = measure(Path(tmp))
    cal.from_folders = bool(sources)
    cal.seconds = time.perf_counter() - started
    cal.jobs = jobs
    out(format_report(cal))

    _, folder, shown = golden_of(recorded[0])
    try:
        golden_run: Run | None = store.read(folder)
    except GoldenMissingError:
        golden_run = None
    fix_bless = bless_command(cal.nodeid, golden_dir_option)
    if golden_run is None:
        out(f"\nno golden yet for {cal.nodeid} (looked in {shown}); record it with:\n  {fix_bless}")
        if write:  # removed between the first run and now
            raise TrainguardError(f"--write: {cal.nodeid} has no golden in {shown} to store the calibration in; "
                                  f"bless it first:\n  {fix_bless}\nthen run calibrate with --write again")
        return 0 if cal.proposal is not None or cal.bitwise else 1
    golden_problems = check_golden(cal, golden_run)
    if cal.proposal is not None:
        if golden_problems:
            out(f"\nthe golden {shown} does NOT match these runs within the proposed tolerance:")
            out("\n".join(f"  {p}" for p in golden_problems[:10]))
            out("  the test or its environment changed since the golden was blessed; if that change is intended, "
                f"re-bless first:\n  {fix_bless}")
        else:
            noise = sum(1 for r in cal.runs if not r.spec.setting.plant)
            out(f"\nthe golden {shown} matches all {noise} runs within the proposed tolerance.")
    if not write:
        if cal.proposal is not None:
            out(f"to store the proposal in the golden (used unless the marker sets rtol, atol or exact itself):\n"
                f"  trainguard calibrate {shlex.quote(cal.nodeid)} --write"
                + (f" --safety {cal.safety:g}" if cal.safety != DEFAULT_SAFETY else "")
                + (f" --runs {runs}" if runs != DEFAULT_RUNS else ""))
        return 0 if cal.proposal is not None or cal.bitwise else 1

    if cal.bitwise:
        if "calibrated" in golden_run.meta:
            write_calibration(folder, None, store)
            out(f"\n--write: removed the earlier calibration from {shown}: the test is bitwise deterministic, so the "
                f"marker's, ini or default tolerance applies again.")
        else:
            out(f"\n--write: nothing to store in {shown}: the test is bitwise deterministic, the current tolerance "
                f"holds.")
        return 0
    if cal.proposal is None:
        out(f"\n--write: nothing written to {shown}: no tolerance covers the differences listed above.")
        return 1
    if golden_problems:
        out(f"\n--write: nothing written to {shown}: with the golden as it is, the test would still fail.")
        return 1
    missed = cal.missed()
    if missed:
        out(f"\n--write: nothing written to {shown}: the proposal misses the planted change "
            f"'{missed[0].description}' (it passes as within tolerance), so storing it would let real changes of "
            "that size through; see the causes and remedies under 'power' above.")
        return 1
    too_loose = _over_caps(cal)
    if too_loose:
        out(f"\n--write: nothing written to {shown}: the proposal is looser than a calibrated tolerance may be "
            f"({too_loose}). Noise from thread counts and kernel choice stays far below that; a spread this large "
            "means the test is sensitive to something real (a near-zero value, an unseeded source): look at the "
            "largest differences above, or set a tolerance in the marker, where reviewers see it.")
        return 1
    write_calibration(folder, cal.metadata(), store)
    out(f"\n--write: stored calibrated tolerances in {shown} (metadata 'calibrated': rtol={cal.proposal.rtol:g}, "
        f"atol={cal.proposal.atol:g}"
        + (f", per metric {', '.join(sorted(cal.metric_proposals))}" if cal.metric_proposals else "")
        + "); the next pytest run compares with them unless the marker sets rtol, atol or exact itself. "
        "A re-bless keeps them; run calibrate --write again to refresh them.")
    if cal.current_exact:
        out("  note: the golden records exact=True from the marker, which takes precedence over calibrated "
            "tolerances; remove exact=True from the marker for them to apply.")
    return 0


def _over_caps(cal: Any) -> str:
    """Which proposed tolerance exceeds the calibrated caps (meta.MAX_CALIBRATED_*), or ''."""
    from ..core.meta import MAX_CALIBRATED_ATOL, MAX_CALIBRATED_RTOL

    proposals = [("overall", cal.proposal), *sorted(cal.metric_proposals.items())]
    for name, p in proposals:
        if p.rtol > MAX_CALIBRATED_RTOL:
            return f"{name} rtol={p.rtol:g} > {MAX_CALIBRATED_RTOL:g}"
        if p.atol > MAX_CALIBRATED_ATOL:
            return f"{name} atol={p.atol:g} > {MAX_CALIBRATED_ATOL:g}"
    return ""
