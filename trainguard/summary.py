"""The end-of-session summary: how many guarded tests ended in each outcome."""

from __future__ import annotations

from typing import Iterable

from .compare import CHANGED, CLOSE, IDENTICAL
from .guard import BLESS_OUTCOMES, NO_GOLDEN, UNREADABLE, GuardResult

_CHECK_ORDER = (IDENTICAL, CLOSE, CHANGED, NO_GOLDEN, UNREADABLE)


def summary_lines(results: Iterable[GuardResult]) -> list[str]:
    results = list(results)
    checks = [r for r in results if not r.blessing]
    blesses = [r for r in results if r.blessing]
    lines: list[str] = []
    if checks:
        counts = {k: sum(r.outcome == k for r in checks) for k in _CHECK_ORDER}
        parts = [f"{n} {k}" for k, n in counts.items() if n]
        lines.append(f"guarded tests checked: {len(checks)} ({', '.join(parts)})")
        for r in checks:
            if r.outcome != IDENTICAL:
                lines.append(f"  {r.outcome:<17} {r.nodeid}")
    if blesses:
        counts = {k: sum(r.outcome == k for r in blesses) for k in BLESS_OUTCOMES}
        parts = [f"{n} {k}" for k, n in counts.items() if n]
        lines.append(f"goldens blessed: {len(blesses)} ({', '.join(parts)})")
        for r in blesses:
            lines.append(f"  {r.outcome:<9} {r.nodeid} -> {r.folder}")
    return lines
