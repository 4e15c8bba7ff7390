"""`GuardPlugin`: the session's state and the hooks that turn a guarded test's verdict into its outcome.

A thin skin: it reads pytest's configuration into a `core.guard.GuardRequest`, lets the
core settle it, and fails the test with the rendered message. Verdicts travel to the
controller in the call report's `user_properties` (the same path with and without
pytest-xdist) and are counted at the end.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Iterator

import pytest

from ...core.project import ci_enabled, ci_value
from ...tools.pytest_runs import PytestCommands
from .repeat import repeat_hints
from .state import FIXTURE, MARKER, Pending, fail, guard_nodeid, remember_nodeid

if TYPE_CHECKING:
    from ...core.records import Run
    from ...core.store import GoldenStore

__all__ = ["FIXTURE", "MARKER", "GuardPlugin", "Pending", "guard_nodeid"]

class GuardPlugin:
    """Per-session state (where goldens live, every verdict for the summary) and the guard's hooks."""

    NAME = "trainguard-guard"

    def __init__(self, config: pytest.Config) -> None:
        self.config = config
        self.rows: list[dict[str, Any]] = []  # one per guarded test, gathered from reports (xdist-safe)
        self.report_path: Path | None = None
        self.portable = False  # portable mode: kernel dispatch pinned at configure (core.dispatch)
        self.portable_replaced: dict[str, str] = {}  # the user's own dispatch settings the pins replaced
        self.portable_capability: str | None = None  # verified once, at the first guarded test
        self.plant: Any = None  # --trainguard-plant: a core.planting.Plant (calibrate's power check)
        self.portable_unavailable = ""  # why this machine cannot pin (not x86-64, no SSE4.1): runs unpinned

    @classmethod
    def of(cls, config: pytest.Config) -> GuardPlugin | None:
        plugin = config.pluginmanager.get_plugin(cls.NAME)
        return plugin if isinstance(plugin, cls) else None

    fail = staticmethod(fail)

    # -- configuration ---------------------------------------------------------------
    @property
    def rootpath(self) -> Path:
        return Path(self.config.rootpath)

    def golden_dir(self) -> Path:
        option = self.config.getoption("--trainguard-golden-dir")
        if option:
            return self.resolve(option)
        return self.resolve(self.config.getini("trainguard_golden_dir") or "golden", base=self.rootpath)

    def resolve(self, raw: str, base: Path | None = None) -> Path:
        """Command-line paths are relative to the invocation folder, ini paths to rootdir."""
        path = Path(raw)
        if path.is_absolute():
            return path
        return (base if base is not None else Path(self.config.invocation_params.dir)) / path

    @property
    def commands(self) -> PytestCommands:
        return PytestCommands(self.config.getoption("--trainguard-golden-dir"),
                              bool(self.config.getoption("--trainguard-portable")))

    def bless_command(self, nodeid: str) -> str:
        return self.commands.bless(nodeid)

    def store(self, root: Path) -> GoldenStore:
        from ...core.golden_format import max_bytes_from_ini
        from ...core.store import GoldenStore

        return GoldenStore(root, max_bytes=max_bytes_from_ini(self.config.getini("trainguard_max_file_mib")),
                           commands=self.commands)

    def light_golden(self, item: pytest.Item) -> Run | None:
        """The test's golden read light (checksums, statistics, sketches; no stored values, no trace),
        before its body runs; None when there is none or it cannot be read (the check says why)."""
        from ...core.errors import TrainguardError

        store = self.store(self.golden_dir())
        try:
            return store.read(store.folder(guard_nodeid(item)), light=True)
        except (TrainguardError, OSError):
            return None

    # -- hooks -----------------------------------------------------------------------
    def pytest_itemcollected(self, item: pytest.Item) -> None:
        # Remember the node id as collected: with --dist loadgroup, pytest-xdist (on pytest < 9.2)
        # appends "@<group>" to the node ids of xdist_group tests in its collection hook, which must
        # change neither a test's golden folder nor its shard.
        remember_nodeid(item)

    @pytest.hookimpl(wrapper=True, tryfirst=True)
    def pytest_runtest_call(self, item: pytest.Item) -> Iterator[None]:
        marker = item.get_closest_marker(MARKER)
        if marker is not None and FIXTURE not in getattr(item, "fixturenames", ()):
            self.fail(f"{item.nodeid} is marked @pytest.mark.trainguard but does not use the 'trajectory' fixture; "
                      "add a 'trajectory' argument to the test and log to it")
        try:
            result = yield
        except RuntimeError as exc:
            from ...core.determinism import is_nondeterminism_error

            if FIXTURE in getattr(item, "fixturenames", ()) and is_nondeterminism_error(exc):
                self.fail(f"{item.nodeid}: torch raised in deterministic mode, which trainguard turns on for guarded "
                          f"tests:\n  {str(exc).strip().splitlines()[0]}\n"
                          "hint: use an op with a deterministic implementation, or accept run-to-run noise with "
                          "@pytest.mark.trainguard(deterministic='warn') (warns) or deterministic=False, and a tolerance")
            raise
        pending = Pending.of(item)
        if pending is not None:
            self._finish(item, pending)
        return result

    def _finish(self, item: pytest.Item, pending: Pending) -> None:
        __tracebackhide__ = True
        from ...core.errors import TrainguardError
        from ...core.guard import GuardRequest, settle

        nodeid = guard_nodeid(item)
        pending.trajectory.close()
        record_body_threads(pending.fingerprint)
        option = self.config.getoption
        results_dir = option("--trainguard-results")
        report_dir = option("--trainguard-report")
        request = GuardRequest(
            nodeid=nodeid, run=pending.trajectory.to_run(), settings=pending.settings,
            fingerprint=pending.fingerprint, max_values=pending.trajectory.max_values,
            golden=self.store(self.golden_dir()), commands=self.commands, bless=option("--trainguard-bless"),
            reason=option("--trainguard-reason") or "", base=self.rootpath, repeats=tuple(pending.repeats),
            repeat_hints=tuple(repeat_hints(item, nodeid, pending)) if pending.repeats else (),
            results=self.store(self.resolve(results_dir)) if results_dir else None,
            report_dir=self.resolve(report_dir) if report_dir else None,
            ci=ci_value() if ci_enabled() else None,
            retrace=retracer(item, pending) if pending.trajectory.light_trace else None,
            reference=pending.reference,
        )
        try:
            result, row = settle(request)
        except TrainguardError as exc:  # a refused link, a full disk, a marker mistake: the message, no traceback
            self.fail(f"trainguard: {nodeid}: {exc}" if not str(exc).startswith(nodeid) else str(exc))
        item.user_properties.append(("trainguard", row))
        if result.failed:
            self.fail(result.message)

    def pytest_runtest_logreport(self, report: pytest.TestReport) -> None:
        """Gather verdicts from call-phase reports: the same path with and without pytest-xdist."""
        if report.when != "call":
            return
        self.rows.extend(value for key, value in report.user_properties if key == "trainguard" and isinstance(value, dict))

    def pytest_terminal_summary(self, terminalreporter: Any, exitstatus: int, config: pytest.Config) -> None:
        if not self.rows:
            return
        from ...core.summary import summary_lines

        terminalreporter.write_sep("=", "trainguard")
        from ...core.text import safe_output

        for line in summary_lines(self.rows):
            terminalreporter.write_line(safe_output(line))
        if self.report_path is not None:
            terminalreporter.write_line(f"report: {self.report_path}")


