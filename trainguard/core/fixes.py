"""The fix commands that messages end with, as an interface the core is handed.

The core knows *that* a golden must be re-blessed or a results folder recorded, not *how*:
the command lines belong to the layer that knows the user's pytest invocation
(`trainguard.tools.pytest_runs.PytestCommands` implements this for pytest and the CLI).
Without one, messages say what to do in words.
"""

from __future__ import annotations

from typing import Protocol


class FixCommands(Protocol):
    """Commands a message may suggest; each returns a line to paste."""

    def bless(self, nodeid: str) -> str:
        """Re-bless (or first bless) one guarded test."""
        ...

    def bless_any(self) -> str:
        """Re-bless, for a message that does not know the test (a damaged file)."""
        ...

    def record_results(self, results_dir: str) -> str:
        """Run the suite so that it saves its runs to `results_dir`."""
        ...


class WordsOnly:
    """The fallback when no skin supplies commands: a description instead of a command line."""

    def bless(self, nodeid: str) -> str:
        return f"re-bless {nodeid} with the pytest plugin's bless option"

    def bless_any(self) -> str:
        return "re-bless it with the pytest plugin's bless option"

    def record_results(self, results_dir: str) -> str:
        return f"the pytest plugin's results option, pointed at {results_dir}"


_installed: list[FixCommands] = []


def install(commands: FixCommands) -> None:
    """Make `commands` the default for messages of stores and checks not handed their own.

    The skins call this when they load (the pytest plugin, the CLI), so that even a direct
    call of the public API (`trainguard.read_run`) inside a pytest run quotes pytest's
    commands. Later calls replace earlier ones.
    """
    _installed[:] = [commands]


def current() -> FixCommands:
    """The installed fix commands, else `WordsOnly`."""
    return _installed[0] if _installed else WordsOnly()
