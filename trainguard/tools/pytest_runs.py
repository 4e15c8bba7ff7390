"""Every `pytest` command line trainguard runs or suggests, and every reading of pytest's output.

The tools run pytest in fresh processes (calibrate, bisect, prune's collection, the demo)
and the skins suggest commands in messages (re-bless, record results). Keeping all of it
here means one place knows pytest's options, exit codes and output layout.
"""

from __future__ import annotations

import re
import shlex
import subprocess
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

from ..core.errors import TrainguardError

#: pytest exit codes (pytest's documentation, "Exit codes").
EXIT_OK, EXIT_TESTS_FAILED, EXIT_INTERRUPTED, EXIT_INTERNAL, EXIT_USAGE, EXIT_NO_TESTS = 0, 1, 2, 3, 4, 5
#: pytest exit codes that mean "could not test": interrupted, internal error, usage error, no tests collected.
UNTESTABLE = {EXIT_INTERRUPTED: "interrupted or collection errors", EXIT_INTERNAL: "internal error",
              EXIT_USAGE: "usage error, or the tests could not be collected", EXIT_NO_TESTS: "no tests collected"}
#: The reason placeholder of suggested bless commands.
REASON_PLACEHOLDER = "'describe the intended change'"


# -- commands users paste ------------------------------------------------------------


@dataclass(frozen=True)
class PytestCommands:
    """The fix commands messages quote (`core.fixes.FixCommands`), for the user's pytest invocation.

    `golden_dir_option` is the `--trainguard-golden-dir` value the user gave, repeated in
    every suggested command so that it acts on the same goldens; so is `--trainguard-portable`.
    """

    golden_dir_option: str | None = None
    portable_option: bool = False  # --trainguard-portable was given: every suggested run repeats it

    def bless(self, nodeid: str) -> str:
        parts = ["pytest", "--trainguard-bless", "--trainguard-reason", REASON_PLACEHOLDER]
        if self.golden_dir_option:
            parts += [shlex.quote(f"--trainguard-golden-dir={self.golden_dir_option}")]
        if self.portable_option:
            parts.append("--trainguard-portable")
        parts.append(shlex.quote(nodeid))
        return " ".join(parts)

    def bless_any(self) -> str:
        return "pytest --trainguard-bless --trainguard-reason '...'"

    def record_results(self, results_dir: str) -> str:
        return f"pytest {shlex.quote('--trainguard-results=' + results_dir)}"


def shell_line(cmd: Sequence[str], env: Sequence[tuple[str, str]] = ()) -> str:
    """A command as a user would type it: environment first, `python` for this interpreter."""
    words = [f"{k}={shlex.quote(v)}" for k, v in env]
    words += ["python" if c == sys.executable else shlex.quote(c) for c in cmd]
    return " ".join(words)


# -- commands trainguard runs --------------------------------------------------------


def pytest_argv(*args: str, plugin: str | None = None) -> list[str]:
    """`python -m pytest` with this interpreter, without the cache plugin, quiet; `plugin` loaded by name."""
    cmd = [sys.executable, "-m", "pytest"]
    if plugin:
        cmd += ["-p", plugin]
    return [*cmd, "-p", "no:cacheprovider", "-q", *args]


def bless_into(nodeid: str, golden_dir: Path, reason: str, *extra: str) -> list[str]:
    """Bless one test into a scratch golden dir (calibrate's runs)."""
    return pytest_argv("--trainguard-bless", f"--trainguard-golden-dir={golden_dir}",
                       "--trainguard-reason", reason, *extra, nodeid)


def check_against(nodeids: Sequence[str], golden_dir: Path, report_dir: Path) -> list[str]:
    """Check tests against a golden dir and write a report folder (bisect's steps).

    `-p trainguard` loads the plugin by its entry-point name even where plugin autoloading is off.
    """
    return pytest_argv(f"--trainguard-golden-dir={golden_dir}", f"--trainguard-report={report_dir}",
                       "--", *nodeids, plugin="trainguard")


