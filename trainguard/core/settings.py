"""Reading the `trainguard` marker's arguments into validated settings.

Kept apart from the plugin so that the CLI can resolve the same settings, and so that
every wrong argument gets one clear message instead of a TypeError deep inside torch.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping

from .errors import UsageError
from .tolerance import DEFAULT_ATOL, DEFAULT_RTOL, Policy, Tolerance, check_tolerance_value

MARKER_ARGS = ("seed", "rtol", "atol", "exact", "metrics", "deterministic")
MARKER_SIGNATURE = (
    "@pytest.mark.trainguard(seed=0, rtol=None, atol=None, exact=False, metrics=None, deterministic=True)"
)


@dataclass(frozen=True)
class GuardSettings:
    seed: int
    policy: Policy
    deterministic: bool | str
    #: True when the marker itself set rtol, atol or exact: then tolerances calibrated into
    #: the golden (`trainguard calibrate --write`) do not override it.
    marker_tolerance: bool = False


def from_marker(args: tuple[Any, ...], kwargs: Mapping[str, Any], ini_rtol: float | None = None,
                ini_atol: float | None = None) -> GuardSettings:
    """Settings from a marker's arguments; tolerance precedence marker > ini > defaults."""
    where = "@pytest.mark.trainguard"
    if args:
        raise UsageError(f"{where}: takes keyword arguments only, got positional {args!r}; use {MARKER_SIGNATURE}")
    unknown = sorted(set(kwargs) - set(MARKER_ARGS))
    if unknown:
        raise UsageError(f"{where}: unknown argument(s) {', '.join(unknown)}; the marker takes {MARKER_SIGNATURE}")
    seed = kwargs.get("seed", 0)
    if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed < 2**32:
        raise UsageError(f"{where}: seed must be an integer from 0 to 2**32 - 1, got {seed!r}")
    exact = kwargs.get("exact", False)
    if not isinstance(exact, bool):
        raise UsageError(f"{where}: exact must be True or False, got {exact!r}")
    deterministic = kwargs.get("deterministic", True)
    if deterministic not in (True, False, "warn"):
        raise UsageError(f"{where}: deterministic must be True, False or 'warn', got {deterministic!r}")
    rtol = kwargs.get("rtol")
    atol = kwargs.get("atol")
    rtol = check_tolerance_value("rtol", rtol, where) if rtol is not None else (
        ini_rtol if ini_rtol is not None else DEFAULT_RTOL)
    atol = check_tolerance_value("atol", atol, where) if atol is not None else (
        ini_atol if ini_atol is not None else DEFAULT_ATOL)
    default = Tolerance(rtol, atol)
    metrics_arg = kwargs.get("metrics")
    per_metric: dict[str, Tolerance] = {}
    if metrics_arg is not None:
        if not isinstance(metrics_arg, Mapping):
            raise UsageError(f'{where}: metrics must be a dict such as {{"loss": {{"rtol": 1e-4, "atol": 1e-6}}}}, '
                             f"got {type(metrics_arg).__name__}")
        for name, spec in metrics_arg.items():
            if not isinstance(name, str) or not isinstance(spec, Mapping):
                raise UsageError(f'{where}: metrics entries map a metric name to {{"rtol": ..., "atol": ...}}, '
                                 f"got {name!r}: {spec!r}")
            extra = sorted(set(spec) - {"rtol", "atol"})
            if extra:
                raise UsageError(f"{where}: metrics[{name!r}] takes only rtol and atol, got {', '.join(map(str, extra))}")
            per_metric[name] = Tolerance(
                check_tolerance_value("rtol", spec["rtol"], f"{where} metrics[{name!r}]") if "rtol" in spec else rtol,
                check_tolerance_value("atol", spec["atol"], f"{where} metrics[{name!r}]") if "atol" in spec else atol,
            )
    explicit = any(k in kwargs for k in ("rtol", "atol", "exact"))
    source = _source(kwargs.get("rtol") is not None, kwargs.get("atol") is not None, ini_rtol is not None,
                     ini_atol is not None, exact)
    sources = {name: "marker" for name in per_metric}
    policy = Policy(default=default, exact=exact, metrics=per_metric, source=source, metric_sources=sources)
    return GuardSettings(seed, policy, deterministic, explicit)


def _source(marker_rtol: bool, marker_atol: bool, ini_rtol: bool, ini_atol: bool, exact: bool) -> str:
    """Where the overall tolerance came from: one word when both parts agree, else "marker rtol, ini atol"."""
    if exact:
        return "marker"
    rtol = "marker" if marker_rtol else "ini" if ini_rtol else "default"
    atol = "marker" if marker_atol else "ini" if ini_atol else "default"
    return rtol if rtol == atol else f"{rtol} rtol, {atol} atol"


def calibrated_policy(policy: Policy, golden_meta: Mapping[str, Any]) -> Policy:
    """The tolerances `trainguard calibrate --write` stored in a golden, layered under the marker's.

    Precedence: marker > calibrated (golden metadata) > ini > defaults. Per-metric entries
    from the marker still win over calibrated ones.
    """
    cal = golden_meta.get("calibrated")
    if not isinstance(cal, Mapping):
        return policy
    # GoldenMeta validated it on read (finite, non-negative, under the calibrated caps).
    default = Tolerance(float(cal["rtol"]), float(cal["atol"]))
    metrics = {str(k): Tolerance(float(v.get("rtol", default.rtol)), float(v.get("atol", default.atol)))
               for k, v in (cal.get("metrics") or {}).items()}
    sources = dict.fromkeys(metrics, "calibrated")
    metrics.update(policy.metrics or {})
    sources.update(policy.metric_sources or {})
    return Policy(default=default, exact=policy.exact, metrics=metrics, source="calibrated", metric_sources=sources)


def parse_ini_float(name: str, raw: Any) -> float | None:
    if raw in (None, ""):
        return None
    try:
        value = float(raw)
    except (TypeError, ValueError):
        raise UsageError(f"ini option {name} = {raw!r} is not a number") from None
    return check_tolerance_value(name, value, f"ini option {name}")


def parse_ini_int(name: str, raw: Any, default: int) -> int:
    if raw in (None, ""):
        return default
    try:
        value = int(str(raw).replace("_", ""))
    except (TypeError, ValueError):
        raise UsageError(f"ini option {name} = {raw!r} is not an integer") from None
    if value < 0:
        raise UsageError(f"ini option {name} must be >= 0, got {value}")
    return value
