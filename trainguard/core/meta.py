"""`GoldenMeta`: the metadata stored with every golden, typed and validated in one place.

Goldens store it as JSON (Parquet key-value metadata `trainguard.meta`, identical in every
file of a set). The JSON keys are part of the golden format and never change. Goldens come
from pull requests, so every entry is checked for type and range (tolerances finite,
non-negative and capped: a crafted tolerance must not switch a test off), and unknown keys
are refused. The format version is not part of that JSON: each file states its own, and
`format_version` reports what was read.

A `GoldenMeta` is immutable: writers make a new one (`with_`, `without`), so no stage of
the pipeline can change what another stage already saw.
"""

from __future__ import annotations

import datetime as _dt
import math
import re
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field, fields
from typing import Any, Callable

#: Caps on any tolerance a golden's metadata or a marker may carry. A relative tolerance of 0.5
#: already accepts a value halved or raised by half; an absolute one of 1.0 exceeds every
#: weight and normalised loss at the usual initialisation scales (common practice, no single
#: source). Looser values guard nothing: to stop guarding a test, remove its marker, in review.
MAX_RTOL = 0.5
MAX_ATOL = 1.0
#: Caps on a calibrated tolerance (`trainguard calibrate --write`), which measures run-to-run
#: noise: float32 reduction-order noise is about 1e-7 to 1e-5 relative (IEEE 754 binary32 has
#: machine epsilon 2**-23, about 1.19e-7), this project saw at most 3.7e-4 across CPUs and
#: kernel-dispatch settings, so 1e-2 leaves a wide margin while still catching a 1 % change.
MAX_CALIBRATED_RTOL = 1e-2
MAX_CALIBRATED_ATOL = 1e-4
#: Longest text entry (reason, node id, paths) and most entries in a fingerprint.
MAX_TEXT = 4096
#: Most names in a list entry (`nonfinite`).
MAX_NAMES = 64
MAX_FINGERPRINT_ENTRIES = 4096
_STAMP = re.compile(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ\Z")
_FORMAT_KEY = "format_version"


class MetaError(ValueError):
    """A metadata entry of the wrong type or out of range; `key` names it (the store adds the file)."""

    def __init__(self, key: str, value: Any, problem: str | None = None) -> None:
        self.key = key
        super().__init__(f"has metadata {key!r} {problem or f'of the wrong type ({type(value).__name__})'}")


def _text(key: str, value: Any) -> str:
    if not isinstance(value, str):
        raise MetaError(key, value)
    if len(value) > MAX_TEXT:
        raise MetaError(key, value, f"longer than {MAX_TEXT} characters")
    return value


def _int_in(lo: int, hi: int) -> Callable[[str, Any], int]:
    def check(key: str, value: Any) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise MetaError(key, value)
        if not lo <= value <= hi:
            raise MetaError(key, value, f"out of range ({value}; {lo} to {hi} allowed)")
        return value
    return check


def _number(key: str, value: Any, cap: float) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise MetaError(key, value)
    if not (math.isfinite(value) and 0 <= value <= cap):
        raise MetaError(key, value, f"= {value!r}, outside 0 to {cap:g}: a tolerance that loose would switch the "
                        "test off without touching a value")
    return float(value)


def _tolerance_pair(key: str, value: Any, rtol_cap: float, atol_cap: float, required: bool) -> None:
    if not isinstance(value, Mapping):
        raise MetaError(key, value)
    for name, cap in (("rtol", rtol_cap), ("atol", atol_cap)):
        if name in value:
            _number(f"{key}.{name}", value[name], cap)
        elif required:
            raise MetaError(f"{key}.{name}", None, "missing")


def _metrics(key: str, value: Any, rtol_cap: float, atol_cap: float) -> None:
    if not isinstance(value, Mapping):
        raise MetaError(key, value)
    for name, spec in value.items():
        _text(f"{key} name", name)
        if not isinstance(spec, Mapping) or set(spec) - {"rtol", "atol"}:
            raise MetaError(f"{key}.{name}", spec, "is not {rtol, atol}")
        _tolerance_pair(f"{key}.{name}", spec, rtol_cap, atol_cap, required=False)


def _tolerances(key: str, value: Any) -> Mapping[str, Any]:
    if not isinstance(value, Mapping):
        raise MetaError(key, value)
    unknown = set(value) - {"rtol", "atol", "exact", "metrics"}
    if unknown:
        raise MetaError(key, value, f"with unknown entries {sorted(map(str, unknown))}")
    _tolerance_pair(key, value, MAX_RTOL, MAX_ATOL, required=False)
    if "exact" in value and not isinstance(value["exact"], bool):
        raise MetaError(f"{key}.exact", value["exact"])
    if "metrics" in value:
        _metrics(f"{key}.metrics", value["metrics"], MAX_RTOL, MAX_ATOL)
    return value


#: What `trainguard calibrate --write` stores besides the tolerances (report only; never read as numbers).
_CALIBRATED_INFO = {"safety", "observed", "runs", "deterministic_when_fixed", "calibrated_at", "trainguard", "power",
                    "sources"}


def _calibrated(key: str, value: Any) -> Mapping[str, Any]:
    if not isinstance(value, Mapping):
        raise MetaError(key, value)
    unknown = set(value) - {"rtol", "atol", "metrics"} - _CALIBRATED_INFO
    if unknown:
        raise MetaError(key, value, f"with unknown entries {sorted(map(str, unknown))}")
    _tolerance_pair(key, value, MAX_CALIBRATED_RTOL, MAX_CALIBRATED_ATOL, required=True)
    if value.get("metrics") is not None:
        _metrics(f"{key}.metrics", value["metrics"], MAX_CALIBRATED_RTOL, MAX_CALIBRATED_ATOL)
    if not _small_json(value, 256):
        raise MetaError(key, value, "too large")
    return value


def _small_json(value: Any, limit: int) -> bool:
    """At most `limit` leaves, only JSON scalars, strings no longer than MAX_TEXT."""
    stack, count = [value], 0
    while stack:
        item = stack.pop()
        if isinstance(item, Mapping):
            if not all(isinstance(k, str) and len(k) <= MAX_TEXT for k in item):
                return False
            stack.extend(item.values())
        elif isinstance(item, list):
            stack.extend(item)
        else:
            count += 1
            if count > limit or not (item is None or isinstance(item, (bool, int, float))
                                     or (isinstance(item, str) and len(item) <= MAX_TEXT)):
                return False
    return True


def _fingerprint(key: str, value: Any) -> Mapping[str, Any]:
    if not isinstance(value, Mapping):
        raise MetaError(key, value)
    if not _small_json(value, MAX_FINGERPRINT_ENTRIES):
        raise MetaError(key, value, f"with more than {MAX_FINGERPRINT_ENTRIES} entries, or entries that are not "
                        "short JSON values")
    return value


def _names(key: str, value: Any) -> tuple[str, ...]:
    """A short list of short texts (entry names)."""
    if not isinstance(value, (list, tuple)) or len(value) > MAX_NAMES or not all(
            isinstance(v, str) and len(v) <= MAX_TEXT for v in value):
        raise MetaError(key, value, f"is not a list of at most {MAX_NAMES} names")
    return tuple(value)


def _deterministic(key: str, value: Any) -> bool | str:
    if value not in (True, False, "warn") or isinstance(value, (int, float)) and not isinstance(value, bool):
        raise MetaError(key, value, f"= {value!r}, not true, false or \"warn\"")
    return value  # type: ignore[no-any-return]


def _stamp(key: str, value: Any) -> str:
    if not isinstance(value, str) or not _STAMP.match(value):
        raise MetaError(key, value, f"= {str(value)[:40]!r}, not a UTC time such as 2026-12-01T21:57:42Z")
    return value


#: JSON key -> its validator (returns the value or raises MetaError). Keys not listed are refused.
_VALIDATORS: dict[str, Callable[[str, Any], Any]] = {
    "nodeid": _text, "seed": _int_in(0, 2**32 - 1), "deterministic": _deterministic, "tolerances": _tolerances,
    "max_values": _int_in(0, 2**40), "fingerprint": _fingerprint, "blessed_at": _stamp, "reason": _text,
    "calibrated": _calibrated, "adopted_from": _text, "nonfinite": _names,
}


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
    nonfinite: tuple[str, ...] | None = None  # metrics and entries blessed with NaN or Inf in them
    extra: Mapping[str, Any] = field(default_factory=dict)  # always empty: unknown keys are refused
    format_version: int | None = None  # of the file it was read from; never stored in the JSON

    @classmethod
    def from_json(cls, data: Mapping[str, Any], format_version: int | None = None) -> GoldenMeta:
        """Validate a decoded JSON object. Raises `MetaError` naming the first bad entry."""
        known: dict[str, Any] = {}
        for key, value in data.items():
            if key == _FORMAT_KEY:
                if format_version is None and isinstance(value, int) and not isinstance(value, bool):
                    format_version = value
                continue
            check = _VALIDATORS.get(key)
            if check is None:
                raise MetaError(str(key)[:80], value, "is not an entry trainguard writes (unknown key)")
            if value is None:
                continue
            known[key] = check(key, value)
        return cls(**known, format_version=format_version)

    def to_json(self) -> dict[str, Any]:
        """The JSON object stored in goldens (today's keys; no format version)."""
        return dict(self._stored_items())

    def with_(self, **changes: Any) -> GoldenMeta:
        """A copy with entries set (a value of None removes the entry); validated like a read."""
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
