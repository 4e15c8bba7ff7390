"""The pytest plugin: marker, `trajectory` fixture, options, and the terminal summary.

A thin layer: it reads pytest's configuration, hands the run to `guard`, and turns the
verdict into a test outcome. Loading it costs almost nothing: torch, NumPy and pyarrow
are imported only when a guarded test actually runs.
"""

from __future__ import annotations

import datetime as _dt
import os
import shlex
import warnings
from pathlib import Path
from typing import Any, Iterator

import pytest

MARKER = "trainguard"
FIXTURE = "trajectory"

_SESSION_KEY = pytest.StashKey["GuardSession"]()
_ITEM_KEY = pytest.StashKey["_Pending"]()
_NODEID_KEY = pytest.StashKey[str]()
#: The session of the current pytest run; pytest_runtest_logreport receives no config.
_current_session: "GuardSession | None" = None


def pytest_addoption(parser: pytest.Parser) -> None:
    group = parser.getgroup("trainguard", "trainguard: golden files for seeded training runs")
    group.addoption("--trainguard-bless", action="store_true", default=False,
                    help="write or overwrite the golden files of the selected guarded tests instead of comparing")
    group.addoption("--trainguard-reason", metavar="TEXT", default=None,
                    help="why the goldens are being blessed; stored in the goldens written")
    group.addoption("--trainguard-golden-dir", metavar="DIR", default=None,
                    help="golden folder (default: ini trainguard_golden_dir, else 'golden' under rootdir)")
    group.addoption("--trainguard-results", metavar="DIR", default=None,
                    help="save the new run of every guarded test that did not match bitwise in DIR (golden layout), "
                         "for 'trainguard bless --from DIR'")
    group.addoption("--trainguard-report", metavar="DIR", default=None,
                    help="write summary.md, summary.json and plots of changed trajectories to DIR")
    group.addoption("--trainguard-threads", metavar="N", type=int, default=None,
                    help="set torch's intra-op thread count inside guarded tests")
    group.addoption("--trainguard-nondeterministic", action="store_true", default=False,
                    help="turn torch's deterministic mode off in every guarded test (to measure noise)")
    group.addoption("--trainguard-shard", metavar="K/N", default=None,
                    help="run only shard K of N of the guarded tests (stable: chosen by a hash of each node id)")
    group.addoption("--trainguard-repeat", metavar="N", type=int, default=1,
                    help="run the body of each guarded test N times with the same seed and settings; runs that "
                         "differ bit for bit fail as 'nondeterministic' (default 1)")
    parser.addini("trainguard_golden_dir", "folder of golden files, relative to rootdir", default="golden")
    parser.addini("trainguard_rtol", "default relative tolerance of guarded tests", default="")
    parser.addini("trainguard_atol", "default absolute tolerance of guarded tests", default="")
    parser.addini("trainguard_max_file_mib", "golden files larger than this many MiB are refused before loading",
                  default="512")
    parser.addini("trainguard_max_values", "tensors up to this many elements keep their values in the golden",
                  default="")


def pytest_configure(config: pytest.Config) -> None:
    config.addinivalue_line(
        "markers",
        "trainguard(seed=0, rtol=None, atol=None, exact=False, metrics=None, deterministic=True): "
        "guard a seeded training run with golden files (use the 'trajectory' fixture)",
    )
    raw_shard = config.getoption("--trainguard-shard", None)
    if raw_shard:
        parse_shard(raw_shard)  # here, not only at collection: under xdist only workers collect
    check_workflow_options(config)
    global _current_session
    session = GuardSession(config)
    config.stash[_SESSION_KEY] = session
    _current_session = session


def pytest_unconfigure(config: pytest.Config) -> None:
    global _current_session
    if _current_session is not None and _current_session.config is config:
        _current_session = None


class _Pending:
    """What the fixture hands to the call-phase hook for one test."""

    def __init__(self, trajectory: Any, settings: Any, fingerprint: dict[str, Any]) -> None:
        self.trajectory = trajectory
        self.settings = settings
        self.fingerprint = fingerprint
        self.repeats: list[Any] = []  # Runs of the repeats (--trainguard-repeat), after the first run
        self.alerts: list[str] = []  # torch's deterministic-mode warnings during the runs


