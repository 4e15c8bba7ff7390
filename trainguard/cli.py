"""The `trainguard` command: look at goldens and the environment, run the demo.

Every user mistake (a wrong path, a corrupt file) ends in one message on stderr and exit
status 2, never a traceback.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any, Sequence

from .errors import TrainguardError

EXIT_USAGE = 2


def _flatten(data: Any, prefix: str = "") -> list[tuple[str, Any]]:
    if isinstance(data, dict):
        items: list[tuple[str, Any]] = []
        for key in sorted(data):
            items.extend(_flatten(data[key], f"{prefix}{key}."))
        return items
    return [(prefix.rstrip("."), data)]


# -- env -------------------------------------------------------------------------------


def cmd_env(args: argparse.Namespace) -> int:
    from .environment import fingerprint

    fp = fingerprint()
    if args.json:
        print(json.dumps(fp, indent=2, sort_keys=True))
        return 0
    print("environment fingerprint (what trainguard stores with every golden):")
    from .report import table

    print(table(["key", "value"], _flatten(fp)))
    print("\nnote: inside a guarded test trainguard also turns on deterministic mode; "
          "the 'deterministic' values above are this process's, outside any test.")
    return 0


# -- show ------------------------------------------------------------------------------


def _show_meta(meta: dict[str, Any]) -> list[str]:
    from .report import table

    lines = []
    tol = meta.get("tolerances") or {}
    rows = [
        ("format version", meta.get("format_version")),
        ("test", meta.get("nodeid")),
        ("seed", meta.get("seed")),
        ("deterministic", meta.get("deterministic")),
        ("tolerance", "exact (bitwise)" if tol.get("exact") else f"rtol={tol.get('rtol')}, atol={tol.get('atol')}"),
        ("per-metric tolerance", ", ".join(f"{k}: rtol={v.get('rtol')}, atol={v.get('atol')}"
                                           for k, v in (tol.get("metrics") or {}).items()) or None),
        ("stored values up to", meta.get("max_values")),
        ("blessed at", meta.get("blessed_at")),
        ("reason", meta.get("reason") or None),
    ]
    lines.append(table(["metadata", "value"], rows))
    fp = meta.get("fingerprint")
    if isinstance(fp, dict):
        lines.append("")
        lines.append(table(["environment", "value"], _flatten(fp)))
    return lines


def _show_metrics(metrics: dict[str, Any]) -> list[str]:
    import numpy as np

    from .report import fmt, table

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
    from .report import fmt, table

    rows = []
    for t in tensors.values():
        rows.append([t.name, t.kind, t.dtype, "x".join(map(str, t.shape)) or "scalar", t.sha256[:16],
                     fmt(t.min), fmt(t.max), fmt(t.mean), fmt(t.l2), t.nonfinite,
                     "yes" if t.values is not None else "no"])
    return [f"state ({len(tensors)} entries):",
            table(["name", "kind", "dtype", "shape", "sha256 (first 16)", "min", "max", "mean", "l2", "non-finite",
                   "values stored"], rows)]


def cmd_show(args: argparse.Namespace) -> int:
    from . import golden

    path = Path(args.path)
    if not path.exists():
        raise TrainguardError(f"{path}: no such file or folder")
    if path.is_file():
        if path.name == golden.STATE_FILE:
            tensors, meta = golden.read_state(path)
            body = _show_state(tensors)
        else:
            metrics, meta = golden.read_metrics(path)
            body = _show_metrics(metrics)
        print(f"golden file {path}")
        print("\n".join(_show_meta(meta) + [""] + body))
        return 0
    if golden.exists(path):
        run = golden.read_run(path)
        print(f"golden {path}")
        print("\n".join(_show_meta(run.meta) + [""] + _show_metrics(run.metrics) + [""] + _show_state(run.tensors)))
        return 0
    found = golden.find_goldens(path)
    if not found:
        raise TrainguardError(f"{path}: holds no golden files (no {golden.METRICS_FILE} or {golden.STATE_FILE} below it)")
    from .report import table

    rows = []
    for folder in found:
        try:
            run = golden.read_run(folder)
        except TrainguardError as exc:
            rows.append([str(folder.relative_to(path)), "-", "-", "-", "-", f"unreadable: {getattr(exc, 'problem', exc)}"])
            continue
        steps = max((len(s.steps) for s in run.metrics.values()), default=0)
        rows.append([str(folder.relative_to(path)), len(run.metrics), steps, len(run.tensors),
                     run.meta.get("blessed_at", "-"), run.meta.get("reason") or "-"])
    print(f"{len(found)} golden folder(s) under {path} (show one for details: trainguard show FOLDER):")
    print(table(["golden", "metrics", "steps", "state entries", "blessed at", "reason"], rows))
    return 0


# -- bless --from / diff -------------------------------------------------------------


def default_golden_dir(start: Path | None = None) -> Path:
    """The golden dir pytest would use from this folder: its ini option, else 'golden'."""
    import configparser

    start = start or Path.cwd()
    for folder in (start, *start.parents):
        pyproject = folder / "pyproject.toml"
        if pyproject.is_file():
            try:
                import tomllib
            except ImportError:  # Python 3.10: no TOML reader in the standard library
                tomllib = None  # type: ignore[assignment]
            if tomllib is not None:
                try:
                    data = tomllib.loads(pyproject.read_text(encoding="utf-8"))
                except (ValueError, OSError):
                    data = {}
                ini = data.get("tool", {}).get("pytest", {}).get("ini_options")
                if isinstance(ini, dict):
                    return folder / str(ini.get("trainguard_golden_dir", "golden"))
        for name, section in (("pytest.ini", "pytest"), ("tox.ini", "pytest"), ("setup.cfg", "tool:pytest")):
            path = folder / name
            if path.is_file():
                parser = configparser.ConfigParser()
                try:
                    parser.read(path, encoding="utf-8")
                except configparser.Error:
                    continue
                if parser.has_section(section):
                    return folder / parser.get(section, "trainguard_golden_dir", fallback="golden")
    return start / "golden"


def cmd_bless(args: argparse.Namespace) -> int:
    from .results import adopt

    golden_dir = Path(args.golden_dir) if args.golden_dir else default_golden_dir()
    adoptions = adopt(args.source, golden_dir, args.nodeids, reason=args.reason or "", dry_run=args.dry_run)
    from .report import table

    verb = "would adopt" if args.dry_run else "adopted"
    print(f"{verb} {len(adoptions)} result(s) from {args.source} into {golden_dir}:")
    print(table(["golden", "test", "from"], [[a.outcome, a.nodeid, str(a.source)] for a in adoptions]))
    if not args.dry_run:
        print("review and commit them, e.g.: git add " + str(golden_dir))
    return 0


def cmd_diff(args: argparse.Namespace) -> int:
    from . import golden
    from .comparison import compare
    from .report import describe_comparison
    from .tolerance import DEFAULT_ATOL, DEFAULT_RTOL, Policy, Tolerance

    a = golden.read_run(args.a)
    b = golden.read_run(args.b)
    tol = a.meta.get("tolerances") or {}
    per_metric = {k: Tolerance(float(v.get("rtol", DEFAULT_RTOL)), float(v.get("atol", DEFAULT_ATOL)))
                  for k, v in (tol.get("metrics") or {}).items() if isinstance(v, dict)}
    policy = Policy(
        default=Tolerance(args.rtol if args.rtol is not None else float(tol.get("rtol", DEFAULT_RTOL)),
                          args.atol if args.atol is not None else float(tol.get("atol", DEFAULT_ATOL))),
        exact=bool(args.exact or tol.get("exact", False)),
        metrics={} if (args.rtol is not None or args.atol is not None) else per_metric,
    )
    cmp = compare(a, b, policy)
    print(f"trainguard diff: {args.a} (reference) vs {args.b}")
    print(describe_comparison(cmp))
    return 1 if cmp.failed else 0


# -- bisect ----------------------------------------------------------------------------


def cmd_bisect(args: argparse.Namespace) -> int:
    from .bisect import describe, run_bisect

    outcome = run_bisect(args.good, args.bad, args.nodeids, setup=args.setup, reference=args.reference,
                         golden_dir=args.golden_dir, keep=args.keep, echo=lambda line: print(line, flush=True))
    print()
    print(describe(outcome))
    return 0 if outcome.found else 1


# -- calibrate -------------------------------------------------------------------------


def cmd_calibrate(args: argparse.Namespace) -> int:
    from .calibrate import calibrate

    return calibrate(args.nodeid, runs=args.runs, safety=args.safety, write=args.write,
                     golden_dir=args.golden_dir, jobs=args.jobs, keep_runs=args.keep_runs,
                     golden_dir_option=args.golden_dir)


def cmd_merge_reports(args: argparse.Namespace) -> int:
    from .report_files import merge_reports

    path, count = merge_reports(args.dirs, args.out)
    print(f"merged {count} row(s) from {len(args.dirs)} report folder(s) into {path}")
    return 0


# -- prune -----------------------------------------------------------------------------


def collect_nodeids(pytest_args: Sequence[str]) -> list[str]:
    """Node ids of the tests pytest collects with `pytest_args`, from a `--collect-only -q` subprocess."""
    import shlex
    import subprocess

    cmd = [sys.executable, "-m", "pytest", "--collect-only", "-q", "-p", "no:cacheprovider", *pytest_args]
    shown = shlex.join(["python", *cmd[1:]])
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, errors="replace")
    except OSError as exc:
        raise TrainguardError(f"could not start pytest ({exc}); nothing was removed") from None
    lines = proc.stdout.splitlines()
    if proc.returncode == 5:
        raise TrainguardError(f"pytest collected no tests ({shown}), so every golden would count as unused; "
                              "nothing was removed. Run prune from the project root, with the arguments that "
                              "select your whole suite (or none)")
    if proc.returncode != 0:
        errors = [line for line in lines if line.startswith(("ERROR", "E   "))][:8]
        detail = errors or [line for line in (lines + proc.stderr.splitlines()) if line.strip()][-8:]
        raise TrainguardError("collecting the tests failed (pytest exit status "
                              f"{proc.returncode}); nothing was removed. pytest said:\n  " + "\n  ".join(detail)
                              + f"\nFix that, then re-run; to see pytest's full output: {shown}")
    nodeids = []
    for line in lines:
        if not line.strip():
            break  # the node ids end at the first blank line; "N tests collected" and warnings follow
        if "::" in line:
            nodeids.append(line)
    return nodeids


_GOLDEN_ENTRIES = ("metrics.parquet", "state.parquet", "trace.parquet", ".trainguard-commit", ".trainguard-lock")


def _inside_without_links(folder: Path, root: Path) -> bool:
    """`folder` lies below `root`, and neither it nor any folder between them is a symbolic link."""
    try:
        rel = folder.relative_to(root)
    except ValueError:
        return False
    if not rel.parts or ".." in rel.parts:
        return False
    current = root
    for part in rel.parts:
        current = current / part
        if current.is_symlink() or not current.is_dir():
            return False
    return True


def _remove_golden(folder: Path, root: Path) -> bool:
    """Delete one golden folder's files (symbolic links are unlinked, never followed), then the empty
    folders up to `root`. A folder that also holds subfolders keeps them and everything but its golden files."""
    import os

    if not _inside_without_links(folder, root):
        return False
    entries = list(os.scandir(folder))
    nested = any(e.is_dir(follow_symlinks=False) for e in entries)
    for entry in entries:
        if entry.is_dir(follow_symlinks=False):
            continue
        if nested and entry.name not in _GOLDEN_ENTRIES and not entry.name.startswith(".tmp-"):
            continue
        os.unlink(entry.path)
    current = folder
    while current != root:
        try:
            current.rmdir()  # only when empty
        except OSError:
            break
        current = current.parent
    return True


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
    from . import golden
    from .paths import golden_folder

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
    nodeids = collect_nodeids(pytest_args)
    used = {golden_folder(golden_dir, nodeid) for nodeid in nodeids}
    found = golden.find_goldens(golden_dir)
    unused = [folder for folder in found if folder not in used]
    print(f"{len(found)} golden folder(s) under {golden_dir}, {len(nodeids)} test(s) collected: "
          f"{len(unused)} golden folder(s) used by no collected test")
    if not unused:
        return 0
    if not args.delete:
        for folder in unused:
            print(f"  {_shown(folder)}")
        extra = " ".join(pytest_args)
        print("remove them with: trainguard prune --delete"
              + (f" --golden-dir {args.golden_dir}" if args.golden_dir else "") + (f" {extra}" if extra else ""))
        return 1
    for folder in unused:
        if _remove_golden(folder, golden_dir):
            print(f"  removed {_shown(folder)}")
        else:
            print(f"  skipped {_shown(folder)} (not a real folder inside {golden_dir}: a symbolic link is on its path)")
    return 0


# -- demo ------------------------------------------------------------------------------


def cmd_upgrade_goldens(args: argparse.Namespace) -> int:
    from . import golden
    from .report import table

    root = Path(args.dir) if args.dir else default_golden_dir()
    done = golden.upgrade_goldens(root)
    if not done:
        raise TrainguardError(f"{root}: holds no golden files (no {golden.METRICS_FILE} below it)")
    upgraded = sum(1 for _, outcome in done if outcome != "current")
    print(f"{upgraded} of {len(done)} golden folder(s) under {root} upgraded to format {golden.FORMAT_VERSION}"
          + (" (nothing to do)" if not upgraded else ""))
    print(table(["golden", "format"], [[str(f.relative_to(root)), o] for f, o in done]))
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from .demo import run_demo

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
    p = sub.add_parser("calibrate", help="run a guarded test under noise-only variations (threads, deterministic mode, "
                       "hash seed), report the spread and propose rtol/atol")
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
                       "format (adds content digests); idempotent, each folder switched atomically")
    p.add_argument("dir", nargs="?", metavar="DIR",
                   help="golden dir (default: the ini option trainguard_golden_dir, else ./golden)")
    p.set_defaults(func=cmd_upgrade_goldens)
    p = sub.add_parser("env", help="print this machine's environment fingerprint")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(func=cmd_env)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_USAGE
    try:
        return int(args.func(args))
    except TrainguardError as exc:
        print(f"trainguard {args.command}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except BrokenPipeError:  # output piped into head or less, closed early
        sys.stderr.close()
        return 0
    except KeyboardInterrupt:
        print("trainguard: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
