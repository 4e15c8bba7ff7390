"""`trainguard bisect`: find the first commit at which guarded tests stop matching.

Checking out old commits would also check out old goldens, so the reference is frozen
first: the golden dir of the good revision (`git archive GOOD -- <golden dir>`) or of the
work tree is copied into a temporary folder outside the work tree, and every step runs
pytest with `--trainguard-golden-dir` pointing there. `git bisect run` then drives

    python -m trainguard.tools.bisect step ...

at each commit it picks; the step exits 0 (every selected guarded test identical or within
tolerance), 1 (a guarded test changed) or 125 (untestable: setup failed, pytest could not
collect or run the tests, no golden in the reference, no trainguard verdict). Each step
leaves its report folder (summary.json, summary.md, plots, pytest output), keyed by commit
sha, in the temporary folder; the final output prints the first bad commit with the
divergence and the pytest failure report recorded there.

The repository is always left as it was found: original branch and HEAD, no bisect in
progress, also after errors and Ctrl-C. A dirty work tree (tracked changes) is refused.
This module imports neither pytest nor torch: the steps run pytest in a subprocess.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import shlex
import shutil
import signal
import subprocess
import sys
import tarfile
import tempfile
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

from ..core.errors import TrainguardError
from ..core.project import default_golden_dir
from ..core.store import GoldenStore
from ..core.text import safe_output, table
from ..core.verdicts import CHANGED, PASSING
from . import pytest_runs

#: Exit statuses of a step, as `git bisect run` reads them.
STEP_GOOD = 0
STEP_BAD = 1
STEP_SKIP = 125
#: A step that cannot go on (a bug, Ctrl-C) exits above 127: `git bisect run` then aborts.
STEP_ABORT = 128

VERDICTS = {STEP_GOOD: "good", STEP_BAD: "bad", STEP_SKIP: "untestable"}
PYTEST_UNTESTABLE = pytest_runs.UNTESTABLE

STEPS_DIR = "steps"
REFERENCE_DIR = "reference"
STEP_FILE = "step.json"
PYTEST_OUTPUT = "pytest-output.txt"
SETUP_OUTPUT = "setup-output.txt"
ORDER_FILE = "order.jsonl"
GIT_LOG = "git-bisect-run.txt"

Echo = Callable[[str], None]


# -- git -------------------------------------------------------------------------------


def git(repo: Path, *args: str, check: bool = True) -> subprocess.CompletedProcess[str]:
    """Run git in `repo`; with `check`, a failure is a TrainguardError quoting git's message."""
    try:
        proc = subprocess.run(["git", *args], cwd=repo, capture_output=True, text=True)
    except FileNotFoundError:
        if not Path(repo).is_dir():
            raise TrainguardError(f"the folder {repo} no longer exists") from None
        raise TrainguardError("git is not installed (or not on PATH); trainguard bisect needs it") from None
    if check and proc.returncode != 0:
        message = (proc.stderr or proc.stdout).strip().splitlines()
        raise TrainguardError(f"'git {' '.join(args)}' failed in {repo}: " + (message[-1] if message else
                              f"exit status {proc.returncode}"))
    return proc


def _git_path(repo: Path, name: str) -> Path:
    raw = git(repo, "rev-parse", "--git-path", name).stdout.strip()
    path = Path(raw)
    return path if path.is_absolute() else repo / path


def _bisecting(repo: Path) -> bool:
    return _git_path(repo, "BISECT_START").exists() or _git_path(repo, "BISECT_LOG").exists()


def _commit(repo: Path, rev: str, which: str) -> str:
    proc = git(repo, "rev-parse", "--verify", "--quiet", f"{rev}^{{commit}}", check=False)
    if proc.returncode != 0:
        raise TrainguardError(f"the {which} revision {rev!r} is not a commit of {repo}; "
                              f"list candidates with: git log --oneline")
    return proc.stdout.strip()


def _subject(repo: Path, sha: str) -> str:
    return git(repo, "log", "-1", "--format=%s", sha).stdout.strip()


