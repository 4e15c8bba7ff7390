"""`--trainguard-shard K/N`: run only one shard of the guarded tests (unguarded tests all run)."""

from __future__ import annotations

import hashlib

import pytest

from .state import guard_nodeid, is_guarded


def parse_shard(raw: str) -> tuple[int, int]:
    try:
        k_text, n_text = raw.split("/")
        k, n = int(k_text), int(n_text)
    except ValueError:
        raise pytest.UsageError(f"--trainguard-shard {raw!r}: expected K/N with whole numbers, such as 1/4") from None
    if n < 1:
        raise pytest.UsageError(f"--trainguard-shard {raw!r}: N (the number of shards) must be at least 1")
    if not 1 <= k <= n:
        raise pytest.UsageError(f"--trainguard-shard {raw!r}: K must be between 1 and N ({n}); shards count from 1")
    return k, n


def shard_of(nodeid: str, n: int) -> int:
    """1-based shard of a node id: SHA-256 based, so it never depends on which other tests exist."""
    return int.from_bytes(hashlib.sha256(nodeid.encode("utf-8")).digest()[:8], "big") % n + 1


class ShardPlugin:
    """Deselects the guarded tests of the other shards."""

    NAME = "trainguard-shard"

    def __init__(self, k: int, n: int) -> None:
        self.k, self.n = k, n

    def pytest_collection_modifyitems(self, session: pytest.Session, config: pytest.Config,
                                      items: list[pytest.Item]) -> None:
        keep, drop = [], []
        for item in items:
            (drop if is_guarded(item) and shard_of(guard_nodeid(item), self.n) != self.k else keep).append(item)
        if drop:
            config.hook.pytest_deselected(items=drop)
            items[:] = keep