class GuardSession:
    """Per-session state: where goldens live, and every verdict for the summary."""

    def __init__(self, config: pytest.Config) -> None:
        self.config = config
        self.rows: list[dict[str, Any]] = []  # one per guarded test, gathered from reports (xdist-safe)
        self.report_path: Path | None = None

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

    def bless_command(self, nodeid: str) -> str:
        parts = ["pytest", "--trainguard-bless", "--trainguard-reason", "'describe the intended change'"]
        option = self.config.getoption("--trainguard-golden-dir")
        if option:
            parts += ["--trainguard-golden-dir", shlex.quote(option)]
        parts.append(shlex.quote(nodeid))
        return " ".join(parts)


def parse_shard(raw: str) -> tuple[int, int]:
    try:
        k_text, n_text = raw.split("/")
        k, n = int(k_text), int(n_text)
    except ValueError:
        raise pytest.UsageError(f"--trainguard-shard {raw!r}: expected K/N with whole numbers, such as 1/4") from None
    if n < 1:
        raise pytest.UsageError(f"--trainguard-shard {raw!r}: N (the number of shards) must be at least 1")
    if not 1 <= k <= n:
        raise pytest.UsageError(f"--trainguard-shard {raw!r}: K must be between 1 and N ({n}); shards count from 1")
    return k, n


def ci_enabled(environ: Any = None) -> bool:
    """True in CI: the CI environment variable is set, non-empty and not "0" or "false"."""
    value = (os.environ if environ is None else environ).get("CI", "")
    return value.strip().lower() not in ("", "0", "false")


def check_workflow_options(config: pytest.Config) -> None:
    """Usage errors found before any test runs: a bad --trainguard-repeat, a bless in CI without a reason."""
    repeat = config.getoption("--trainguard-repeat", 1)
    if repeat is not None and repeat < 1:
        raise pytest.UsageError(f"--trainguard-repeat {repeat}: N must be at least 1 "
                                "(1 runs each guarded test once, as without the option)")
    if config.getoption("--trainguard-bless", False) and ci_enabled() \
            and not (config.getoption("--trainguard-reason", None) or "").strip():
        args = [str(a) for a in config.invocation_params.args]
        command = shlex.join(["pytest", *args, "--trainguard-reason", "describe the intended change"])
        raise pytest.UsageError(
            f"--trainguard-bless in CI (the CI environment variable is {os.environ.get('CI', '')!r}) needs an "
            "explicit --trainguard-reason, which is stored in the goldens for review; nothing was written. "
            f"Re-run with a reason:\n  {command}")


def shard_of(nodeid: str, n: int) -> int:
    """1-based shard of a node id: SHA-256 based, so it never depends on which other tests exist."""
    import hashlib

    return int.from_bytes(hashlib.sha256(nodeid.encode("utf-8")).digest()[:8], "big") % n + 1


def pytest_itemcollected(item: pytest.Item) -> None:
    # Remember the node id as collected: with --dist loadgroup, pytest-xdist (on pytest < 9.2)
    # appends "@<group>" to the node ids of xdist_group tests in its collection hook, which must
    # change neither a test's golden folder nor its shard.
    item.stash[_NODEID_KEY] = item.nodeid


def guard_nodeid(item: pytest.Item) -> str:
    """The node id goldens, shards and reports use: the id as collected."""
    return item.stash.get(_NODEID_KEY, item.nodeid)


def is_guarded(item: pytest.Item) -> bool:
    return item.get_closest_marker(MARKER) is not None or FIXTURE in getattr(item, "fixturenames", ())


def pytest_collection_modifyitems(session: pytest.Session, config: pytest.Config, items: list[pytest.Item]) -> None:
    raw = config.getoption("--trainguard-shard")
    if not raw:
        return
    k, n = parse_shard(raw)
    keep, drop = [], []
    for item in items:
        (drop if is_guarded(item) and shard_of(guard_nodeid(item), n) != k else keep).append(item)
    if drop:
        config.hook.pytest_deselected(items=drop)
        items[:] = keep