@dataclass
class _Head:
    branch: str | None
    sha: str

    @property
    def name(self) -> str:
        return self.branch or self.sha[:12]


def _head(repo: Path) -> _Head:
    branch = git(repo, "symbolic-ref", "--quiet", "--short", "HEAD", check=False)
    sha = git(repo, "rev-parse", "HEAD", check=False)
    if sha.returncode != 0:
        raise TrainguardError(f"{repo} has no commits yet; there is nothing to bisect")
    return _Head(branch.stdout.strip() if branch.returncode == 0 else None, sha.stdout.strip())


def _dirty(repo: Path) -> list[str]:
    out = git(repo, "status", "--porcelain", "--untracked-files=no").stdout
    return [line for line in out.splitlines() if line.strip()]


# -- the frozen reference ----------------------------------------------------------------


def _tar_files(data: bytes) -> list[tuple[str, bytes]]:
    """The regular files of a `git archive` tar, by path (links, devices and the like are left out)."""
    import io

    files = []
    with tarfile.open(fileobj=io.BytesIO(data), mode="r:") as tar:
        for member in tar.getmembers():
            if member.isfile():
                source = tar.extractfile(member)
                if source is not None:
                    files.append((member.name, source.read()))
    return files


def _tree_files(source: Path, prefix: str) -> list[tuple[str, bytes]]:
    """The regular files below `source` (links not followed), by path under `prefix`."""
    files = []
    for dirpath, dirnames, filenames in os.walk(source, followlinks=False):
        dirnames.sort()
        for name in sorted(filenames):
            path = Path(dirpath) / name
            if path.is_file() and not path.is_symlink():
                files.append((f"{prefix}/{path.relative_to(source).as_posix()}", path.read_bytes()))
    return files


def freeze_reference(repo: Path, golden_rel: str, dest: Path, good_sha: str | None) -> Path:
    """Copy the goldens (of commit `good_sha`, or of the work tree when None) to `dest`; return the golden dir."""
    frozen = dest.joinpath(*golden_rel.split("/"))
    if good_sha is None:
        source = repo / golden_rel
        if not source.is_dir():
            raise TrainguardError(f"the work tree has no golden dir {golden_rel} (looked in {source}); "
                                  "bless the tests first, or give the golden folder with --golden-dir DIR")
        GoldenStore(dest).import_files(_tree_files(source, golden_rel))
        frozen.mkdir(parents=True, exist_ok=True)
    else:
        try:
            proc = subprocess.run(["git", "archive", "--format=tar", good_sha, "--", golden_rel], cwd=repo,
                                  capture_output=True)
        except FileNotFoundError:
            raise TrainguardError("git is not installed (or not on PATH); trainguard bisect needs it") from None
        if proc.returncode != 0:
            said = proc.stderr.decode(errors="replace").strip().splitlines()
            raise TrainguardError(
                f"the good revision {good_sha[:12]} has no golden dir {golden_rel} to use as reference "
                f"({said[-1] if said else 'git archive failed'}); "
                "pick a good revision that has committed goldens, give the folder with --golden-dir DIR, "
                "or compare against the work tree's goldens with --reference worktree")
        dest.mkdir(parents=True, exist_ok=True)
        GoldenStore(dest).import_files(_tar_files(proc.stdout))
        frozen.mkdir(parents=True, exist_ok=True)
    if not GoldenStore(frozen, read_only=True).find():
        where = "the work tree" if good_sha is None else f"the good revision {good_sha[:12]}"
        raise TrainguardError(f"{where} holds no golden files under {golden_rel}; bless and commit goldens first "
                              "(pytest --trainguard-bless), or give the golden folder with --golden-dir DIR")
    return frozen


# -- one step --------------------------------------------------------------------------


@dataclass
class StepResult:
    sha: str
    status: int
    reason: str
    pytest_exit: int | None = None
    rows: list[dict[str, Any]] = field(default_factory=list)
    report: str = ""
    errors: list[str] = field(default_factory=list)

    @property
    def verdict(self) -> str:
        return VERDICTS.get(self.status, "aborted")


