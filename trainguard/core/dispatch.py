"""Portable mode: pin CPU kernel dispatch to a baseline every x86-64 machine shares.

The same seeded run gives other float bits on another CPU because the libraries under torch
choose code paths by instruction set and vendor: ATen's vectorised kernels
(`ATEN_CPU_CAPABILITY`: default, avx2, avx512), oneDNN (`ONEDNN_MAX_CPU_ISA`, older name
`DNNL_MAX_CPU_ISA`) and oneMKL, which also dispatches by vendor. oneMKL's developer guide,
"Conditional Numerical Reproducibility", documents `MKL_CBWR=COMPATIBLE` as the branch that
gives the same results on every x86 processor, valid with a fixed thread count. Portable mode
sets all of them, plus one intra-op thread, before torch runs its first kernel, and records
the pins in the fingerprint so that a portable golden is never compared with an unpinned run
without saying so.

Measured here (torch 2.13.0+cpu, AMD EPYC with AVX2): three optimizers trained under pins were
bit-identical whatever the process's own dispatch settings (`MKL_ENABLE_INSTRUCTIONS=SSE4_2`,
`ATEN_CPU_CAPABILITY=avx2`, `MKL_CBWR=AUTO`, `OMP_NUM_THREADS=2`); unpinned, each setting
moved bits. Settings read by the libraries only when they start must be in place before torch
is imported or runs a kernel; `verify` checks the one torch reports.
"""

from __future__ import annotations

import os
import re
import sys
from typing import Any, Mapping, MutableMapping

from .errors import UsageError

#: The pins, as environment variables the libraries read when they start.
PORTABLE_PINS: dict[str, str] = {
    "ATEN_CPU_CAPABILITY": "default",  # ATen's scalar kernels, no AVX2/AVX-512 variants
    "ONEDNN_MAX_CPU_ISA": "SSE41",  # oneDNN's lowest x86-64 code path
    "DNNL_MAX_CPU_ISA": "SSE41",  # the same, for oneDNN releases before the rename
    "MKL_CBWR": "COMPATIBLE",  # oneMKL's conditional numerical reproducibility, all-processor branch
    "OMP_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
}
#: Intra-op threads in a portable run (CNR holds only for a fixed thread count; one also fixes
#: the order of torch's own parallel reductions).
PORTABLE_THREADS = 1
#: What `torch.backends.cpu.get_cpu_capability()` reports once the ATen pin took effect.
_BASELINE_CAPABILITY = "DEFAULT"
#: The fingerprint key a portable run records; its absence marks an unpinned run.
FINGERPRINT_KEY = "portable"


#: Architectures the pins mean something on, and the instruction set they pin to.
_X86 = ("x86_64", "amd64", "x64")
_BASELINE_FLAG = "sse4_1"


def baseline_problem(machine: str | None = None, flags: list[str] | None = None) -> str:
    """Why this machine cannot run the pinned baseline ('' when it can): not x86-64, or no SSE4.1."""
    import platform

    from .machine import cpu

    machine = machine if machine is not None else platform.machine()
    if machine.lower() not in _X86:
        return (f"this machine is {machine}, not x86-64: the pins describe x86-64 code paths, so its results cannot "
                "match portable goldens blessed on x86-64")
    known = flags if flags is not None else cpu().get("flags")
    if known and _BASELINE_FLAG not in known:
        return "this CPU lacks SSE4.1, the instruction set portable mode pins oneDNN to"
    return ""


#: Values the libraries accept for their dispatch settings. ATen: DispatchStub's parser (an
#: unknown value is ignored with a warning); oneDNN: its "CPU Dispatcher Control" guide;
#: oneMKL: its developer guide, "Specifying Code Branches" (MKL_CBWR, "<branch>[,STRICT]" or
#: "BRANCH=<branch>[,STRICT]"); MKL_ENABLE_INSTRUCTIONS' names recalled from oneMKL's
#: "Instruction Set Specific Dispatching" page, from memory.
_KNOWN_VALUES: dict[str, re.Pattern[str]] = {
    "ATEN_CPU_CAPABILITY": re.compile(r"default|avx|avx2|avx512|avx512_vnni|avx512_bf16|amx|vsx|zvector|sve\d*"),
    "ONEDNN_MAX_CPU_ISA": re.compile(r"(?i)default|all|sse41|avx|avx2|avx2_vnni|avx2_vnni_2|avx512_core(_vnni|_bf16|"
                                     r"_fp16|_amx|_amx_fp16)?|avx10_\d+_512(_amx(_fp16|_2)?)?"),
    "MKL_CBWR": re.compile(r"(?i)(branch=)?(auto|compatible|sse2|sse3|ssse3|sse4_1|sse4_2|avx|avx2|avx512(_e\d)?|"
                           r"avx512_mic(_e1)?|avx10)(,strict)?"),
    "MKL_ENABLE_INSTRUCTIONS": re.compile(r"(?i)sse4_2|avx|avx2(_e1)?|avx512(_e\d)?|avx512_mic(_e1)?|avx10(_\d+)?"),
}
_KNOWN_VALUES["DNNL_MAX_CPU_ISA"] = _KNOWN_VALUES["ONEDNN_MAX_CPU_ISA"]


