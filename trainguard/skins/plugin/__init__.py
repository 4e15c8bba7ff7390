"""The pytest plugin: options, the `trainguard` marker and the `trajectory` fixture.

This module is what the `pytest11` entry point loads, so it stays cheap: it imports no
torch, NumPy or pyarrow. At configure time it registers the feature plugins, the pytest
way (`config.pluginmanager.register`), each only where it has work to do:

- `guard.GuardPlugin`, always: session state, the call-phase hook that checks or blesses
  each guarded test, the summary;
- `shard.ShardPlugin`, with `--trainguard-shard K/N`;
- `repeat.RepeatPlugin`, with `--trainguard-repeat N` for N > 1;
- `report.ReportPlugin`, with `--trainguard-report DIR`, on the controller only under xdist.
"""

from __future__ import annotations

import os
import shlex
from typing import Any, Iterator

import pytest

from ...core import fixes
from ...core.project import ci_enabled
from ...tools.pytest_runs import PytestCommands
from .guard import FIXTURE, MARKER, GuardPlugin, Pending
from .shard import ShardPlugin, parse_shard

fixes.install(PytestCommands())  # messages of the core quote pytest's commands from here on

__all__ = ["MARKER", "FIXTURE", "GuardPlugin", "trajectory"]


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
    group.addoption("--trainguard-portable", action="store_true", default=False,
                    help="pin CPU kernel dispatch to a baseline every x86-64 machine shares (ATen, oneDNN, oneMKL "
                         "CNR, one thread), so goldens match across CPUs; also ini trainguard_portable = true")
    group.addoption("--trainguard-threads", metavar="N", type=int, default=None,
                    help="set torch's intra-op thread count inside guarded tests")
    group.addoption("--trainguard-nondeterministic", action="store_true", default=False,
                    help="turn torch's deterministic mode off in every guarded test (to measure noise)")
    group.addoption("--trainguard-shard", metavar="K/N", default=None,
                    help="run only shard K of N of the guarded tests (stable: chosen by a hash of each node id)")
    group.addoption("--trainguard-repeat", metavar="N", type=int, default=1,
                    help="run the body of each guarded test N times with the same seed and settings; runs that "
                         "differ bit for bit fail as 'nondeterministic' (default 1)")
    group.addoption("--trainguard-full-trace", action="store_true", default=False,
                    help="record the full per-step trace of watched tests on every check (default: one fingerprint "
                         "per event, and the body re-run with the full trace only when a check fails)")
    group.addoption("--trainguard-plant", metavar="KIND:SIZE", default=None,
                    help="trainguard calibrate's power check: bless with a small real change planted (lr:0.01 "
                         "scales every optimizer's learning rate by 1.01); the goldens are marked as scratch")
    parser.addini("trainguard_golden_dir", "folder of golden files, relative to rootdir", default="golden")
    parser.addini("trainguard_rtol", "default relative tolerance of guarded tests", default="")
    parser.addini("trainguard_atol", "default absolute tolerance of guarded tests", default="")
    parser.addini("trainguard_max_file_mib", "golden files larger than this many MiB are refused before loading; "
                  "every decoding limit derives from it (default 32)", default="")
    parser.addini("trainguard_portable", "pin CPU kernel dispatch in guarded tests (see --trainguard-portable)",
                  type="bool", default=False)
    parser.addini("trainguard_max_values", "tensors up to this many elements keep their values in the golden",
                  default="")


def pytest_configure(config: pytest.Config) -> None:
    config.addinivalue_line(
        "markers",
        "trainguard(seed=0, rtol=None, atol=None, exact=False, metrics=None, deterministic=True): "
        "guard a seeded training run with golden files (use the 'trajectory' fixture)",
    )
    raw_shard = config.getoption("--trainguard-shard", None)
    shard = parse_shard(raw_shard) if raw_shard else None  # here, not at collection: under xdist only workers collect
    check_workflow_options(config)
    manager = config.pluginmanager
    guard = GuardPlugin(config)
    from ...core.dispatch import unknown_settings

    unknown = unknown_settings()
    if unknown:  # never a silent pass: the libraries ignore these and dispatch by CPU
        config.issue_config_time_warning(pytest.PytestWarning(
            f"trainguard: kernel dispatch setting(s) {', '.join(unknown)} name no code path the library knows; it "
            "ignores them and dispatches by CPU, so this run is not dispatched as the variable says (the "
            "fingerprint records the value as set). Fix or unset them"), stacklevel=2)
    if config.getoption("--trainguard-portable", False) or config.getini("trainguard_portable"):
        from ...core import dispatch

        threads = config.getoption("--trainguard-threads", None)
        if threads not in (None, dispatch.PORTABLE_THREADS):
            raise pytest.UsageError(f"--trainguard-threads {threads} contradicts portable mode, which runs guarded "
                                    f"tests on {dispatch.PORTABLE_THREADS} thread (oneMKL's reproducible branch "
                                    "needs a fixed count); drop one of the two")
        guard.portable = True
        problem = dispatch.baseline_problem()
        if problem:  # run unpinned, say so, and mark the goldens (a portable golden never matches them silently)
            guard.portable_unavailable = problem
            config.issue_config_time_warning(pytest.PytestWarning(
                f"trainguard: portable mode is unavailable here ({problem}); guarded tests run unpinned and their "
                "goldens are marked so"), stacklevel=2)
        else:
            guard.portable_replaced = dispatch.pin()  # before test modules import torch and run kernels
    plant = config.getoption("--trainguard-plant", None)
    if plant:
        from ...core import planting
        from ...core.errors import UsageError

        if not config.getoption("--trainguard-bless", False):
            raise pytest.UsageError(f"--trainguard-plant={plant} only goes with --trainguard-bless into a scratch "
                                    "folder (trainguard calibrate does this); a planted change is never checked "
                                    "against real goldens")
        try:
            guard.plant = planting.parse(plant)
        except UsageError as exc:
            raise pytest.UsageError(str(exc)) from None
    manager.register(guard, GuardPlugin.NAME)
    if shard is not None:
        manager.register(ShardPlugin(*shard), ShardPlugin.NAME)
    if (config.getoption("--trainguard-repeat", 1) or 1) > 1:
        from .repeat import RepeatPlugin

        manager.register(RepeatPlugin(config.getoption("--trainguard-repeat")), RepeatPlugin.NAME)
    if config.getoption("--trainguard-report", None) and not hasattr(config, "workerinput"):
        from .report import ReportPlugin

        manager.register(ReportPlugin(), ReportPlugin.NAME)  # xdist workers leave the report to the controller