def classify(pytest_exit: int, summary: dict[str, Any] | None) -> tuple[int, str]:
    """The step's exit status and a one-line reason, from pytest's exit code and summary.json."""
    if pytest_exit in PYTEST_UNTESTABLE:
        return STEP_SKIP, f"pytest exit {pytest_exit} ({PYTEST_UNTESTABLE[pytest_exit]})"
    if summary is None:
        return STEP_SKIP, f"pytest exit {pytest_exit} without a trainguard summary.json"
    rows = [r for r in summary.get("rows", []) if not r.get("blessing")]
    counts: dict[str, int] = {}
    for r in rows:
        counts[r.get("outcome", "?")] = counts.get(r.get("outcome", "?"), 0) + 1
    tally = ", ".join(f"{n} {k}" for k, n in sorted(counts.items()))
    if counts.get(CHANGED):
        return STEP_BAD, tally
    if not rows:
        return STEP_SKIP, f"pytest exit {pytest_exit}, but no guarded test ran"
    unusable = [r["nodeid"] for r in rows if r.get("outcome") not in PASSING]
    if unusable:
        return STEP_SKIP, f"{tally} ({', '.join(unusable[:3])})"
    if pytest_exit != 0:
        return STEP_SKIP, f"{tally}, but pytest exit {pytest_exit} (a test failed without a trainguard verdict)"
    return STEP_GOOD, tally


def _step_env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONDONTWRITEBYTECODE"] = "1"  # no __pycache__ in the work tree
    return env


def run_step(repo: Path, cwd: Path, frozen: Path, work: Path, nodeids: Sequence[str],
             setup: str | None = None) -> StepResult:
    """Test the checked-out commit: setup, then pytest against the frozen goldens. Writes steps/<sha>/."""
    sha = git(repo, "rev-parse", "HEAD").stdout.strip()
    report = work / STEPS_DIR / sha
    if report.exists():
        shutil.rmtree(report)
    report.mkdir(parents=True)
    result = StepResult(sha, STEP_SKIP, "", report=str(report))
    env = _step_env()
    if not cwd.is_dir():
        result.reason = f"the folder {cwd} does not exist at this commit"
    else:
        setup_ok = True
        if setup:
            proc = subprocess.run(setup, shell=True, cwd=cwd, env=env, stdout=subprocess.PIPE,
                                  stderr=subprocess.STDOUT, text=True, errors="replace")
            (report / SETUP_OUTPUT).write_text(proc.stdout, encoding="utf-8")
            if proc.returncode != 0:
                setup_ok = False
                result.reason = f"setup command exited {proc.returncode}"
        if setup_ok:
            cmd = pytest_runs.check_against(nodeids, frozen, report)
            proc = pytest_runs.run(cmd, cwd, env, merge_stderr=True)
            (report / PYTEST_OUTPUT).write_text(proc.stdout, encoding="utf-8")
            summary = None
            summary_path = report / "summary.json"
            if summary_path.is_file():
                try:
                    summary = json.loads(summary_path.read_text(encoding="utf-8"))
                except ValueError:
                    summary = None
            result.pytest_exit = proc.returncode
            result.status, result.reason = classify(proc.returncode, summary)
            result.rows = [r for r in (summary or {}).get("rows", []) if not r.get("blessing")]
            result.errors = pytest_runs.error_lines(proc.stdout) if result.status == STEP_SKIP else []
            if result.status == STEP_SKIP and not result.errors:  # say something: pytest's last lines
                result.errors = [line.rstrip() for line in proc.stdout.splitlines() if line.strip()][-6:]
            exceptions = [e for e in result.errors if pytest_runs.EXCEPTION_LINE.match(e)]
            if exceptions:
                result.reason += ": " + exceptions[-1][1:].strip()
    (report / STEP_FILE).write_text(json.dumps(asdict(result), indent=1), encoding="utf-8")
    with open(work / ORDER_FILE, "a", encoding="utf-8") as fh:
        fh.write(json.dumps({"sha": sha, "status": result.status}) + "\n")
    return result


def step_line(result: StepResult, subject: str = "") -> str:
    text = f"trainguard bisect: {result.sha[:12]} {result.verdict:<10} {result.reason}"
    return text + (f"  [{subject}]" if subject else "")


