"""Invented runs and file-editing helpers shared by the golden storage tests.

No torch: runs are built from `trainguard.core.records` directly, so the storage tests (and the
subprocesses of the crash tests) stay fast.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
from pathlib import Path
from typing import Any

import numpy as np

from trainguard.core import golden_format
from trainguard.core import store as golden
from trainguard.core.records import MetricSeries, Run, TensorRecord, TraceEntry


def make_run(tag: str, steps: int = 12, with_trace: bool = True) -> Run:
    """A small run whose every file depends on `tag` (so runs "A" and "B" differ everywhere)."""
    seed = int.from_bytes(hashlib.sha256(tag.encode()).digest()[:4], "little")
    rng = np.random.default_rng(seed)
    loss = np.abs(rng.normal(1.0, 0.3, steps)).cumsum()[::-1].copy()
    metrics = {
        "loss": MetricSeries(np.arange(steps) * 5, loss),
        "oven_temp": MetricSeries(np.arange(0, steps, 3), rng.normal(180, 2, len(range(0, steps, 3)))),
    }
    weights = rng.normal(0, 1, 24)
    weights[3] = -0.0
    weights[7] = math.nan
    tensors = {
        "dough.weight": TensorRecord("dough.weight", "parameter", "float32", (4, 6), hashlib.sha256(weights.tobytes()).hexdigest(),
                                     float(np.nanmin(weights)), float(np.nanmax(weights)), float(np.nanmean(weights)),
                                     float(np.sqrt(np.nansum(weights ** 2))), 1, values=weights),
        "dough.weight.exp_avg_sq": TensorRecord("dough.weight.exp_avg_sq", "optimizer", "float32", (500,),
                                                hashlib.sha256(tag.encode() + b"v").hexdigest(), 0.0, 1.0, 0.5, 11.2, 0,
                                                values=None, sketch=rng.normal(0, 1, 256)),
        "param_groups.0.lr": TensorRecord("param_groups.0.lr", "hyperparameter", "float64", (),
                                          hashlib.sha256(tag.encode() + b"lr").hexdigest(), 0.01, 0.01, 0.01, 0.01, 0,
                                          values=np.array([0.01 if tag == "A" else 0.02])),
    }
    trace = None
    if with_trace:
        trace = [TraceEntry(step, stage, seq, 0, "crumb", "float32", (2, 3), hashlib.sha256(f"{tag}{step}{stage}".encode()).hexdigest(),
                            float(step), float(step + 1), float(step + 0.5), float(seq), 0, rng.normal(0, 1, 16))
                 for step in range(3) for seq, stage in enumerate(("data", "forward", "backward", "update"))]
    meta = {"nodeid": f"tests/test_bakery.py::test_proofing[{tag}]", "seed": 7, "deterministic": True,
            "tolerances": {"rtol": 1e-5, "atol": 1e-8, "exact": False, "metrics": {}}, "max_values": 100,
            "fingerprint": {"python": "3.x", "packages": {"torch": "2.13.0"}}, "blessed_at": "2026-03-01T10:00:00Z",
            "reason": f"run {tag}"}
    return Run(metrics=metrics, tensors=tensors, meta=meta, trace=trace)


def same_run(a: Run, b: Run) -> bool:
    """True when two runs hold the same content, bit for bit (NaN and -0.0 included)."""
    if list(a.metrics) != list(b.metrics) and sorted(a.metrics) != sorted(b.metrics):
        return False
    for name in a.metrics:
        if name not in b.metrics:
            return False
        if a.metrics[name].steps.tobytes() != b.metrics[name].steps.tobytes():
            return False
        if a.metrics[name].values.tobytes() != b.metrics[name].values.tobytes():
            return False
    if sorted(a.tensors) != sorted(b.tensors):
        return False
    for name, t in a.tensors.items():
        u = b.tensors[name]
        if (t.kind, t.dtype, tuple(t.shape), t.sha256, t.nonfinite) != (u.kind, u.dtype, tuple(u.shape), u.sha256, u.nonfinite):
            return False
        for arr_a, arr_b in ((t.values, u.values), (t.sketch, u.sketch)):
            if (arr_a is None) != (arr_b is None):
                return False
            if arr_a is not None and np.asarray(arr_a, np.float64).tobytes() != np.asarray(arr_b, np.float64).tobytes():
                return False
    if (a.trace is None) != (b.trace is None):
        return False
    if a.trace is not None:
        if len(a.trace) != len(b.trace):
            return False
        for x, y in zip(a.trace, b.trace):
            if (x.step, x.stage, x.seq, x.name, x.sha256) != (y.step, y.stage, y.seq, y.name, y.sha256):
                return False
    return a.meta.get("reason") == b.meta.get("reason")


def which_run(run: Run, candidates: dict[str, Run]) -> str | None:
    """The name of the candidate `run` equals completely, or None (a mixed or damaged set)."""
    for name, candidate in candidates.items():
        if same_run(candidate, run):
            return name
    return None


def file_tag(path: Path) -> str:
    """The `reason` stored in one golden file's metadata, read with pyarrow directly."""
    import pyarrow.parquet as pq

    meta = pq.ParquetFile(path).schema_arrow.metadata
    return json.loads(meta[b"trainguard.meta"])["reason"]


