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


# -- per-dtype defaults (README, "Tolerances per dtype") ------------------------------------------


def test_machine_epsilons_match_numpy_and_torch():
    # References: numpy.finfo and torch.finfo, which implement IEEE 754 binary16/32/64 and bfloat16.
    import torch

    from trainguard.core.tolerance import EPSILON

    assert EPSILON["float16"] == float(np.finfo(np.float16).eps)
    assert EPSILON["float32"] == float(np.finfo(np.float32).eps)
    assert EPSILON["float64"] == float(np.finfo(np.float64).eps)
    assert EPSILON["bfloat16"] == torch.finfo(torch.bfloat16).eps
    assert EPSILON["float8_e4m3fn"] == torch.finfo(torch.float8_e4m3fn).eps
    assert EPSILON["float8_e5m2"] == torch.finfo(torch.float8_e5m2).eps


def _ulps_up(x: float, n: int, dtype) -> float:
    v = np.array(x, dtype=dtype)
    for _ in range(n):
        v = np.nextafter(v, np.array(np.inf, dtype=dtype))
    return float(v)


def test_float16_one_ulp_flip_is_noise_three_ulps_a_change():
    # numpy.nextafter in float16 gives the neighbours; a one-ulp flip at 1.0 (9.8e-4 relative) is
    # what a float32 accumulation rounded to half precision produces, and fails NumPy's 1e-5.
    one_ulp, three = _ulps_up(1.0, 1, np.float16), _ulps_up(1.0, 3, np.float16)
    assert not np.isclose(one_ulp, 1.0, rtol=1e-5, atol=1e-8)
    g = _record([1.0, 0.5], "float16")
    assert judge(g, _record([one_ulp, 0.5], "float16"), Tolerance()).verdict == CLOSE
    assert judge(g, _record([three, 0.5], "float16"), Tolerance()).verdict == CHANGED
    # the same numbers as float32 entries keep the float32 default, so the flip is a change
    assert judge(_record([1.0, 0.5]), _record([one_ulp, 0.5]), Tolerance()).verdict == CHANGED


def test_bfloat16_defaults_agree_with_torch_testing_on_one_ulp():
    import torch

    eps = torch.finfo(torch.bfloat16).eps
    a = torch.tensor([1.0, 2.0], dtype=torch.bfloat16)
    b = torch.tensor([1.0 + eps, 2.0], dtype=torch.bfloat16)  # one ulp above 1.0
    torch.testing.assert_close(b, a)  # torch.testing's bfloat16 default (rtol 1.6e-2) passes it too
    g, n = _record(a.double().numpy(), "bfloat16"), _record(b.double().numpy(), "bfloat16")
    assert judge(g, n, Tolerance()).verdict == CLOSE
    far = _record(np.array([1.0 + 3 * eps, 2.0]), "bfloat16")
    assert judge(g, far, Tolerance()).verdict == CHANGED


def test_a_tolerance_someone_set_applies_to_every_dtype_as_given():
    one_ulp, two = _ulps_up(1.0, 1, np.float16), _ulps_up(1.0, 2, np.float16)
    g = _record([1.0], "float16")
    tol = Tolerance(1e-3, 1e-8)  # rtol from a marker is kept; the atol part is the default, so float16's replaces it
    assert tol.for_dtype("float16") == Tolerance(1e-3, 2**-23)
    assert judge(g, _record([one_ulp], "float16"), tol).verdict == CLOSE
    assert judge(g, _record([two], "float16"), tol).verdict == CHANGED
    assert Tolerance(1e-5, 1e-6).for_dtype("float16") == Tolerance(2**-9, 1e-6)


@pytest.mark.parametrize("dtype, golden, new", [("int64", [100, 7], [101, 7]), ("bool", [1, 0], [1, 1]),
                                                ("uint8", [200], [201])])
def test_integers_and_booleans_are_compared_exactly_whatever_the_tolerance(dtype, golden, new):
    loose = Tolerance(0.5, 1.0)  # the loosest tolerance a marker may set
    j = judge(_record(golden, dtype), _record(new, dtype), loose)
    assert j.verdict == CHANGED and j.elements_off == 1
    assert judge(_record(golden, dtype), _record(golden, dtype), loose).verdict == IDENTICAL


def test_the_report_names_a_dtype_default_where_it_decided():
    from trainguard.core.comparison import compare
    from trainguard.core.records import Run
    from trainguard.core.report import describe_comparison

    g = Run(tensors={"oven.weight": _record([1.0, 0.5], "float16"), "oven.steps": _record([100], "int64")})
    n = Run(tensors={"oven.weight": _record([_ulps_up(1.0, 3, np.float16), 0.5], "float16"),
                     "oven.steps": _record([101], "int64")})
    text = describe_comparison(compare(g, n, Policy()))
    assert "judged by float16's default rtol=0.00195312, atol=1.19209e-07" in text
    assert "judged by exact (int64: integers have no rounding)" in text
