"""Portable mode (`--trainguard-portable`): goldens that match across kernel-dispatch settings.

On one machine, other CPUs' dispatch is imitated the way oneMKL's and torch's documentation
describe (`MKL_ENABLE_INSTRUCTIONS`, `ATEN_CPU_CAPABILITY`, `MKL_CBWR`, thread counts), each in
a fresh pytest process. Unpinned, those settings move the bits of a small invented tram-depot
model's training; pinned, a golden blessed under one setting must be bit-identical under every
other.
"""

from __future__ import annotations

import pytest

from trainguard.core import dispatch
from trainguard.core.store import read_run

DEPOT = '''
import pytest
import torch


def _train(trajectory, make_opt):
    x = torch.randn(384, 5)
    y = (x @ torch.tensor([1.8, -0.6, 0.9, 1.2, 0.4]) + 0.3 * torch.tanh(x[:, 0] * x[:, 2])).unsqueeze(1)
    model = torch.nn.Sequential(torch.nn.Linear(5, 64), torch.nn.Tanh(), torch.nn.Linear(64, 1))
    opt = make_opt(model.parameters())
    for step in range(15):
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(model(x), y)
        loss.backward()
        opt.step()
        trajectory.log(step, loss=loss)
    trajectory.state(model, optimizer=opt)


@pytest.mark.trainguard(seed=102, exact=True)
def test_depot_momentum(trajectory):
    _train(trajectory, lambda p: torch.optim.SGD(p, lr=0.05, momentum=0.9))


@pytest.mark.trainguard(seed=105, exact=True)
def test_depot_rmsprop(trajectory):
    _train(trajectory, lambda p: torch.optim.RMSprop(p, lr=0.01))
'''

#: Dispatch settings of "other machines", imitated on this one (each must be set before the process starts).
OTHER_MACHINES = [
    {"MKL_ENABLE_INSTRUCTIONS": "SSE4_2", "ATEN_CPU_CAPABILITY": "default", "OMP_NUM_THREADS": "1"},
    {"MKL_CBWR": "AUTO", "OMP_NUM_THREADS": "2"},
    {"MKL_ENABLE_INSTRUCTIONS": "AVX2", "ATEN_CPU_CAPABILITY": "avx2", "ONEDNN_MAX_CPU_ISA": "AVX2"},
]
DISPATCH_KEYS = ("MKL_ENABLE_INSTRUCTIONS", "ATEN_CPU_CAPABILITY", "OMP_NUM_THREADS", "MKL_CBWR", "MKL_NUM_THREADS",
                 "ONEDNN_MAX_CPU_ISA", "DNNL_MAX_CPU_ISA")


def _run(pytester, monkeypatch, env, *args):
    for key in DISPATCH_KEYS:
        monkeypatch.delenv(key, raising=False)
    for key, value in env.items():
        monkeypatch.setenv(key, value)
    return pytester.runpytest_subprocess("-p", "no:xdist", "-p", "no:cacheprovider", *args)


@pytest.mark.slow
def test_portable_goldens_are_bit_identical_under_other_dispatch_settings(pytester, monkeypatch):
    pytester.makepyfile(test_depot=DEPOT)
    blessed = _run(pytester, monkeypatch, {}, "--trainguard-portable", "--trainguard-bless")
    assert blessed.ret == 0, blessed.stdout.str()
    golden = read_run(pytester.path / "golden" / "test_depot.py" / "test_depot_momentum")
    record = golden.meta["fingerprint"][dispatch.FINGERPRINT_KEY]
    assert record["pins"] == dispatch.PORTABLE_PINS and record["cpu_capability"] == "DEFAULT"
    assert _run(pytester, monkeypatch, {}, "--trainguard-golden-dir=plain_base", "--trainguard-bless").ret == 0
    moved = 0
    for i, env in enumerate(OTHER_MACHINES):
        checked = _run(pytester, monkeypatch, env, "--trainguard-portable")
        checked.assert_outcomes(passed=2)  # exact=True: bit for bit
        assert "guarded tests checked: 2 (2 identical)" in checked.stdout.str(), env
        assert _run(pytester, monkeypatch, env, f"--trainguard-golden-dir=plain_{i}", "--trainguard-bless").ret == 0
        moved += _digest(pytester.path / f"plain_{i}") != _digest(pytester.path / "plain_base")
    # ... and without the pins, at least one of those settings moved bits (else this test proves nothing)
    print(f"\nunpinned: {moved} of {len(OTHER_MACHINES)} dispatch settings moved bits; pinned: 0")
    assert moved >= 1


