"""Report folders for CI: `summary.md`, `summary.json` and plots of changed trajectories.

`summary.md` is a Markdown table fit for a pull-request comment or a CI job summary.
`summary.json` carries the same rows for machines (bisect and shard merging read it).
Plots need matplotlib (the `trainguard[report]` extra); without it the summary says how
to get them instead of failing the run.
"""

from __future__ import annotations

import json
import os
import re
import stat
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any
from urllib.parse import quote

from .atomic import check_root, write_confined
from .errors import TrainguardError
from .paths import safe_component
from .report import environment_changes, first_divergence
from .text import md_code, md_escape, untrusted
from .verdicts import ATTENTION_ORDER, CHANGED, CLOSE, IDENTICAL, NONDETERMINISTIC

if TYPE_CHECKING:
    from .outcome import GuardResult
    from .records import Run

SUMMARY_MD = "summary.md"
SUMMARY_JSON = "summary.json"
PLOTS = "plots"
REPORT_FORMAT = 1


@dataclass
class Row:
    nodeid: str
    outcome: str
    divergence: str = ""
    environment: list[str] = field(default_factory=list)
    plot: str | None = None
    blessing: bool = False


def row_for(result: GuardResult, report_dir: Path | None = None) -> dict[str, Any]:
    """A JSON-ready summary row of one verdict; writes its plot into `report_dir` when it changed.

    Rows are plain data so that they travel from pytest-xdist workers to the controller
    (in a report's user_properties) and between CI shards (in summary.json).
    """
    cmp = result.comparison
    env = environment_changes(cmp.golden_meta.get("fingerprint"), cmp.new_meta.get("fingerprint")) if cmp else []
    divergence = getattr(result, "divergence", "") or first_divergence(cmp)  # set for nondeterministic runs
    # Names and fingerprint values come from goldens (pull requests): escaped here, once, for every consumer.
    row = Row(result.nodeid, result.outcome, untrusted(divergence), [untrusted(e) for e in env],
              blessing=result.blessing)
    data = asdict(row)
    data["folder"] = result.folder
    data["plots_unavailable"] = False
    if result.warning:
        data["warning"] = untrusted(result.warning)
    if (report_dir is not None and not result.blessing and result.outcome == CHANGED
            and result.reference is not None and result.run is not None):
        try:
            import matplotlib  # noqa: F401
        except ImportError:
            data["plots_unavailable"] = True
        else:
            name = f"{PLOTS}/{safe_component(result.nodeid.replace('::', '__'))}.png"
            if plot_trajectories(report_dir, name, result.nodeid, result.reference, result.run):
                data["plot"] = name
    return data


def _row(data: dict[str, Any]) -> Row:
    return Row(**{k: data[k] for k in Row.__dataclass_fields__ if k in data})


_ICON = {IDENTICAL: "identical", CLOSE: "within tolerance", CHANGED: "**changed**",
         NONDETERMINISTIC: "**nondeterministic**"}


def summary_markdown(rows: list[Row], plots_note: str = "") -> str:
    checks = [r for r in rows if not r.blessing]
    counts: dict[str, int] = {}
    for r in checks:
        counts[r.outcome] = counts.get(r.outcome, 0) + 1
    lines = ["# trainguard summary", ""]
    if not checks:
        lines.append("No guarded test was checked in this run.")
    else:
        lines.append(", ".join(f"{n} {k}" for k, n in counts.items()) + f" (of {len(checks)} guarded tests)")
        lines += ["", "| test | outcome | first divergence | environment changes |", "| --- | --- | --- | --- |"]
        order = {outcome: i for i, outcome in enumerate(ATTENTION_ORDER)}
        for r in sorted(checks, key=lambda r: (order.get(r.outcome, len(order)), r.nodeid)):
            div = md_escape(r.divergence) or "-"
            if r.plot:
                div += f" ([plot]({quote(r.plot)}))"
            env = "<br>".join(md_escape(e) for e in r.environment[:5]) or "-"
            if len(r.environment) > 5:
                env += f"<br>... {len(r.environment) - 5} more"
            lines.append(f"| {md_code(r.nodeid)} | {_ICON.get(r.outcome, md_escape(r.outcome))} | {div} | {env} |")
    if plots_note:
        lines += ["", plots_note]
    return "\n".join(lines) + "\n"


PLOTS_NOTE = ("Plots of changed trajectories need matplotlib: `pip install 'trainguard[report]'`, "
              "then re-run with `--trainguard-report`.")


def write_report(report_dir: str | os.PathLike[str], rows: list[dict[str, Any]]) -> Path:
    """Write summary.md and summary.json for `rows` (plots were written when the rows were made)."""
    report_dir = Path(report_dir)
    note = PLOTS_NOTE if any(r.get("plots_unavailable") for r in rows) else ""
    # Sorted: under pytest-xdist rows arrive in completion order, which changes from run to run.
    rows = sorted(rows, key=lambda r: (r["nodeid"], bool(r.get("blessing"))))
    write_confined(report_dir, SUMMARY_MD, summary_markdown([_row(r) for r in rows], note), "reports")
    payload = {"format": REPORT_FORMAT, "rows": rows}
    write_confined(report_dir, SUMMARY_JSON, json.dumps(payload, indent=1, sort_keys=True), "reports")
    return report_dir / SUMMARY_MD