def _fail(message: str) -> None:
    __tracebackhide__ = True
    pytest.fail(message, pytrace=False)


@pytest.fixture
def trajectory(request: pytest.FixtureRequest) -> Iterator[Any]:
    """Seeds every RNG, turns on deterministic mode, records the run; restores all globals afterwards."""
    from .capture import DEFAULT_MAX_VALUES, Trajectory
    from .determinism import GlobalState, guarded_setup
    from .errors import UsageError
    from .environment import fingerprint
    from .settings import from_marker, parse_ini_float, parse_ini_int

    config = request.config
    marker = request.node.get_closest_marker(MARKER)
    try:
        settings = from_marker(
            marker.args if marker else (),
            marker.kwargs if marker else {},
            ini_rtol=parse_ini_float("trainguard_rtol", config.getini("trainguard_rtol")),
            ini_atol=parse_ini_float("trainguard_atol", config.getini("trainguard_atol")),
        )
        max_values = parse_ini_int("trainguard_max_values", config.getini("trainguard_max_values"), DEFAULT_MAX_VALUES)
    except UsageError as exc:
        _fail(f"{request.node.nodeid}: {exc}")
    traj = Trajectory(max_values=max_values)
    saved = GlobalState.capture()
    try:
        deterministic = False if config.getoption("--trainguard-nondeterministic") else settings.deterministic
        guarded_setup(settings.seed, deterministic, threads=config.getoption("--trainguard-threads"))
        request.node.stash[_ITEM_KEY] = _Pending(traj, settings, fingerprint())
        yield traj
    finally:
        traj.close()
        saved.restore()


@pytest.hookimpl(wrapper=True)
def pytest_runtest_call(item: pytest.Item) -> Iterator[None]:
    marker = item.get_closest_marker(MARKER)
    if marker is not None and FIXTURE not in getattr(item, "fixturenames", ()):
        _fail(f"{item.nodeid} is marked @pytest.mark.trainguard but does not use the 'trajectory' fixture; "
              "add a 'trajectory' argument to the test and log to it")
    pending = item.stash.get(_ITEM_KEY, None)
    repeat = item.config.getoption("--trainguard-repeat", 1) or 1
    try:
        if pending is None or repeat < 2:
            result = yield
        else:
            with _Repeats(item, pending, repeat) as repeats:
                result = yield
                repeats.run_again()
    except RuntimeError as exc:
        from .determinism import is_nondeterminism_error

        if FIXTURE in getattr(item, "fixturenames", ()) and is_nondeterminism_error(exc):
            _fail(f"{item.nodeid}: torch raised in deterministic mode, which trainguard turns on for guarded tests:\n"
                  f"  {str(exc).strip().splitlines()[0]}\n"
                  "hint: use an op with a deterministic implementation, or accept run-to-run noise with "
                  "@pytest.mark.trainguard(deterministic='warn') (warns) or deterministic=False, and a tolerance")
        raise
    if pending is not None:
        _finish(item, pending)
    return result


