"""trainguard's speed and scale benchmark: one command, ratios measured side by side.

    python benchmarks/run.py            # everything (a few minutes on 2 cores)
    python benchmarks/run.py --quick    # fewer repetitions, smaller parallel suite (a smoke test)
    python benchmarks/run.py --only checksum,size

Every figure is a ratio of two things measured in the same run on the same machine,
interleaved (A, B, A, B, ...) so that drift and other load hit both sides alike; medians
over repetitions. Absolute times are printed beside the ratios for context only.
Peak memory is measured in a fresh subprocess per measurement (VmHWM from
/proc/self/status after resetting it through /proc/self/clear_refs), because tracemalloc
does not see torch's allocations.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

RESULTS: list[dict] = []


def report(target: str, name: str, ratio: float, limit: float, detail: str, higher_is_better: bool = False) -> None:
    ok = ratio >= limit if higher_is_better else ratio <= limit
    sign = ">=" if higher_is_better else "<="
    RESULTS.append({"target": target, "name": name, "ratio": ratio, "limit": f"{sign} {limit:g}", "ok": ok,
                    "detail": detail})
    print(f"  [{'ok' if ok else 'MISSED'}] {name}: {ratio:.3f} (target {sign} {limit:g}); {detail}", flush=True)


def info(text: str) -> None:
    print(f"  {text}", flush=True)


# -- 1. guard overhead ------------------------------------------------------------------
#
# In-process, through the Python API, doing per test exactly what the plugin's fixture and
# call hook do (GlobalState.capture, guarded_setup, environment fingerprint, Trajectory,
# to_run, guard.check against a golden blessed beforehand, GlobalState.restore). Running
# pytest in-process would add pytest's own per-test cost to both sides and make the ratio
# measure pytest rather than trainguard; subprocesses would add torch's import time.

MLP = dict(inputs=128, hidden=256, outputs=10, batch=64, steps=200)


def _snippet(traj=None, watch: bool = False):
    import torch

    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(MLP["inputs"], MLP["hidden"]), torch.nn.ReLU(),
                                torch.nn.Linear(MLP["hidden"], MLP["hidden"]), torch.nn.ReLU(),
                                torch.nn.Linear(MLP["hidden"], MLP["outputs"]))
    opt = torch.optim.Adam(model.parameters(), lr=1e-3)
    # A made-up task: classify points by which of 10 random directions they are closest to.
    x = torch.randn(MLP["batch"] * 8, MLP["inputs"])
    y = (x @ torch.randn(MLP["inputs"], MLP["outputs"])).argmax(dim=1)
    if watch:
        traj.watch(model, opt)
    for step in range(MLP["steps"]):
        i = (step % 8) * MLP["batch"]
        opt.zero_grad()
        loss = torch.nn.functional.cross_entropy(model(x[i : i + MLP["batch"]]), y[i : i + MLP["batch"]])
        loss.backward()
        opt.step()
        if traj is not None:
            traj.log(step, loss=loss)
    if traj is not None:
        traj.state(model, optimizer=opt)
    return model


def _guarded(folder: Path, watch: bool, bless: bool = False) -> str:
    from trainguard.core import guard
    from trainguard.core.capture import Trajectory
    from trainguard.core.determinism import GlobalState, guarded_setup
    from trainguard.core.environment import fingerprint
    from trainguard.core.tolerance import Policy

    saved = GlobalState.capture()
    try:
        guarded_setup(0, True)
        fp = fingerprint()
        traj = Trajectory()
        try:
            _snippet(traj, watch)
        finally:
            traj.close()
        run = traj.to_run()
        run.meta = {"nodeid": "bench::mlp", "seed": 0, "deterministic": True, "tolerances": Policy().to_json(),
                    "max_values": traj.max_values, "fingerprint": fp, "blessed_at": "", "reason": "benchmark"}
        if bless:
            return guard.bless("bench::mlp", run, folder, Policy()).outcome
        result = guard.check("bench::mlp", run, folder, Policy(), "bless")
        return result.outcome
    finally:
        saved.restore()


def bench_overhead(reps: int) -> None:
    print("1. guard overhead: 200-step MLP snippet, guarded vs bare (same process, after warm-up)", flush=True)
    import torch

    # One intra-op thread: with two, OpenMP's busy-waiting makes timings on a shared
    # 2-core machine swing by several times whenever anything else runs.
    torch.set_num_threads(1)
    with tempfile.TemporaryDirectory() as tmp:
        plain, traced = Path(tmp) / "final", Path(tmp) / "trace"
        _guarded(plain, False, bless=True)
        _guarded(traced, True, bless=True)
        assert _guarded(plain, False) == "identical" and _guarded(traced, True) == "identical"
        _snippet()
        bare, final, trace = [], [], []
        for _ in range(reps):
            for fn, out in ((lambda: _snippet(), bare), (lambda: _guarded(plain, False), final),
                            (lambda: _snippet(), bare), (lambda: _guarded(traced, True), trace)):
                t0 = time.perf_counter()
                fn()
                out.append(time.perf_counter() - t0)
    b = statistics.median(bare)
    info(f"MLP {MLP['inputs']}-{MLP['hidden']}-{MLP['hidden']}-{MLP['outputs']}, batch {MLP['batch']}, Adam, "
         f"{MLP['steps']} steps, torch threads {torch.get_num_threads()}; bare median {b * 1e3:.0f} ms")
    f, t = statistics.median(final), statistics.median(trace)
    report("1", "guarded (final state) / bare", f / b, 1.05, f"+{(f - b) * 1e3:.0f} ms per test")
    report("1", "guarded (per-step trace) / bare", t / b, 1.30, f"+{(t - b) * 1e3:.0f} ms per test")


# -- 2. checksums of a 100M-parameter model ------------------------------------------------

BIG_SHAPES = [(5000, 5000)] * 4  # four 25M-element weights (+ biases): 100,020,000 float32 parameters

_CHILD = r"""
import hashlib, json, os, sys, time
sys.path.insert(0, {repo!r})
import numpy as np, torch
mode = {mode!r}
torch.manual_seed(0)
model = torch.nn.Sequential(*[torch.nn.Linear(i, o) for o, i in {shapes!r}])
from trainguard.core import checksum
from trainguard.core import store as golden
from trainguard.core.capture import Trajectory
import tempfile
Trajectory().state(w=torch.ones(3))  # warm-up: imports, caches of small sizes
def status(key):
    for line in open("/proc/self/status"):
        if line.startswith(key):
            return int(line.split()[1]) * 1024
