"""`GoldenMeta`: the metadata stored with every golden, typed and validated in one place.

Goldens store it as JSON (Parquet key-value metadata `trainguard.meta`, identical in every
file of a set). The JSON keys are part of the golden format and never change; unknown keys
written by other versions are kept as they are (`extra`). The format version is not part
of that JSON: each file states its own, and `format_version` reports what was read.

A `GoldenMeta` is immutable: writers make a new one (`with_`, `without`), so no stage of
the pipeline can change what another stage already saw.
"""

from __future__ import annotations

import datetime as _dt
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field, fields
from typing import Any

#: JSON key -> accepted types (bool is never accepted for int fields).
_TYPES: dict[str, tuple[type, ...]] = {
    "nodeid": (str,), "seed": (int,), "deterministic": (bool, str), "tolerances": (dict,),
    "max_values": (int,), "fingerprint": (dict,), "blessed_at": (str,), "reason": (str,),
    "calibrated": (dict,), "adopted_from": (str,),
}
_FORMAT_KEY = "format_version"


class MetaError(ValueError):
    """A metadata entry of the wrong type; `key` names it (the store adds the file)."""

    def __init__(self, key: str, value: Any) -> None:
        self.key = key
        super().__init__(f"has metadata {key!r} of the wrong type ({type(value).__name__})")


def utc_stamp(now: _dt.datetime | None = None) -> str:
    """The bless time as goldens store it: UTC, seconds, ISO 8601 with a Z (2026-12-01T21:57:42Z)."""
    return (now or _dt.datetime.now(_dt.timezone.utc)).strftime("%Y-%m-%dT%H:%M:%SZ")


@dataclass(frozen=True, eq=False)
class GoldenMeta(Mapping[str, Any]):
    """Seed, tolerances, fingerprint, bless time and reason of one golden (None: not recorded).

    Reads like the JSON object it is stored as (`meta["reason"]`, `meta.get("seed")`,
    `"calibrated" in meta`), plus typed attributes.

    >>> meta = GoldenMeta.from_json({"seed": 7, "reason": "first bake"})
    >>> meta.seed, meta["reason"], "calibrated" in meta
    (7, 'first bake', False)
    >>> meta.with_(reason="new flour").to_json()
    {'seed': 7, 'reason': 'new flour'}
    """

    nodeid: str | None = None
    seed: int | None = None
    deterministic: bool | str | None = None
    tolerances: Mapping[str, Any] | None = None  # Policy.to_json() of the test's settings
    max_values: int | None = None
    fingerprint: Mapping[str, Any] | None = None
    blessed_at: str | None = None
    reason: str | None = None
    calibrated: Mapping[str, Any] | None = None  # written by `trainguard calibrate --write`
    adopted_from: str | None = None  # set by `trainguard bless --from`
    extra: Mapping[str, Any] = field(default_factory=dict)  # keys this version does not know
    format_version: int | None = None  # of the file it was read from; never stored in the JSON

    @classmethod
    def from_json(cls, data: Mapping[str, Any], format_version: int | None = None) -> GoldenMeta:
        """Validate a decoded JSON object. Raises `MetaError` naming the first bad entry."""
        known: dict[str, Any] = {}
        extra: dict[str, Any] = {}
        for key, value in data.items():
            if key == _FORMAT_KEY:
                if format_version is None and isinstance(value, int) and not isinstance(value, bool):
                    format_version = value
                continue
            types = _TYPES.get(key)
            if types is None:
                extra[key] = value
                continue
            if value is None:
                continue
            if not isinstance(value, types) or (bool not in types and isinstance(value, bool)):
                raise MetaError(key, value)
            known[key] = value
        return cls(**known, extra=extra, format_version=format_version)

    def to_json(self) -> dict[str, Any]:
        """The JSON object stored in goldens (today's keys; no format version)."""
        return dict(self._stored_items())

    def with_(self, **changes: Any) -> GoldenMeta:
        """A copy with entries set (a value of None removes the entry); unknown keys go to `extra`."""
        data = self.to_json()
        for key, value in changes.items():
            if value is None:
                data.pop(key, None)
            else:
                data[key] = value
        return GoldenMeta.from_json(data, format_version=self.format_version)

    def without(self, *keys: str) -> GoldenMeta:
        """A copy without the named entries."""
        data = {k: v for k, v in self.to_json().items() if k not in keys}
        return GoldenMeta.from_json(data, format_version=None if _FORMAT_KEY in keys else self.format_version)

    def _stored_items(self) -> Iterator[tuple[str, Any]]:
        for f in fields(self):
            if f.name in ("extra", _FORMAT_KEY):
                continue
            value = getattr(self, f.name)
            if value is not None:
                yield f.name, value
        yield from self.extra.items()

    # -- Mapping -------------------------------------------------------------------
    def _items(self) -> Iterator[tuple[str, Any]]:
        yield from self._stored_items()
        if self.format_version is not None:
            yield _FORMAT_KEY, self.format_version

    def __getitem__(self, key: str) -> Any:
        for k, v in self._items():
            if k == key:
                return v
        raise KeyError(key)

    def __iter__(self) -> Iterator[str]:
        return (k for k, _ in self._items())

    def __len__(self) -> int:
        return sum(1 for _ in self._items())

    def __repr__(self) -> str:
        return f"GoldenMeta({dict(self._items())!r})"