def step_main(argv: Sequence[str] | None = None) -> int:
    """`python -m trainguard.tools.bisect step ...`, run by `git bisect run` at each commit."""
    parser = argparse.ArgumentParser(prog="python -m trainguard.tools.bisect step")
    parser.add_argument("--repo", required=True)
    parser.add_argument("--cwd", required=True)
    parser.add_argument("--frozen", required=True)
    parser.add_argument("--work", required=True)
    parser.add_argument("--setup", default=None)
    parser.add_argument("nodeids", nargs="+")
    args = parser.parse_args(argv)
    try:
        repo = Path(args.repo)
        result = run_step(repo, Path(args.cwd), Path(args.frozen), Path(args.work), args.nodeids, args.setup)
        print(safe_output(step_line(result, _subject(repo, result.sha))), flush=True)
        return result.status
    except KeyboardInterrupt:
        return 130
    except Exception as exc:  # noqa: BLE001 - any failure here must abort the bisect, not mark a commit bad
        print(safe_output(f"trainguard bisect: step failed, aborting the bisect: {type(exc).__name__}: {exc}"),
              flush=True)
        return STEP_ABORT


# -- the whole bisect ------------------------------------------------------------------


@dataclass
class BisectOutcome:
    found: bool
    sha: str = ""
    subject: str = ""
    candidates: list[str] = field(default_factory=list)
    step: StepResult | None = None
    tested: list[tuple[str, int]] = field(default_factory=list)
    work: str = ""
    repo: str = ""
    failures: list[str] = field(default_factory=list)  # FAILURES section of pytest's output at the first bad commit
    reference: str = ""  # which goldens were the reference


def _golden_rel(repo: Path, cwd: Path, golden_dir: str | None) -> str:
    if golden_dir:
        path = Path(golden_dir)
        path = path if path.is_absolute() else cwd / path
    else:
        path = default_golden_dir(cwd)
    try:
        rel = Path(os.path.realpath(path)).relative_to(os.path.realpath(repo))
    except ValueError:
        raise TrainguardError(f"the golden dir {path} is outside the repository {repo}; bisect can only freeze "
                              "goldens tracked in it (give the folder with --golden-dir DIR)") from None
    if str(rel) in ("", "."):
        raise TrainguardError(f"the golden dir {path} is the repository root; give the golden folder with "
                              "--golden-dir DIR")
    return rel.as_posix()


def _restore(repo: Path, head: _Head, echo: Echo) -> None:
    """End any bisect and put HEAD back where it was. Never raises; says what to run if it cannot."""
    problems = []
    try:
        if _bisecting(repo):
            proc = git(repo, "bisect", "reset", check=False)
            if proc.returncode != 0:
                problems.append("git bisect reset: " + (proc.stderr or proc.stdout).strip())
        now = _head(repo)
        if now.branch != head.branch or now.sha != head.sha:
            target = head.branch if head.branch else head.sha
            args = ["checkout", "--quiet", target] if head.branch else ["checkout", "--quiet", "--detach", target]
            proc = git(repo, *args, check=False)
            if proc.returncode != 0:
                problems.append(f"git {' '.join(args)}: " + (proc.stderr or proc.stdout).strip())
    except TrainguardError as exc:
        problems.append(str(exc))
    if problems:
        echo(f"trainguard bisect: could not restore {repo} to {head.name}: " + "; ".join(problems)
             + f"\n  fix: git bisect reset; git checkout {head.name}")


