"""The words trainguard's verdicts are given in, and their order of severity.

Every layer speaks this vocabulary: the comparison decides identical, within tolerance or
changed per metric, tensor and trace stage; a check ends in one of those or in no golden,
unreadable golden or nondeterministic; a bless ends in new, changed or unchanged. The
values are the words users see in reports and `summary.json`, so they never change.
The module-level names are the enum's values as plain strings: they travel through JSON,
pytest-xdist and `user_properties` as they are.
"""

from __future__ import annotations

from enum import Enum
from typing import Iterable


class Verdict(str, Enum):
    """Outcome of a check (and, for the first three, of one metric, tensor or trace stage)."""

    IDENTICAL = "identical"
    CLOSE = "within tolerance"
    CHANGED = "changed"
    NO_GOLDEN = "no golden"
    UNREADABLE = "unreadable golden"
    NONDETERMINISTIC = "nondeterministic"


class Blessing(str, Enum):
    """Outcome of a bless (a run whose repeats disagree is `Verdict.NONDETERMINISTIC` instead)."""

    NEW = "new"
    CHANGED = "changed"
    UNCHANGED = "unchanged"


IDENTICAL: str = Verdict.IDENTICAL.value
CLOSE: str = Verdict.CLOSE.value
CHANGED: str = Verdict.CHANGED.value
NO_GOLDEN: str = Verdict.NO_GOLDEN.value
UNREADABLE: str = Verdict.UNREADABLE.value
NONDETERMINISTIC: str = Verdict.NONDETERMINISTIC.value
BLESSED_NEW: str = Blessing.NEW.value
BLESSED_CHANGED: str = Blessing.CHANGED.value
BLESSED_UNCHANGED: str = Blessing.UNCHANGED.value

#: Severity of the comparison verdicts: a run's outcome is the worst of its parts'.
_RANK = {IDENTICAL: 0, CLOSE: 1, CHANGED: 2}
#: Outcomes of a check that let the test pass.
PASSING = (IDENTICAL, CLOSE)
#: Order of outcomes in the terminal summary: checks, then blesses.
CHECK_ORDER = (IDENTICAL, CLOSE, CHANGED, NONDETERMINISTIC, NO_GOLDEN, UNREADABLE)
BLESS_ORDER = (BLESSED_NEW, BLESSED_CHANGED, BLESSED_UNCHANGED, NONDETERMINISTIC)
#: Order of rows in summary.md: what needs attention first.
ATTENTION_ORDER = (CHANGED, NONDETERMINISTIC, NO_GOLDEN, UNREADABLE, CLOSE, IDENTICAL)


def rank(verdict: str) -> int:
    """Severity of a comparison verdict: identical 0, within tolerance 1, changed 2."""
    return _RANK[verdict]


def worst(verdicts: Iterable[str]) -> str:
    """The most severe of `verdicts`; identical when there are none."""
    return max(verdicts, key=rank, default=IDENTICAL)
