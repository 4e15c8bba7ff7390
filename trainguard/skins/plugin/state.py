"""What the plugin's parts share about one test: its pending record, its node id, how to fail it."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, NoReturn

import pytest

if TYPE_CHECKING:
    from ...core.capture import Trajectory
    from ...core.records import Run
    from ...core.settings import GuardSettings

MARKER = "trainguard"
FIXTURE = "trajectory"

_PENDING_KEY = pytest.StashKey["Pending"]()
_NODEID_KEY = pytest.StashKey[str]()


class Pending:
    """What the fixture hands to the call-phase hook for one test."""

    def __init__(self, trajectory: Trajectory, settings: GuardSettings, fingerprint: dict[str, Any],
                 start: Any = None) -> None:
        self.trajectory = trajectory
        self.start = start  # core.determinism.GlobalState the body started from (seeded, pinned): for a re-run
        self.reference: Run | None = None  # the golden, read light before the body ran (a check only)
        self.settings = settings
        self.fingerprint = fingerprint
        self.repeats: list[Run] = []  # Runs of the repeats (--trainguard-repeat), after the first run
        self.alerts: list[str] = []  # torch's deterministic-mode warnings during the runs

    @staticmethod
    def attach(item: pytest.Item, pending: Pending) -> None:
        item.stash[_PENDING_KEY] = pending

    @staticmethod
    def of(item: pytest.Item) -> Pending | None:
        return item.stash.get(_PENDING_KEY, None)


def guard_nodeid(item: pytest.Item) -> str:
    """The node id goldens, shards and reports use: the id as collected."""
    return item.stash.get(_NODEID_KEY, item.nodeid)


def is_guarded(item: pytest.Item) -> bool:
    return item.get_closest_marker(MARKER) is not None or FIXTURE in getattr(item, "fixturenames", ())


def remember_nodeid(item: pytest.Item) -> None:
    item.stash[_NODEID_KEY] = item.nodeid


def fail(message: str) -> NoReturn:
    """Fail the running test with `message` and no traceback (trainguard explains itself)."""
    __tracebackhide__ = True
    from ...core.text import safe_output

    pytest.fail(safe_output(message), pytrace=False)