class _Repeats:
    """`--trainguard-repeat N`: runs a guarded test's body N-1 more times and records torch's warnings.

    What is re-run: the test function itself (`item.runtest()`), each time with a fresh
    `Trajectory` and with every global put back to the state the first run's body started
    from (RNGs as seeded, deterministic flags, threads, dtype, ...; see `GlobalState`).
    What is not: fixtures. They are set up once and their values are shared by all runs,
    so a test that trains an object a fixture returns trains it further in each run.
    """

    def __init__(self, item: pytest.Item, pending: _Pending, count: int) -> None:
        self.item, self.pending, self.count = item, pending, count

    def __enter__(self) -> "_Repeats":
        from .determinism import GlobalState

        self.start = GlobalState.capture()  # seeded and pinned, after every fixture: where each body starts
        self.catcher = warnings.catch_warnings(record=True)
        self.records = self.catcher.__enter__()
        return self

    def run_again(self) -> None:
        import torch

        from .capture import Trajectory

        funcargs = self.item.funcargs  # type: ignore[attr-defined]
        first = funcargs[FIXTURE]
        if FIXTURE not in getattr(getattr(self.item, "_fixtureinfo", None), "argnames", ()):
            _fail(f"{guard_nodeid(self.item)}: --trainguard-repeat gives each run a fresh 'trajectory' argument, but "
                  "this test gets the trajectory through another fixture; add a 'trajectory' argument to the test "
                  "and pass it on, or run it without --trainguard-repeat")
        try:
            for _ in range(self.count - 1):
                self.start.restore()
                if self.start.cuda_rng is None and torch.cuda.is_available() and torch.cuda.is_initialized():
                    torch.cuda.manual_seed_all(self.pending.settings.seed)  # CUDA started during run 1: seed it as then
                traj = Trajectory(max_values=first.max_values)
                funcargs[FIXTURE] = traj
                try:
                    self.item.runtest()
                finally:
                    traj.close()
                self.pending.repeats.append(traj.to_run())
        finally:
            funcargs[FIXTURE] = first

    def __exit__(self, *exc_info: Any) -> bool:
        from .guard import is_determinism_alert

        self.catcher.__exit__(*exc_info)
        seen = set()
        for w in self.records:
            key = (str(w.message), w.category, w.filename, w.lineno)
            if key in seen:
                continue
            seen.add(key)
            try:  # hand each warning on (once) to pytest's own warning capture and summary
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno, source=w.source)
            except Exception:  # a filter turned it into an error after the test had warned: it was seen
                pass
            text = str(w.message).strip()
            if is_determinism_alert(text):
                first_line = text.splitlines()[0] if text else text
                self.pending.alerts.append(f"{w.category.__name__}: {first_line} ({os.path.basename(w.filename)}:{w.lineno})")
        return False


def _finish(item: pytest.Item, pending: _Pending) -> None:
    __tracebackhide__ = True
    from . import golden, guard, paths

    session: GuardSession = item.config.stash[_SESSION_KEY]
    nodeid = guard_nodeid(item)
    traj = pending.trajectory
    settings = pending.settings
    traj.close()
    run = traj.to_run()
    if run.is_empty:
        _fail(f"{nodeid}: the guarded test recorded nothing; call trajectory.log(step, loss=...) "
              "or trajectory.state(model, optimizer=opt) in it")
    unknown = sorted(set(settings.policy.metrics or {}) - set(run.metrics))
    if unknown:
        _fail(f"{nodeid}: the marker's metrics= names {', '.join(map(repr, unknown))}, which the test never "
              f"logged (logged: {', '.join(run.metrics) or 'none'}); fix the name in the marker")
    bless = item.config.getoption("--trainguard-bless")
    run.meta = {
        "nodeid": nodeid,
        "seed": settings.seed,
        "deterministic": settings.deterministic,
        "tolerances": settings.policy.to_json(),
        "max_values": traj.max_values,
        "fingerprint": pending.fingerprint,
        "blessed_at": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "reason": item.config.getoption("--trainguard-reason") or "",
    }
    folder = paths.golden_folder(session.golden_dir(), nodeid)
    repeated = None
    if pending.repeats:
        repeated = guard.check_repeats(nodeid, [run, *pending.repeats], folder, base=session.rootpath,
                                       hints=_repeat_hints(item, nodeid, pending))
    if repeated is not None:
        result = repeated
    elif bless:
        result = guard.bless(nodeid, run, folder, settings.policy, base=session.rootpath, root=session.golden_dir(),
                             max_bytes=golden.max_bytes_from_ini(item.config.getini("trainguard_max_file_mib")))
    else:
        result = guard.check(nodeid, run, folder, settings.policy, session.bless_command(nodeid),
                             base=session.rootpath, use_calibrated=not settings.marker_tolerance,
                             max_bytes=golden.max_bytes_from_ini(item.config.getini("trainguard_max_file_mib")),
                             root=session.golden_dir())
    if result.outcome == guard.NO_GOLDEN and ci_enabled():
        result.message += (f"\nThis is a CI run (the CI environment variable is {os.environ.get('CI', '')!r}): goldens "
                           "are never created in CI. Run the command above on your machine, review the new golden "
                           f"and commit it (git add {shlex.quote(result.folder)}).")
    results_dir = item.config.getoption("--trainguard-results")
    if results_dir and not bless and result.outcome not in (guard.IDENTICAL, guard.NONDETERMINISTIC):
        from .results import write_result

        write_result(session.resolve(results_dir), nodeid, run)
    from .report_files import row_for

    report_dir = item.config.getoption("--trainguard-report")
    item.user_properties.append(("trainguard", row_for(result, session.resolve(report_dir) if report_dir else None)))
    if result.failed:
        _fail(result.message)


