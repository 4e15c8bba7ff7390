"""trainguard: guard seeded training runs with Parquet golden files.

The public API is listed in `__all__`. Names are loaded on first use, so that importing
the package (which pytest does to load the plugin) imports neither torch, NumPy nor
pyarrow. The package has three layers, each importing only from below (DEVELOPERS.md):
`trainguard.core` (records, store, comparison, reports as data), `trainguard.tools`
(workflows that run pytest in subprocesses) and `trainguard.skins` (the pytest plugin
and the CLI).
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

from .core.version import __version__

_EXPORTS = {
    "Trajectory": "core.capture",
    "Run": "core.records",
    "MetricSeries": "core.records",
    "TensorRecord": "core.records",
    "TraceEntry": "core.records",
    "Stats": "core.records",
    "GoldenMeta": "core.meta",
    "GoldenStore": "core.store",
    "read_run": "core.store",
    "write_run": "core.store",
    "FORMAT_VERSION": "core.golden_format",
    "compare": "core.comparison",
    "Comparison": "core.comparison",
    "Policy": "core.tolerance",
    "Tolerance": "core.tolerance",
    "Verdict": "core.verdicts",
    "fingerprint": "core.environment",
    "golden_folder": "core.paths",
    "check": "core.guard",
    "bless": "core.guard",
    "GuardResult": "core.guard",
    "describe_comparison": "core.report",
    "TrainguardError": "core.errors",
    "UsageError": "core.errors",
    "GoldenError": "core.errors",
    "GoldenMissingError": "core.errors",
    "GoldenCorruptError": "core.errors",
    "GoldenVersionError": "core.errors",
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