def retracer(item: pytest.Item, pending: Pending) -> Callable[[], Run]:
    """The test body once more, from the globals it started with and a fresh trajectory that keeps
    the full trace (what `core.guard.settle` asks for when a light-traced check fails). Fixtures
    are not set up again, as with --trainguard-repeat; a body that then takes another path is
    reported as nondeterministic (`core.retrace.departure`)."""

    def again() -> Run:
        from ...core.capture import Trajectory
        from ...core.records import Run

        funcargs = getattr(item, "funcargs", None)
        first = pending.trajectory
        if pending.start is None or funcargs is None or funcargs.get(FIXTURE) is not first:
            return Run()  # the trajectory came through another fixture: nothing to re-run; reported as parted
        pending.start.restore()
        fresh = Trajectory(max_values=first.max_values, light_trace=False)
        fresh.known = first.known
        funcargs[FIXTURE] = fresh
        try:
            item.runtest()  # type: ignore[attr-defined]
        except (Exception, pytest.fail.Exception, pytest.skip.Exception):  # noqa: BLE001 - a body that fails now took another path
            return Run()
        finally:
            fresh.close()
            funcargs[FIXTURE] = first
        return fresh.to_run()

    return again


def record_body_threads(fingerprint: dict[str, Any]) -> None:
    """Record a thread count the test body set itself (`torch.set_num_threads` inside the test):
    the fingerprint is taken before the body runs, so without this the change would not show."""
    import sys

    torch = sys.modules.get("torch")
    threads = fingerprint.get("threads")
    if torch is None or not isinstance(threads, dict):
        return
    now = torch.get_num_threads()
    if now != threads.get("intra_op"):
        threads["intra_op_set_in_body"] = now