def run_bisect(good: str, bad: str, nodeids: Sequence[str], *, setup: str | None = None,
               reference: str = "good", golden_dir: str | None = None, cwd: Path | None = None,
               keep: bool = False, echo: Echo = print) -> BisectOutcome:
    """Find the first commit in (good, bad] at which the selected guarded tests stop matching."""
    if reference not in ("good", "worktree"):
        raise TrainguardError(f"--reference must be 'good' or 'worktree', not {reference!r}")
    if not nodeids:
        raise TrainguardError("name the guarded tests to bisect, e.g.: trainguard bisect --good v1.0 --bad HEAD "
                              "tests/test_model.py::test_train")
    cwd = Path(cwd or Path.cwd()).resolve()
    top = git(cwd, "rev-parse", "--show-toplevel", check=False)
    if top.returncode != 0:
        raise TrainguardError(f"{cwd} is not inside a git repository; run trainguard bisect from a clone of the "
                              "project whose history you want to search")
    repo = Path(top.stdout.strip())
    if _bisecting(repo):
        raise TrainguardError(f"a git bisect is already in progress in {repo}; finish it, or end it with: "
                              "git bisect reset")
    dirty = _dirty(repo)
    if dirty:
        listing = "\n".join(f"  {line}" for line in dirty[:20])
        more = f"\n  ... and {len(dirty) - 20} more" if len(dirty) > 20 else ""
        raise TrainguardError(f"the work tree of {repo} has uncommitted changes to tracked files, which checking "
                              f"out other commits would disturb:\n{listing}{more}\n"
                              "  fix: commit them, or set them aside with: git stash  (then git stash pop after)")
    good_sha = _commit(repo, good, "good")
    bad_sha = _commit(repo, bad, "bad")
    if good_sha == bad_sha:
        raise TrainguardError(f"--good {good} and --bad {bad} are the same commit {good_sha[:12]}; give an older "
                              "good revision")
    if git(repo, "merge-base", "--is-ancestor", bad_sha, good_sha, check=False).returncode == 0:
        raise TrainguardError(f"the bad revision {bad} is older than the good revision {good} (an ancestor of it); "
                              "swap --good and --bad")
    golden_rel = _golden_rel(repo, cwd, golden_dir)
    head = _head(repo)

    work = Path(tempfile.mkdtemp(prefix="trainguard-bisect-"))
    try:
        frozen = freeze_reference(repo, golden_rel, work / REFERENCE_DIR,
                                  good_sha if reference == "good" else None)
        ref_text = (f"goldens of the good revision {good_sha[:12]}" if reference == "good"
                    else f"goldens of the work tree at {head.name}")
        echo(f"trainguard bisect: reference = {ref_text} ({golden_rel}/), frozen in {frozen}")
        return _bisect(repo, cwd, head, good, bad, good_sha, bad_sha, nodeids, setup, frozen, work, echo,
                       reference=reference, reference_text=f"{ref_text} ({golden_rel}/)", frozen_as=repo / golden_rel,
                       explicit_golden_dir=bool(golden_dir))
    finally:
        if keep:
            echo(f"trainguard bisect: kept the reference and every step's report in {work}")
        else:
            shutil.rmtree(work, ignore_errors=True)


