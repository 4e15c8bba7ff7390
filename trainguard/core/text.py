"""Plain-text building blocks every report shares: tables, number formats, flattening.

One set of formatters, so that a number reads the same in a failure report, `trainguard
show`, calibrate's report and bisect's summary.
"""

from __future__ import annotations

import math
from typing import Any, Callable, Iterable, Iterator, Mapping, Sequence


def table(headers: Sequence[str], rows: Iterable[Sequence[Any]], indent: str = "  ") -> str:
    """A plain-text table with left-aligned columns (no dependency on pandas).

    >>> print(table(["metric", "steps"], [["loss", 40]]))
      metric  steps
      loss    40
    """
    cells = [[_cell(c) for c in row] for row in rows]
    widths = [len(h) for h in headers]
    for row in cells:
        widths = [max(w, len(c)) for w, c in zip(widths, row)]
    lines = [indent + "  ".join(h.ljust(w) for h, w in zip(headers, widths)).rstrip()]
    for row in cells:
        lines.append(indent + "  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip())
    return "\n".join(lines)


def _cell(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return fmt(value)
    return str(value)


def fmt(x: float | int | None) -> str:
    """Numbers with enough digits to see a difference in float32 data (9 significant)."""
    if x is None:
        return "-"
    if isinstance(x, float) and math.isnan(x):
        return "nan"
    if isinstance(x, float) and math.isinf(x):
        return "inf" if x > 0 else "-inf"
    if x == 0:
        return "0"
    if isinstance(x, int):
        return str(x)
    return f"{x:.9g}"


def short(x: float) -> str:
    """Sizes of differences: three significant digits in exponent form (1.33e-04), 0 as 0."""
    if isinstance(x, float) and (math.isnan(x) or math.isinf(x)):
        return fmt(x)
    return f"{x:.2e}" if x else "0"


def flatten(data: Any, prefix: str = "") -> list[tuple[str, Any]]:
    """Nested mappings as sorted (dotted.key, value) pairs: `{"a": {"b": 1}}` -> [("a.b", 1)]."""
    if isinstance(data, Mapping):
        items: list[tuple[str, Any]] = []
        for key in sorted(data):
            items.extend(flatten(data[key], f"{prefix}{key}."))
        return items
    return [(prefix.rstrip("."), data)]


def join_names(names: Sequence[str], limit: int, more: str = " and {} more") -> str:
    """The first `limit` names, comma-separated, then how many were left out."""
    shown = ", ".join(names[:limit])
    return shown + (more.format(len(names) - limit) if len(names) > limit else "")


def nested_items(prefix: str, value: Any, keep: Callable[[Any], bool]) -> Iterator[tuple[str, Any]]:
    """Leaves of nested lists, tuples and mappings, named `prefix.0`, `prefix.key` (keys sorted as text).

    Leaves for which `keep` is false are dropped; so are strings and None unless `keep` takes them.
    Used for optimizer state (L-BFGS history lists) and model inputs and outputs alike, so that
    one tensor gets the same name wherever it is recorded.
    """
    if isinstance(value, (list, tuple)):
        for i, item in enumerate(value):
            yield from nested_items(f"{prefix}.{i}", item, keep)
    elif isinstance(value, Mapping):
        for key in sorted(value, key=str):
            yield from nested_items(f"{prefix}.{key}", value[key], keep)
    elif keep(value):
        yield prefix, value
