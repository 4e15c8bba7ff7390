"""Settings shared by every test of this suite."""

from __future__ import annotations

import os

import pytest

# Module- and session-scoped fixtures (e.g. the bisect history) run before any function
# fixture can clear CI, so clear it for the whole test process as well.
os.environ.pop("CI", None)


@pytest.fixture(autouse=True)
def _outside_ci(monkeypatch: pytest.MonkeyPatch) -> None:
    """Run every test as on a developer machine, even when this suite itself runs in CI.

    trainguard is stricter when the CI environment variable is set (a bless needs a reason,
    missing goldens say so); the pytest runs these tests start inherit the environment, so
    without this their outcome would depend on where the suite runs. Tests of the CI
    behaviour set CI themselves (tests/test_repeat_ci_prune.py).
    """
    monkeypatch.delenv("CI", raising=False)
