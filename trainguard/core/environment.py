"""The environment fingerprint stored with every golden.

Bit-exact training results hold only for the same library versions, kernels, thread
count and hardware. When a comparison fails, the first question is "what else changed?";
the fingerprint answers it, and the report shows its differences next to the values.
"""

from __future__ import annotations

import functools
import os
import platform
import sys
from typing import Any

#: Environment variables recorded when set, besides every one with a dispatch prefix (`machine.DISPATCH_ENV_PREFIXES`).
RECORDED_ENV = (
    "CUBLAS_WORKSPACE_CONFIG",
    "OMP_NUM_THREADS",
    "MKL_NUM_THREADS",
    "OPENBLAS_NUM_THREADS",
    "OPENBLAS_CORETYPE",
    "MKL_CBWR",
    "ATEN_CPU_CAPABILITY",
    "CUDA_VISIBLE_DEVICES",
    "PYTHONHASHSEED",
)

#: Build settings of torch that select kernels (from `torch.__config__.show()`).
_BUILD_KEYS = ("BLAS_INFO", "LAPACK_INFO", "USE_MKL", "USE_MKLDNN", "USE_OPENMP", "USE_CUDA", "USE_CUDNN", "USE_ROCM")


def _version(dist: str) -> str | None:
    from importlib import metadata

    try:
        return metadata.version(dist)
    except metadata.PackageNotFoundError:
        return None


@functools.lru_cache(maxsize=1)
def _static_part() -> dict[str, Any]:
    import numpy
    import torch

    config = torch.__config__.show()
    build: dict[str, str] = {}
    for item in config.replace("\n", ",").split(","):
        key, sep, value = item.strip().partition("=")
        if sep and key in _BUILD_KEYS:
            build[key] = value.strip()
    parallel = ""
    for line in torch.__config__.parallel_info().splitlines():
        if line.startswith("ATen parallel backend:"):
            parallel = line.split(":", 1)[1].strip()
    try:
        capability = torch.backends.cpu.get_cpu_capability()
    except Exception:  # older torch without the query
        capability = "unknown"
    from .machine import cpu, library_versions

    return {
        "cpu": cpu(),
        "libraries": library_versions(config),
        "python": platform.python_version(),
        "implementation": platform.python_implementation(),
        "os": platform.system(),
        "machine": platform.machine(),
        "byteorder": sys.byteorder,
        "packages": {
            "torch": str(torch.__version__),
            "numpy": str(numpy.__version__),
            "pyarrow": _version("pyarrow"),
            "trainguard": _version("trainguard"),
        },
        "torch_build": build,
        "parallel_backend": parallel,
        "cpu_capability": capability,
    }


def _device_part(torch: Any) -> dict[str, Any]:
    if not torch.cuda.is_available():
        return {"type": "cpu"}
    return {
        "type": "cuda",
        "cuda": torch.version.cuda,
        "cudnn": torch.backends.cudnn.version(),
        "names": [torch.cuda.get_device_name(i) for i in range(torch.cuda.device_count())],
    }


def fingerprint() -> dict[str, Any]:
    """The current environment as a JSON-ready dict (nested, string keys)."""
    import torch

    from .machine import dispatch_env, imported_distributions

    fp = dict(_static_part())
    fp["packages"] = dict(fp["packages"])
    fp["threads"] = {"intra_op": torch.get_num_threads(), "inter_op": torch.get_num_interop_threads()}
    fp["deterministic"] = {
        "algorithms": torch.are_deterministic_algorithms_enabled(),
        "warn_only": torch.is_deterministic_algorithms_warn_only_enabled(),
        "cudnn_deterministic": bool(torch.backends.cudnn.deterministic),
        "cudnn_benchmark": bool(torch.backends.cudnn.benchmark),
        "matmul_allow_tf32": bool(torch.backends.cuda.matmul.allow_tf32),
        "cudnn_allow_tf32": bool(torch.backends.cudnn.allow_tf32),
        "float32_matmul_precision": torch.get_float32_matmul_precision(),
    }
    fp["default_dtype"] = str(torch.get_default_dtype()).replace("torch.", "")
    fp["device"] = _device_part(torch)
    env = {k: os.environ[k] for k in RECORDED_ENV if k in os.environ}
    env.update(dispatch_env())
    fp["env"] = dict(sorted(env.items()))
    fp["packages"].update(imported_distributions())  # optimizer and model libraries too, not only torch
    return fp
