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


# -- 1. guard overhead, measured the way users pay it: per-test times in one pytest session ----
#
# A generated test file holds, per snippet, a bare test (no trainguard), a guarded test that
# records the final state, and a guarded test that also watches every step; pytest runs them
# interleaved (bare, final, bare, trace, ...) in one session after they were blessed in another,
# and JUnit's per-test times (setup + call + teardown) give medians per kind. Everything runs
# on one torch thread: with two, OpenMP's busy-waiting makes timings on a shared 2-core machine
# swing several-fold whenever anything else runs.

SNIPPETS = {
    # name: (builder, steps, reps); builders are source text, so the same code runs bare and guarded
    "mlp": ("mlp(128, 256)", 200, 15),              # the 200-step MLP of the issue (101,386 parameters)
    "tiny": ("mlp(128, 256)", 1, 25),               # one step: the per-test fixed cost
    "conv": ("conv()", 20, 5),                      # a conv net with 1.07M parameters
    "steps10x": ("mlp(128, 256)", 2000, 5),        # 10x the steps
    "params10x": ("mlp(128, 950)", 200, 5),        # 10x the parameters (1,034,460)
}

_GUARD_HEAD = '''
import pytest
import torch

torch.set_num_threads(1)


def mlp(inputs, hidden):
    model = torch.nn.Sequential(torch.nn.Linear(inputs, hidden), torch.nn.ReLU(), torch.nn.Linear(hidden, hidden),
                                torch.nn.ReLU(), torch.nn.Linear(hidden, 10))
    x = torch.randn(64 * 8, inputs)
    y = (x @ torch.randn(inputs, 10)).argmax(dim=1)  # a made-up task: the nearest of 10 random directions
    return model, x, y


def conv():
    model = torch.nn.Sequential(torch.nn.Conv2d(3, 32, 3, padding=1), torch.nn.ReLU(), torch.nn.MaxPool2d(2),
                                torch.nn.Conv2d(32, 64, 3, padding=1), torch.nn.ReLU(), torch.nn.MaxPool2d(2),
                                torch.nn.Flatten(), torch.nn.Linear(64 * 8 * 8, 256), torch.nn.ReLU(),
                                torch.nn.Linear(256, 10))
    x = torch.randn(64 * 8, 3, 32, 32)  # invented 32x32 "tile photos" of a tram depot floor
    y = x.mean(dim=(2, 3)).argmax(dim=1)
    return model, x, y


def train(build, steps, traj=None, watch=False):
    torch.manual_seed(0)
    model, x, y = build()
    opt = torch.optim.Adam(model.parameters(), lr=1e-3)
    if watch:
        traj.watch(model, opt)
    for step in range(steps):
        i = (step % 8) * 64
        opt.zero_grad()
        loss = torch.nn.functional.cross_entropy(model(x[i : i + 64]), y[i : i + 64])
        loss.backward()
        opt.step()
        if traj is not None:
            traj.log(step, loss=loss)
    if traj is not None:
        traj.state(model, optimizer=opt)
'''


def _guard_suite(snippets: dict[str, tuple[str, int, int]], quick: bool) -> str:
    parts = [_GUARD_HEAD]
    for name, (builder, steps, reps) in snippets.items():
        for r in range(1 if quick else reps):
            call = f"train(lambda: {builder}, {steps}"
            parts.append(f"def test_{name}_bare_{r}():\n    {call})\n")
            parts.append(f"@pytest.mark.trainguard(seed=0)\ndef test_{name}_final_{r}(trajectory):\n"
                         f"    {call}, trajectory)\n")
            parts.append(f"def test_{name}_bareb_{r}():\n    {call})\n")
            parts.append(f"@pytest.mark.trainguard(seed=0)\ndef test_{name}_trace_{r}(trajectory):\n"
                         f"    {call}, trajectory, watch=True)\n")
    return "\n\n".join(parts)


