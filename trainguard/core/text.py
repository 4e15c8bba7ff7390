"""Plain-text building blocks every report shares: tables, number formats, flattening.

One set of formatters, so that a number reads the same in a failure report, `trainguard
show`, calibrate's report and bisect's summary.
"""

from __future__ import annotations

import math
import re
from typing import Any, Callable, Iterable, Iterator, Mapping, Sequence

#: C0 and C1 control characters, DEL, Unicode line/paragraph separators and bidirectional
#: overrides: what a terminal obeys (\r rewrites a line, ESC starts a sequence) or a reader
#: misreads (bidi overrides reorder text), and what may not appear raw in one table cell.
_CONTROL = re.compile("[\x00-\x1f\x7f-\x9f\u2028\u2029\u200e\u200f\u202a-\u202e\u2066-\u2069]")
_CONTROL_BUT_NEWLINE = re.compile("[\x00-\x09\x0b-\x1f\x7f-\x9f\u2028\u2029\u200e\u200f\u202a-\u202e\u2066-\u2069]")
#: A line some hosted CI services execute as a "workflow command" (`::error::`, `::add-mask::`).
_WORKFLOW_COMMAND = re.compile(r"^(\s*)::", re.MULTILINE)
#: What could break a table cell or make a link, an image or HTML out of untrusted text.
_MD_SPECIAL = re.compile(r"([\\`\[\]|])")


def _escape_char(m: re.Match[str]) -> str:
    ch = m.group(0)
    named = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}
    if ch in named:
        return named[ch]
    return f"\\x{ord(ch):02x}" if ord(ch) < 0x100 else f"\\u{ord(ch):04x}"


def untrusted(value: Any) -> str:
    """A string that came from a golden, result or fingerprint, safe inside one line of output.

    Control characters (newlines included) are shown escaped (`\\r`, `\\x1b`), so the text can
    neither start a new line nor move the cursor.

    >>> untrusted("loss\\r::error::pwned")
    'loss\\\\r::error::pwned'
    """
    return _CONTROL.sub(_escape_char, str(value))


def safe_output(text: str) -> str:
    """Whole output text on its way to a terminal or CI log: control characters other than
    newlines escaped, and no line can start a CI workflow command (a backslash is put before `::`).

    >>> safe_output("ok\\n::error::x")
    'ok\\n\\\\::error::x'
    """
    return _WORKFLOW_COMMAND.sub(lambda m: m.group(1) + "\\::", _CONTROL_BUT_NEWLINE.sub(_escape_char, text))


def md_code(value: Any) -> str:
    """Text as a Markdown code span for one table cell (node ids stay readable): escaped as `untrusted`,
    `|` escaped (GFM splits table cells before it parses code spans), fenced by more backticks than it holds.

    >>> md_code("t.py::test[a|b]")
    '`t.py::test[a\\\\|b]`'
    """
    text = untrusted(value).replace("|", "\\|")
    longest = max((len(run) for run in re.findall("`+", text)), default=0)
    fence = "`" * (longest + 1)
    pad = " " if text.startswith("`") or text.endswith("`") else ""
    return f"{fence}{pad}{text}{pad}{fence}"


def md_escape(value: Any) -> str:
    """Text for one Markdown table cell: escaped as `untrusted`, HTML and Markdown syntax neutralised.

    >>> md_escape("a|b <img src=x> `c` ![t](http://x)")
    'a\\\\|b &lt;img src=x> \\\\`c\\\\` !\\\\[t\\\\](http://x)'
    """
    text = untrusted(value).replace("<", "&lt;")  # no HTML tag can start without "<"
    return _WORKFLOW_COMMAND.sub(lambda m: m.group(1) + "\\::", _MD_SPECIAL.sub(r"\\\1", text))


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
    return untrusted(value)  # one cell, one line: names and reasons from goldens cannot break the table


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
    shown = ", ".join(untrusted(n) for n in names[:limit])
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