def unknown_settings(environ: Mapping[str, str] | None = None) -> list[str]:
    """Dispatch variables set to values their library does not know: it ignores them and chooses
    by CPU, so the run is not dispatched as the variable says (`NAME=value` each)."""
    env = os.environ if environ is None else environ
    return [f"{k}={env[k]}" for k, pattern in _KNOWN_VALUES.items()
            if k in env and not pattern.fullmatch(env[k].strip())]


def pin(environ: MutableMapping[str, str] | None = None) -> dict[str, str]:
    """Set the pins; returns the values they replaced (the user's own dispatch settings), for the record."""
    env = os.environ if environ is None else environ
    replaced = {k: env[k] for k in PORTABLE_PINS if k in env and env[k] != PORTABLE_PINS[k]}
    env.update(PORTABLE_PINS)
    return replaced


def shell_exports() -> str:
    """The pins as one line to put before a command, for when torch starts before trainguard can pin."""
    return " ".join(f"{k}={v}" for k, v in PORTABLE_PINS.items())


def torch_started() -> bool:
    """Whether torch was imported before the pins were set (its kernels may already have dispatched)."""
    return "torch" in sys.modules


def verify() -> str:
    """Check that the pin torch can report took effect; returns the capability in force.

    Raises `UsageError` with the fix when torch already chose a wider code path (it ran a
    kernel before trainguard pinned it: a plugin or conftest imported and used torch first).
    """
    import torch

    try:
        capability = str(torch.backends.cpu.get_cpu_capability())
    except AttributeError:  # torch < 2.1 has no query; nothing to check
        return "unknown"
    if capability.upper() != _BASELINE_CAPABILITY:
        raise UsageError(
            f"portable mode could not pin torch's CPU kernels: they already run with capability {capability}, "
            "because torch ran a kernel before trainguard could set ATEN_CPU_CAPABILITY (a plugin or conftest.py "
            f"used torch first). Set the pins before Python starts instead:\n  {shell_exports()} pytest ...")
    return capability


def record(replaced: Mapping[str, str], capability: str) -> dict[str, Any]:
    """The fingerprint entry of a portable run: the pins, what they replaced, and torch's capability."""
    return {"pins": dict(PORTABLE_PINS), "threads": PORTABLE_THREADS, "replaced": dict(replaced),
            "cpu_capability": capability}


def unavailable(reason: str) -> dict[str, Any]:
    """The fingerprint entry of a run that asked for portable mode on a machine that cannot pin: it ran unpinned."""
    return {"unavailable": reason}


def _pinned(fp: Mapping[str, Any] | None) -> bool:
    entry = (fp or {}).get(FINGERPRINT_KEY)
    return isinstance(entry, Mapping) and bool(entry) and "unavailable" not in entry


def mismatch(golden_fp: Mapping[str, Any] | None, new_fp: Mapping[str, Any] | None) -> str:
    """Why a run and a golden cannot be compared bit for bit because one is portable and the other not ('' if they can)."""
    g = _pinned(golden_fp)
    n = _pinned(new_fp)
    if g == n:
        return ""
    if g:
        return ("the golden was blessed in portable mode (pinned kernel dispatch) but this run was not: their "
                "bits are not comparable. Run in portable mode (--trainguard-portable, or ini "
                "trainguard_portable = true), or re-bless without it")
    return ("this run is in portable mode (pinned kernel dispatch) but the golden was blessed without it: their "
            "bits are not comparable. Re-bless it in portable mode")
