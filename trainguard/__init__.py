"""trainguard: guard seeded training runs with Parquet golden files.

The public API is listed in `__all__`. Names are loaded on first use, so that importing
the package (which pytest does to load the plugin) imports neither torch, NumPy nor
pyarrow.
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

__version__ = "0.1.0"

_EXPORTS = {
    "Trajectory": "capture",
    "Run": "record",
    "MetricSeries": "record",
    "TensorRecord": "record",
    "read_run": "golden",
    "write_run": "golden",
    "FORMAT_VERSION": "golden",
    "compare": "comparison",
    "Comparison": "comparison",
    "Policy": "tolerance",
    "Tolerance": "tolerance",
    "fingerprint": "environment",
    "golden_folder": "paths",
    "check": "guard",
    "bless": "guard",
    "GuardResult": "guard",
    "describe_comparison": "report",
    "TrainguardError": "errors",
    "UsageError": "errors",
    "GoldenError": "errors",
    "GoldenMissingError": "errors",
    "GoldenCorruptError": "errors",
    "GoldenVersionError": "errors",
}

__all__ = sorted(_EXPORTS) + ["__version__"]


def __getattr__(name: str) -> Any:
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'trainguard' has no attribute {name!r}")
    value = getattr(import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return __all__
