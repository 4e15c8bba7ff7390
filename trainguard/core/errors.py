"""The exceptions trainguard raises on purpose.

Every error a user can cause (a wrong marker argument, a decreasing step, a corrupt
golden file) is one of these, carries a message that names the file or test involved,
and, where there is one, the exact command that fixes it. The pytest plugin and the CLI
print these messages without a traceback; anything else escaping is a bug.
"""

from __future__ import annotations


class TrainguardError(Exception):
    """Base class: a problem trainguard can explain to its user."""


class UsageError(TrainguardError):
    """The test code called trainguard in a way it cannot honour."""


class GoldenError(TrainguardError):
    """A golden file or folder cannot be used. Always names the path."""

    def __init__(self, path: object, problem: str, fix: str | None = None) -> None:
        self.path = str(path)
        self.problem = problem
        self.fix = fix
        message = f"{self.path}: {problem}"
        if fix:
            message += f"\n  fix: {fix}"
        super().__init__(message)


class GoldenMissingError(GoldenError):
    """No golden exists yet for a guarded test."""


class GoldenCorruptError(GoldenError):
    """A golden file exists but cannot be read as a trainguard golden."""


class GoldenVersionError(GoldenError):
    """A golden was written by a format version this trainguard cannot read."""