def _digest(root):
    runs = [read_run(root / "test_depot.py" / name) for name in ("test_depot_momentum", "test_depot_rmsprop")]
    return [sorted(t.sha256 for t in r.tensors.values()) for r in runs]


@pytest.mark.slow
def test_portable_and_unpinned_goldens_are_never_compared_silently(pytester, monkeypatch):
    pytester.makepyfile(test_depot=DEPOT)
    assert _run(pytester, monkeypatch, {}, "--trainguard-bless").ret == 0
    portable = _run(pytester, monkeypatch, {}, "--trainguard-portable")
    portable.assert_outcomes(failed=2)
    text = portable.stdout.str()
    assert "this run is in portable mode" in text and "--trainguard-portable" in text
    assert "Traceback" not in text
    # re-blessed in portable mode (same command the message shows), then an unpinned run is told why
    assert _run(pytester, monkeypatch, {}, "--trainguard-portable", "--trainguard-bless").ret == 0
    plain = _run(pytester, monkeypatch, {})
    plain.assert_outcomes(failed=2)
    assert "blessed in portable mode" in plain.stdout.str()


def test_portable_mode_refuses_a_contradicting_thread_count(pytester, monkeypatch):
    pytester.makepyfile(test_depot=DEPOT)
    result = _run(pytester, monkeypatch, {}, "--trainguard-portable", "--trainguard-threads", "4")
    assert result.ret == 4 and "contradicts portable mode" in result.stderr.str()


def test_pins_record_what_they_replaced():
    env = {"MKL_CBWR": "AUTO", "OMP_NUM_THREADS": "1", "PATH": "/bin"}
    replaced = dispatch.pin(env)
    assert replaced == {"MKL_CBWR": "AUTO"}  # OMP_NUM_THREADS already had the pinned value
    assert {k: env[k] for k in dispatch.PORTABLE_PINS} == dispatch.PORTABLE_PINS and env["PATH"] == "/bin"
    assert dispatch.mismatch({"portable": {"pins": {}}}, {}) and dispatch.mismatch({}, {"portable": {"x": 1}})
    assert dispatch.mismatch({}, {}) == "" and dispatch.mismatch({"portable": {"a": 1}}, {"portable": {"a": 1}}) == ""


def test_a_machine_that_cannot_run_the_baseline_is_named_and_its_goldens_marked():
    assert dispatch.baseline_problem("x86_64", ["sse4_1", "avx2"]) == ""
    assert "not x86-64" in dispatch.baseline_problem("aarch64", [])
    assert "SSE4.1" in dispatch.baseline_problem("x86_64", ["sse2"])
    marked = {dispatch.FINGERPRINT_KEY: dispatch.unavailable("aarch64")}
    pinned = {dispatch.FINGERPRINT_KEY: dispatch.record({}, "DEFAULT")}
    assert dispatch.mismatch(pinned, marked)  # a portable golden never silently matches an unpinned run
    assert dispatch.mismatch(marked, {}) == ""  # both ran unpinned: compared as usual


def test_unknown_dispatch_values_are_named():
    # Values from the libraries' own documentation pass (oneDNN "CPU Dispatcher Control", oneMKL
    # "Specifying Code Branches", ATen's DispatchStub); anything else is named.
    known = {"ATEN_CPU_CAPABILITY": "avx2", "ONEDNN_MAX_CPU_ISA": "AVX512_CORE_AMX", "DNNL_MAX_CPU_ISA": "SSE41",
             "MKL_CBWR": "BRANCH=AVX2,STRICT", "MKL_ENABLE_INSTRUCTIONS": "SSE4_2"}
    assert dispatch.unknown_settings(known) == []
    assert dispatch.unknown_settings({"MKL_CBWR": "COMPATIBLE", "ATEN_CPU_CAPABILITY": "avx9000",
                                      "ONEDNN_MAX_CPU_ISA": "SSE4"}) == ["ATEN_CPU_CAPABILITY=avx9000",
                                                                         "ONEDNN_MAX_CPU_ISA=SSE4"]


def test_an_unknown_dispatch_value_is_never_a_silent_pass(pytester, monkeypatch):
    pytester.makepyfile(test_depot=DEPOT)
    result = _run(pytester, monkeypatch, {"ATEN_CPU_CAPABILITY": "avx9000"}, "--trainguard-bless", "-k", "momentum")
    assert result.ret == 0
    assert "kernel dispatch setting(s) ATEN_CPU_CAPABILITY=avx9000 name no code path the library knows" \
        in result.stdout.str()
