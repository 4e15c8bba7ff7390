"""A check's second look: the same body again, with the full trace, only when the verdict needs it.

A plain check records a light trace (one fingerprint per event, see `trace`). When the run is
not identical to its golden, the report should name the step and stage where it departs, which
needs the full trace; so the skin re-runs the test body once with it (`GuardRequest.retrace`).
That second run is only evidence about the first if it took the same path: same metrics bit for
bit, same state checksums, same event fingerprints. `departure` says whether it did, and where
it did not (which makes the test nondeterministic, whatever its golden says).
"""

from __future__ import annotations

import numpy as np

from .records import Run


def departure(first: Run, again: Run) -> str:
    """Where `again` stopped reproducing `first`; "" when it reproduced it exactly."""
    if again.is_empty and not first.is_empty:
        return "the second run recorded nothing: its body raised, or it got its trajectory another way"
    for name in sorted(set(first.metrics) | set(again.metrics)):
        a, b = first.metrics.get(name), again.metrics.get(name)
        if a is None or b is None:
            return f"metric {name} was logged in one run only"
        if not np.array_equal(a.steps, b.steps):
            return f"metric {name} was logged at other steps"
        differ = np.flatnonzero(a.values.view(np.uint64) != b.values.view(np.uint64))
        if differ.size:
            return f"metric {name} differs from step {int(a.steps[differ[0]])}"
    if first.prints is not None and again.prints is not None:
        for one, two in zip(first.prints, again.prints):
            if one != two:
                return f"the trace parts at step {one.step}, stage {one.stage} (event {one.event})"
        if len(first.prints) != len(again.prints):
            return f"one run recorded {abs(len(first.prints) - len(again.prints))} more trace event(s)"
    for name in sorted(set(first.tensors) | set(again.tensors)):
        a_rec, b_rec = first.tensors.get(name), again.tensors.get(name)
        if a_rec is None or b_rec is None:
            return f"state entry {name} was recorded in one run only"
        if a_rec.sha256 != b_rec.sha256:
            return f"state entry {name} differs"
    return ""