try:
    with open("/proc/self/clear_refs", "w") as f:
        f.write("5")  # reset VmHWM to the current RSS
    reset = True
except OSError:
    reset = False
before = status("VmRSS:")
t0 = time.perf_counter()
out = {{}}
if mode == "hashlib":
    for p in model.parameters():
        hashlib.sha256(memoryview(p.detach().numpy().reshape(-1).view(np.uint8))).hexdigest()
elif mode == "checksum":
    for p in model.parameters():
        checksum.sha256_hex(p)
elif mode == "full":
    traj = Trajectory()
    traj.state(model)
    run = traj.to_run()
out["seconds"] = time.perf_counter() - t0
out.update(peak=status("VmHWM:") - before, reset=reset, params=sum(p.numel() for p in model.parameters()))
if mode == "full":  # after the peak was read: writing Parquet is not part of recording
    with tempfile.TemporaryDirectory() as tmp:
        run.meta = {{"nodeid": "bench::big"}}
        golden.write_run(tmp, run)
        out["state_bytes"] = os.path.getsize(os.path.join(tmp, "state.parquet"))
print(json.dumps(out))
"""


def _child(mode: str) -> dict:
    code = _CHILD.format(repo=str(REPO), mode=mode, shapes=BIG_SHAPES)
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    if proc.returncode:
        raise RuntimeError(f"child {mode} failed:\n{proc.stderr[-3000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def bench_checksum(reps: int) -> None:
    print("2. state checksums of a 100M-parameter float32 model, vs hashlib.sha256 on the same bytes", flush=True)
    runs: dict[str, list[dict]] = {"hashlib": [], "checksum": [], "full": []}
    for _ in range(reps):
        for mode in runs:
            runs[mode].append(_child(mode))
    med = {m: statistics.median(r["seconds"] for r in rs) for m, rs in runs.items()}
    params = runs["hashlib"][0]["params"]
    nbytes = params * 4
    info(f"{params:,} float32 parameters ({nbytes / 2**20:.0f} MiB); hashlib {nbytes / med['hashlib'] / 1e6:.0f} MB/s, "
         f"trainguard checksum {nbytes / med['checksum'] / 1e6:.0f} MB/s, full recording "
         f"{nbytes / med['full'] / 1e6:.0f} MB/s (medians of {reps} fresh processes each)")
    report("2", "checksum only throughput / hashlib", med["hashlib"] / med["checksum"], 0.90,
           "trainguard.checksum.sha256_hex per parameter", higher_is_better=True)
    report("2", "full state recording throughput / hashlib", med["hashlib"] / med["full"], 0.90,
           "Trajectory.state(model): SHA-256 + float64 statistics + 256-value sketch", higher_is_better=True)
    for mode in ("checksum", "full"):
        peak = max(r["peak"] for r in runs[mode]) / 2**20
        reset = all(r["reset"] for r in runs[mode])
        report("2", f"peak memory over the model, {mode} (MiB)", peak, 64,
               "VmHWM - VmRSS before, fresh subprocess" + ("" if reset else " (VmHWM could not be reset)"))
    state_bytes = runs["full"][0]["state_bytes"]
    report("3", "state.parquet of the 100M model (MiB)", state_bytes / 2**20, 1.0, f"{state_bytes:,} bytes")


# -- 3. golden size of a long trajectory ---------------------------------------------------

def _curves(n: int):
    """Made-up but realistic curves: decaying noisy loss, warm-up/cosine lr, grad norm, accuracy."""
    import numpy as np

    rng = np.random.default_rng(7)
    t = np.arange(n, dtype=np.float64)
    loss = 2.3 * np.exp(-t / (n / 5)) + 0.15 + 0.05 * rng.standard_normal(n) * np.exp(-t / n)
    warm = n // 100
    lr = np.where(t < warm, 3e-4 * t / warm, 3e-4 * 0.5 * (1 + np.cos(np.pi * (t - warm) / (n - warm))))
    grad = np.abs(1.0 + 0.3 * np.exp(-t / (n / 10)) + 0.2 * rng.standard_normal(n))
    acc = np.clip(0.95 - 0.85 * np.exp(-t / (n / 6)) + 0.02 * rng.standard_normal(n), 0, 1)
    return {"loss": loss, "lr": lr, "grad_norm": grad, "accuracy": acc}


def bench_size() -> None:
    print("3. golden size: 100,000 steps x 4 metrics vs numpy.savez_compressed of the same float64 arrays",
          flush=True)
    import numpy as np

    from trainguard.core import store as golden
    from trainguard.core.records import MetricSeries, Run

    n = 100_000
    curves = _curves(n)
    steps = np.arange(n, dtype=np.int64)
    run = Run(metrics={k: MetricSeries(steps.copy(), v) for k, v in curves.items()}, tensors={}, trace=None)
    run.meta = {"nodeid": "bench::long"}
    with tempfile.TemporaryDirectory() as tmp:
        golden.write_run(Path(tmp) / "g", run)
        ours = (Path(tmp) / "g" / "metrics.parquet").stat().st_size
        np.savez_compressed(Path(tmp) / "ref.npz", **curves)  # values only: no step column
        ref = (Path(tmp) / "ref.npz").stat().st_size
    report("3", "metrics.parquet / savez_compressed (values only)", ours / ref, 1.0,
           f"{ours:,} vs {ref:,} bytes (raw float64: {4 * n * 8:,})")


# -- 4. comparing a 1,000,000-step trajectory ---------------------------------------------

def _timeit(fn, reps: int) -> float:
    times = []
    for _ in range(reps):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def bench_compare(reps: int) -> None:
    print("4. comparing a 1,000,000-step trajectory vs numpy.isclose on the same arrays", flush=True)
    import numpy as np

    from trainguard.core.comparison import compare_metric
    from trainguard.core.records import MetricSeries
    from trainguard.core.tolerance import Policy

    n = 1_000_000
    loss = _curves(n)["loss"]
    steps = np.arange(n, dtype=np.int64)
    golden_s = MetricSeries(steps, loss)
    cases = {
        "identical": MetricSeries(steps.copy(), loss.copy()),
        "within tolerance": MetricSeries(steps.copy(), loss * (1 + 1e-9)),
        "changed": MetricSeries(steps.copy(), loss * (1 + 1e-3)),
    }
    policy = Policy()
    for name, new in cases.items():
        compare_metric("loss", golden_s, new, policy)
        np.isclose(new.values, loss)
        ours, ref = [], []
        for _ in range(reps):  # interleaved
            ours.append(_timeit(lambda: compare_metric("loss", golden_s, new, policy), 1))
            ref.append(_timeit(lambda: np.isclose(new.values, loss, rtol=1e-5, atol=1e-8), 1))
        o, r = statistics.median(ours), statistics.median(ref)
        verdict = compare_metric("loss", golden_s, new, policy).verdict
        report("4", f"compare_metric / numpy.isclose ({name})", o / r, 1.5,
               f"{o * 1e3:.1f} vs {r * 1e3:.1f} ms, verdict {verdict!r}")


# -- 5. plugin cost for projects without guarded tests ------------------------------------

def bench_plugin(reps: int) -> None:
    print("5. pytest on one trivial test: trainguard loaded vs -p no:trainguard (subprocesses)", flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        Path(tmp, "test_trivial.py").write_text("def test_one():\n    assert 1 + 1 == 2\n")
        base = [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "test_trivial.py"]
        runs = {"with": [], "without": []}

        def once(kind: str) -> None:
            cmd = base + ([] if kind == "with" else ["-p", "no:trainguard"])
            t0 = time.perf_counter()
            proc = subprocess.run(cmd, cwd=tmp, capture_output=True, text=True)
            runs[kind].append(time.perf_counter() - t0)
            if proc.returncode:
                raise RuntimeError(proc.stdout + proc.stderr)

        once("with"), once("without")  # warm the file cache
        runs = {"with": [], "without": []}
        for i in range(reps):
            for kind in (("with", "without") if i % 2 == 0 else ("without", "with")):
                once(kind)
    w, wo = statistics.median(runs["with"]), statistics.median(runs["without"])
    report("5", "plugin cost, median difference (ms)", (w - wo) * 1e3, 50,
           f"{w * 1e3:.0f} vs {wo * 1e3:.0f} ms per pytest run, {reps} runs each, alternating order")


# -- 6. parallel: 32 guarded tests, -n 2 vs serial -----------------------------------------

_SUITE = '''
import pytest, torch

@pytest.mark.trainguard(seed=1)
@pytest.mark.parametrize("case", range({count}))
def test_mlp(trajectory, case):
    torch.manual_seed(case)
    model = torch.nn.Sequential(torch.nn.Linear(64, {hidden}), torch.nn.Tanh(), torch.nn.Linear({hidden}, 1))
    opt = torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.9)
    x = torch.randn(256, 64)
    y = x[:, :1] * 0.5 - x[:, 1:2] ** 2 * 0.1
    for step in range({steps}):
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(model(x), y)
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss)
    trajectory.state(model, optimizer=opt)
'''


def bench_parallel(count: int, steps: int) -> None:
    print(f"6. parallel: {count} guarded tests, pytest -n 2 vs serial", flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        Path(tmp, "test_suite.py").write_text(textwrap.dedent(_SUITE.format(count=count, hidden=256, steps=steps)))
        Path(tmp, "pytest.ini").write_text("[pytest]\n")
        base = [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "--trainguard-threads", "1"]
        bless = subprocess.run(base + ["--trainguard-bless", "--trainguard-reason", "benchmark"], cwd=tmp,
                               capture_output=True, text=True)
        if bless.returncode:
            raise RuntimeError(bless.stdout[-3000:] + bless.stderr[-3000:])
        times = {"serial": [], "parallel": []}
        for kind in ("serial", "parallel", "parallel", "serial"):
            cmd = base + (["-n", "2"] if kind == "parallel" else ["-p", "no:xdist"])
            t0 = time.perf_counter()
            proc = subprocess.run(cmd, cwd=tmp, capture_output=True, text=True)
            times[kind].append(time.perf_counter() - t0)
            if proc.returncode:
                raise RuntimeError(proc.stdout[-3000:] + proc.stderr[-3000:])
    s, p = statistics.mean(times["serial"]), statistics.mean(times["parallel"])
    report("6", "wall time pytest -n 2 / serial", p / s, 0.65,
           f"{p:.1f} vs {s:.1f} s (means of 2, order S P P S; --trainguard-threads 1 in both)")


# -- machine ----------------------------------------------------------------------------

def machine() -> dict:
    import numpy
    import pyarrow
    import torch

    cpu = "unknown"
    try:
        for line in open("/proc/cpuinfo"):
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    ram = "unknown"
    try:
        for line in open("/proc/meminfo"):
            if line.startswith("MemTotal"):
                ram = f"{int(line.split()[1]) / 2**20:.1f} GiB"
    except OSError:
        pass
    load = os.getloadavg() if hasattr(os, "getloadavg") else None
    return {"nproc": os.cpu_count(), "cpu": cpu, "ram": ram, "python": platform.python_version(),
            "torch": torch.__version__, "numpy": numpy.__version__, "pyarrow": pyarrow.__version__,
            "torch_threads": torch.get_num_threads(),
            "loadavg_start": " ".join(f"{x:.2f}" for x in load) if load else "n/a"}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true", help="fewer repetitions (a smoke test, not a measurement)")
    parser.add_argument("--only", default="overhead,checksum,size,compare,plugin,parallel",
                        help="comma-separated subset of: overhead,checksum,size,compare,plugin,parallel")
    parser.add_argument("--json", metavar="FILE", help="also write the results as JSON")
    args = parser.parse_args(argv)
    only = set(args.only.split(","))
    q = args.quick
    start = time.perf_counter()
    env = machine()
    print("machine: " + ", ".join(f"{k} {v}" for k, v in env.items()), flush=True)
    if "overhead" in only:
        bench_overhead(3 if q else 9)
    if "checksum" in only:
        bench_checksum(1 if q else 3)
    if "size" in only:
        bench_size()
    if "compare" in only:
        bench_compare(5 if q else 21)
    if "plugin" in only:
        bench_plugin(4 if q else 12)
    if "parallel" in only:
        bench_parallel(8 if q else 32, 100 if q else 400)
    elapsed = time.perf_counter() - start
    load = os.getloadavg() if hasattr(os, "getloadavg") else None
    env["loadavg_end"] = " ".join(f"{x:.2f}" for x in load) if load else "n/a"
    print(f"\n{'target':<7}{'measure':<58}{'ratio':>10}  {'limit':<9} result")
    for r in RESULTS:
        print(f"{r['target']:<7}{r['name']:<58}{r['ratio']:>10.3f}  {r['limit']:<9} {'ok' if r['ok'] else 'MISSED'}")
    print(f"\ntotal {elapsed:.0f} s; load average at start {env['loadavg_start']}, at end {env['loadavg_end']}")
    if args.json:
        Path(args.json).write_text(json.dumps({"machine": env, "results": RESULTS, "seconds": elapsed}, indent=1))
    return 0 if all(r["ok"] for r in RESULTS) else 1


if __name__ == "__main__":
    sys.exit(main())