def _bisect(repo: Path, cwd: Path, head: _Head, good: str, bad: str, good_sha: str, bad_sha: str,
            nodeids: Sequence[str], setup: str | None, frozen: Path, work: Path, echo: Echo, *,
            reference: str, reference_text: str, frozen_as: Path, explicit_golden_dir: bool) -> BisectOutcome:
    step_cmd = [sys.executable, "-m", "trainguard.tools.bisect", "step", "--repo", str(repo), "--cwd", str(cwd),
                "--frozen", str(frozen), "--work", str(work)]
    if setup:
        step_cmd += ["--setup", setup]
    step_cmd += ["--", *nodeids]
    interrupted = False
    try:
        # -- the range: bad must fail, good must pass (bad first: unknown node ids show up there)
        git(repo, "checkout", "--quiet", "--detach", bad_sha)
        bad_step = run_step(repo, cwd, frozen, work, nodeids, setup)
        echo(step_line(bad_step, _subject(repo, bad_sha)))
        if bad_step.status == STEP_GOOD:
            other = ("--reference worktree to compare with the work tree's goldens" if reference == "good"
                     else "--reference good to compare with the good revision's goldens")
            raise TrainguardError(f"the bad revision {bad} matches the reference ({bad_step.reason}); nothing to "
                                  f"bisect. Check the node ids and --bad, or use {other}")
        if bad_step.status != STEP_BAD:
            raise TrainguardError(_untestable("bad", bad, bad_step, nodeids, setup))
        git(repo, "checkout", "--quiet", "--detach", good_sha)
        good_step = run_step(repo, cwd, frozen, work, nodeids, setup)
        echo(step_line(good_step, _subject(repo, good_sha)))
        if good_step.status == STEP_BAD:
            div = "; ".join(f"{r['nodeid']}: {r.get('divergence') or r.get('outcome')}" for r in good_step.rows
                            if r.get("outcome") == CHANGED)
            hint = ("its own goldens do not match its code; give an older --good" if reference == "good"
                    else "give an older --good, or use --reference good to compare with its own goldens")
            raise TrainguardError(f"the good revision {good} already fails against the reference ({div}); {hint}")
        if good_step.status != STEP_GOOD:
            raise TrainguardError(_untestable("good", good, good_step, nodeids, setup))
        _restore(repo, head, echo)

        # -- the search
        git(repo, "bisect", "start", bad_sha, good_sha)
        log_path = work / GIT_LOG
        with open(log_path, "w", encoding="utf-8") as log:
            # Its own session, so that on Ctrl-C it is stopped here, all of it, before the restore.
            proc = subprocess.Popen(["git", "bisect", "run", *step_cmd], cwd=repo, stdout=subprocess.PIPE,
                                    stderr=subprocess.STDOUT, text=True, errors="replace", env=_step_env(),
                                    start_new_session=True)
            try:
                assert proc.stdout is not None
                for line in proc.stdout:
                    log.write(line)
                    if line.startswith(("trainguard bisect:", "Bisecting:")):
                        echo(line.rstrip("\n"))
                proc.wait()
            finally:
                if proc.poll() is None:
                    _stop(proc)
        text = log_path.read_text(encoding="utf-8")
        tested = _tested(work)
        match = re.search(r"^([0-9a-f]{40}) is the first bad commit", text, re.M)
        if match:
            sha = match.group(1)
            step_file = work / STEPS_DIR / sha / STEP_FILE
            step = StepResult(**json.loads(step_file.read_text(encoding="utf-8"))) if step_file.is_file() else None
            output = work / STEPS_DIR / sha / PYTEST_OUTPUT
            failures = failures_section(output.read_text(encoding="utf-8")) if output.is_file() else []
            failures = unfreeze(failures, work, os.path.relpath(frozen_as, cwd), explicit_golden_dir)
            return BisectOutcome(True, sha, _subject(repo, sha), step=step, tested=tested, work=str(work),
                                 repo=str(repo), failures=failures, reference=reference_text)
        if "only 'skip'ped commits left" in text:
            candidates = re.findall(r"^([0-9a-f]{40})$", text, re.M)
            return BisectOutcome(False, candidates=candidates, tested=tested, work=str(work), repo=str(repo),
                                 reference=reference_text)
        tail = "\n".join("  " + line for line in text.strip().splitlines()[-8:])
        raise TrainguardError(f"git bisect run stopped without naming a first bad commit (exit {proc.returncode}):"
                              f"\n{tail}")
    except KeyboardInterrupt:
        interrupted = True
        raise
    finally:
        # A second Ctrl-C must not cut the restore short.
        previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
        try:
            _restore(repo, head, echo)
            if interrupted:
                echo(f"trainguard bisect: interrupted; {repo} is back on {head.name}, no bisect in progress")
        finally:
            signal.signal(signal.SIGINT, previous)


def _stop(proc: subprocess.Popen[str]) -> None:
    """Stop `git bisect run` and everything it started: SIGINT to its process group, then SIGKILL."""
    if not hasattr(os, "killpg"):  # Windows: no process groups to signal
        proc.kill()
        proc.wait()
        return
    for sig, wait in ((signal.SIGINT, 10.0), (signal.SIGKILL, 5.0)):
        try:
            os.killpg(proc.pid, sig)
        except (ProcessLookupError, PermissionError):
            pass
        try:
            proc.wait(timeout=wait)
            return
        except subprocess.TimeoutExpired:
            continue


