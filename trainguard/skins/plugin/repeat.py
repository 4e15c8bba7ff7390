"""`--trainguard-repeat N`: run a guarded test's body N-1 more times and record torch's warnings.

What is re-run: the test function itself (`item.runtest()`), each time with a fresh
`Trajectory` and with every global put back to the state the first run's body started
from (RNGs as seeded, deterministic flags, threads, dtype, ...; see `GlobalState`).
What is not: fixtures. They are set up once and their values are shared by all runs,
so a test that trains an object a fixture returns trains it further in each run.
"""

from __future__ import annotations

import os
import shlex
import warnings
from typing import Any, Iterator

import pytest

from .state import FIXTURE, Pending, fail, guard_nodeid


class RepeatPlugin:
    """Wraps the test call inside the guard's wrapper, so the repeats are done before the verdict."""

    NAME = "trainguard-repeat"

    def __init__(self, count: int) -> None:
        self.count = count

    @pytest.hookimpl(wrapper=True)
    def pytest_runtest_call(self, item: pytest.Item) -> Iterator[None]:
        pending = Pending.of(item)
        if pending is None:
            return (yield)
        with _Repeats(item, pending, self.count) as repeats:
            result = yield
            repeats.run_again()
        return result


class _Repeats:
    def __init__(self, item: pytest.Item, pending: Pending, count: int) -> None:
        self.item, self.pending, self.count = item, pending, count

    def __enter__(self) -> _Repeats:
        from ...core.determinism import GlobalState

        self.start = GlobalState.capture()  # seeded and pinned, after every fixture: where each body starts
        self.catcher = warnings.catch_warnings(record=True)
        self.records = self.catcher.__enter__()
        return self

    def run_again(self) -> None:
        import torch

        from ...core.capture import Trajectory

        funcargs = self.item.funcargs  # type: ignore[attr-defined]
        first = funcargs[FIXTURE]
        if FIXTURE not in getattr(getattr(self.item, "_fixtureinfo", None), "argnames", ()):
            fail(f"{guard_nodeid(self.item)}: --trainguard-repeat gives each run a fresh 'trajectory' "
                             "argument, but this test gets the trajectory through another fixture; add a 'trajectory' "
                             "argument to the test and pass it on, or run it without --trainguard-repeat")
        first.close()  # the first run's trace is complete: its hooks go, its entries stay for the verdict
        try:
            for _ in range(self.count - 1):
                self.start.restore()
                if self.start.cuda_rng is None and torch.cuda.is_available() and torch.cuda.is_initialized():
                    torch.cuda.manual_seed_all(self.pending.settings.seed)  # CUDA started during run 1: seed it as then
                traj = Trajectory(max_values=first.max_values)
                funcargs[FIXTURE] = traj
                try:
                    self.item.runtest()
                finally:
                    traj.close()
                self.pending.repeats.append(traj.to_run())
        finally:
            funcargs[FIXTURE] = first

    def __exit__(self, *exc_info: Any) -> bool:
        from ...core.determinism import is_determinism_alert

        self.catcher.__exit__(*exc_info)
        seen = set()
        for w in self.records:
            key = (str(w.message), w.category, w.filename, w.lineno)
            if key in seen:
                continue
            seen.add(key)
            try:  # hand each warning on (once) to pytest's own warning capture and summary
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno, source=w.source)
            except Exception:  # a filter turned it into an error after the test had warned: it was seen
                pass
            text = str(w.message).strip()
            if is_determinism_alert(text):
                first_line = text.splitlines()[0] if text else text
                self.pending.alerts.append(f"{w.category.__name__}: {first_line} ({os.path.basename(w.filename)}:{w.lineno})")
        return False


def repeat_hints(item: pytest.Item, nodeid: str, pending: Pending) -> list[str]:
    """What to look at when the repeats of a test disagree."""
    settings = pending.settings
    off = item.config.getoption("--trainguard-nondeterministic") or not settings.deterministic
    hints = []
    if pending.alerts:
        hints.append("hint: torch warned during the runs that ops ran without a deterministic implementation "
                     f"(deterministic={settings.deterministic!r}):")
        hints += [f"    {alert}" for alert in pending.alerts[:5]]
        hints.append("  use ops with deterministic kernels, or deterministic=True to make torch raise at the op")
    elif off:
        hints.append("hint: deterministic mode was off for this test ("
                     + ("--trainguard-nondeterministic" if settings.deterministic else "deterministic=False")
                     + "), so torch may pick kernels that add in a different order on each run; "
                     "try @pytest.mark.trainguard(deterministic='warn') to have torch name them")
    shared = [name for name in getattr(item, "fixturenames", ()) if name not in (FIXTURE, "request")]
    if shared:
        hints.append(f"note: only the test body is re-run; fixtures ({', '.join(shared)}) were set up once and "
                     "shared by all runs: if the test trains or changes an object a fixture returns, build it in "
                     "the test body instead")
    if not pending.alerts and not off:
        hints.append("hint: torch reported no op without a deterministic implementation, so the test reads something "
                     "that changes between runs: the clock (time.time, time.perf_counter_ns), os.urandom or secrets, "
                     "an unseeded generator (numpy.random.default_rng(), torch.Generator() without manual_seed), "
                     "iteration over a set of strings, or threads racing")
    hints.append(f"hint: if some noise is expected, measure it and get a tolerance: trainguard calibrate {shlex.quote(nodeid)}")
    return hints
