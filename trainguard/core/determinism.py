"""Seeding, deterministic mode, and putting every global back afterwards.

A guarded run is only comparable with its golden if it starts from the same random
state and uses deterministic kernels; and a guarded test must not change the world for
the tests that run after it. This module owns both halves: `GlobalState.capture()`
before, `guarded_setup()` to seed and pin, `GlobalState.restore()` after.
"""

from __future__ import annotations

import os
import random
from dataclasses import dataclass, field
from typing import Any

import numpy as np

#: Environment variables set for deterministic kernels, with the values trainguard uses.
#: CUBLAS_WORKSPACE_CONFIG: cuBLAS needs a fixed workspace for reproducible GEMMs on
#: CUDA >= 10.2 (PyTorch "Reproducibility" notes); it only takes effect if set before
#: CUDA initialises, so it is set before the test body and recorded in the fingerprint.
DETERMINISTIC_ENV = {"CUBLAS_WORKSPACE_CONFIG": ":4096:8"}

_UNSET = object()


@dataclass
class GlobalState:
    """A snapshot of every process-wide setting a guarded run may touch."""

    python_random: Any = None
    numpy_random: Any = None
    torch_rng: Any = None
    cuda_rng: Any = None
    deterministic: bool = False
    deterministic_warn_only: bool = False
    num_threads: int = 1
    default_dtype: Any = None
    anomaly: bool = False
    anomaly_check_nan: bool = True
    cudnn_benchmark: bool = False
    cudnn_deterministic: bool = False
    cudnn_enabled: bool = True
    matmul_tf32: bool = False
    cudnn_tf32: bool = True
    matmul_precision: str = "highest"
    env: dict[str, Any] = field(default_factory=dict)

    @classmethod
    def capture(cls) -> GlobalState:
        import torch

        state = cls(
            python_random=random.getstate(),
            numpy_random=np.random.get_state(),
            torch_rng=torch.get_rng_state(),
            cuda_rng=_cuda_rng_state(torch),
            deterministic=torch.are_deterministic_algorithms_enabled(),
            deterministic_warn_only=torch.is_deterministic_algorithms_warn_only_enabled(),
            num_threads=torch.get_num_threads(),
            default_dtype=torch.get_default_dtype(),
            anomaly=torch.is_anomaly_enabled(),
            anomaly_check_nan=_anomaly_check_nan(torch),
            cudnn_benchmark=torch.backends.cudnn.benchmark,
            cudnn_deterministic=torch.backends.cudnn.deterministic,
            cudnn_enabled=torch.backends.cudnn.enabled,
            matmul_tf32=torch.backends.cuda.matmul.allow_tf32,
            cudnn_tf32=torch.backends.cudnn.allow_tf32,
            matmul_precision=torch.get_float32_matmul_precision(),
            env={k: os.environ.get(k, _UNSET) for k in DETERMINISTIC_ENV},
        )
        return state

    def restore(self) -> None:
        import torch

        random.setstate(self.python_random)
        np.random.set_state(self.numpy_random)
        torch.set_rng_state(self.torch_rng)
        if self.cuda_rng is not None:
            torch.cuda.set_rng_state_all(self.cuda_rng)
        torch.use_deterministic_algorithms(self.deterministic, warn_only=self.deterministic_warn_only)
        if torch.get_num_threads() != self.num_threads:
            torch.set_num_threads(self.num_threads)
        torch.set_default_dtype(self.default_dtype)
        torch.set_anomaly_enabled(self.anomaly, self.anomaly_check_nan)
        torch.backends.cudnn.benchmark = self.cudnn_benchmark
        torch.backends.cudnn.deterministic = self.cudnn_deterministic
        torch.backends.cudnn.enabled = self.cudnn_enabled
        torch.backends.cuda.matmul.allow_tf32 = self.matmul_tf32
        torch.backends.cudnn.allow_tf32 = self.cudnn_tf32
        torch.set_float32_matmul_precision(self.matmul_precision)
        for key, value in self.env.items():
            if value is _UNSET:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value


def _cuda_rng_state(torch: Any) -> Any:
    # Asking for CUDA RNG state would initialise CUDA; only do it if something already did.
    if torch.cuda.is_available() and torch.cuda.is_initialized():
        return torch.cuda.get_rng_state_all()
    return None


def _anomaly_check_nan(torch: Any) -> bool:
    getter = getattr(torch, "is_anomaly_check_nan_enabled", None)
    return bool(getter()) if getter else True


def guarded_setup(seed: int, deterministic: bool | str = True, threads: int | None = None) -> None:
    """Seed every RNG from `seed` and pin the settings that make kernels reproducible.

    `deterministic` is True (ops without a deterministic implementation raise), "warn"
    (they warn), or False (leave torch's deterministic mode off). `threads` sets torch's
    intra-op thread count (reductions may group differently with another count).
    """
    import torch

    if threads is not None:
        torch.set_num_threads(threads)
    for key, value in DETERMINISTIC_ENV.items():
        os.environ.setdefault(key, value)
    random.seed(seed)
    np.random.seed(seed)
    torch.manual_seed(seed)  # seeds every CUDA device too, lazily
    if deterministic:
        torch.use_deterministic_algorithms(True, warn_only=(deterministic == "warn"))
    else:
        torch.use_deterministic_algorithms(False)
    torch.backends.cudnn.benchmark = False
    torch.backends.cudnn.deterministic = bool(deterministic)
    torch.backends.cuda.matmul.allow_tf32 = False
    torch.backends.cudnn.allow_tf32 = False
    torch.set_float32_matmul_precision("highest")


#: Text of torch's deterministic-mode alerts (warn_only=True warns with it, True raises with it).
_DETERMINISM_ALERT = ("does not have a deterministic implementation", "use_deterministic_algorithms")


def is_determinism_alert(text: str) -> bool:
    """True for the message torch gives for an op without a deterministic implementation."""
    return any(marker in text for marker in _DETERMINISM_ALERT)


def is_nondeterminism_error(exc: BaseException) -> bool:
    """True for the RuntimeError torch raises in deterministic mode for an op without a deterministic kernel."""
    return isinstance(exc, RuntimeError) and is_determinism_alert(str(exc))
