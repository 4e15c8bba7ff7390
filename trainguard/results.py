"""Result folders: new runs saved by CI, and adopting them as goldens without re-running.

CI often runs on another platform than the laptop that blessed the goldens. When CI's
runs differ and the difference is intended, the right goldens are CI's own runs: the
plugin saves them (`--trainguard-results DIR`, same layout as the golden dir) and
`trainguard bless --from DIR` adopts them. Adoption validates everything first and only
then writes, so a bad results folder never leaves goldens half-updated.
"""

from __future__ import annotations

import datetime as _dt
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

from . import golden, guard, paths
from .errors import TrainguardError
from .record import Run
from .tolerance import Policy


def write_result(results_dir: str | os.PathLike[str], nodeid: str, run: Run) -> Path:
    folder = paths.golden_folder(results_dir, nodeid)
    golden.write_run(folder, run)
    return folder


@dataclass
class Adoption:
    nodeid: str
    source: Path
    target: Path
    outcome: str  # guard.BLESSED_NEW / BLESSED_CHANGED / BLESSED_UNCHANGED


def selects(selector: str, nodeid: str) -> bool:
    """A selector picks a node id exactly, or everything below a file, class or test name."""
    selector = selector.rstrip(":")
    return nodeid == selector or nodeid.startswith(selector + "::") or nodeid.startswith(selector + "[")


def load_results(results_dir: str | os.PathLike[str]) -> dict[str, tuple[Path, Run]]:
    """Every readable result below `results_dir`, by node id. Raises on anything unusable."""
    results_dir = Path(results_dir)
    if not results_dir.is_dir():
        raise TrainguardError(f"{results_dir}: no such results folder")
    found = golden.find_goldens(results_dir)
    if not found:
        raise TrainguardError(
            f"{results_dir}: holds no results (no {golden.METRICS_FILE} below it); results are written by "
            f"pytest --trainguard-results {results_dir}")
    out: dict[str, tuple[Path, Run]] = {}
    for folder in found:
        run = golden.read_run(folder)
        version = run.meta.get("format_version")
        if version != golden.FORMAT_VERSION:
            raise TrainguardError(
                f"{folder}: recorded in golden format {version}, this trainguard writes format "
                f"{golden.FORMAT_VERSION}; re-run the tests with this trainguard to get results it can adopt")
        nodeid = run.meta.get("nodeid")
        if not isinstance(nodeid, str) or not nodeid:
            raise TrainguardError(f"{folder}: result has no test node id in its metadata")
        if paths.golden_folder(results_dir, nodeid) != folder:
            raise TrainguardError(f"{folder}: result for {nodeid} is not where that test's results belong "
                                  f"({paths.golden_relpath(nodeid)}); refusing it")
        out[nodeid] = (folder, run)
    return out


def adopt(results_dir: str | os.PathLike[str], golden_dir: str | os.PathLike[str], selectors: Sequence[str] = (),
          reason: str = "", dry_run: bool = False) -> list[Adoption]:
    """Make the selected results (all when no selector) the goldens. Validates all before writing any."""
    results = load_results(results_dir)
    chosen = sorted(results) if not selectors else []
    for selector in selectors:
        hits = [n for n in sorted(results) if selects(selector, n)]
        if not hits:
            known = "\n  ".join(sorted(results)[:20])
            raise TrainguardError(f"no result in {results_dir} matches {selector!r}; results there are for:\n  {known}")
        chosen.extend(h for h in hits if h not in chosen)
    stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    adoptions = []
    for nodeid in chosen:
        source, run = results[nodeid]
        run.meta = {**run.meta, "blessed_at": stamp, "reason": reason or run.meta.get("reason", ""),
                    "adopted_from": str(source)}
        run.meta.pop("format_version", None)
        target = paths.golden_folder(golden_dir, nodeid)
        if dry_run:
            adoptions.append(Adoption(nodeid, source, target, "would adopt"))
            continue
        result = guard.bless(nodeid, run, target, Policy())
        adoptions.append(Adoption(nodeid, source, target, result.outcome))
    return adoptions
