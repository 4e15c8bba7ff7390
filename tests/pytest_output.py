"""Reading the output of pytest runs made by `pytester` (shared by the end-to-end tests)."""

from __future__ import annotations

import re

import pytest

_HEADER = re.compile(r"^_{3,} (.+?) _{3,}$")
_VERBOSE = re.compile(r"^(\S+::\S+) (PASSED|FAILED|ERROR|SKIPPED)\b")


def sections(result: pytest.RunResult) -> dict[str, str]:
    """Failure/error sections of pytest's report, keyed by test name ('ERROR at setup of x' -> 'x')."""
    out: dict[str, list[str]] = {}
    current: list[str] | None = None
    for line in result.stdout.lines:
        m = _HEADER.match(line)
        if m:
            name = m.group(1).removeprefix("ERROR at setup of ").removeprefix("ERROR at teardown of ")
            current = out.setdefault(name, [])
            continue
        if line.startswith("=") and line.endswith("="):
            current = None
        elif current is not None:
            current.append(line)
    return {k: "\n".join(v) for k, v in out.items()}


def outcomes(result: pytest.RunResult) -> dict[str, str]:
    """Per-test outcome from a `-v` run: {'test_x.py::test_y': 'PASSED', ...}."""
    found: dict[str, str] = {}
    for line in result.stdout.lines:
        m = _VERBOSE.match(line)
        if m:
            found.setdefault(m.group(1), m.group(2))  # first word wins (a setup ERROR stays ERROR)
    return found
