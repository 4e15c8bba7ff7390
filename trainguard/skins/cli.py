"""The `trainguard` command: look at goldens and the environment, run the demo.

Every user mistake (a wrong path, a corrupt file) ends in one message on stderr and exit
status 2, never a traceback.
"""

from __future__ import annotations

import argparse
import json
import shlex
import sys
from pathlib import Path
from typing import Any, Sequence

from ..core.errors import TrainguardError
from ..core.project import default_golden_dir
from ..core.text import flatten as _flatten
from ..core.text import fmt, safe_output, table
from ..tools.pytest_runs import PytestCommands

EXIT_USAGE = 2


def say(text: str = "", err: bool = False, flush: bool = False) -> None:
    """Print text that may hold names, reasons or paths from goldens: control characters escaped,
    no line able to start a CI workflow command (`core.text.safe_output`)."""
    print(safe_output(text), file=sys.stderr if err else sys.stdout, flush=flush)


# -- env -------------------------------------------------------------------------------


def cmd_env(args: argparse.Namespace) -> int:
    from ..core.environment import fingerprint

    fp = fingerprint()
    if args.json:
        say(json.dumps(fp, indent=2, sort_keys=True))
        return 0
    say("environment fingerprint (what trainguard stores with every golden):")
    say(table(["key", "value"], _flatten(fp)))
    say("\nnote: inside a guarded test trainguard also turns on deterministic mode; "
          "the 'deterministic' values above are this process's, outside any test.")
    return 0


# -- show ------------------------------------------------------------------------------


def _tolerance_in_force(meta: Any) -> str:
    """What a check against this golden uses when the marker sets no tolerance, and where it comes from."""
    from ..core.settings import calibrated_policy
    from ..core.tolerance import Policy

    recorded = Policy.from_json(meta.get("tolerances"))
    policy = calibrated_policy(recorded, meta)
    if policy.source == "calibrated":
        return (policy.describe() + "; used unless the marker sets rtol, atol or exact (then the marker's). "
                f"At bless time: {recorded.describe()}")
    return policy.describe().replace("(from golden)", "(recorded at bless time from the marker, ini or defaults)")


def _show_meta(meta: Any) -> list[str]:
    lines = []
    rows = [
        ("format version", meta.get("format_version")),
        ("test", meta.get("nodeid")),
        ("seed", meta.get("seed")),
        ("deterministic", meta.get("deterministic")),
        ("tolerance", _tolerance_in_force(meta)),
        ("stored values up to", meta.get("max_values")),
        ("blessed at", meta.get("blessed_at")),
        ("reason", meta.get("reason") or None),
        ("adopted from", meta.get("adopted_from")),
    ]
    lines.append(table(["metadata", "value"], rows))
    fp = meta.get("fingerprint")
    if isinstance(fp, dict):
        lines.append("")
        lines.append(table(["environment", "value"], _flatten(fp)))
    return lines


def _show_metrics(metrics: dict[str, Any]) -> list[str]:
    import numpy as np

    rows = []
    for name, s in metrics.items():
        v = s.values
        finite = v[np.isfinite(v)]
        rows.append([name, len(s.steps), int(s.steps[0]) if len(s.steps) else None,
                     int(s.steps[-1]) if len(s.steps) else None,
                     fmt(float(v[0])) if len(v) else None, fmt(float(v[-1])) if len(v) else None,
                     fmt(float(finite.min())) if finite.size else None,
                     fmt(float(finite.max())) if finite.size else None, int(v.size - finite.size)])
    head = f"metrics ({len(metrics)}):"
    return [head, table(["metric", "steps", "first step", "last step", "first value", "last value", "min", "max",
                         "non-finite"], rows)]


