"""Report folders for CI: `summary.md`, `summary.json` and plots of changed trajectories.

`summary.md` is a Markdown table fit for a pull-request comment or a CI job summary.
`summary.json` carries the same rows for machines (bisect and shard merging read it).
Plots need matplotlib (the `trainguard[report]` extra); without it the summary says how
to get them instead of failing the run.
"""

from __future__ import annotations

import json
import os
from urllib.parse import quote
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Iterable

from .compare import CHANGED, CLOSE, IDENTICAL, Comparison
from .paths import safe_component
from .report import environment_changes, short

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


def first_divergence(cmp: Comparison | None) -> str:
    """The one-line answer to "where did it change?"."""
    if cmp is None:
        return ""
    if cmp.trace is not None and cmp.trace.first_bitwise is not None:
        return cmp.trace.summary()
    for m in cmp.metrics:
        if m.verdict == CHANGED:
            if m.first_step is None:
                return f"metric {m.name}: {m.note}"
            text = (f"{m.name} at step {m.first_step}: {m.golden:.9g} -> {m.new:.9g} "
                    f"(rel {short(m.rel_diff)}, allowed {short(m.allowed)})")
            return text + (f"; {m.note}" if m.note else "")
    changed = [t.name for t in cmp.tensors if t.verdict == CHANGED]
    if changed:
        return "state: " + ", ".join(changed[:4]) + (f" and {len(changed) - 4} more" if len(changed) > 4 else "")
    for m in cmp.metrics:
        if m.verdict == CLOSE:
            return f"{m.name} first differs at step {m.first_step} (within tolerance)"
    return ""


def rows_from_results(results: Iterable[Any]) -> list[Row]:
    rows = []
    for r in results:
        cmp = r.comparison
        env = environment_changes(cmp.golden_meta.get("fingerprint"), cmp.new_meta.get("fingerprint")) if cmp else []
        rows.append(Row(r.nodeid, r.outcome, first_divergence(cmp), env, blessing=r.blessing))
    return rows


def _md_escape(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


_ICON = {IDENTICAL: "identical", CLOSE: "within tolerance", CHANGED: "**changed**"}


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
        order = {CHANGED: 0, "no golden": 1, "unreadable golden": 2, CLOSE: 3, IDENTICAL: 4}
        for r in sorted(checks, key=lambda r: (order.get(r.outcome, 5), r.nodeid)):
            div = _md_escape(r.divergence) or "-"
            if r.plot:
                div += f" ([plot]({quote(r.plot)}))"
            env = "<br>".join(_md_escape(e) for e in r.environment[:5]) or "-"
            if len(r.environment) > 5:
                env += f"<br>... {len(r.environment) - 5} more"
            lines.append(f"| `{_md_escape(r.nodeid)}` | {_ICON.get(r.outcome, r.outcome)} | {div} | {env} |")
    if plots_note:
        lines += ["", plots_note]
    return "\n".join(lines) + "\n"


def _atomic_text(path: Path, text: str) -> None:
    tmp = path.with_name(f".tmp-{path.name}.{os.getpid()}")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)


def write_report(report_dir: str | os.PathLike[str], results: list[Any]) -> Path:
    """Write summary.md, summary.json and (with matplotlib) a plot per changed test."""
    report_dir = Path(report_dir)
    report_dir.mkdir(parents=True, exist_ok=True)
    rows = rows_from_results(results)
    changed = [(row, r) for row, r in zip(rows, results)
               if not r.blessing and r.outcome == CHANGED and r.reference is not None and r.run is not None]
    note = ""
    if changed:
        try:
            import matplotlib  # noqa: F401
        except ImportError:
            note = ("Plots of changed trajectories need matplotlib: `pip install 'trainguard[report]'`, "
                    "then re-run with `--trainguard-report`.")
        else:
            (report_dir / PLOTS).mkdir(exist_ok=True)
            for row, r in changed:
                name = f"{PLOTS}/{safe_component(r.nodeid.replace('::', '__'))}.png"
                if plot_trajectories(report_dir / name, r.nodeid, r.reference, r.run):
                    row.plot = name
    _atomic_text(report_dir / SUMMARY_MD, summary_markdown(rows, note))
    payload = {"format": REPORT_FORMAT, "rows": [asdict(row) for row in rows]}
    _atomic_text(report_dir / SUMMARY_JSON, json.dumps(payload, indent=1, sort_keys=True))
    return report_dir / SUMMARY_MD


def plot_trajectories(path: Path, title: str, golden: Any, new: Any) -> bool:
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
        top.set_title(name)
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
    fig.suptitle(title, fontsize=9)
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return True
