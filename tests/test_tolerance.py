"""core.tolerance: the elementwise rule, Policy's JSON form, and the one ladder entries are judged by."""

from __future__ import annotations

import dataclasses
import hashlib

import numpy as np
import pytest

from trainguard.core.records import TensorRecord, TraceEntry
from trainguard.core.tolerance import Policy, Tolerance, judge, norm_allowed, within
from trainguard.core.verdicts import CHANGED, CLOSE, IDENTICAL


def _record(values: np.ndarray, dtype: str = "float32", keep: bool = True) -> TensorRecord:
    v = np.asarray(values, dtype=np.float64)
    return TensorRecord("oven.weight", "parameter", dtype, (v.size,), hashlib.sha256(v.tobytes()).hexdigest(),
                        float(v.min()), float(v.max()), float(v.mean()), float(np.linalg.norm(v)), 0,
                        values=v if keep else None)


def test_within_is_numpy_isclose_for_finite_values():
    # Reference: numpy.isclose, |a - b| <= atol + rtol * |b| with b the reference (NumPy docs).
    rng = np.random.default_rng(3)
    g = rng.normal(size=2000)
    n = g + rng.normal(scale=1e-5, size=2000)
    tol = Tolerance(1e-5, 1e-8)
    assert np.array_equal(within(g, n, tol), np.isclose(n, g, rtol=1e-5, atol=1e-8))


def test_policy_json_round_trip_and_fallbacks():
    policy = Policy(default=Tolerance(1e-4, 1e-7), exact=False, metrics={"loss": Tolerance(1e-3, 1e-6)})
    assert Policy.from_json(policy.to_json()) == dataclasses.replace(policy, source="golden")  # read back: "from golden"
    partial = Policy.from_json({"rtol": 2e-3, "metrics": {"loss": {"atol": 1e-6}, "bad": [1]}, "exact": "yes"})
    assert partial.default == Tolerance(2e-3, 1e-8)
    assert partial.for_metric("loss") == Tolerance(2e-3, 1e-6) and "bad" not in partial.metrics
    assert partial.exact is False  # only a JSON true means exact


def test_judge_climbs_structure_bits_values_in_that_order():
    g = _record(np.linspace(1, 2, 8))
    assert judge(g, g, Tolerance()).verdict == IDENTICAL
    retyped = _record(np.linspace(1, 2, 8), dtype="float64")
    j = judge(g, retyped, Tolerance())
    assert (j.verdict, j.reasons) == (CHANGED, ["dtype float32 -> float64"])
    close = judge(g, _record(np.linspace(1, 2, 8) * (1 + 1e-7)), Tolerance(1e-5, 1e-8))
    assert (close.verdict, close.basis, close.elements_off) == (CLOSE, "values", 0)
    far = judge(g, _record(np.linspace(1, 2, 8) * (1 + 1e-3)), Tolerance(1e-5, 1e-8))
    assert (far.verdict, far.elements_off) == (CHANGED, 8)
    assert judge(g, _record(np.linspace(1, 2, 8) * (1 + 1e-7)), Tolerance(), exact=True).verdict == CHANGED


def test_judge_uses_statistics_and_sketch_when_values_were_not_kept():
    base = np.linspace(-1, 1, 64)
    g, n = _record(base, keep=False), _record(base[::-1].copy(), keep=False)  # same statistics, reordered
    g.sketch, n.sketch = np.array([1.0, 0.0]), np.array([0.0, 1.0])  # sketches of a reordering differ
    j = judge(g, n, Tolerance(1e-5, 1e-8))
    assert j.basis == "statistics+sketch" and j.verdict == CHANGED
    assert j.sketch_allowed == pytest.approx(norm_allowed(64, g.l2, Tolerance(1e-5, 1e-8)))


def test_trace_entries_go_up_the_same_ladder():
    def entry(value: float, sha: str) -> TraceEntry:
        return TraceEntry(0, "data", 0, 0, "input.0", "float32", (2,), sha, value, value, value, abs(value), 0)

    assert judge(entry(1.0, "a"), entry(1.0, "a"), Tolerance()).verdict == IDENTICAL
    assert judge(entry(1.0, "a"), entry(1.0 + 1e-9, "b"), Tolerance()).verdict == CLOSE
    assert judge(entry(1.0, "a"), entry(1.1, "b"), Tolerance()).verdict == CHANGED
