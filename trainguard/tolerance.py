"""Tolerance rules: which differences count as a change.

The rule is NumPy's `isclose`: |new - golden| <= atol + rtol * |golden| (asymmetric: the
golden is the reference). Two extensions matter for training: identical non-finite
values (NaN with NaN, +Inf with +Inf) match, and a non-finite value against a finite one
never does, whatever the tolerance, so a run that diverges to NaN is always a change.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np

from .errors import UsageError

#: Defaults: the documented defaults of `numpy.isclose` (NumPy reference, numpy.isclose:
#: rtol=1e-05, atol=1e-08). Chosen so that the rule and its defaults have one public source.
DEFAULT_RTOL = 1e-5
DEFAULT_ATOL = 1e-8


@dataclass(frozen=True)
class Tolerance:
    rtol: float = DEFAULT_RTOL
    atol: float = DEFAULT_ATOL

    def describe(self) -> str:
        return f"rtol={self.rtol:g}, atol={self.atol:g}"


@dataclass(frozen=True)
class Policy:
    """The tolerances in force for one guarded test."""

    default: Tolerance = Tolerance()
    exact: bool = False
    metrics: Mapping[str, Tolerance] = None  # type: ignore[assignment]

    def for_metric(self, name: str) -> Tolerance:
        if self.metrics and name in self.metrics:
            return self.metrics[name]
        return self.default

    def to_json(self) -> dict[str, Any]:
        return {
            "rtol": self.default.rtol,
            "atol": self.default.atol,
            "exact": self.exact,
            "metrics": {k: {"rtol": v.rtol, "atol": v.atol} for k, v in (self.metrics or {}).items()},
        }


def check_tolerance_value(name: str, value: Any, where: str) -> float:
    """A tolerance must be a finite, non-negative real number."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise UsageError(f"{where}: {name} must be a number, got {value!r}")
    value = float(value)
    if not math.isfinite(value) or value < 0:
        raise UsageError(f"{where}: {name} must be finite and >= 0, got {value!r}")
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
