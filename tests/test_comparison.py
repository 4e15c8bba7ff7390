"""core.comparison: run-level outcomes, checked against numpy.isclose and hand-made differences."""

from __future__ import annotations

import numpy as np

from trainguard.core.comparison import compare
from trainguard.core.records import MetricSeries, Run
from trainguard.core.tolerance import Policy, Tolerance
from trainguard.core.verdicts import CHANGED, CLOSE, IDENTICAL, worst


def _run(values, steps=None) -> Run:
    values = np.asarray(values, dtype=np.float64)
    return Run(metrics={"loss": MetricSeries(np.arange(values.size) if steps is None else steps, values)})


def test_outcome_is_the_worst_verdict_and_first_step_off_matches_numpy():
    rng = np.random.default_rng(11)
    g = np.abs(rng.normal(size=300)) + 0.5
    n = g.copy()
    n[40:] *= 1 + 1e-6  # within rtol 1e-5
    n[120] *= 1 + 1e-3  # first step outside
    cmp = compare(_run(g), _run(n), Policy(default=Tolerance(1e-5, 1e-8)))
    m = cmp.metrics[0]
    expected_off = ~np.isclose(n, g, rtol=1e-5, atol=1e-8)  # reference: numpy.isclose
    assert cmp.outcome == CHANGED == worst([m.verdict])
    assert m.first_step == int(np.flatnonzero(expected_off)[0]) == 120
    assert m.steps_off == int(expected_off.sum())


def test_identical_close_and_missing_steps():
    g = [1.0, 0.8, 0.6]
    assert compare(_run(g), _run(g), Policy()).outcome == IDENTICAL
    assert compare(_run(g), _run([1.0, 0.8, 0.6 * (1 + 1e-7)]), Policy()).outcome == CLOSE
    shorter = compare(_run(g), _run([1.0, 0.8], steps=np.array([0, 1])), Policy())
    assert shorter.outcome == CHANGED and shorter.metrics[0].missing_steps == [2]


def test_nan_where_the_golden_was_finite_is_always_a_change():
    cmp = compare(_run([1.0, 0.5]), _run([1.0, float("nan")]), Policy(default=Tolerance(1.0, 1.0)))
    assert cmp.outcome == CHANGED and cmp.metrics[0].note == "diverged to NaN at step 1"