#: Options whose value is a folder. Given as two arguments (`--trainguard-golden-dir DIR`), pytest
#: reads DIR as a test path while it chooses its rootdir, before this plugin is loaded: an existing
#: DIR outside the project moves rootdir, which changes every node id and so every golden folder.
PATH_OPTIONS = ("--trainguard-golden-dir", "--trainguard-results", "--trainguard-report")


def check_path_options(args: list[str]) -> None:
    """Refuse the two-argument form of the folder options, with the one-argument form as the fix."""
    for i, arg in enumerate(args):
        if arg in PATH_OPTIONS and i + 1 < len(args):
            fixed = [*args[:i], f"{arg}={args[i + 1]}", *args[i + 2:]]
            raise pytest.UsageError(
                f"write {arg}={args[i + 1]} (with '='): as two arguments, pytest takes {args[i + 1]} for a test path "
                "while it chooses its rootdir (before trainguard is loaded), which can change every node id and so "
                f"the golden folder of every test. Run:\n  {shlex.join(['pytest', *fixed])}")


def check_workflow_options(config: pytest.Config) -> None:
    """Usage errors found before any test runs: a bad --trainguard-repeat, a bless in CI without a reason."""
    check_path_options([str(a) for a in config.invocation_params.args])
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


@pytest.fixture
def trajectory(request: pytest.FixtureRequest) -> Iterator[Any]:
    """Seeds every RNG, turns on deterministic mode, records the run; restores all globals afterwards."""
    from ...core.capture import DEFAULT_MAX_VALUES, Trajectory
    from ...core.determinism import GlobalState, guarded_setup
    from ...core.environment import fingerprint
    from ...core.errors import UsageError
    from ...core.settings import from_marker, parse_ini_float, parse_ini_int

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
        GuardPlugin.fail(f"{request.node.nodeid}: {exc}")
    full_trace = (config.getoption("--trainguard-full-trace") or config.getoption("--trainguard-bless")
                  or (config.getoption("--trainguard-repeat") or 1) > 1)
    traj = Trajectory(max_values=max_values, light_trace=not full_trace)
    guard = GuardPlugin.of(config)
    portable = guard is not None and guard.portable
    saved = GlobalState.capture()
    try:
        deterministic = False if config.getoption("--trainguard-nondeterministic") else settings.deterministic
        threads = config.getoption("--trainguard-threads")
        if portable:
            from ...core import dispatch

            assert guard is not None
            if not guard.portable_unavailable:
                threads = dispatch.PORTABLE_THREADS
        guarded_setup(settings.seed, deterministic, threads=threads)
        fp = fingerprint()
        if portable and guard is not None and guard.portable_unavailable:
            fp[dispatch.FINGERPRINT_KEY] = dispatch.unavailable(guard.portable_unavailable)
        elif portable:
            assert guard is not None
            if guard.portable_capability is None:
                try:
                    guard.portable_capability = dispatch.verify()
                except UsageError as exc:
                    GuardPlugin.fail(f"{request.node.nodeid}: {exc}")
            fp[dispatch.FINGERPRINT_KEY] = dispatch.record(guard.portable_replaced, guard.portable_capability)
        plant = guard.plant if guard is not None else None
        if plant is not None:
            from ...core import planting

            fp[planting.FINGERPRINT_KEY] = plant.spec
        pending = Pending(traj, settings, fp, start=GlobalState.capture())
        if guard is not None and not config.getoption("--trainguard-bless"):
            pending.reference = guard.light_golden(request.node)
            traj.known = pending.reference.tensors if pending.reference is not None else None
        Pending.attach(request.node, pending)
        if plant is None:
            yield traj
        else:
            with planting.planted(plant):
                yield traj
    finally:
        traj.close()
        saved.restore()
