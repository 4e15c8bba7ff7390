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


def generated_project(tmp_path, monkeypatch, files: dict[str, str], ini: str = "trainguard_golden_dir = golden\n"):
    """A throwaway pytest project for end-to-end runs, made the working directory. Its runs need
    no hypothesis or xdist (skipping them saves about 1 s per process), and Python's hash seed
    is left to each run."""
    (tmp_path / "pytest.ini").write_text("[pytest]\n" + ini)
    for name, text in files.items():
        (tmp_path / name).write_text(text)
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("PYTEST_ADDOPTS", "-p no:hypothesispytest -p no:xdist")
    monkeypatch.delenv("PYTHONHASHSEED", raising=False)
    return tmp_path


def run_pytest(project, *args: str, env: dict[str, str] | None = None):
    """`python -m pytest -q ARGS` in a fresh process in `project`, with extra environment variables."""
    import os
    import subprocess
    import sys

    return subprocess.run([sys.executable, "-m", "pytest", "-p", "no:cacheprovider", "-q", *args], cwd=project,
                          capture_output=True, text=True, env={**os.environ, **(env or {})})
