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
    from .fingerprint import fingerprint

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
            rows.append([str(folder.relative_to(path)), "-", "-", "-", "-", f"unreadable: {exc.problem if hasattr(exc, 'problem') else exc}"])
            continue
        steps = max((len(s.steps) for s in run.metrics.values()), default=0)
        rows.append([str(folder.relative_to(path)), len(run.metrics), steps, len(run.tensors),
                     run.meta.get("blessed_at", "-"), run.meta.get("reason") or "-"])
    print(f"{len(found)} golden folder(s) under {path} (show one for details: trainguard show FOLDER):")
    print(table(["golden", "metrics", "steps", "state entries", "blessed at", "reason"], rows))
    return 0


# -- demo ------------------------------------------------------------------------------


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
    except KeyboardInterrupt:
        print("trainguard: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
