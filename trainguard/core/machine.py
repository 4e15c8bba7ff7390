"""Machine facts for the fingerprint: the CPU, the settings kernels dispatch on, the libraries in use.

A report can only say "only the machine changed" if the fingerprint saw the machine: the CPU
vendor and model and the instruction-set flags that oneMKL, oneDNN and ATen choose code paths
by; every environment variable that steers dispatch or threading; the BLAS and oneDNN builds
torch reports; and the version of every numerical library the test process imported, so that
an upgrade of an optimizer or model library shows in the report, not only torch's.
"""

from __future__ import annotations

import functools
import os
import re
import sys
from typing import Any

#: /proc/cpuinfo flags that kernel libraries dispatch on (x86-64 vector extensions, FMA, SHA, AMX).
DISPATCH_FLAGS = ("sse4_1", "sse4_2", "avx", "avx2", "fma", "f16c", "bmi2", "sha_ni", "avx_vnni", "avx512f",
                  "avx512dq", "avx512cd", "avx512bw", "avx512vl", "avx512_vnni", "avx512_bf16", "avx512_fp16",
                  "avx512ifma", "avx512vbmi", "amx_tile", "amx_bf16", "amx_int8")
#: Environment variables that steer kernel dispatch or threading, recorded whenever set.
DISPATCH_ENV_PREFIXES = ("MKL_", "OMP_", "ATEN_", "ONEDNN_", "DNNL_", "OPENBLAS_", "KMP_", "CUBLAS_", "CUDA_",
                         "GOTO_", "BLIS_", "VECLIB_")


@functools.lru_cache(maxsize=1)
def cpu() -> dict[str, Any]:
    """Vendor, model, family/model/stepping and dispatch flags of the first CPU (Linux /proc/cpuinfo)."""
    info: dict[str, Any] = {"cores": os.cpu_count()}
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as fh:
            text = fh.read(1 << 20)
    except OSError:
        import platform

        info["processor"] = platform.processor() or platform.machine()
        return info
    block = text.split("\n\n", 1)[0]
    fields = {}
    for line in block.splitlines():
        key, sep, value = line.partition(":")
        if sep:
            fields[key.strip()] = value.strip()
    for key, name in (("vendor_id", "vendor"), ("model name", "model_name"), ("cpu family", "family"),
                      ("model", "model"), ("stepping", "stepping")):
        if key in fields:
            info[name] = fields[key]
    flags = set(fields.get("flags", "").split())
    info["flags"] = [f for f in DISPATCH_FLAGS if f in flags]
    return info


def dispatch_env(environ: dict[str, str] | None = None) -> dict[str, str]:
    env = os.environ if environ is None else environ
    return {k: v for k, v in sorted(env.items()) if k.startswith(DISPATCH_ENV_PREFIXES)}


@functools.lru_cache(maxsize=1)
def _distributions_of_modules() -> dict[str, list[str]]:
    from importlib import metadata

    try:
        return {k: list(v) for k, v in metadata.packages_distributions().items()}
    except Exception:  # noqa: BLE001 - a broken installation must not break a test
        return {}


@functools.lru_cache(maxsize=512)
def _numerical(dist: str) -> str | None:
    """The version of `dist` when it is torch or NumPy or depends on one of them, else None."""
    from importlib import metadata

    try:
        if dist.lower() in ("torch", "numpy"):
            return metadata.version(dist)
        requires = metadata.requires(dist) or []
        if any(re.match(r"(torch|numpy)\b", r.strip(), re.I) for r in requires):
            return metadata.version(dist)
    except Exception:  # noqa: BLE001 - broken metadata of one package must not break a test
        return None
    return None


def imported_distributions() -> dict[str, str]:
    """Name -> version of every installed numerical distribution (torch, NumPy, or one that depends on
    them) whose top-level module this process imported: an optimizer or model library included."""
    count = len(sys.modules)
    if _LAST[0] == count:  # nothing imported since the last call (a suite of guarded tests): same answer
        return dict(_LAST[1])
    mapping = _distributions_of_modules()
    names = sorted({d for mod in list(sys.modules) if "." not in mod for d in mapping.get(mod, ())})
    out = {}
    for name in names:
        version = _numerical(name)
        if version is not None:
            out[name] = version
    _LAST[:] = [count, out]
    return dict(out)


_LAST: list[Any] = [-1, {}]


def library_versions(config_text: str) -> dict[str, str]:
    """BLAS/LAPACK (oneMKL) and oneDNN versions as `torch.__config__.show()` states them."""
    out = {}
    for line in config_text.splitlines():
        line = line.strip(" -")
        if re.search(r"Math Kernel Library|oneMKL|OpenBLAS", line, re.I) and "mkl" not in out:
            out["mkl"] = line[:160]
        elif re.search(r"MKL-DNN|oneDNN|DNNL", line, re.I) and "onednn" not in out:
            out["onednn"] = line[:160]
    return out
