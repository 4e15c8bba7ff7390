"""`GuardResult`: the verdict for one guarded test, as data.

The guard makes one (`guard.check`, `guard.bless`, `guard.check_repeats`); the renderers
(`report.render_result`) and the summary rows (`report_files.row_for`) read it.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from .comparison import Comparison
from .records import Run
from .verdicts import CHANGED, NO_GOLDEN, NONDETERMINISTIC, UNREADABLE


@dataclass
class GuardResult:
    nodeid: str
    folder: str
    outcome: str
    blessing: bool = False
    comparison: Comparison | None = None
    message: str = ""  # filled by `report.render_result` when the outcome fails the test
    run: Run | None = None  # the new run (checks only)
    reference: Run | None = None  # the golden it was compared with, when readable
    divergence: str = ""  # one-line "where" for the summary when `comparison` alone does not say it
    error: str = ""  # why the golden is unreadable
    warning: str = ""  # blesses: what the reviewer should know (non-finite values were blessed)
    # nondeterministic only: first differences, number of runs, first differing run, how many
    # differ, and the runs that agree with run 1
    where: list[str] = field(default_factory=list)
    runs: int = 0
    differing_run: int = 0
    differing: int = 0
    agreeing: list[int] = field(default_factory=list)

    @property
    def failed(self) -> bool:
        if self.outcome == NONDETERMINISTIC:  # fails checks and blesses alike: nothing was compared or written
            return True
        return not self.blessing and self.outcome in (CHANGED, NO_GOLDEN, UNREADABLE)