def _show_state(tensors: dict[str, Any]) -> list[str]:
    rows = []
    for t in tensors.values():
        rows.append([t.name, t.kind, t.dtype, "x".join(map(str, t.shape)) or "scalar", t.sha256[:16],
                     fmt(t.min), fmt(t.max), fmt(t.mean), fmt(t.l2), t.nonfinite,
                     "yes" if t.values is not None else "no"])
    return [f"state ({len(tensors)} entries):",
            table(["name", "kind", "dtype", "shape", "sha256 (first 16)", "min", "max", "mean", "l2", "non-finite",
                   "values stored"], rows)]


def _show_trace(entries: list[Any]) -> list[str]:
    steps = sorted({e.step for e in entries})
    names = sorted({e.name for e in entries})
    rows = [[e.step, e.stage, e.call, e.name, e.dtype, "x".join(map(str, e.shape)) or "scalar", e.sha256[:16],
             fmt(e.l2)] for e in entries[:40]]
    head = f"trace ({len(entries)} entries, {len(steps)} steps, {len(names)} tensors; first 40 shown):"
    return [head, table(["step", "stage", "call", "name", "dtype", "shape", "sha256 (first 16)", "l2"], rows)]


def _store(root: Path, read_only: bool = True, golden_dir_option: str | None = None) -> Any:
    from ..core.store import GoldenStore

    return GoldenStore(root, read_only=read_only, commands=PytestCommands(golden_dir_option))


def cmd_show(args: argparse.Namespace) -> int:
    from ..core import golden_format

    path = Path(args.path)
    if not path.exists():
        raise TrainguardError(f"{path}: no such file or folder")
    if path.is_file():
        kind = path.name if path.name in golden_format.KINDS else golden_format.METRICS_FILE
        records, meta = _store(path.parent).read_file(path, kind)
        body = {golden_format.STATE_FILE: _show_state, golden_format.TRACE_FILE: _show_trace}.get(
            kind, _show_metrics)(records)
        say(f"golden file {path}")
        say("\n".join(_show_meta(meta) + [""] + body))
        return 0
    store = _store(path)
    if store.exists(path):
        run = store.read(path)
        say(f"golden {path}")
        say("\n".join(_show_meta(run.meta) + [""] + _show_metrics(run.metrics) + [""] + _show_state(run.tensors)))
        return 0
    found = store.find()
    if not found:
        raise TrainguardError(f"{path}: holds no golden files (no {golden_format.METRICS_FILE} or "
                              f"{golden_format.STATE_FILE} below it)")
    rows = []
    for folder in found:
        try:
            run = store.read(folder)
        except TrainguardError as exc:
            rows.append([str(folder.relative_to(path)), "-", "-", "-", "-", f"unreadable: {getattr(exc, 'problem', exc)}"])
            continue
        steps = max((len(s.steps) for s in run.metrics.values()), default=0)
        rows.append([str(folder.relative_to(path)), len(run.metrics), steps, len(run.tensors),
                     run.meta.get("blessed_at", "-"), run.meta.get("reason") or "-"])
    say(f"{len(found)} golden folder(s) under {path} (show one for details: trainguard show FOLDER):")
    say(table(["golden", "metrics", "steps", "state entries", "blessed at", "reason"], rows))
    return 0


# -- bless --from / diff -------------------------------------------------------------


def cmd_bless(args: argparse.Namespace) -> int:
    from ..core.results import adopt

    golden_dir = Path(args.golden_dir) if args.golden_dir else default_golden_dir()
    commands = PytestCommands(args.golden_dir)
    adoptions = adopt(_store(Path(args.source)), _store(golden_dir, read_only=False, golden_dir_option=args.golden_dir),
                      args.nodeids, reason=args.reason or "", dry_run=args.dry_run, commands=commands)
    verb = "would adopt" if args.dry_run else "adopted"
    say(f"{verb} {len(adoptions)} result(s) from {args.source} into {golden_dir}:")
    say(table(["golden", "test", "from"], [[a.outcome, a.nodeid, str(a.source)] for a in adoptions]))
    if not args.dry_run:
        say("review and commit them, e.g.: git add " + str(golden_dir))
    return 0