def read_rows(report_dir: str | os.PathLike[str]) -> list[dict[str, Any]]:
    """Rows of a report folder's summary.json (for merging shards)."""
    path = Path(report_dir) / SUMMARY_JSON
    try:
        payload = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise TrainguardError(f"{path}: missing; is {report_dir} a folder written by --trainguard-report?") from None
    except (OSError, ValueError, RecursionError) as exc:
        raise TrainguardError(f"{path}: not readable JSON ({exc})") from None
    if not isinstance(payload, dict) or payload.get("format") != REPORT_FORMAT or not isinstance(payload.get("rows"), list):
        raise TrainguardError(f"{path}: not a trainguard summary (format {REPORT_FORMAT} expected)")
    rows = payload["rows"]
    for row in rows:
        if not isinstance(row, dict) or not isinstance(row.get("nodeid"), str) or not isinstance(row.get("outcome"), str):
            raise TrainguardError(f"{path}: malformed row {row!r:.80}")
    return rows


def merge_reports(sources: list[str | os.PathLike[str]], out: str | os.PathLike[str]) -> tuple[Path, int]:
    """Merge the report folders of CI shards into one: rows, and their plots copied along.

    Everything is read and checked before anything is written, so an error leaves `out` as it was.
    """
    out = Path(out)
    check_root(out, "reports")
    seen: dict[Path, str] = {}
    for source in sources:
        real = Path(source).resolve()
        if real in seen:
            also = "" if seen[real] == str(source) else f" (also as {seen[real]})"
            raise TrainguardError(f"{source}: report folder given twice{also}; name each shard's folder once")
        if real == out.resolve():
            raise TrainguardError(f"{source}: the output folder cannot also be a report folder to merge; "
                                  "choose another --out")
        seen[real] = str(source)
    rows_by_source = [(source, read_rows(source)) for source in sources]
    merged: dict[str, dict[str, Any]] = {}
    copies: list[tuple[Path, Path]] = []
    plot_names: set[str] = set()
    for source, source_rows in rows_by_source:
        for row in source_rows:
            key = f"{row['nodeid']}|{row.get('blessing', False)}"
            if key in merged:
                raise TrainguardError(f"{row['nodeid']} appears in more than one report (again in {source}); "
                                      "were the shards overlapping?")
            plot = row.get("plot")
            if plot:
                data = _plot_bytes(Path(source), str(plot))
                if data is None:
                    row = {**row, "plot": None}
                else:
                    name = Path(plot).name
                    if name in plot_names:  # distinct node ids, same escaped file name: keep both
                        name = f"{Path(name).stem}-{len(plot_names)}{Path(name).suffix}"
                    plot_names.add(name)
                    copies.append((data, f"{PLOTS}/{name}"))  # one plain component: _plot_bytes checked it
                    row = {**row, "plot": f"{PLOTS}/{name}"}
            merged[key] = row
    for data, rel in copies:
        write_confined(out, rel, data, "reports")
    rows = sorted(merged.values(), key=lambda r: r["nodeid"])
    return write_report(out, rows), len(rows)


#: A plot trainguard writes is well under a megabyte; a larger "plot" in a shard's folder is not one.
_MAX_PLOT_BYTES = 16 * 1024 * 1024


#: Plot file names as `row_for` makes them (`paths.safe_component` output, which may hold %XX escapes).
_PLOT_NAME = re.compile(r"[A-Za-z0-9_\-+=,@\[\]()%~][A-Za-z0-9_\-.+=,@\[\]()%~]{0,200}\.png\Z")


def _plot_bytes(source: Path, plot: str) -> bytes | None:
    """A shard's plot, read without following any link (at the file or on the way), or None to drop it."""
    rel = Path(plot)
    if rel.is_absolute() or ".." in rel.parts or len(rel.parts) != 2 or rel.parts[0] != PLOTS \
            or not _PLOT_NAME.match(rel.parts[1]):
        return None
    current = source
    for part in rel.parts:
        current = current / part
        if current.is_symlink():
            return None
    try:
        fd = os.open(current, os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0))
    except OSError:
        return None
    try:
        with os.fdopen(fd, "rb") as fh:
            if not stat.S_ISREG(os.fstat(fh.fileno()).st_mode):
                return None
            data = fh.read(_MAX_PLOT_BYTES + 1)
    except OSError:
        return None
    return data if len(data) <= _MAX_PLOT_BYTES else None


def plot_trajectories(report_dir: Path, relpath: str, title: str, golden: Run, new: Run) -> bool:
    """Golden and new trajectory per metric, and |difference| on a log scale. False if nothing to plot."""
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt
    import numpy as np

    names = [n for n in golden.metrics if n in new.metrics]
    if not names:
        return False
    fig, axes = plt.subplots(2, len(names), figsize=(4.5 * len(names), 6), squeeze=False, sharex="col")
    for col, name in enumerate(names):
        g, n = golden.metrics[name], new.metrics[name]
        top, bottom = axes[0][col], axes[1][col]
        top.plot(g.steps, g.values, label="golden", color="#1f5f8b", linewidth=1.6)
        top.plot(n.steps, n.values, label="new", color="#d9731a", linewidth=1.2, linestyle="--")
        top.set_title(untrusted(name))
        top.legend(loc="best", fontsize=8)
        common, gi, ni = np.intersect1d(g.steps, n.steps, return_indices=True)
        diff = np.abs(n.values[ni] - g.values[gi])
        positive = diff > 0
        if positive.any():
            bottom.semilogy(common[positive], diff[positive], color="#8b1f3f", marker=".", linewidth=0.8)
        else:
            bottom.text(0.5, 0.5, "identical", ha="center", va="center", transform=bottom.transAxes)
        bottom.set_xlabel("step")
        bottom.set_ylabel("|new - golden|")
    fig.suptitle(untrusted(title), fontsize=9)
    fig.tight_layout()
    try:  # pytest-xdist workers write plots side by side: atomically, each its own
        write_confined(report_dir, relpath, lambda tmp: fig.savefig(tmp, dpi=90, format="png"), "reports")
    finally:
        plt.close(fig)
    return True