def _repeat_hints(item: pytest.Item, nodeid: str, pending: _Pending) -> list[str]:
    """What to look at when the repeats of a test disagree."""
    settings = pending.settings
    off = item.config.getoption("--trainguard-nondeterministic") or not settings.deterministic
    hints = []
    if pending.alerts:
        hints.append("hint: torch warned during the runs that ops ran without a deterministic implementation "
                     f"(deterministic={settings.deterministic!r}):")
        hints += [f"    {alert}" for alert in pending.alerts[:5]]
        hints.append("  use ops with deterministic kernels, or deterministic=True to make torch raise at the op")
    elif off:
        hints.append("hint: deterministic mode was off for this test ("
                     + ("--trainguard-nondeterministic" if settings.deterministic else "deterministic=False")
                     + "), so torch may pick kernels that add in a different order on each run; "
                     "try @pytest.mark.trainguard(deterministic='warn') to have torch name them")
    shared = [name for name in getattr(item, "fixturenames", ()) if name not in (FIXTURE, "request")]
    if shared:
        hints.append(f"note: only the test body is re-run; fixtures ({', '.join(shared)}) were set up once and "
                     "shared by all runs: if the test trains or changes an object a fixture returns, build it in "
                     "the test body instead")
    if not pending.alerts and not off:
        hints.append("hint: torch reported no op without a deterministic implementation, so the test reads something "
                     "that changes between runs: the clock (time.time, time.perf_counter_ns), os.urandom or secrets, "
                     "an unseeded generator (numpy.random.default_rng(), torch.Generator() without manual_seed), "
                     "iteration over a set of strings, or threads racing")
    hints.append(f"hint: if some noise is expected, measure it and get a tolerance: trainguard calibrate {shlex.quote(nodeid)}")
    return hints


def pytest_runtest_logreport(report: pytest.TestReport) -> None:
    """Gather verdicts from call-phase reports: the same path with and without pytest-xdist."""
    if report.when != "call":
        return
    rows = [value for key, value in report.user_properties if key == "trainguard" and isinstance(value, dict)]
    if rows and _current_session is not None:
        _current_session.rows.extend(rows)


def pytest_sessionfinish(session: pytest.Session, exitstatus: int) -> None:
    config = session.config
    guard_session = config.stash.get(_SESSION_KEY, None)
    report_dir = config.getoption("--trainguard-report", None)
    if guard_session is None or not report_dir or hasattr(config, "workerinput"):
        return  # xdist workers leave the report to the controller
    from .report_files import write_report

    guard_session.report_path = write_report(guard_session.resolve(report_dir), guard_session.rows)


def pytest_terminal_summary(terminalreporter: Any, exitstatus: int, config: pytest.Config) -> None:
    guard_session = config.stash.get(_SESSION_KEY, None)
    if guard_session is None or not guard_session.rows:
        return
    from .summary import summary_lines

    terminalreporter.write_sep("=", "trainguard")
    for line in summary_lines(guard_session.rows):
        terminalreporter.write_line(line)
    if guard_session.report_path is not None:
        terminalreporter.write_line(f"report: {guard_session.report_path}")