def _untestable(which: str, rev: str, step: StepResult, nodeids: Sequence[str], setup: str | None) -> str:
    details = "".join(f"\n  {e}" for e in step.errors)
    if step.pytest_exit in (4, 5) and (pytest_runs.not_found(step.errors) or step.pytest_exit == 5):
        return (f"pytest found none of the selected tests at the {which} revision {rev} ({step.reason}): "
                f"{' '.join(nodeids)}{details}\n"
                f"  check the node ids; list the tests there with: git checkout {rev} && "
                f"python -m pytest --collect-only -q")
    command = f"python -m pytest {' '.join(shlex.quote(n) for n in nodeids)}"
    if step.reason.startswith("setup command"):
        command = setup or ""
    return (f"the {which} revision {rev} cannot be tested: {step.reason}{details}\n"
            f"  reproduce with: git checkout {rev} && {command}")


def _tested(work: Path) -> list[tuple[str, int]]:
    order = work / ORDER_FILE
    if not order.is_file():
        return []
    out = []
    for line in order.read_text(encoding="utf-8").splitlines():
        item = json.loads(line)
        out.append((item["sha"], int(item["status"])))
    return out


# -- output ----------------------------------------------------------------------------


def failures_section(output: str, max_lines: int = 200) -> list[str]:
    """The FAILURES section of pytest's output (up to the next ==== header), at most `max_lines` lines."""
    return pytest_runs.section(output, "FAILURES", max_lines)


def unfreeze(lines: Sequence[str], work: Path, golden_dir: str, explicit: bool) -> list[str]:
    """Show paths into the frozen reference as the golden dir they were copied from.

    The failure report names the golden folder and a re-bless command; both point into the
    temporary folder, which is gone when bisect ends. A re-bless belongs in the real golden dir.
    """
    frozen = re.escape(f"{work.name}/{REFERENCE_DIR}/") + r"\S*"
    option = re.compile(r" '?--trainguard-golden-dir[= ]\S*" + frozen)
    path = re.compile(r"(?<!\S)\S*" + re.escape(f"{work.name}/{REFERENCE_DIR}/"))
    replacement = f" {shlex.quote('--trainguard-golden-dir=' + golden_dir)}" if explicit else ""
    out = []
    for line in lines:
        line = option.sub(lambda _: replacement, line)
        out.append(path.sub("", line))
    return out


def describe(outcome: BisectOutcome) -> str:
    repo = Path(outcome.repo)
    lines = []
    if outcome.tested:
        rows = [[sha[:12], VERDICTS.get(status, "aborted"), _subject(repo, sha)] for sha, status in outcome.tested]
        lines += [f"tested {len(outcome.tested)} commit(s):", table(["commit", "verdict", "subject"], rows), ""]
    if not outcome.found:
        lines.append("trainguard bisect: untestable commits hide the first bad commit; it is one of:")
        lines += [f"  {sha[:12]} {_subject(repo, sha)}" for sha in outcome.candidates]
        lines.append("fix the untestable commits' set-up (--setup CMD) or narrow the range with --good/--bad")
        return "\n".join(lines)
    lines.append(f"first bad commit: {outcome.sha} {outcome.subject}")
    if outcome.reference:
        lines.append(f"reference: {outcome.reference}")
    step = outcome.step
    if step is not None:
        lines.append("")
        rows = [[r.get("nodeid", ""), r.get("outcome", ""), r.get("divergence") or "-"] for r in step.rows]
        if rows:
            lines.append(table(["test", "outcome", "first divergence"], rows))
        env = sorted({e for r in step.rows for e in r.get("environment") or []})
        if env:
            lines.append("environment changes: " + "; ".join(env[:5]))
    if outcome.failures:
        lines += ["", f"pytest failures at {outcome.sha[:12]}:"] + outcome.failures
    return "\n".join(lines)


def main(argv: Sequence[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    if argv[:1] == ["step"]:
        return step_main(argv[1:])
    print("usage: python -m trainguard.tools.bisect step ... (run by 'trainguard bisect'; use that command instead)",
          file=sys.stderr)
    return 2


if __name__ == "__main__":
    sys.exit(main())