def bench_overhead(quick: bool) -> None:
    import re
    import xml.etree.ElementTree as ET

    print("1. guard overhead: per-test times (JUnit) in one pytest session, bare vs guarded, interleaved", flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        Path(tmp, "test_guard.py").write_text(_guard_suite(SNIPPETS, quick))
        Path(tmp, "pytest.ini").write_text("[pytest]\n")
        base = [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "-p", "no:randomly", "-p", "no:xdist",
                "--trainguard-threads", "1"]
        bless = subprocess.run(base + ["--trainguard-bless", "--trainguard-reason", "benchmark", "-k", "final or trace"],
                               cwd=tmp, capture_output=True, text=True)
        if bless.returncode:
            raise RuntimeError(bless.stdout[-3000:] + bless.stderr[-3000:])
        proc = subprocess.run(base + ["--junitxml=times.xml"], cwd=tmp, capture_output=True, text=True)
        if proc.returncode or "identical" not in proc.stdout:
            raise RuntimeError(proc.stdout[-3000:] + proc.stderr[-3000:])
        times: dict[tuple[str, str], dict[int, float]] = {}
        for case in ET.parse(Path(tmp, "times.xml")).iter("testcase"):
            m = re.fullmatch(r"test_(\w+?)_(bare|bareb|final|trace)_(\d+)", case.get("name", ""))
            if m:
                times.setdefault((m.group(1), m.group(2)), {})[int(m.group(3))] = float(case.get("time", "nan"))
    # Each guarded test is paired with the bare test run just before it (final with bare, trace with
    # bareb): the median of those differences follows the machine's drift far better than a
    # difference of medians, on a machine whose other jobs come and go.
    med: dict[tuple[str, str], float] = {}
    extra: dict[str, dict[str, float]] = {}
    for name in SNIPPETS:
        bare = {**{("a", r): t for r, t in times[(name, "bare")].items()},
                **{("b", r): t for r, t in times[(name, "bareb")].items()}}
        med[(name, "bare")] = statistics.median(bare.values())
        extra[name] = {}
        for kind, partner in (("final", "bare"), ("trace", "bareb")):
            diffs = [t - times[(name, partner)][r] for r, t in times[(name, kind)].items()]
            extra[name][kind] = statistics.median(diffs)
            med[(name, kind)] = med[(name, "bare")] + extra[name][kind]
            times[(name, kind + "_n")] = {0: len(diffs)}
    for name, (builder, steps, _) in SNIPPETS.items():
        info(f"{name}: {builder}, {steps} steps: bare {med[(name, 'bare')] * 1e3:.0f} ms, final "
             f"{med[(name, 'final')] * 1e3:.0f} ms, trace {med[(name, 'trace')] * 1e3:.0f} ms "
             f"(medians of {int(times[(name, 'final_n')][0])} paired differences)")
    mlp = med[("mlp", "bare")]
    report("1", "guarded (final state) / bare, 200-step MLP", med[("mlp", "final")] / mlp, 1.03,
           f"+{extra['mlp']['final'] * 1e3:.1f} ms per test")
    report("1", "fixed per-test cost, ms (1-step MLP, guarded - bare)", extra["tiny"]["final"] * 1e3, 10,
           "medians of JUnit times")
    report("2", "guarded (per-step trace) / bare, 200-step MLP", med[("mlp", "trace")] / mlp, 1.30,
           f"+{extra['mlp']['trace'] * 1e3:.0f} ms per test")
    report("2", "guarded (per-step trace) / bare, conv net 1.07M params", med[("conv", "trace")] / med[("conv", "bare")],
           1.50, f"+{extra['conv']['trace'] * 1e3:.0f} ms per test")
    for name, what in (("steps10x", "10x steps"), ("params10x", "10x parameters")):
        for kind in ("final", "trace"):
            growth = extra[name][kind] / extra["mlp"][kind] if extra["mlp"][kind] > 0 else float("nan")
            # 10 is linear; up to 12 is read as linear within this measurement's noise (stated in RESULTS.md)
            report("6", f"guard cost growth at {what} ({kind}); linear = 10", growth, 12.0,
                   f"+{extra['mlp'][kind] * 1e3:.1f} -> +{extra[name][kind] * 1e3:.1f} ms; guarded / bare "
                   f"{med[(name, kind)] / med[(name, 'bare')]:.3f}")


# -- 2. checksums of a 100M-parameter model ------------------------------------------------

BIG_SHAPES = [(5000, 5000)] * 4  # four 25M-element weights (+ biases): 100,020,000 float32 parameters

_CHILD = r"""
import hashlib, json, os, sys, time
sys.path.insert(0, {repo!r})
import numpy as np, torch
mode = {mode!r}
cores = {cores!r}
if cores == 1 and hasattr(os, "sched_setaffinity"):
    os.sched_setaffinity(0, {{sorted(os.sched_getaffinity(0))[0]}})
    torch.set_num_threads(1)
torch.manual_seed(0)
model = torch.nn.Sequential(*[torch.nn.Linear(i, o) for o, i in {shapes!r}])
from trainguard.core import checksum
from trainguard.core import store as golden
from trainguard.core.capture import Trajectory
import tempfile
Trajectory().state(w=torch.ones(3))  # warm-up: imports, caches of small sizes
known = None
if mode == "check":  # what a check knows before the body runs: the golden's records (from a light read)
    blessed = Trajectory()
    blessed.state(model)
    known = blessed.to_run().tensors
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
elif mode in ("full", "check"):
    traj = Trajectory()
    traj.known = known
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


def _child(mode: str, cores: int = 2) -> dict:
    code = _CHILD.format(repo=str(REPO), mode=mode, shapes=BIG_SHAPES, cores=cores)
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    if proc.returncode:
        raise RuntimeError(f"child {mode} failed:\n{proc.stderr[-3000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def bench_checksum(reps: int) -> None:
    print("3. state recording of a 100M-parameter float32 model, vs hashlib.sha256 on the same bytes", flush=True)
    modes = ("hashlib", "checksum", "full", "check")
    for cores in (2, 1):
        runs: dict[str, list[dict]] = {m: [] for m in modes}
        for _ in range(reps):
            for mode in modes:  # interleaved, a fresh process each
                runs[mode].append(_child(mode, cores))
        med = {m: statistics.median(r["seconds"] for r in rs) for m, rs in runs.items()}
        params = runs["hashlib"][0]["params"]
        nbytes = params * 4
        info(f"{cores} core(s): {params:,} float32 parameters ({nbytes / 2**20:.0f} MiB); hashlib "
             f"{nbytes / med['hashlib'] / 1e6:.0f} MB/s, checksum {nbytes / med['checksum'] / 1e6:.0f} MB/s, full "
             f"recording {nbytes / med['full'] / 1e6:.0f} MB/s, check-time recording {nbytes / med['check'] / 1e6:.0f} "
             f"MB/s (medians of {reps} fresh processes each)")
        report("3", f"checksum only / hashlib, {cores} core(s)", med["hashlib"] / med["checksum"], 0.90,
               "trainguard.checksum.sha256_hex per parameter", higher_is_better=True)
        report("3", f"full recording (bless) / hashlib, {cores} core(s)", med["hashlib"] / med["full"], 0.90,
               "Trajectory.state(model): SHA-256 + float64 statistics + 1024-value sketch", higher_is_better=True)
        report("3", f"check-time recording / hashlib, {cores} core(s)", med["hashlib"] / med["check"], 0.90,
               "Trajectory.state(model) knowing the golden: SHA-256, statistics and sketch reused when it matches",
               higher_is_better=True)
        if cores == 2:
            for mode in ("checksum", "full", "check"):
                peak = max(r["peak"] for r in runs[mode]) / 2**20
                reset = all(r["reset"] for r in runs[mode])
                report("3", f"peak memory over the model, {mode} (MiB)", peak, 64,
                       "VmHWM - VmRSS before, fresh subprocess" + ("" if reset else " (VmHWM could not be reset)"))
            state_bytes = runs["full"][0]["state_bytes"]
            report("-", "state.parquet of the 100M model (MiB)", state_bytes / 2**20, 1.0, f"{state_bytes:,} bytes")


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
    print("-. golden size (an earlier issue's target, kept): 100,000 steps x 4 metrics vs numpy.savez_compressed of the same float64 arrays",
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
    report("-", "metrics.parquet / savez_compressed (values only)", ours / ref, 1.0,
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
    print("-. comparing a 1,000,000-step trajectory vs numpy.isclose on the same arrays", flush=True)
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
        report("-", f"compare_metric / numpy.isclose ({name})", o / r, 1.5,
               f"{o * 1e3:.1f} vs {r * 1e3:.1f} ms, verdict {verdict!r}")


# -- 5. plugin cost for projects without guarded tests ------------------------------------

def bench_plugin(reps: int) -> None:
    print("-. pytest on one trivial test: trainguard loaded vs -p no:trainguard (subprocesses)", flush=True)
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
    report("-", "plugin cost, median difference (ms)", (w - wo) * 1e3, 50,
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
    print(f"4. parallel: {count} guarded tests, pytest -n 2 vs serial", flush=True)
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
    report("4", "wall time pytest -n 2 / serial", p / s, 0.60,
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
        bench_overhead(q)
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
