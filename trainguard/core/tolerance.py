"""Tolerance rules: which differences count as a change.

The rule is NumPy's `isclose`: |new - golden| <= atol + rtol * |golden| (asymmetric: the
golden is the reference). Two extensions matter for training: identical non-finite
values (NaN with NaN, +Inf with +Inf) match, and a non-finite value against a finite one
never does, whatever the tolerance, so a run that diverges to NaN is always a change.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np

from .checksum import sketch_distance
from .errors import UsageError
from .meta import MAX_ATOL, MAX_RTOL
from .records import Summarized
from .verdicts import CHANGED, CLOSE, IDENTICAL

#: Defaults: the documented defaults of `numpy.isclose` (NumPy reference, numpy.isclose:
#: rtol=1e-05, atol=1e-08). Chosen so that the rule and its defaults have one public source.
DEFAULT_RTOL = 1e-5
DEFAULT_ATOL = 1e-8


#: IEEE 754 machine epsilon 2^-(p-1) of each floating dtype, p its significand precision in bits
#: (IEEE 754-2008, Table 3.5: binary16 p=11, binary32 p=24, binary64 p=53; bfloat16 keeps
#: binary32's exponent with p=8; the float8 formats of "FP8 Formats for Deep Learning",
#: Micikevicius et al. 2022: E4M3 p=4, E5M2 p=3).
EPSILON: dict[str, float] = {
    "float64": 2.0**-52, "float32": 2.0**-23, "float16": 2.0**-10, "bfloat16": 2.0**-7,
    "float8_e4m3fn": 2.0**-3, "float8_e4m3fnuz": 2.0**-3, "float8_e5m2": 2.0**-2, "float8_e5m2fnuz": 2.0**-2,
}
#: Where the default pair (1e-5, 1e-8) is in force, state and trace entries of these dtypes take
#: these instead. 1e-5 is about 84 float32 epsilons; for a format whose epsilon is above 1e-5,
#: one rounding step already exceeds it, so a value stored in half precision that lands one ulp
#: the other side of a rounding boundary (after float32 accumulation, the usual case) would fail.
#: Their rtol is 2 epsilons (one ulp either way); float16's atol is 2 ulps of its smallest
#: subnormal (2^-24), below which it cannot resolve anything. For comparison, torch.testing's
#: documented defaults: float16 rtol 1e-3, bfloat16 rtol 1.6e-2 (about 2 epsilons), both atol 1e-5.
LOW_PRECISION_DEFAULTS: dict[str, tuple[float, float]] = {
    "float16": (2 * EPSILON["float16"], 2.0**-23),
    "bfloat16": (2 * EPSILON["bfloat16"], 1e-8),
    "float8_e4m3fn": (2 * EPSILON["float8_e4m3fn"], 2.0**-8),
    "float8_e4m3fnuz": (2 * EPSILON["float8_e4m3fnuz"], 2.0**-8),
    "float8_e5m2": (min(2 * EPSILON["float8_e5m2"], MAX_RTOL), 2.0**-15),
    "float8_e5m2fnuz": (min(2 * EPSILON["float8_e5m2fnuz"], MAX_RTOL), 2.0**-15),
}
#: Integer and boolean entries (step counts, indices, masks) are compared exactly: no rounding
#: produces a difference in them, so any difference is a change.
EXACT_KINDS = ("int", "uint", "bool")


def is_exact_dtype(dtype: str) -> bool:
    """Integers and booleans: compared bit for bit whatever the tolerance."""
    return dtype.startswith(EXACT_KINDS)


@dataclass(frozen=True)
class Tolerance:
    """One pair of tolerances for the rule |new - golden| <= atol + rtol * |golden|."""

    rtol: float = DEFAULT_RTOL
    atol: float = DEFAULT_ATOL

    def describe(self) -> str:
        """As reports print it: `rtol=1e-05, atol=1e-08`."""
        return f"rtol={self.rtol:g}, atol={self.atol:g}"

    def for_dtype(self, dtype: str) -> Tolerance:
        """The pair an entry of `dtype` is judged by: a low-precision dtype's own default replaces
        each part that is the float32 default (README, "Tolerances per dtype").

        >>> Tolerance().for_dtype("float16")
        Tolerance(rtol=0.001953125, atol=1.1920928955078125e-07)
        >>> Tolerance(1e-3, 1e-8).for_dtype("bfloat16")
        Tolerance(rtol=0.001, atol=1e-08)
        """
        low = LOW_PRECISION_DEFAULTS.get(dtype)
        if low is None:
            return self
        return Tolerance(low[0] if self.rtol == DEFAULT_RTOL else self.rtol,
                         low[1] if self.atol == DEFAULT_ATOL else self.atol)


#: Where a tolerance in force came from, as reports name it.
SOURCES = ("marker", "calibrated", "ini", "default", "command line", "golden")


@dataclass(frozen=True)
class Policy:
    """The tolerances in force for one guarded test, and where they came from.

    `source` names the origin of the overall tolerance: "marker", "calibrated" (the golden's
    metadata, from `trainguard calibrate --write`), "ini", "default" (numpy.isclose's), "command
    line" (`trainguard diff --rtol`) or "golden" (recorded at bless time); a mix reads "marker rtol,
    ini atol". Reports print it beside the numbers, so a loosened tolerance is never invisible.
    """

    default: Tolerance = Tolerance()
    exact: bool = False
    metrics: Mapping[str, Tolerance] = None  # type: ignore[assignment]
    source: str = "default"
    metric_sources: Mapping[str, str] = None  # type: ignore[assignment]

    def for_metric(self, name: str) -> Tolerance:
        if self.metrics and name in self.metrics:
            return self.metrics[name]
        return self.default

    def describe(self) -> str:
        """`rtol=1e-05, atol=1e-08 (from default)`, plus per-metric tolerances and theirs."""
        if self.exact:
            return f"exact (bitwise; from {self.source})"
        text = f"{self.default.describe()} (from {self.source})"
        for name, tol in sorted((self.metrics or {}).items()):
            where = (self.metric_sources or {}).get(name, self.source)
            text += f"; {name}: {tol.describe()} (from {where})"
        return text

    def to_json(self) -> dict[str, Any]:
        """The form goldens record as metadata `tolerances` (and `calibrated` takes, without `exact`)."""
        return {
            "rtol": self.default.rtol,
            "atol": self.default.atol,
            "exact": self.exact,
            "metrics": {k: {"rtol": v.rtol, "atol": v.atol} for k, v in (self.metrics or {}).items()},
        }

    @classmethod
    def from_json(cls, data: Mapping[str, Any] | None, fallback: Tolerance = Tolerance()) -> Policy:
        """Read back `to_json`'s form; missing parts take `fallback` (entries that are not numbers are skipped).

        >>> Policy.from_json({"rtol": 1e-4, "metrics": {"loss": {"atol": 1e-6}}}).for_metric("loss")
        Tolerance(rtol=0.0001, atol=1e-06)
        """
        data = data or {}
        default = Tolerance(_number(data.get("rtol"), fallback.rtol), _number(data.get("atol"), fallback.atol))
        metrics = {}
        raw = data.get("metrics")
        for name, spec in (raw.items() if isinstance(raw, Mapping) else ()):
            if isinstance(spec, Mapping):
                metrics[str(name)] = Tolerance(_number(spec.get("rtol"), default.rtol),
                                               _number(spec.get("atol"), default.atol))
        return cls(default=default, exact=data.get("exact") is True, metrics=metrics, source="golden")

    def with_default(self, default: Tolerance, keep_metrics: bool = True, source: str | None = None) -> Policy:
        """The same policy with another overall tolerance (per-metric ones dropped unless kept)."""
        return Policy(default=default, exact=self.exact, metrics=self.metrics if keep_metrics else {},
                      source=source or self.source, metric_sources=self.metric_sources if keep_metrics else {})


def _number(value: Any, fallback: float) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return fallback
    return float(value)


def check_tolerance_value(name: str, value: Any, where: str) -> float:
    """A tolerance must be a finite, non-negative real number, no looser than its cap (meta.MAX_RTOL, MAX_ATOL)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise UsageError(f"{where}: {name} must be a number, got {value!r}")
    value = float(value)
    if not math.isfinite(value) or value < 0:
        raise UsageError(f"{where}: {name} must be finite and >= 0, got {value!r}")
    cap = MAX_ATOL if name.endswith("atol") else MAX_RTOL
    if value > cap:
        raise UsageError(f"{where}: {name}={value:g} is looser than trainguard allows ({cap:g}); a tolerance that "
                         "loose guards nothing. To stop guarding this test, remove its trainguard marker")
    return value


def bitwise_equal(golden: np.ndarray, new: np.ndarray) -> np.ndarray:
    """Elementwise identity of float64 bit patterns (so -0.0 != 0.0 and NaN payloads count)."""
    g = np.ascontiguousarray(golden, dtype=np.float64).view(np.uint64)
    n = np.ascontiguousarray(new, dtype=np.float64).view(np.uint64)
    return g == n


def within(golden: np.ndarray, new: np.ndarray, tol: Tolerance) -> np.ndarray:
    """Elementwise verdict of the tolerance rule, with trainguard's non-finite handling."""
    golden = np.asarray(golden, dtype=np.float64)
    new = np.asarray(new, dtype=np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        ok = np.abs(new - golden) <= tol.atol + tol.rtol * np.abs(golden)
    # Non-finite handling: only identical non-finite values match.
    finite_g = np.isfinite(golden)
    finite_n = np.isfinite(new)
    both_nan = np.isnan(golden) & np.isnan(new)
    same_inf = ~finite_g & ~finite_n & (golden == new)
    return np.where(finite_g & finite_n, ok, both_nan | same_inf)


def norm_allowed(numel: int, golden_l2: float, tol: Tolerance) -> float:
    """Largest allowed L2 distance for a whole tensor: the norm-wise analogue of the elementwise rule.

    If every element satisfies |d_i| <= atol + rtol |g_i|, then by the triangle inequality
    ||d||_2 <= atol * sqrt(n) + rtol * ||g||_2. Used where only sketches are stored.
    """
    return tol.atol * math.sqrt(max(numel, 0)) + tol.rtol * (golden_l2 if math.isfinite(golden_l2) else 0.0)


#: Share of the largest bucket differences left out when the bucket noise is measured, so that
#: a few moved elements (up to 2 % of the buckets: 20 of 1024) do not count as noise.
SKETCH_TRIM = 0.02
#: Bucket noise allowed before a bucket counts as holding a moved element: this many standard
#: deviations of the other buckets. Chosen here, no source: with 1024 Gaussian buckets the chance
#: that any exceeds 6 sigma is about 1024 x 2e-9 = 2e-6.
SKETCH_Z = 6.0
#: Sketches with fewer buckets (a trace entry's 16) give no elementwise estimate: too few
#: buckets to keep moved elements apart or to measure the noise.
MIN_ESTIMATE_BUCKETS = 256


@dataclass(frozen=True)
class SketchEstimate:
    """The largest elementwise difference as a count-sketch estimates it, with its error bound.

    Bucket j of the difference of two sketches is D_j = sum of s_i d_i over the positions i
    hashed to j (count-sketch; Charikar, Chen & Farach-Colton 2002). A position that moved far
    more than its bucket-mates sits alone in its bucket with high probability, so |D_j| = |d_i|
    up to the signed sum of the others, whose size `bound` estimates (SKETCH_Z times the RMS of
    the buckets left after the largest SKETCH_TRIM share is set aside). `largest` is max_j |D_j|:
    the estimate of max_i |d_i| when the moved elements are few, within +- `bound`.
    """

    largest: float
    bound: float
    scale: float  # the largest |golden| value (from the statistics)
    allowed: float  # atol + rtol * scale: the loosest element's allowance

    @property
    def over(self) -> bool:
        """Some element moved by more than any element is allowed, beyond the noise: the rule is broken."""
        return self.largest - self.bound > self.allowed


def sketch_estimate(golden_sketch: np.ndarray, new_sketch: np.ndarray, golden_min: float, golden_max: float,
                    tol: Tolerance) -> SketchEstimate:
    """Estimate max |new - golden| over the elements from two count-sketches (see `SketchEstimate`).

    The allowance is that of the element with the largest magnitude, since the sketch cannot say
    which element moved: a sparse change is called a change only when it exceeds every element's
    allowance (no false alarm from a within-tolerance move of a large value); a move between an
    element's own allowance and the largest one's is let through (README states this bound).
    """
    d = np.abs(np.asarray(new_sketch, dtype=np.float64) - np.asarray(golden_sketch, dtype=np.float64))
    finite = np.sort(d[np.isfinite(d)])
    if not finite.size:
        return SketchEstimate(math.nan, math.nan, math.nan, math.nan)
    largest = float(finite[-1])
    rest = finite[: finite.size - max(1, int(SKETCH_TRIM * finite.size))]
    bound = SKETCH_Z * float(np.sqrt(np.mean(rest * rest))) if rest.size else 0.0
    scale = max(abs(golden_min), abs(golden_max)) if math.isfinite(golden_min) and math.isfinite(golden_max) else 0.0
    return SketchEstimate(largest, bound, scale, tol.atol + tol.rtol * scale)


@dataclass
class Judgement:
    """The verdict on one described tensor (state or trace entry) and what it was based on."""

    verdict: str
    reasons: list[str] = field(default_factory=list)  # "dtype float32 -> float64", "shape ...", "checksum"
    basis: str = ""  # "values", "statistics" or "statistics+sketch"; empty when bits or structure decided
    golden: np.ndarray | None = None  # the numbers compared elementwise (values, or the five statistics)
    new: np.ndarray | None = None
    ok: np.ndarray | None = None  # elementwise verdict over them
    sketch_distance: float | None = None  # estimated L2 distance, when only sketches were stored
    sketch_allowed: float | None = None
    estimate: SketchEstimate | None = None  # estimated largest elementwise difference, from the sketches
    judged_by: str = ""  # when not the given pair: "float16's default rtol=..., atol=..." or "exact (int64 ...)"

    @property
    def elements_off(self) -> int:
        """Compared numbers outside tolerance (a sketch distance over its allowance, and an estimated
        elementwise difference over every element's allowance, count as one each)."""
        off = 0 if self.ok is None else int(self.ok.size - np.count_nonzero(self.ok))
        if self.sketch_distance is not None and not self.sketch_distance <= (self.sketch_allowed or 0.0):
            off += 1
        if self.estimate is not None and self.estimate.over:
            off += 1
        return off


def judge(golden: Summarized, new: Summarized, tol: Tolerance, exact: bool = False) -> Judgement:
    """Climb the one ladder every state and trace entry is judged by.

    The tolerance is the entry's dtype's (`Tolerance.for_dtype`); integers and booleans are
    compared exactly. 1. dtype or shape differ: changed. 2. same SHA-256: identical. 3. the stored values when
    both sides kept them, else the statistics (min, max, mean, L2 norm, non-finite count),
    each under the elementwise rule (bits only with `exact`); where both kept a count-sketch,
    also the estimated L2 distance against `norm_allowed` (dense drift) and the estimated largest
    elementwise difference against every element's allowance (a few moved elements, see
    `sketch_estimate`). Any number outside: changed.
    """
    reasons = []
    judged_by = ""
    if not exact and is_exact_dtype(golden.dtype):
        judged_by, exact = f"exact ({golden.dtype}: integers have no rounding)", True
    elif not exact and (own := tol.for_dtype(golden.dtype)) != tol:
        judged_by, tol = f"{golden.dtype}'s default {own.describe()}", own
    if golden.dtype != new.dtype:
        reasons.append(f"dtype {golden.dtype} -> {new.dtype}")
    if golden.shape != new.shape:
        reasons.append(f"shape {list(golden.shape)} -> {list(new.shape)}")
    if reasons:
        return Judgement(CHANGED, reasons, judged_by=judged_by)
    if golden.sha256 == new.sha256:
        return Judgement(IDENTICAL, judged_by=judged_by)
    out = Judgement(CLOSE, ["checksum"], judged_by=judged_by)
    g_values, n_values = getattr(golden, "values", None), getattr(new, "values", None)
    if g_values is not None and n_values is not None and g_values.shape == n_values.shape:
        out.golden, out.new, out.basis = g_values, n_values, "values"
    else:
        out.golden, out.new, out.basis = golden.stats.as_array(), new.stats.as_array(), "statistics"
    same = bitwise_equal(out.golden, out.new)
    out.ok = same if exact else (same | within(out.golden, out.new, tol))
    if out.basis == "statistics" and golden.sketch is not None and new.sketch is not None \
            and golden.sketch.shape == new.sketch.shape:
        out.basis = "statistics+sketch"
        out.sketch_distance = sketch_distance(golden.sketch, new.sketch)
        out.sketch_allowed = norm_allowed(golden.numel, golden.l2, tol)
        if golden.sketch.size >= MIN_ESTIMATE_BUCKETS:
            out.estimate = sketch_estimate(golden.sketch, new.sketch, golden.min, golden.max, tol)
    if exact or out.elements_off:
        out.verdict = CHANGED
    return out
