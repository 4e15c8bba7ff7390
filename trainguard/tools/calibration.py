"""Calibration analysis: from recorded runs to spreads, a proposed tolerance and a report.

Pure functions of the runs `trainguard calibrate` recorded (`calibrate` starts the
processes): `analyse` measures, per metric and state entry, the spread of every run
against the first baseline run and proposes rtol/atol from it; `format_report` writes it
up; `check_golden` tells whether the golden would pass under the proposal.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ..core import paths
from ..core.comparison import compare
from ..core.errors import TrainguardError
from ..core.meta import utc_stamp
from ..core.records import Run, TensorRecord
from ..core.text import table
from ..core.tolerance import DEFAULT_ATOL, DEFAULT_RTOL, Policy, Tolerance, bitwise_equal
from ..core.verdicts import CHANGED, CLOSE
from ..core.version import __version__

#: Default safety factor: the proposal is this many times the largest spread observed. A
#: factor of 10 (one order of magnitude of headroom over a handful of runs) is a common
#: rule of thumb in numerical testing, not a value with a single authoritative source.
DEFAULT_SAFETY = 10.0
#: Default number of baseline runs (each variation runs `runs - 1` times, at least once).
DEFAULT_RUNS = 2
#: Values smaller than this fraction of their entry's RMS have their spread measured against
#: that fraction of the RMS instead of their own size. A tenth keeps values of the same order
#: (a loss falling from 0.7 to 0.1) judged by their own size, while an element a thousand times
#: smaller than its neighbours cannot inflate rtol. Chosen here, not taken from a source.
SCALE_FLOOR = 0.1
#: Largest relative spread (against max(|value|, its entry's RMS)) that rtol takes. Rounding
#: noise in a value that means something stays orders of magnitude below it (float32 rounds at
#: 6e-8 per operation; thread and dispatch noise measured here after a few dozen steps: 1e-7 to
#: 5e-5). An entry moving more than this is noise around zero, and atol covers it. Chosen here,
#: not taken from a source; MAX_CALIBRATED_RTOL (1e-2) is the hard cap above it.
NOISE_REL = 1e-3
#: The planted change a proposal must catch for `--write`: every learning rate 1 % higher.
REQUIRED_PLANT = "lr:0.01"
#: Most state entries listed in the report (the rest are counted).
MAX_TENSOR_ROWS = 15



# -- what was run ----------------------------------------------------------------------------


@dataclass(frozen=True)
class Setting:
    """One way of running the test: extra pytest options and environment variables."""

    key: str  # "baseline", "threads=1", "nondeterministic", "hashseed=1", "dispatch=sse4.2", "planted lr:0.01"
    description: str
    args: tuple[str, ...] = ()
    env: tuple[tuple[str, str], ...] = ()
    plant: str = ""  # a planted change (core.planting spec): a power check, not a noise run
    required: bool = False  # a power check the proposal must pass for --write


@dataclass
class RunSpec:
    label: str  # unique, e.g. "baseline 2", "threads=4", "threads=4 #2"
    setting: Setting

    @property
    def folder_name(self) -> str:
        return paths.safe_component(self.label.replace(" #", "_").replace(" ", "-"))



@dataclass
class RecordedRun:
    spec: RunSpec
    run: Run
    folder: Path
    seconds: float = 0.0



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
        """The entry's own magnitude: the root mean square of its finite reference values.

        Relative spreads are taken against max(|value|, SCALE_FLOOR x scale), so that an element
        near zero (a momentum buffer entry of 1e-9 beside others of 1e-3) cannot make rtol huge:
        its spread counts against the size of its entry, and atol takes what rtol leaves."""
        finite = self.reference[np.isfinite(self.reference)]
        return float(np.sqrt(np.mean(np.square(finite)))) if finite.size else 0.0

    @property
    def max_abs(self) -> float:
        return float(self.spread.max()) if self.spread.size else 0.0

    def rel(self) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            rel = self.spread / np.abs(self.reference)
        return np.where(self.spread == 0, 0.0, rel)

    def scaled_rel(self) -> np.ndarray:
        """spread / max(|reference|, SCALE_FLOOR x scale): the relative spread, floored by the entry's RMS."""
        floor = np.maximum(np.abs(self.reference), SCALE_FLOOR * self.scale)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            rel = self.spread / floor
        return np.where((self.spread > 0) & (floor > 0) & np.isfinite(rel), rel, 0.0)

    def raw_rtol(self) -> tuple[float, int | None]:
        """Largest scaled relative spread up to NOISE_REL, and where (index); spreads above it are
        left to atol (values that are themselves rounding residue, e.g. a bias's gradient before a
        normalisation layer, which is zero in exact arithmetic)."""
        rel = self.scaled_rel()
        rel = np.where(rel <= NOISE_REL, rel, 0.0)
        if not rel.size or not (rel > 0).any():
            return 0.0, None
        i = int(np.argmax(rel))
        return float(rel[i]), i

    def raw_atol(self, rtol: float) -> tuple[float, int | None]:
        """Largest part of a spread that `rtol` x |reference| leaves uncovered, and where (index)."""
        if not self.spread.size:
            return 0.0, None
        with np.errstate(invalid="ignore", over="ignore"):
            rest = self.spread - rtol * np.abs(self.reference)
        rest = np.where(np.isfinite(rest) & (self.spread > 0), rest, 0.0)
        i = int(np.argmax(rest))
        return (float(rest[i]), i) if rest[i] > 0 else (0.0, None)

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
    power: list[PowerCheck] = field(default_factory=list)  # runs with a planted change, judged under the proposal
    from_folders: bool = False  # the noise runs were read from folders (calibrate --from), not run here

    def missed(self) -> list[PowerCheck]:
        """Required power checks the tolerance lets through (their plant had an effect)."""
        return [p for p in self.power if p.required and p.missed]

    def forcing(self) -> list[str]:
        """Where the proposed tolerances were forced up: the entries their observed spreads came from."""
        out = []
        for name, p in [("overall", self.proposal), *sorted(self.metric_proposals.items())]:
            if p is None:
                continue
            if not p.kept_rtol:
                out.append(f"rtol={_num(p.rtol)} ({name}) from {p.rtol_where} (relative spread {_e(p.raw_rtol)})")
            if not p.kept_atol:
                out.append(f"atol={_num(p.atol)} ({name}) from {p.atol_where} (spread {_e(p.raw_atol)})")
        return out

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
        assert self.proposal is not None
        return {
            "rtol": self.proposal.rtol,
            "atol": self.proposal.atol,
            "metrics": {k: {"rtol": p.rtol, "atol": p.atol} for k, p in sorted(self.metric_proposals.items())},
            "safety": self.safety,
            "observed": {"rtol": self.proposal.raw_rtol, "atol": self.proposal.raw_atol},
            "runs": [{"label": r.spec.label, "setting": r.spec.setting.description} for r in self.runs
                     if not r.spec.setting.plant],
            "power": [{"plant": p.plant, "effect": p.effect, "caught": p.caught, "where": p.where}
                      for p in self.power],
            "deterministic_when_fixed": self.fixed_difference is None,
            "calibrated_at": utc_stamp(),
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

    rtol = safety x the largest relative spread, each spread taken against max(|value|, a tenth
    of the RMS of its metric or entry), spreads above NOISE_REL of that left out; atol = safety
    x the largest part of a spread that this rtol (before the safety factor) leaves uncovered. Each is rounded up to one significant digit; a part with no spread keeps its
    current value. Then every observed difference d at reference value g satisfies
    d <= atol + rtol * |g|, and a near-zero element cannot inflate rtol: its spread is measured
    against the size of its entry.
    """
    raw_rtol, rtol_where = 0.0, ""
    for s in spreads:
        r, i = s.raw_rtol()
        if r > raw_rtol:
            raw_rtol, rtol_where = r, s.where(i)
    raw_atol, atol_where = 0.0, ""
    for s in spreads:
        a, j = s.raw_atol(raw_rtol)
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
            notes: Sequence[str] = (), power_reference: RecordedRun | None = None) -> Calibration:
    """Spreads, first differences and the proposed tolerance from recorded runs (runs[0]: reference).

    Runs with a planted change (`Setting.plant`) are power checks, not noise: they take no
    part in the spread, and are judged under the proposal against `power_reference` (by
    default runs[0]), which must have run on the same machine as they did.
    """
    noise = [r for r in runs if not r.spec.setting.plant]
    if len(noise) < 2 or noise[0] is not runs[0]:
        raise TrainguardError("calibration needs at least two runs without a planted change, the first of them first")
    ref = runs[0].run
    others = noise[1:]
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
        # The overall tolerance (state entries, and metrics without their own) from the state's
        # spread alone; each metric that moved gets its own, so a noisy loss never loosens the
        # weights' tolerance, nor the weights' noise a metric that stayed put.
        proposal = propose(tensors, safety, current)
        for s in metrics:
            if s.max_abs > 0:
                own = propose([s], safety, Tolerance(proposal.rtol, proposal.atol))
                if (own.rtol, own.atol) != (proposal.rtol, proposal.atol):
                    metric_proposals[s.name] = own
    seed = ref.meta.get("seed")
    cal = Calibration(
        nodeid=str(ref.meta.get("nodeid") or nodeid), seed=seed if isinstance(seed, int) else None, safety=safety,
        runs=list(runs), notes=list(notes), metrics=metrics, tensors=tensors, identical_tensors=identical,
        problems=problems, bitwise=bitwise, fixed_difference=fixed_difference, per_run=per_run, current=current,
        current_exact=bool(tol.get("exact", False)), proposal=proposal, metric_proposals=metric_proposals,
    )
    add_power(cal, power_reference if power_reference is not None else runs[0],
              [r for r in runs if r.spec.setting.plant])
    return cal


def add_power(cal: Calibration, reference: RecordedRun, planted: Sequence[RecordedRun]) -> None:
    """Judge runs with a planted change under the calibration's tolerance, against `reference` (a run
    of the same machine); the runs themselves belong in `cal.runs`."""
    cal.power.extend(power_check(cal, reference, r) for r in planted)


@dataclass
class PowerCheck:
    """Whether the tolerance in question fails a run with a planted change, and where it first does."""

    label: str
    plant: str
    description: str
    required: bool
    effect: bool  # the plant changed any bit at all (False: the test steps no torch.optim optimizer)
    caught: bool
    where: str = ""  # "metric 'loss' at step 3", "state entry 'fc.weight'"
    step: int | None = None
    largest: str = ""  # the largest difference the tolerance let through, when not caught

    @property
    def missed(self) -> bool:
        return self.effect and not self.caught


def judged_policy(cal: Calibration) -> Policy:
    """The tolerance power checks are judged under: the proposal, else the one in force now."""
    policy = cal.policy()
    if policy is not None:
        return policy
    return Policy(default=cal.current, exact=cal.current_exact)


def power_check(cal: Calibration, reference: RecordedRun, planted: RecordedRun) -> PowerCheck:
    setting = planted.spec.setting
    out = PowerCheck(planted.spec.label, setting.plant, setting.description, setting.required,
                     effect=_first_difference(planted.spec.label, reference.run, planted.run) is not None, caught=False)
    if not out.effect:
        return out
    cmp = compare(reference.run, planted.run, judged_policy(cal))
    changed = [m for m in cmp.metrics if m.verdict == CHANGED]
    if changed:
        first = min(changed, key=lambda m: (m.first_step is None, m.first_step or 0, m.name))
        out.caught, out.step = True, first.first_step
        out.where = f"metric {first.name!r}" + (f" at step {first.first_step}" if first.first_step is not None else "")
        return out
    tensor = next((t for t in cmp.tensors if t.verdict == CHANGED), None)
    if tensor is not None:
        out.caught, out.where = True, f"state entry {tensor.name!r} (final state)"
        return out
    moved = [(m.max_abs / max(abs(m.golden), 1e-300) if math.isfinite(m.golden) else 0.0, f"metric {m.name!r}")
             for m in cmp.metrics if m.verdict == CLOSE]
    moved += [(t.max_rel if math.isfinite(t.max_rel) else 0.0, f"state entry {t.name!r}")
              for t in cmp.tensors if t.verdict == CLOSE]
    if moved:
        rel, name = max(moved)
        out.largest = f"{name}, relative {rel:.1e}"
    return out


def check_golden(cal: Calibration, golden_run: Run) -> list[str]:
    """Problems if the golden would not pass, under the proposed tolerance, against every calibration run."""
    policy = cal.policy()
    if policy is None:
        return []
    out = []
    for r in cal.runs:
        if r.spec.setting.plant:
            continue  # power checks are meant to fail
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



# -- the report ----------------------------------------------------------------------------


def _e(x: float) -> str:
    return f"{x:.1e}" if x else "0"


def _value(x: float | None) -> str:
    return "-" if x is None else f"{x:.9g}"


def format_report(cal: Calibration) -> str:
    out: list[str] = []
    ref_label = cal.reference.spec.label
    seed = f" (seed {cal.seed})" if cal.seed is not None else ""
    out.append(f"trainguard calibrate: {cal.nodeid}{seed}")
    if cal.from_folders:
        out.append(f"{len(cal.runs)} runs in {cal.seconds:.1f} s: one from each folder given (recorded elsewhere, e.g. "
                   f"by CI on other runners), power checks here; all compared with {ref_label}")
    else:
        out.append(f"{len(cal.runs)} runs in {cal.seconds:.1f} s ({cal.jobs} at a time), each a fresh pytest process "
                   f"blessing into a scratch folder; all compared with {ref_label}")
    rows = []
    for r in cal.runs:
        if r is cal.reference:
            verdict = "(reference)"
        elif r.spec.setting.plant:
            verdict = "power check (below)"
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

    noise_runs = sum(1 for r in cal.runs if not r.spec.setting.plant)
    if cal.bitwise and cal.from_folders:
        out.append(f"BITWISE IDENTICAL across all {noise_runs} folders: every metric value and every state checksum "
                   f"matches {ref_label}; these machines need no tolerance.")
    elif cal.bitwise:
        out.append(f"BITWISE DETERMINISTIC under all variations: every metric value and every state checksum of all "
                   f"{noise_runs} runs is identical to {ref_label} (threads, kernel dispatch, deterministic mode and "
                   f"hash seed change nothing).")
    if cal.bitwise:
        out.append("proposal: keep the current tolerance "
                   + ("(exact)" if cal.current_exact else f"({cal.current.describe()})")
                   + ", or demand bitwise identity on this machine:")
        out.append(f"  {cal.marker_line()}")
        out.append(f"  {cal.marker_line(exact=True)}")
        out.extend(_power_lines(cal))
        return "\n".join(out)

    fd = cal.fixed_difference
    if fd is not None:
        vals = f" ({_value(fd.reference)} vs {_value(fd.value)})" if fd.reference is not None else ""
        out.append(f"NOT DETERMINISTIC even with everything fixed: {ref_label} and {fd.label} ran with identical "
                   f"settings and differ; first difference: {fd.where}{vals}.")
        out.append("  something in the test reads a source that changes between runs (the clock, os.urandom, an "
                   "unseeded generator, data loader workers, a file or network resource); the tolerance below "
                   "covers the noise seen, but removing the source is better.")
    elif cal.from_folders:
        out.append("the folders differ (first differences per folder are listed above); the spread below is what "
                   "a tolerance must cover across those machines.")
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
               f"rtol = {cal.safety:g} x the largest relative spread, each taken against the larger of the value "
               f"and {SCALE_FLOOR:g} x the RMS of its metric or entry (spreads above {NOISE_REL:g} of that are "
               f"left to atol); atol = {cal.safety:g} x what that leaves uncovered; rounded up to one significant "
               f"digit. The overall pair comes from the state entries; each metric that moved gets its own:")
    out.append(f"  rtol={_num(p.rtol)}  " + ("(current value kept: no state entry moved)" if p.kept_rtol
                                            else f"(observed {_e(p.raw_rtol)} in {p.rtol_where})"))
    out.append(f"  atol={_num(p.atol)}  " + ("(current value kept: nothing left for atol)" if p.kept_atol
                                            else f"(observed {_e(p.raw_atol)} in {p.atol_where})"))
    if cal.metric_proposals:
        out.append("  per metric: " + ", ".join(f"{k}: rtol={_num(v.rtol)}, atol={_num(v.atol)}"
                                                for k, v in sorted(cal.metric_proposals.items())))
    if p.rtol < cal.current.rtol and not p.kept_rtol:
        out.append(f"  note: tighter than the current rtol={_num(cal.current.rtol)}; runs on other machines (CI) may "
                   f"need their own calibration or goldens")
    out.append("ready marker line:")
    out.append(f"  {cal.marker_line()}")
    out.extend(_power_lines(cal))
    return "\n".join(out)


def _power_lines(cal: Calibration) -> list[str]:
    """The power checks: does the tolerance still fail small real changes, and how early."""
    if not cal.power:
        return []
    judged = "the proposed tolerance" if cal.proposal is not None else "the current tolerance"
    out = ["", f"power: runs with a small real change planted, each judged under {judged} against the "
               "baseline run of the same machine:"]
    rows = []
    for p in cal.power:
        if not p.effect:
            verdict = "no effect (the test steps no torch.optim optimizer, or ignores this change)"
        elif p.caught:
            verdict = f"CAUGHT, first in {p.where}"
        else:
            verdict = "MISSED: passes as within tolerance" + (f" (largest: {p.largest})" if p.largest else "")
        rows.append([p.label, p.description + (" (required)" if p.required else ""), verdict])
    out.append(table(["run", "planted change", "verdict"], rows))
    if cal.missed():
        out.append("the tolerance lets a 1 % learning-rate change through: it guards nothing a reviewer cares about. "
                   "It was forced up by:")
        out.extend(f"  {line}" for line in cal.forcing() or ["(the tolerance in force, not a proposal)"])
        out.append("  remedies: a longer run (more steps let a real change grow past the noise); portable mode "
                   "(--trainguard-portable) with exact=True, so that no noise needs a tolerance; or per-metric "
                   "tolerances in the marker (metrics={...}) that keep the noisy metric from loosening the rest.")
    return out


