"""Result folders: new runs saved by CI, and adopting them as goldens without re-running.

CI often runs on another platform than the laptop that blessed the goldens. When CI's
runs differ and the difference is intended, the right goldens are CI's own runs: the
plugin saves them (`--trainguard-results DIR`, same layout as the golden dir) and
`trainguard bless --from DIR` adopts them. Adoption validates everything first and only
then writes, so a bad results folder never leaves goldens half-updated.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path
from typing import Sequence

from . import golden_format
from .errors import TrainguardError
from .fixes import FixCommands, current
from .guard import bless
from .meta import utc_stamp
from .paths import golden_relpath
from .records import Run
from .store import GoldenStore
from .tolerance import Policy


@dataclass
class Adoption:
    nodeid: str
    source: Path
    target: Path
    outcome: str  # verdicts.BLESSED_NEW / BLESSED_CHANGED / BLESSED_UNCHANGED, or "would adopt"


def selects(selector: str, nodeid: str) -> bool:
    """A selector picks a node id exactly, or everything below a file, class or test name."""
    selector = selector.rstrip(":")
    return nodeid == selector or nodeid.startswith(selector + "::") or nodeid.startswith(selector + "[")


def load_results(results: GoldenStore, commands: FixCommands | None = None) -> dict[str, tuple[Path, Run]]:
    """Every readable result in a results store, by node id. Raises on anything unusable."""
    results_dir = results.root
    if not results_dir.is_dir():
        raise TrainguardError(f"{results_dir}: no such results folder")
    found = results.find()
    if not found:
        raise TrainguardError(
            f"{results_dir}: holds no results (no {golden_format.METRICS_FILE} below it); results are written by "
            f"{(commands or current()).record_results(str(results_dir))}")
    out: dict[str, tuple[Path, Run]] = {}
    for folder in found:
        run = results.read(folder)
        version = run.meta.format_version
        if version != golden_format.FORMAT_VERSION:
            raise TrainguardError(
                f"{folder}: recorded in golden format {version}, this trainguard writes format "
                f"{golden_format.FORMAT_VERSION}; re-run the tests with this trainguard to get results it can adopt")
        nodeid = run.meta.nodeid
        if not nodeid:
            raise TrainguardError(f"{folder}: result has no test node id in its metadata")
        if results.folder(nodeid) != folder:
            raise TrainguardError(f"{folder}: result for {nodeid} is not where that test's results belong "
                                  f"({golden_relpath(nodeid)}); refusing it")
        out[nodeid] = (folder, run)
    return out


def adopt(results: GoldenStore, golden: GoldenStore, selectors: Sequence[str] = (), reason: str = "",
          dry_run: bool = False, commands: FixCommands | None = None) -> list[Adoption]:
    """Make the selected results (all when no selector) the goldens. Validates all before writing any."""
    found = load_results(results, commands)
    chosen = sorted(found) if not selectors else []
    for selector in selectors:
        hits = [n for n in sorted(found) if selects(selector, n)]
        if not hits:
            known = "\n  ".join(sorted(found)[:20])
            raise TrainguardError(f"no result in {results.root} matches {selector!r}; results there are for:\n  {known}")
        chosen.extend(h for h in hits if h not in chosen)
    stamp = utc_stamp()
    adoptions = []
    for nodeid in chosen:
        source, run = found[nodeid]
        # A results folder is CI output: its tolerances are never adopted (a crafted `calibrated`
        # entry would switch the test off); the golden being replaced keeps its own calibration.
        run = replace(run, meta=run.meta.with_(blessed_at=stamp, reason=reason or run.meta.get("reason", ""),
                                               adopted_from=str(source), calibrated=None))
        target = golden.folder(nodeid)
        if dry_run:
            adoptions.append(Adoption(nodeid, source, target, "would adopt"))
            continue
        result = bless(nodeid, run, target, Policy(), store=golden)
        adoptions.append(Adoption(nodeid, source, target, result.outcome))
    return adoptions