def run(cmd: Sequence[str], cwd: Path, env: Mapping[str, str] | None = None,
        merge_stderr: bool = False) -> subprocess.CompletedProcess[str]:
    """Run a pytest command and capture its output as text (undecodable bytes replaced)."""
    return subprocess.run(list(cmd), cwd=cwd, env=dict(env) if env is not None else None, text=True,
                          errors="replace", stdout=subprocess.PIPE,
                          stderr=subprocess.STDOUT if merge_stderr else subprocess.PIPE)


def collect_nodeids(pytest_args: Sequence[str], cwd: Path | None = None) -> list[str]:
    """Node ids of the tests pytest collects with `pytest_args`, from a `--collect-only -q` subprocess."""
    cmd = [sys.executable, "-m", "pytest", "--collect-only", "-q", "-p", "no:cacheprovider", *pytest_args]
    shown = shell_line(cmd)
    try:
        proc = run(cmd, cwd or Path.cwd())
    except OSError as exc:
        raise TrainguardError(f"could not start pytest ({exc}); nothing was removed") from None
    lines = proc.stdout.splitlines()
    if proc.returncode == EXIT_NO_TESTS:
        raise TrainguardError(f"pytest collected no tests ({shown}), so every golden would count as unused; "
                              "nothing was removed. Run prune from the project root, with the arguments that "
                              "select your whole suite (or none)")
    if proc.returncode != EXIT_OK:
        errors = [line for line in lines if line.startswith(("ERROR", "E   "))][:8]
        detail = errors or [line for line in (lines + proc.stderr.splitlines()) if line.strip()][-8:]
        raise TrainguardError("collecting the tests failed (pytest exit status "
                              f"{proc.returncode}); nothing was removed. pytest said:\n  " + "\n  ".join(detail)
                              + f"\nFix that, then re-run; to see pytest's full output: {shown}")
    nodeids = []
    for line in lines:
        if not line.strip():
            break  # the node ids end at the first blank line; "N tests collected" and warnings follow
        if "::" in line:
            nodeids.append(line)
    return nodeids


# -- reading pytest's output ---------------------------------------------------------

EXCEPTION_LINE = re.compile(r"^E\s+(\w+\.)*\w*(Error|Exception|Interrupt)\b.*")
_HEADER = re.compile(r"^=+ .+ =+$")


def error_lines(output: str) -> list[str]:
    """pytest's own error lines (`ERROR: not found: ...`, collection errors) and exception lines, for messages."""
    picked: list[str] = []
    for raw in output.splitlines():
        line = raw.strip()
        if (line.startswith(("ERROR:", "ERROR ")) or "not found:" in line or EXCEPTION_LINE.match(line)) \
                and line not in picked:
            picked.append(line)
    return picked[:8]


def not_found(errors: Sequence[str]) -> bool:
    """pytest said a named test or file does not exist."""
    return any("not found:" in e for e in errors)


def section(output: str, name: str, max_lines: int | None = None, to_end: bool = False) -> list[str]:
    """The lines of pytest's `==== name ====` section, up to the next such header (or the end).

    The header itself is left out; with `max_lines`, longer sections are cut with a note.
    """
    lines = output.splitlines()
    start = next((i for i, line in enumerate(lines) if _HEADER.match(line) and f" {name} " in line), None)
    if start is None:
        return []
    end = len(lines) if to_end else next((i for i in range(start + 1, len(lines)) if _HEADER.match(lines[i])),
                                         len(lines))
    body = lines[start + 1:end]
    if max_lines is not None and len(body) > max_lines:
        body = body[:max_lines] + [f"... ({len(body) - max_lines} more lines)"]
    return body


def from_section(output: str, name: str) -> str:
    """The output from the `== name ==` separator line on (the whole output when there is none)."""
    lines = output.splitlines()
    for i, line in enumerate(lines):
        if line.startswith("=") and f" {name} " in line:
            return "\n".join(lines[i:])
    return output


def failed_tests(output: str) -> set[str]:
    """Test names (without their file) of pytest's `FAILED file::name - ...` summary lines."""
    names = set()
    for line in output.splitlines():
        if line.startswith("FAILED "):
            names.add(line.split("::", 1)[-1].split(" ", 1)[0])
    return names


def tail(text: str, lines: int = 25, indent: str = "    ") -> str:
    """The last `lines` non-blank-trimmed lines of an output, indented for a message."""
    kept = text.strip().splitlines()[-lines:]
    return "\n".join(indent + line for line in kept)
