"""`trainguard calibrate`: measure a guarded test's run-to-run noise and propose tolerances.

The test is run several times, each time in a fresh `python -m pytest` process that
blesses it into a scratch folder, under settings that must not count as behaviour
changes on this machine:

- the baseline (as configured, with Python's hash seed fixed), twice or more: two runs
  with identical settings must agree bit for bit, else something in the test reads a
  source that changes between runs (time, `os.urandom`, an unseeded generator);
- torch's intra-op thread count set to other values (`--trainguard-threads`): CPU
  reductions split their work by thread and may add in another order;
- torch's deterministic mode off (`--trainguard-nondeterministic`): kernels without a
  deterministic implementation (atomic adds, mostly on GPUs) are then allowed;
- another `PYTHONHASHSEED`: Python salts str hashes per process, so a plain `pytest`
  run iterates sets of names in an order that changes from run to run.

Everything is measured against the first baseline run. The analysis (`analyse`) and
the report (`format_report`) are pure functions of the recorded runs; only
`run_variations` starts processes. Nothing here imports pytest.
"""

from __future__ import annotations

import datetime as _dt
import math
import os
import shlex
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from . import golden, paths
from .errors import GoldenMissingError, TrainguardError
from .record import Run, TensorRecord
from .tolerance import DEFAULT_ATOL, DEFAULT_RTOL, Policy, Tolerance, bitwise_equal

#: Default safety factor: the proposal is this many times the largest spread observed. A
#: factor of 10 (one order of magnitude of headroom over a handful of runs) is a common
#: rule of thumb in numerical testing, not a value with a single authoritative source.
DEFAULT_SAFETY = 10.0
#: Default number of baseline runs (each variation runs `runs - 1` times, at least once).
DEFAULT_RUNS = 2
#: "Near zero": below this fraction of the largest magnitude of the same metric or tensor
#: (or moved by more than its own magnitude). There a relative spread says little (it grows
#: without bound as the value nears 0), so such values are covered by atol instead of rtol.
NEAR_ZERO = 1e-3
#: Most state entries listed in the report (the rest are counted).
MAX_TENSOR_ROWS = 15


# -- planning the runs ---------------------------------------------------------------------


@dataclass(frozen=True)
class Setting:
    """One way of running the test: extra pytest options and environment variables."""

    key: str  # "baseline", "threads=1", "nondeterministic", "hashseed=1"
    description: str
    args: tuple[str, ...] = ()
    env: tuple[tuple[str, str], ...] = ()


@dataclass
class RunSpec:
    label: str  # unique, e.g. "baseline 2", "threads=4", "threads=4 #2"
    setting: Setting

    @property
    def folder_name(self) -> str:
        return paths.safe_component(self.label.replace(" #", "_").replace(" ", "-"))


def base_hash_seed(environ: dict[str, str] | os._Environ[str] | None = None) -> str:
    """The PYTHONHASHSEED of the baseline: the user's when it is a number, else 0."""
    raw = (environ if environ is not None else os.environ).get("PYTHONHASHSEED", "")
    return raw if raw.isdigit() and int(raw) < 2**32 else "0"


def baseline_setting(hash_seed: str) -> Setting:
    return Setting("baseline", f"as configured, PYTHONHASHSEED={hash_seed}", (), (("PYTHONHASHSEED", hash_seed),))