def rewrite(path: Path, table: Any = None, metadata: dict[bytes, bytes] | None = None, reseal: bool = False) -> None:
    """Rewrite one golden file with pyarrow: new table and/or metadata entries.

    With `reseal`, the content digest is recomputed (as someone who knows the digest
    definition could), so the reader's later checks are reached.
    """
    import pyarrow.parquet as pq

    original = pq.read_table(path)
    merged = dict(original.schema.metadata or {})
    merged.update(metadata or {})
    table = original if table is None else table
    if reseal:
        merged = golden_format.reseal(path.name, table, merged)
    pq.write_table(table.replace_schema_metadata(merged), path)


def downgrade_to_format_1(folder: Path, only: str = "*.parquet") -> None:
    """Turn a format-2 golden folder (or its files matching `only`) into what trainguard 0.1
    (format 1) wrote: no digest, no run id."""
    import pyarrow.parquet as pq

    for path in sorted(folder.glob(only)):
        table = pq.read_table(path)
        meta = {k: v for k, v in table.schema.metadata.items()
                if k not in (golden_format.KEY_DIGEST, golden_format.KEY_RUN_ID, golden_format.KEY_WRITER)}
        meta[golden_format.KEY_VERSION] = b"1"
        pq.write_table(table.replace_schema_metadata(meta), path)


def snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


# -- writer processes for the crash and concurrency tests ------------------------------------------

#: The two runs the writer processes alternate between: A with a trace, B without one, so a
#: switch also removes or adds trace.parquet.
def crash_runs() -> dict[str, Run]:
    return {"A": make_run("A"), "B": make_run("B", with_trace=False)}


def write_forever(folders: list[str], order: str, started: Any, pause: float = 0.0) -> None:
    """Child process: write the runs named in `order` (e.g. "AB") to every folder, round after round."""
    import random
    import shutil
    import time

    runs = crash_runs()
    rng = random.Random(os.getpid())
    warmup = Path(folders[0]).parent / f"warmup-{os.getpid()}"
    golden.write_run(warmup, runs["A"])  # first-write imports, off the clock
    shutil.rmtree(warmup)
    started.set()
    while True:
        for name in order:
            for folder in folders:
                golden.write_run(folder, runs[name])
                if pause:
                    time.sleep(rng.uniform(0, pause))


def watched_fit(model: Any, opt: Any, loss_of: Any, steps: int = 3, light: bool = False) -> Any:
    """A plain watched loop of `steps` steps on a fixed batch (`loss_of()` runs the model), then the state;
    `light` keeps the check-time trace (one fingerprint per event)."""
    from trainguard.core.capture import Trajectory

    traj = Trajectory(light_trace=light)
    traj.watch(model, opt)
    for step in range(steps):
        opt.zero_grad()
        loss = loss_of()
        loss.backward()
        opt.step()
        traj.log(step, loss=loss)
    traj.close()
    traj.state(model, optimizer=opt)
    return traj