def cmd_diff(args: argparse.Namespace) -> int:
    from dataclasses import replace

    from ..core.comparison import compare
    from ..core.report import describe_comparison
    from ..core.settings import calibrated_policy
    from ..core.tolerance import Policy, Tolerance, check_tolerance_value

    a, b = _read_golden(args.a), _read_golden(args.b)
    # The reference's tolerance as a check would use it: calibrated if stored, else as recorded at bless.
    recorded = calibrated_policy(Policy.from_json(a.meta.tolerances), a.meta)
    if args.rtol is not None or args.atol is not None:
        rtol = check_tolerance_value("rtol", args.rtol, "--rtol") if args.rtol is not None else recorded.default.rtol
        atol = check_tolerance_value("atol", args.atol, "--atol") if args.atol is not None else recorded.default.atol
        recorded = recorded.with_default(Tolerance(rtol, atol), keep_metrics=False, source="command line")
    policy = replace(recorded, exact=True, source="command line") if args.exact else recorded
    cmp = compare(a, b, policy)
    say(f"trainguard diff: {args.a} (reference) vs {args.b}")
    say(describe_comparison(cmp))
    return 1 if cmp.failed else 0


def _read_golden(raw: str) -> Any:
    """One golden (or result) folder for diff; a folder of goldens gets a message that says what to give."""
    from ..core.errors import GoldenMissingError

    path = Path(raw)
    if not path.exists():
        raise TrainguardError(f"{path}: no such folder")
    store = _store(path)
    try:
        return store.read(path)
    except GoldenMissingError:
        found = store.find() if path.is_dir() else []
        if found:
            raise TrainguardError(f"{path}: is a folder of {len(found)} goldens, not one golden; diff compares one "
                                  f"test's golden folder with another, e.g. trainguard diff {found[0]} "
                                  f"OTHER/{found[0].relative_to(path)}") from None
        raise


# -- audit -----------------------------------------------------------------------------


def cmd_audit(args: argparse.Namespace) -> int:
    from ..core.atomic import write_atomic
    from ..tools.audit import render_markdown, render_text, run_audit

    golden_dir = Path(args.golden_dir) if args.golden_dir else default_golden_dir()
    audit = run_audit(args.since, golden_dir)
    text = render_markdown(audit) if args.markdown else render_text(audit)
    if args.output:
        write_atomic(Path(args.output), text, fsync=False)
        say(f"audit written to {args.output} ({len(audit.findings)} change(s), {len(audit.flagged)} flagged)")
    else:
        say(text.rstrip("\n"))
    return 1 if audit.flagged else 0


# -- bisect ----------------------------------------------------------------------------


def cmd_bisect(args: argparse.Namespace) -> int:
    from ..tools.bisect import describe, run_bisect

    outcome = run_bisect(args.good, args.bad, args.nodeids, setup=args.setup, reference=args.reference,
                         golden_dir=args.golden_dir, keep=args.keep, echo=lambda line: say(line, flush=True))
    say()
    say(describe(outcome))
    return 0 if outcome.found else 1


# -- calibrate -------------------------------------------------------------------------


def cmd_calibrate(args: argparse.Namespace) -> int:
    from ..tools.calibrate import calibrate

    return calibrate(args.nodeid, runs=args.runs, safety=args.safety, write=args.write,
                     golden_dir=args.golden_dir, jobs=args.jobs, keep_runs=args.keep_runs,
                     golden_dir_option=args.golden_dir, out=say, sources=args.sources or ())


def cmd_merge_reports(args: argparse.Namespace) -> int:
    from ..core.report_files import merge_reports

    path, count = merge_reports(args.dirs, args.out)
    say(f"merged {count} row(s) from {len(args.dirs)} report folder(s) into {path}")
    return 0


# -- prune -----------------------------------------------------------------------------


def _shown(path: Path) -> str:
    """`path` relative to the current folder when it lies below it."""
    try:
        return str(path.absolute().relative_to(Path.cwd()))
    except ValueError:
        return str(path)


