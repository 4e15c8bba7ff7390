"""The end-of-session summary: how many guarded tests ended in each outcome."""

from __future__ import annotations

from typing import Any, Iterable

from .verdicts import BLESS_ORDER as _BLESS_ORDER
from .verdicts import CHECK_ORDER as _CHECK_ORDER
from .verdicts import IDENTICAL, NONDETERMINISTIC


def summary_lines(rows: Iterable[dict[str, Any]]) -> list[str]:
    """Lines for the terminal from summary rows (see report_files.row_for)."""
    rows = list(rows)
    checks = [r for r in rows if not r.get("blessing")]
    blesses = [r for r in rows if r.get("blessing")]
    lines: list[str] = []
    if checks:
        parts = [f"{n} {k}" for k in _CHECK_ORDER if (n := sum(r["outcome"] == k for r in checks))]
        lines.append(f"guarded tests checked: {len(checks)} ({', '.join(parts)})")
        for r in checks:
            if r["outcome"] != IDENTICAL:
                lines.append(f"  {r['outcome']:<17} {r['nodeid']}")
    if blesses:
        parts = [f"{n} {k}" for k in _BLESS_ORDER if (n := sum(r["outcome"] == k for r in blesses))]
        lines.append(f"goldens blessed: {len(blesses)} ({', '.join(parts)})")
        for r in blesses:
            if r["outcome"] == NONDETERMINISTIC:  # its runs disagreed: nothing was written
                lines.append(f"  {r['outcome']:<9} {r['nodeid']} (not blessed: its repeated runs differ)")
            else:
                lines.append(f"  {r['outcome']:<9} {r['nodeid']} -> {r.get('folder', '')}")
            if r.get("warning"):
                lines.append(f"    warning: {r['warning']}")
    return lines