def thread_counts(baseline_threads: int, cpu_count: int | None) -> list[int]:
    """Two intra-op thread counts other than the baseline's: 1 and the CPU count where possible."""
    cpus = max(1, cpu_count or 1)
    out: list[int] = []
    for n in (1, cpus, max(2, baseline_threads // 2), baseline_threads * 2, baseline_threads + 1, baseline_threads + 2):
        if n >= 1 and n != baseline_threads and n not in out:
            out.append(n)
        if len(out) == 2:
            break
    return out


def plan(baseline_meta: dict[str, Any], runs: int, hash_seed: str, cpu_count: int | None) -> tuple[list[RunSpec], list[str]]:
    """The runs after the first baseline run, and notes on variations left out."""
    notes: list[str] = []
    base = baseline_setting(hash_seed)
    fixed_env = (("PYTHONHASHSEED", hash_seed),)
    fp = baseline_meta.get("fingerprint") or {}
    threads = (fp.get("threads") or {}).get("intra_op")
    variations: list[Setting] = []
    if isinstance(threads, int) and threads >= 1:
        for n in thread_counts(threads, cpu_count):
            variations.append(Setting(f"threads={n}", f"--trainguard-threads {n} (baseline: {threads})",
                                      ("--trainguard-threads", str(n)), fixed_env))
    else:
        notes.append("thread count not varied: the baseline run recorded no intra-op thread count")
    if baseline_meta.get("deterministic") is False:
        notes.append("deterministic mode not varied: the marker already turns it off (deterministic=False)")
    else:
        variations.append(Setting("nondeterministic", "--trainguard-nondeterministic (deterministic mode off)",
                                  ("--trainguard-nondeterministic",), fixed_env))
    other_seed = str((int(hash_seed) + 1) % 2**32)
    variations.append(Setting(f"hashseed={other_seed}", f"PYTHONHASHSEED={other_seed} (another str hash salt)",
                              (), (("PYTHONHASHSEED", other_seed),)))
    specs = [RunSpec(f"baseline {i}", base) for i in range(2, runs + 1)]
    repeats = max(1, runs - 1)
    for v in variations:
        for k in range(1, repeats + 1):
            specs.append(RunSpec(v.key if repeats == 1 else f"{v.key} #{k}", v))
    return specs, notes


# -- running -------------------------------------------------------------------------------


@dataclass
class RecordedRun:
    spec: RunSpec
    run: Run
    folder: Path
    seconds: float = 0.0


def pytest_command(nodeid: str, out_dir: Path, setting: Setting) -> list[str]:
    return [sys.executable, "-m", "pytest", "-p", "no:cacheprovider", "-q", "--trainguard-bless",
            "--trainguard-golden-dir", str(out_dir), "--trainguard-reason", f"trainguard calibrate: {setting.key}",
            *setting.args, nodeid]


def _shell(cmd: Sequence[str], env: Sequence[tuple[str, str]] = ()) -> str:
    words = [f"{k}={shlex.quote(v)}" for k, v in env]
    words += ["python" if c == sys.executable else shlex.quote(c) for c in cmd]
    return " ".join(words)


def _tail(text: str, lines: int = 25) -> str:
    kept = text.strip().splitlines()[-lines:]
    return "\n".join("    " + line for line in kept)


def run_once(nodeid: str, spec: RunSpec, scratch: Path, cwd: Path) -> RecordedRun:
    """Run the test once under `spec` (blessing into `scratch/<label>`) and read what it recorded."""
    out_dir = scratch / spec.folder_name
    cmd = pytest_command(nodeid, out_dir, spec.setting)
    env = dict(os.environ)
    env.update(dict(spec.setting.env))
    started = time.perf_counter()
    proc = subprocess.run(cmd, cwd=cwd, env=env, capture_output=True, text=True)
    seconds = time.perf_counter() - started
    output = (proc.stdout or "") + (proc.stderr or "")
    if proc.returncode in (4, 5):
        raise TrainguardError(
            f"{nodeid}: pytest found no such test in {cwd} (exit status {proc.returncode}):\n{_tail(output, 6)}\n"
            f"  list the guarded tests' node ids with: python -m pytest --collect-only -q -m trainguard")
    if proc.returncode != 0:
        raise TrainguardError(
            f"{nodeid} did not pass in calibration run '{spec.label}' ({spec.setting.description}); "
            f"pytest exited with status {proc.returncode}:\n{_tail(output)}\n"
            f"  reproduce it with: {_shell(cmd, spec.setting.env)}")
    found = golden.find_goldens(out_dir) if out_dir.is_dir() else []
    if not found:
        raise TrainguardError(
            f"{nodeid} ran but recorded no golden in calibration run '{spec.label}': it is not a guarded test, "
            f"or it was skipped or deselected. Guarded tests carry @pytest.mark.trainguard(seed=...) and use the "
            f"'trajectory' fixture; check with: python -m pytest -q -rs {shlex.quote(nodeid)}")
    if len(found) > 1:
        ids = [str(f.relative_to(out_dir)) for f in found]
        raise TrainguardError(
            f"{nodeid} selects {len(found)} guarded tests ({', '.join(ids[:5])}{', ...' if len(ids) > 5 else ''}); "
            f"calibrate one test at a time: give its full node id, e.g. from "
            f"python -m pytest --collect-only -q {shlex.quote(nodeid)}")
    run = golden.read_run(found[0])
    return RecordedRun(spec, run, found[0], seconds)


def run_all(nodeid: str, runs: int, scratch: Path, cwd: Path, jobs: int,
            progress: Callable[[str], None] = lambda line: None,
            after_first: Callable[[RecordedRun], None] = lambda first: None) -> tuple[list[RecordedRun], list[str]]:
    """The first baseline run alone (it tells the test's real node id, thread count and deterministic
    setting, and `after_first` may refuse to go on), then the rest, `jobs` at a time."""
    hash_seed = base_hash_seed()
    first = run_once(nodeid, RunSpec("baseline 1", baseline_setting(hash_seed)), scratch, cwd)
    progress(f"  done: baseline 1 ({first.seconds:.1f} s)")
    after_first(first)
    specs, notes = plan(first.run.meta, runs, hash_seed, os.cpu_count())

    def one(spec: RunSpec) -> RecordedRun:
        rec = run_once(nodeid, spec, scratch, cwd)
        progress(f"  done: {spec.label} ({rec.seconds:.1f} s)")
        return rec

    with ThreadPoolExecutor(max_workers=max(1, jobs)) as pool:
        rest = list(pool.map(one, specs))
    return [first, *rest], notes


def default_jobs(cpu_count: int | None = None) -> int:
    """Runs at a time: a quarter of the CPUs, 1 to 4 (each run uses several threads itself)."""
    return max(1, min(4, (cpu_count if cpu_count is not None else (os.cpu_count() or 1)) // 4))


# -- analysis ------------------------------------------------------------------------------


@dataclass
class Spread:
    """The spread of one metric or state entry over all runs, against the first baseline run."""

    name: str
    reference: np.ndarray  # baseline values (metric by step, tensor elements, or statistics)
    spread: np.ndarray  # max over runs of |value - baseline|, same shape
    steps: np.ndarray | None = None  # metrics only
    kind: str = "metric"
    basis: str = "values"  # state: "values" or "statistics"
    by_run: dict[str, float] = field(default_factory=dict)  # label -> max abs diff of that run

    @property
    def scale(self) -> float:
        finite = np.abs(self.reference[np.isfinite(self.reference)])
        return float(finite.max()) if finite.size else 0.0

    def near_zero(self) -> np.ndarray:
        """Values below NEAR_ZERO of the largest magnitude of the same series, or that moved by more
        than their own magnitude: noise around zero, covered by atol rather than rtol."""
        mag = np.abs(self.reference)
        if self.scale <= 0:
            return np.ones(self.reference.shape, bool)
        return (mag < NEAR_ZERO * self.scale) | (self.spread > mag)

    @property
    def max_abs(self) -> float:
        return float(self.spread.max()) if self.spread.size else 0.0

    def rel(self) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            rel = self.spread / np.abs(self.reference)
        return np.where(self.spread == 0, 0.0, rel)

    def raw_rtol(self) -> tuple[float, int | None]:
        """Largest relative spread over values away from zero, and where (index)."""
        mask = ~self.near_zero() & (self.spread > 0)
        if not mask.any():
            return 0.0, None
        rel = np.where(mask, self.rel(), -1.0)
        i = int(np.argmax(rel))
        return float(rel[i]), i

    def raw_atol(self) -> tuple[float, int | None]:
        """Largest absolute spread over values near zero, and where (index)."""
        mask = self.near_zero() & (self.spread > 0)
        if not mask.any():
            return 0.0, None
        absd = np.where(mask, self.spread, -1.0)
        i = int(np.argmax(absd))
        return float(absd[i]), i

    @property
    def max_rel(self) -> float:
        rel = self.rel()
        finite = rel[np.isfinite(rel)]
        return float(finite.max()) if finite.size else (math.inf if self.max_abs > 0 else 0.0)

    def where(self, index: int | None) -> str:
        if index is None:
            return ""
        if self.kind == "metric" and self.steps is not None:
            return f"metric {self.name} at step {int(self.steps[index])}"
        if self.basis == "statistics":
            return f"{self.name} ({_STAT_NAMES[index]})"
        return f"{self.name}[{index}]" if self.reference.size > 1 else self.name

    def growth(self) -> float | None:
        """Per-step growth factor of the spread: exp of the slope of a least-squares line
        through log(spread) over the steps where it is non-zero (at least 3 of them)."""
        if self.steps is None:
            return None
        ok = (self.spread > 0) & np.isfinite(self.spread)
        if ok.sum() < 3 or np.unique(self.steps[ok]).size < 3:
            return None
        slope = np.polyfit(self.steps[ok].astype(np.float64), np.log(self.spread[ok]), 1)[0]
        return float(math.exp(slope))


_STAT_NAMES = ("min", "max", "mean", "l2", "non-finite count", "sketch L2 distance")


@dataclass
class Difference:
    """The first difference between the reference and one run."""

    label: str
    where: str  # "metric 'loss' at step 2" or "state entry 'fc.weight'"
    reference: float | None = None
    value: float | None = None
    step: int | None = None
    metric: str | None = None


@dataclass
class Proposal:
    rtol: float
    atol: float
    raw_rtol: float
    raw_atol: float
    rtol_where: str = ""
    atol_where: str = ""
    kept_rtol: bool = False  # no spread away from zero: the current rtol is kept
    kept_atol: bool = False


@dataclass
class Calibration:
    nodeid: str
    seed: int | None
    safety: float
    runs: list[RecordedRun]
    notes: list[str]
    metrics: list[Spread]
    tensors: list[Spread]
    identical_tensors: int
    problems: list[str]  # differences no tolerance can cover (missing steps, NaN vs finite, shapes)
    bitwise: bool  # every run bitwise identical to the reference
    fixed_difference: Difference | None  # first difference between identical-settings runs
    per_run: dict[str, Difference | None]  # label -> first difference (None: bitwise identical)
    current: Tolerance  # the golden's / run's tolerance as recorded (marker > ini > defaults)
    current_exact: bool
    proposal: Proposal | None
    metric_proposals: dict[str, Proposal]
    seconds: float = 0.0
    jobs: int = 1

    @property
    def reference(self) -> RecordedRun:
        return self.runs[0]

    def policy(self) -> Policy | None:
        if self.proposal is None:
            return None
        return Policy(default=Tolerance(self.proposal.rtol, self.proposal.atol), exact=False,
                      metrics={k: Tolerance(p.rtol, p.atol) for k, p in self.metric_proposals.items()})

    def marker_line(self, exact: bool = False) -> str:
        args = [] if self.seed is None else [f"seed={self.seed}"]
        if exact:
            args.append("exact=True")
        elif self.proposal is not None:
            args += [f"rtol={_num(self.proposal.rtol)}", f"atol={_num(self.proposal.atol)}"]
            if self.metric_proposals:
                inner = ", ".join(f'"{k}": {{"rtol": {_num(p.rtol)}, "atol": {_num(p.atol)}}}'
                                  for k, p in sorted(self.metric_proposals.items()))
                args.append(f"metrics={{{inner}}}")
        return f"@pytest.mark.trainguard({', '.join(args)})"

    def metadata(self) -> dict[str, Any]:
        """What `--write` stores as the golden's `calibrated` metadata."""
        from . import __version__

        assert self.proposal is not None
        return {
            "rtol": self.proposal.rtol,
            "atol": self.proposal.atol,
            "metrics": {k: {"rtol": p.rtol, "atol": p.atol} for k, p in sorted(self.metric_proposals.items())},
            "safety": self.safety,
            "observed": {"rtol": self.proposal.raw_rtol, "atol": self.proposal.raw_atol},
            "runs": [{"label": r.spec.label, "setting": r.spec.setting.description} for r in self.runs],
            "deterministic_when_fixed": self.fixed_difference is None,
            "calibrated_at": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
            "trainguard": __version__,
        }


def _num(x: float) -> str:
    return f"{x:g}"


def round_up(x: float) -> float:
    """The smallest number with one significant digit that is >= x (x > 0): 2.3e-5 -> 3e-05."""
    if not x > 0 or not math.isfinite(x):
        return x
    e = math.floor(math.log10(x))
    m = math.ceil(round(x / 10.0**e, 9))
    while True:
        if m >= 10:
            m, e = 1, e + 1
        value = float(f"{m}e{e}")
        if value >= x:
            return value
        m += 1


def propose(spreads: Sequence[Spread], safety: float, current: Tolerance) -> Proposal:
    """The tolerance rule (README, "Calibrating tolerances"):

    rtol = safety x the largest relative spread over values away from zero,
    atol = safety x the largest absolute spread over values near zero (below NEAR_ZERO of
    the largest magnitude of the same metric or tensor, or moved by more than their own
    magnitude), each rounded up to one
    significant digit. A part with no spread keeps its current value. Then every observed
    difference d at reference value g satisfies d <= atol + rtol * |g|.
    """
    raw_rtol, raw_atol, rtol_where, atol_where = 0.0, 0.0, "", ""
    for s in spreads:
        r, i = s.raw_rtol()
        if r > raw_rtol:
            raw_rtol, rtol_where = r, s.where(i)
        a, j = s.raw_atol()
        if a > raw_atol:
            raw_atol, atol_where = a, s.where(j)
    return Proposal(
        rtol=round_up(safety * raw_rtol) if raw_rtol > 0 else current.rtol,
        atol=round_up(safety * raw_atol) if raw_atol > 0 else current.atol,
        raw_rtol=raw_rtol, raw_atol=raw_atol, rtol_where=rtol_where, atol_where=atol_where,
        kept_rtol=raw_rtol == 0, kept_atol=raw_atol == 0,
    )


def _abs_diff(reference: np.ndarray, values: np.ndarray) -> np.ndarray:
    """|values - reference|, 0 where the bits agree (so equal NaNs and infinities count as 0)."""
    with np.errstate(invalid="ignore", over="ignore"):
        d = np.abs(values - reference)
    return np.where(bitwise_equal(reference, values), 0.0, d)


def _sketch_gap(golden_rec: TensorRecord, new_rec: TensorRecord) -> float:
    """Estimated L2 distance from the entries' sketches (stored in place of large tensors' values),
    0 when either has none. The comparison allows atol * sqrt(n) + rtol * l2 for it, so it is
    recorded against the baseline's l2: rtol then covers it."""
    a, b = getattr(golden_rec, "sketch", None), getattr(new_rec, "sketch", None)
    if a is None or b is None or np.shape(a) != np.shape(b):
        return 0.0
    gap = float(np.linalg.norm(np.asarray(b, dtype=np.float64) - np.asarray(a, dtype=np.float64)))
    return gap if math.isfinite(gap) else 0.0


def _tensor_arrays(t: TensorRecord, basis: str) -> np.ndarray:
    if basis == "values" and t.values is not None:
        return t.values
    return np.array([t.min, t.max, t.mean, t.l2, t.nonfinite], dtype=np.float64)


def _first_difference(label: str, ref: Run, run: Run) -> Difference | None:
    """Earliest step at which any metric's bits differ (ties: metric name), else the first state entry."""
    best: Difference | None = None
    for name in sorted(ref.metrics):
        g, n = ref.metrics[name], run.metrics.get(name)
        if n is None:
            return Difference(label, f"metric {name!r} (not logged)", metric=name)
        if not np.array_equal(g.steps, n.steps):
            return Difference(label, f"metric {name!r} (other steps logged)", metric=name)
        same = bitwise_equal(g.values, n.values)
        if same.all():
            continue
        k = int(np.flatnonzero(~same)[0])
        step = int(g.steps[k])
        if best is None or step < (best.step if best.step is not None else step + 1):
            best = Difference(label, f"metric {name!r} at step {step}", float(g.values[k]), float(n.values[k]),
                              step, name)
    if best is not None:
        return best
    for name in sorted(set(ref.metrics) | set(run.metrics)):
        if name not in ref.metrics:
            return Difference(label, f"metric {name!r} (logged only by this run)", metric=name)
    for name in sorted(set(ref.tensors) | set(run.tensors)):
        a, b = ref.tensors.get(name), run.tensors.get(name)
        if a is None or b is None or a.sha256 != b.sha256 or a.dtype != b.dtype or a.shape != b.shape:
            return Difference(label, f"state entry {name!r}")
    return None


def analyse(nodeid: str, runs: Sequence[RecordedRun], safety: float = DEFAULT_SAFETY,
            notes: Sequence[str] = ()) -> Calibration:
    """Spreads, first differences and the proposed tolerance from recorded runs (runs[0]: reference)."""
    if len(runs) < 2:
        raise TrainguardError("calibration needs at least two runs")
    ref = runs[0].run
    others = runs[1:]
    problems: list[str] = []

    metrics: list[Spread] = []
    for name in sorted(ref.metrics):
        g = ref.metrics[name]
        spread = np.zeros(g.values.shape)
        by_run: dict[str, float] = {}
        for r in others:
            n = r.run.metrics.get(name)
            if n is None:
                problems.append(f"run '{r.spec.label}' did not log metric {name!r}")
                continue
            if not np.array_equal(g.steps, n.steps):
                problems.append(f"run '{r.spec.label}' logged metric {name!r} at other steps than baseline 1")
                continue
            d = _abs_diff(g.values, n.values)
            if np.isnan(d).any():
                k = int(np.flatnonzero(np.isnan(d))[0])
                problems.append(f"run '{r.spec.label}': metric {name!r} at step {int(g.steps[k])} is "
                                f"{n.values[k]!r} against {g.values[k]!r} in baseline 1 (no tolerance covers a "
                                f"non-finite value against a finite one)")
                d = np.where(np.isnan(d), 0.0, d)
            spread = np.maximum(spread, d)
            by_run[r.spec.label] = float(d.max()) if d.size else 0.0
        metrics.append(Spread(name, g.values, spread, g.steps, "metric", "values", by_run))
    for r in others:
        for name in sorted(set(r.run.metrics) - set(ref.metrics)):
            problems.append(f"run '{r.spec.label}' logged metric {name!r}, which baseline 1 did not")

    tensors: list[Spread] = []
    identical = 0
    for name in sorted(ref.tensors):
        t = ref.tensors[name]
        if all(name in r.run.tensors and r.run.tensors[name].sha256 == t.sha256
               and r.run.tensors[name].dtype == t.dtype and r.run.tensors[name].shape == t.shape for r in others):
            identical += 1
            continue
        basis = "values" if t.values is not None and all(
            name not in r.run.tensors or r.run.tensors[name].values is not None for r in others) else "statistics"
        g = _tensor_arrays(t, basis)
        with_sketch = basis == "statistics" and getattr(t, "sketch", None) is not None
        spread = np.zeros(g.size + with_sketch)
        by_run = {}
        for r in others:
            n_rec = r.run.tensors.get(name)
            if n_rec is None:
                problems.append(f"run '{r.spec.label}' did not record state entry {name!r}")
                continue
            if n_rec.dtype != t.dtype or n_rec.shape != t.shape:
                problems.append(f"run '{r.spec.label}': state entry {name!r} is {n_rec.dtype} {list(n_rec.shape)}, "
                                f"baseline 1 has {t.dtype} {list(t.shape)}")
                continue
            n = _tensor_arrays(n_rec, basis)
            if n.shape != g.shape:
                problems.append(f"run '{r.spec.label}': state entry {name!r} stored {n.size} values, baseline 1 {g.size}")
                continue
            d = _abs_diff(g, n)
            if np.isnan(d).any():
                problems.append(f"run '{r.spec.label}': state entry {name!r} has non-finite values where baseline 1 "
                                f"has finite ones (no tolerance covers that)")
                d = np.where(np.isnan(d), 0.0, d)
            if with_sketch:
                d = np.append(d, _sketch_gap(t, n_rec))
            spread = np.maximum(spread, d)
            by_run[r.spec.label] = float(d.max()) if d.size else 0.0
        reference = np.append(g, t.l2) if with_sketch else g
        tensors.append(Spread(name, reference, spread, None, t.kind, basis, by_run))
    for r in others:
        for name in sorted(set(r.run.tensors) - set(ref.tensors)):
            problems.append(f"run '{r.spec.label}' recorded state entry {name!r}, which baseline 1 did not")

    per_run = {r.spec.label: _first_difference(r.spec.label, ref, r.run) for r in others}
    bitwise = all(d is None for d in per_run.values())
    fixed = [per_run[r.spec.label] for r in others if r.spec.setting.key == "baseline" and per_run[r.spec.label]]
    fixed_difference = min(fixed, key=lambda d: (d.step is None, d.step or 0, d.metric or "")) if fixed else None

    tol = ref.meta.get("tolerances") or {}
    current = Tolerance(float(tol.get("rtol", DEFAULT_RTOL)), float(tol.get("atol", DEFAULT_ATOL)))
    proposal = None
    metric_proposals: dict[str, Proposal] = {}
    if not bitwise and not problems:
        proposal = propose([*metrics, *tensors], safety, current)
        for s in metrics:  # per metric only where it is tighter than the overall proposal
            if s.max_abs > 0:
                own = propose([s], safety, Tolerance(proposal.rtol, proposal.atol))
                if (own.rtol, own.atol) != (proposal.rtol, proposal.atol):
                    metric_proposals[s.name] = own
    seed = ref.meta.get("seed")
    return Calibration(
        nodeid=str(ref.meta.get("nodeid") or nodeid), seed=seed if isinstance(seed, int) else None, safety=safety,
        runs=list(runs), notes=list(notes), metrics=metrics, tensors=tensors, identical_tensors=identical,
        problems=problems, bitwise=bitwise, fixed_difference=fixed_difference, per_run=per_run, current=current,
        current_exact=bool(tol.get("exact", False)), proposal=proposal, metric_proposals=metric_proposals,
    )


# -- the golden ----------------------------------------------------------------------------


def check_golden(cal: Calibration, golden_run: Run) -> list[str]:
    """Problems if the golden would not pass, under the proposed tolerance, against every calibration run."""
    from .comparison import CHANGED, compare

    policy = cal.policy()
    if policy is None:
        return []
    out = []
    for r in cal.runs:
        cmp = compare(golden_run, r.run, policy)
        if cmp.outcome != CHANGED:
            continue
        for m in cmp.metrics:
            if m.verdict == CHANGED:
                where = f"metric {m.name!r}" + (f" at step {m.first_step}: golden {m.golden!r}, run {m.new!r}"
                                                if m.first_step is not None else f" ({m.note or 'steps differ'})")
                out.append(f"run '{r.spec.label}': {where}")
                break
        else:
            t = next(t for t in cmp.tensors if t.verdict == CHANGED)
            out.append(f"run '{r.spec.label}': state entry {t.name!r} ({', '.join(t.reasons)})")
    return out


def bless_command(nodeid: str, golden_dir_option: str | None = None) -> str:
    parts = ["pytest", "--trainguard-bless", "--trainguard-reason", "'describe the intended change'"]
    if golden_dir_option:
        parts += ["--trainguard-golden-dir", shlex.quote(golden_dir_option)]
    return " ".join(parts + [shlex.quote(nodeid)])


def write_calibration(folder: Path, calibrated: dict[str, Any] | None) -> Run:
    """Store (or, with None, remove) the `calibrated` entry of the golden in `folder`, atomically per file."""
    run = golden.read_run(folder)
    run.meta.pop("format_version", None)  # set by the reader from the file's own key, not part of the JSON
    if calibrated is None:
        run.meta.pop("calibrated", None)
    else:
        run.meta["calibrated"] = calibrated
    golden.write_run(folder, run)
    return run


# -- the report ----------------------------------------------------------------------------


def _e(x: float) -> str:
    return f"{x:.1e}" if x else "0"


def _value(x: float | None) -> str:
    return "-" if x is None else f"{x:.9g}"


def format_report(cal: Calibration) -> str:
    from .report import table

    out: list[str] = []
    ref_label = cal.reference.spec.label
    seed = f" (seed {cal.seed})" if cal.seed is not None else ""
    out.append(f"trainguard calibrate: {cal.nodeid}{seed}")
    out.append(f"{len(cal.runs)} runs in {cal.seconds:.1f} s ({cal.jobs} at a time), each a fresh pytest process "
               f"blessing into a scratch folder; all compared with {ref_label}")
    rows = []
    for r in cal.runs:
        if r is cal.reference:
            verdict = "(reference)"
        else:
            d = cal.per_run.get(r.spec.label)
            if d is None:
                verdict = "bitwise identical"
            else:
                worst = max([s.by_run.get(r.spec.label, 0.0) for s in (*cal.metrics, *cal.tensors)], default=0.0)
                verdict = f"differs, first in {d.where}" + (f"; max abs diff {_e(worst)}" if worst else "")
        rows.append([r.spec.label, r.spec.setting.description, verdict])
    out.append(table(["run", "setting", "against " + ref_label], rows))
    for note in cal.notes:
        out.append(f"  note: {note}")
    out.append("")

    if cal.bitwise:
        out.append(f"BITWISE DETERMINISTIC under all variations: every metric value and every state checksum of all "
                   f"{len(cal.runs)} runs is identical to {ref_label} (threads, deterministic mode and hash seed "
                   f"change nothing).")
        out.append("proposal: keep the current tolerance "
                   + ("(exact)" if cal.current_exact else f"({cal.current.describe()})")
                   + ", or demand bitwise identity on this machine:")
        out.append(f"  {cal.marker_line()}")
        out.append(f"  {cal.marker_line(exact=True)}")
        return "\n".join(out)

    fd = cal.fixed_difference
    if fd is not None:
        vals = f" ({_value(fd.reference)} vs {_value(fd.value)})" if fd.reference is not None else ""
        out.append(f"NOT DETERMINISTIC even with everything fixed: {ref_label} and {fd.label} ran with identical "
                   f"settings and differ; first difference: {fd.where}{vals}.")
        out.append("  something in the test reads a source that changes between runs (the clock, os.urandom, an "
                   "unseeded generator, data loader workers, a file or network resource); the tolerance below "
                   "covers the noise seen, but removing the source is better.")
    else:
        out.append("deterministic with everything fixed (identical settings gave identical bits), but not under "
                   "every variation; first differences per run are listed above.")
    out.append("")

    if cal.problems:
        out.append("differences no tolerance can cover (so no tolerance is proposed):")
        out.extend(f"  {p}" for p in cal.problems[:20])
        if len(cal.problems) > 20:
            out.append(f"  ... and {len(cal.problems) - 20} more")
        return "\n".join(out)

    if cal.metrics:
        out.append(f"metrics (spread = max over runs of |value - {ref_label}|; growth = per-step factor of a "
                   f"log-linear fit of the non-zero spread):")
        rows = []
        for s in cal.metrics:
            steps = s.steps if s.steps is not None else np.arange(s.spread.size)
            if not s.spread.size:
                continue
            nz = np.flatnonzero(s.spread > 0)
            mid = len(steps) // 2
            g = s.growth()
            p = cal.metric_proposals.get(s.name) or (cal.proposal if s.max_abs > 0 else None)
            rows.append([
                s.name, len(steps), int(steps[nz[0]]) if nz.size else "-",
                f"{_e(float(s.spread[0]))} @{int(steps[0])}", f"{_e(float(s.spread[mid]))} @{int(steps[mid])}",
                f"{_e(float(s.spread[-1]))} @{int(steps[-1])}", _e(s.max_abs), _e(s.max_rel),
                f"x{g:.3g}/step" if g is not None else "-",
                f"rtol={_num(p.rtol)}, atol={_num(p.atol)}" if p else "identical",
            ])
        out.append(table(["metric", "steps", "first step off", "spread first", "middle", "last", "max abs",
                          "max rel", "growth", "proposed"], rows))
        out.append("")
    moved = sorted(cal.tensors, key=lambda s: -s.max_rel if math.isfinite(s.max_rel) else -math.inf)
    out.append(f"state (max elementwise |difference| from {ref_label} over all runs):")
    if moved:
        rows = [[s.name, s.kind, s.basis, _e(s.max_abs), _e(s.max_rel) if math.isfinite(s.max_rel) else "inf",
                 f"{int((s.spread > 0).sum())}/{s.spread.size}"] for s in moved[:MAX_TENSOR_ROWS]]
        out.append(table(["entry", "kind", "from", "max abs", "max rel", "elements moved"], rows))
        if len(moved) > MAX_TENSOR_ROWS:
            out.append(f"  ... and {len(moved) - MAX_TENSOR_ROWS} more entries that moved")
    out.append(f"  ({cal.identical_tensors} of {cal.identical_tensors + len(cal.tensors)} state entries bitwise "
               f"identical in every run)")
    out.append("")

    p = cal.proposal
    assert p is not None
    out.append(f"proposed tolerance, safety factor {cal.safety:g} (a common rule of thumb, not a standard): "
               f"rtol = {cal.safety:g} x the largest relative spread of values away from zero, atol = {cal.safety:g} x "
               f"the largest absolute spread of values near zero (below {NEAR_ZERO:g} x the largest magnitude of "
               f"their metric or entry, or moved by more than their own size), rounded up to one significant "
               f"digit:")
    out.append(f"  rtol={_num(p.rtol)}  " + ("(current value kept: nothing away from zero moved)" if p.kept_rtol
                                            else f"(observed {_e(p.raw_rtol)} in {p.rtol_where})"))
    out.append(f"  atol={_num(p.atol)}  " + ("(current value kept: nothing near zero moved)" if p.kept_atol
                                            else f"(observed {_e(p.raw_atol)} in {p.atol_where})"))
    if cal.metric_proposals:
        out.append("  per metric: " + ", ".join(f"{k}: rtol={_num(v.rtol)}, atol={_num(v.atol)}"
                                                for k, v in sorted(cal.metric_proposals.items())))
    if p.rtol < cal.current.rtol and not p.kept_rtol:
        out.append(f"  note: tighter than the current rtol={_num(cal.current.rtol)}; runs on other machines (CI) may "
                   f"need their own calibration or goldens")
    out.append("ready marker line:")
    out.append(f"  {cal.marker_line()}")
    return "\n".join(out)


# -- the command ---------------------------------------------------------------------------


def calibrate(nodeid: str, runs: int = DEFAULT_RUNS, safety: float = DEFAULT_SAFETY, write: bool = False,
              golden_dir: str | os.PathLike[str] | None = None, jobs: int | None = None,
              keep_runs: str | os.PathLike[str] | None = None, cwd: str | os.PathLike[str] | None = None,
              out: Callable[[str], None] = print, golden_dir_option: str | None = None) -> int:
    """Run, analyse, report, and with `write` store the proposal in the golden. Returns an exit status:
    0 done, 1 no tolerance could be proposed (or written). User mistakes raise TrainguardError."""
    if runs < 2:
        raise TrainguardError(f"--runs must be at least 2 (two identical runs tell whether the test is deterministic "
                              f"with everything fixed), got {runs}")
    if not (math.isfinite(safety) and safety >= 1):
        raise TrainguardError(f"--safety must be a number >= 1 (below 1 the proposal would not cover the spread "
                              f"already observed), got {safety:g}")
    cwd = Path(cwd) if cwd is not None else Path.cwd()
    jobs = jobs if jobs is not None else default_jobs()
    if jobs < 1:
        raise TrainguardError(f"--jobs must be at least 1, got {jobs}")
    if golden_dir is None:
        from .cli import default_golden_dir

        golden_dir = default_golden_dir(cwd)
    golden_dir = Path(golden_dir)
    keep = Path(keep_runs) if keep_runs is not None else None
    if keep is not None and keep.exists() and (not keep.is_dir() or any(keep.iterdir())):
        raise TrainguardError(f"--keep-runs {keep}: must be an empty folder or not exist yet; choose another "
                              f"folder or remove it (rm -r {shlex.quote(str(keep))})")

    def progress(line: str) -> None:
        print(line, file=sys.stderr, flush=True)

    def golden_of(first: RecordedRun) -> tuple[str, Path, str]:
        real = str(first.run.meta.get("nodeid") or nodeid)  # pytest's id, relative to rootdir
        folder = paths.golden_folder(golden_dir, real)
        shown = os.path.relpath(folder, cwd) if folder.is_absolute() else str(folder)
        return real, folder, shown

    def refuse_without_golden(first: RecordedRun) -> None:
        real, folder, shown = golden_of(first)
        if write and not golden.exists(folder):
            raise TrainguardError(f"--write: {real} has no golden in {shown} to store the calibration in; bless it "
                                  f"first:\n  {bless_command(real, golden_dir_option)}\n"
                                  f"then run calibrate with --write again")

    progress(f"trainguard calibrate: running {nodeid} (baseline first, then {jobs} at a time)")
    started = time.perf_counter()
    if keep is not None:
        keep.mkdir(parents=True, exist_ok=True)
        recorded, notes = run_all(nodeid, runs, keep, cwd, jobs, progress, refuse_without_golden)
    else:
        with tempfile.TemporaryDirectory(prefix="trainguard-calibrate-") as tmp:
            recorded, notes = run_all(nodeid, runs, Path(tmp), cwd, jobs, progress, refuse_without_golden)
    cal = analyse(nodeid, recorded, safety, notes)
    cal.seconds = time.perf_counter() - started
    cal.jobs = jobs
    out(format_report(cal))

    _, folder, shown = golden_of(recorded[0])
    try:
        golden_run = golden.read_run(folder)
    except GoldenMissingError:
        golden_run = None
    fix_bless = bless_command(cal.nodeid, golden_dir_option)
    if golden_run is None:
        out(f"\nno golden yet for {cal.nodeid} (looked in {shown}); record it with:\n  {fix_bless}")
        if write:  # removed between the first run and now
            raise TrainguardError(f"--write: {cal.nodeid} has no golden in {shown} to store the calibration in; "
                                  f"bless it first:\n  {fix_bless}\nthen run calibrate with --write again")
        return 0 if cal.proposal is not None or cal.bitwise else 1
    golden_problems = check_golden(cal, golden_run)
    if cal.proposal is not None:
        if golden_problems:
            out(f"\nthe golden {shown} does NOT match these runs within the proposed tolerance:")
            out("\n".join(f"  {p}" for p in golden_problems[:10]))
            out("  the test or its environment changed since the golden was blessed; if that change is intended, "
                f"re-bless first:\n  {fix_bless}")
        else:
            out(f"\nthe golden {shown} matches all {len(cal.runs)} runs within the proposed tolerance.")
    if not write:
        if cal.proposal is not None:
            out(f"to store the proposal in the golden (used unless the marker sets rtol, atol or exact itself):\n"
                f"  trainguard calibrate {shlex.quote(cal.nodeid)} --write"
                + (f" --safety {cal.safety:g}" if cal.safety != DEFAULT_SAFETY else "")
                + (f" --runs {runs}" if runs != DEFAULT_RUNS else ""))
        return 0 if cal.proposal is not None or cal.bitwise else 1

    if cal.bitwise:
        if "calibrated" in golden_run.meta:
            write_calibration(folder, None)
            out(f"\n--write: removed the earlier calibration from {shown}: the test is bitwise deterministic, so the "
                f"marker's, ini or default tolerance applies again.")
        else:
            out(f"\n--write: nothing to store in {shown}: the test is bitwise deterministic, the current tolerance "
                f"holds.")
        return 0
    if cal.proposal is None:
        out(f"\n--write: nothing written to {shown}: no tolerance covers the differences listed above.")
        return 1
    if golden_problems:
        out(f"\n--write: nothing written to {shown}: with the golden as it is, the test would still fail.")
        return 1
    write_calibration(folder, cal.metadata())
    out(f"\n--write: stored calibrated tolerances in {shown} (metadata 'calibrated': rtol={_num(cal.proposal.rtol)}, "
        f"atol={_num(cal.proposal.atol)}"
        + (f", per metric {', '.join(sorted(cal.metric_proposals))}" if cal.metric_proposals else "")
        + "); the next pytest run compares with them unless the marker sets rtol, atol or exact itself. "
        "A bless that rewrites this golden drops them: calibrate again afterwards.")
    if cal.current_exact:
        out("  note: the golden records exact=True from the marker, which takes precedence over calibrated "
            "tolerances; remove exact=True from the marker for them to apply.")
    return 0