_SELECTING_FLAGS = ("-k", "-m", "--deselect", "--lf", "--last-failed", "--ignore", "--ignore-glob", "--sw",
                    "--stepwise")
_VALUE_FLAGS = ("-p", "-c", "-o", "--rootdir", "--confcutdir", "--override-ini", "--config-file")


def _selection_args(pytest_args: list[str]) -> list[str]:
    """The pytest arguments that select a subset of the suite (flags, paths, node ids)."""
    found, skip = [], False
    for arg in pytest_args:
        if skip:
            skip = False
            continue
        flag = arg.split("=", 1)[0]
        if flag in _VALUE_FLAGS:
            skip = "=" not in arg
        elif flag in _SELECTING_FLAGS or (flag.startswith("-k") or flag.startswith("-m")) and not flag.startswith("--"):
            found.append(arg)
        elif not arg.startswith("-"):
            found.append(arg)
    return found


def cmd_prune(args: argparse.Namespace) -> int:
    from ..tools.pytest_runs import collect_nodeids

    pytest_args = list(args.pytest_args)
    if pytest_args[:1] == ["--"]:
        pytest_args = pytest_args[1:]
    misplaced = [a for a in pytest_args if a in ("--delete", "--golden-dir") or a.startswith("--golden-dir=")]
    if misplaced:
        raise TrainguardError(f"{misplaced[0]} came after the pytest arguments, where it would go to pytest; "
                              f"put it first: trainguard prune {misplaced[0]} ... [PYTEST ARGS]")
    narrowing = _selection_args(pytest_args)
    if args.delete and narrowing:
        raise TrainguardError(
            f"prune --delete with a test selection ({' '.join(narrowing)}) would delete the goldens of every test "
            "outside it; list with the selection (trainguard prune ...), or delete against the whole suite: "
            "trainguard prune --delete")
    golden_dir = Path(args.golden_dir) if args.golden_dir else default_golden_dir()
    if golden_dir.is_symlink() and args.delete:
        raise TrainguardError(f"{golden_dir} is a symbolic link; prune --delete does not follow links. "
                              f"Give the real folder: trainguard prune --delete --golden-dir {golden_dir.resolve()}")
    if not golden_dir.is_dir():
        raise TrainguardError(f"{golden_dir}: no such golden folder; give it with --golden-dir DIR")
    store = _store(golden_dir, read_only=not args.delete, golden_dir_option=args.golden_dir)
    nodeids = collect_nodeids(pytest_args)
    used = {store.folder(nodeid) for nodeid in nodeids}
    found = store.find()
    unused = [folder for folder in found if folder not in used]
    say(f"{len(found)} golden folder(s) under {golden_dir}, {len(nodeids)} test(s) collected: "
          f"{len(unused)} golden folder(s) used by no collected test")
    if not unused:
        return 0
    if not args.delete:
        for folder in unused:
            say(f"  {_shown(folder)}")
        extra = " ".join(pytest_args)
        say("remove them with: trainguard prune --delete"
              + (f" --golden-dir {args.golden_dir}" if args.golden_dir else "") + (f" {extra}" if extra else ""))
        return 1
    for folder in unused:
        if store.remove(folder):
            say(f"  removed {_shown(folder)}")
        else:
            say(f"  skipped {_shown(folder)} (not a real folder inside {golden_dir}: a symbolic link is on its path)")
    return 0


# -- upgrade-goldens, demo ---------------------------------------------------------------


def cmd_upgrade_goldens(args: argparse.Namespace) -> int:
    from ..core import golden_format
    from ..tools.git_history import held_format_2

    root = Path(args.dir) if args.dir else default_golden_dir()
    store = _store(root, read_only=False)
    done = store.upgrade(held_format_2=held_format_2(store.max_bytes))
    if not done:
        raise TrainguardError(f"{root}: holds no golden files (no {golden_format.METRICS_FILE} below it)")
    upgraded = sum(1 for _, outcome in done if outcome != "current")
    if upgraded:
        say("warning: format-1 goldens carry no digest, so trainguard could not check that nobody edited them; "
            "this upgrade vouches for their content. Review them before committing: git diff --stat "
            + shlex.quote(str(root)))
    say(f"{upgraded} of {len(done)} golden folder(s) under {root} upgraded to format {golden_format.FORMAT_VERSION}"
          + (" (nothing to do)" if not upgraded else ""))
    say(table(["golden", "format"], [[str(f.relative_to(root)), o] for f, o in done]))
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from ..tools.demo import run_demo

    return run_demo(keep=args.keep)


# -- entry point -----------------------------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="trainguard",
        description="Guard seeded training runs with Parquet golden files. "
        "The pytest plugin does the checking; this command inspects goldens and runs the demo.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    p = sub.add_parser("demo", help="write a small guarded suite, bless it, check it, break it, show the report")
    p.add_argument("--keep", metavar="DIR", help="build the demo in DIR (must be empty or absent) and keep it")
    p.set_defaults(func=cmd_demo)
    p = sub.add_parser("show", help="show a golden folder or file (or list the goldens under a folder)")
    p.add_argument("path", help="a golden folder, a metrics.parquet/state.parquet file, or a golden dir")
    p.set_defaults(func=cmd_show)
    p = sub.add_parser("bless", help="adopt saved results (pytest --trainguard-results DIR) as goldens, without re-running")
    p.add_argument("--from", dest="source", required=True, metavar="DIR", help="results folder, e.g. a CI artifact")
    p.add_argument("nodeids", nargs="*", metavar="NODEID",
                   help="tests to adopt (a node id, or a file/class prefix); default: all results in DIR")
    p.add_argument("--reason", help="why; stored in the goldens")
    p.add_argument("--golden-dir", help="golden folder (default: the ini option trainguard_golden_dir, else ./golden)")
    p.add_argument("--dry-run", action="store_true", help="list what would be adopted, write nothing")
    p.set_defaults(func=cmd_bless)
    p = sub.add_parser("diff", help="compare two goldens or result folders with the plugin's report")
    p.add_argument("a", help="reference folder (e.g. a golden)")
    p.add_argument("b", help="folder to compare (e.g. a result)")
    p.add_argument("--rtol", type=float, help="relative tolerance (default: the reference's)")
    p.add_argument("--atol", type=float, help="absolute tolerance (default: the reference's)")
    p.add_argument("--exact", action="store_true", help="demand bitwise identity")
    p.set_defaults(func=cmd_diff)
    p = sub.add_parser("audit", help="review aid: goldens added, removed or re-blessed since REV, tolerances "
                       "loosened or tightened, entries gone; exit 1 when something was loosened or removed")
    p.add_argument("--since", required=True, metavar="REV", help="the revision to compare with, e.g. origin/main")
    p.add_argument("--golden-dir", metavar="DIR",
                   help="golden folder (default: the ini option trainguard_golden_dir, else ./golden)")
    p.add_argument("--markdown", action="store_true", help="print a Markdown table for a pull-request comment")
    p.add_argument("--output", metavar="FILE", help="write the report to FILE instead of printing it")
    p.set_defaults(func=cmd_audit)
    p = sub.add_parser("bisect", help="find the first commit at which guarded tests stop matching (git bisect)")
    p.add_argument("--good", required=True, metavar="REV", help="a revision whose tests match the reference")
    p.add_argument("--bad", required=True, metavar="REV", help="a later revision whose tests have changed")
    p.add_argument("--setup", metavar="CMD", help="shell command run at each commit before pytest "
                   "(e.g. 'pip install -e .'); a non-zero exit marks the commit untestable")
    p.add_argument("--reference", choices=("good", "worktree"), default="good",
                   help="goldens to compare with: the good revision's (default) or the work tree's")
    p.add_argument("--golden-dir", metavar="DIR",
                   help="golden folder (default: the ini option trainguard_golden_dir, else ./golden)")
    p.add_argument("--keep", action="store_true",
                   help="keep the temporary folder (frozen reference, each commit's report) and print where it is")
    p.add_argument("nodeids", nargs="+", metavar="NODEID", help="guarded tests to check at each commit")
    p.set_defaults(func=cmd_bisect)
    p = sub.add_parser("calibrate", help="run a guarded test under noise-only variations (threads, kernel dispatch, "
                       "deterministic mode, hash seed), report the spread, propose rtol/atol and check that "
                       "the proposal still catches small planted changes")
    p.add_argument("nodeid", metavar="NODEID", help="one guarded test, e.g. tests/test_x.py::test_y")
    p.add_argument("--runs", type=int, default=2, metavar="N",
                   help="baseline runs (default 2, at least 2); each variation runs N-1 times, at least once")
    p.add_argument("--safety", type=float, default=10.0, metavar="F",
                   help="proposed tolerance = F x the largest spread observed (default 10)")
    p.add_argument("--write", action="store_true",
                   help="store the proposal in the test's golden (metadata 'calibrated'), where comparisons use it")
    p.add_argument("--golden-dir", help="golden folder (default: the ini option trainguard_golden_dir, else ./golden)")
    p.add_argument("--jobs", type=int, default=None, metavar="J",
                   help="runs at a time after the first (default: a quarter of the CPUs, 1 to 4)")
    p.add_argument("--keep-runs", metavar="DIR", help="keep every run's recording in DIR (empty or absent), "
                   "one folder per run, for trainguard show/diff")
    p.add_argument("--from", dest="sources", nargs="+", metavar="DIR",
                   help="measure the spread across these folders instead (results folders CI wrote with "
                        "--trainguard-results on different runners, or the golden folder); the first is the "
                        "reference. The power checks still run here")
    p.set_defaults(func=cmd_calibrate)
    p = sub.add_parser("merge-reports", help="merge the --trainguard-report folders of CI shards into one")
    p.add_argument("dirs", nargs="+", metavar="DIR", help="report folders (each with summary.json)")
    p.add_argument("--out", required=True, metavar="DIR", help="folder for the merged summary.md, summary.json, plots")
    p.set_defaults(func=cmd_merge_reports)
    p = sub.add_parser("prune", help="list (or --delete) golden folders that no collected test uses")
    p.add_argument("--golden-dir", help="golden folder (default: the ini option trainguard_golden_dir, else ./golden)")
    p.add_argument("--delete", action="store_true", help="remove the unused golden folders (links are never followed)")
    p.add_argument("pytest_args", nargs=argparse.REMAINDER, metavar="PYTEST ARGS",
                   help="arguments for the collecting pytest run (after trainguard's own options; '--' first "
                        "if they start with '-'), e.g. tests/")
    p.set_defaults(func=cmd_prune)
    p = sub.add_parser("upgrade-goldens", help="convert goldens written by an older trainguard to the current "
                       "format (adds content digests) after you reviewed them: it vouches for their content; idempotent, each "
                       "folder switched atomically")
    p.add_argument("dir", nargs="?", metavar="DIR",
                   help="golden dir (default: the ini option trainguard_golden_dir, else ./golden)")
    p.set_defaults(func=cmd_upgrade_goldens)
    p = sub.add_parser("env", help="print this machine's environment fingerprint")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(func=cmd_env)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    from ..core import fixes

    fixes.install(PytestCommands())
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_USAGE
    try:
        return int(args.func(args))
    except TrainguardError as exc:
        say(f"trainguard {args.command}: {exc}", err=True)
        return EXIT_USAGE
    except BrokenPipeError:  # output piped into head or less, closed early
        sys.stderr.close()
        return 0
    except KeyboardInterrupt:
        say("trainguard: interrupted", err=True)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
