"""core.meta and core.verdicts: the metadata's JSON keys, validation and immutability; verdict words."""

from __future__ import annotations

import json

import pytest

from trainguard.core.meta import GoldenMeta, MetaError, utc_stamp
from trainguard.core.records import Run
from trainguard.core.verdicts import CHANGED, CLOSE, IDENTICAL, Verdict, worst


def test_json_keys_are_kept_and_unknown_keys_are_refused():
    data = {"nodeid": "t.py::test_rye", "seed": 4, "deterministic": "warn", "reason": "new flour",
            "calibrated": {"rtol": 1e-4, "atol": 1e-7}}
    meta = GoldenMeta.from_json(data, format_version=2)
    assert meta.to_json() == data and "format_version" not in meta.to_json()
    assert meta["format_version"] == 2 and meta.seed == 4 and meta.extra == {}
    assert json.loads(json.dumps(meta.to_json(), sort_keys=True)) == data
    with pytest.raises(MetaError, match="'kiln'.*unknown key"):
        GoldenMeta.from_json({**data, "kiln": {"zone": [1, 2]}})


@pytest.mark.parametrize("key, value", [("seed", "7"), ("seed", True), ("seed", -1), ("seed", 2**32), ("reason", 3),
                                        ("reason", "x" * 5000), ("tolerances", [1]), ("max_values", 1.5),
                                        ("deterministic", 1), ("deterministic", "maybe"),
                                        ("blessed_at", "yesterday"), ("fingerprint", {"cpu": {"x": object()}})])
def test_wrong_types_and_ranges_are_refused_naming_the_key(key, value):
    with pytest.raises(MetaError, match=repr(key)):
        GoldenMeta.from_json({key: value})


# A crafted tolerance is the silent off-switch: each of these would let any change through.
# float("inf") and 1e300 are IEEE 754 values that JSON carries (Python writes Infinity); the caps
# are the module's documented MAX_* constants.
@pytest.mark.parametrize("entry", [
    {"calibrated": {"rtol": 1e300, "atol": 0.0}},
    {"calibrated": {"rtol": "inf", "atol": 0.0}},
    {"calibrated": {"rtol": float("inf"), "atol": 0.0}},
    {"calibrated": {"rtol": float("nan"), "atol": 0.0}},
    {"calibrated": {"rtol": 1e-3, "atol": -1.0}},
    {"calibrated": {"rtol": 0.02, "atol": 0.0}},          # over the calibrated cap (1e-2)
    {"calibrated": {"rtol": 1e-3, "atol": 1e-3}},         # over the calibrated atol cap (1e-4)
    {"calibrated": {"rtol": 1e-3}},                       # incomplete
    {"calibrated": {"rtol": 1e-3, "atol": 0.0, "metrics": [["loss", 9]]}},
    {"calibrated": {"rtol": 1e-3, "atol": 0.0, "metrics": {"loss": {"rtol": 5.0}}}},
    {"calibrated": {"rtol": 1e-3, "atol": 0.0, "exact": False, "switch": "off"}},
    {"tolerances": {"rtol": 0.6, "atol": 0.0, "exact": False}},
    {"tolerances": {"rtol": 1e-5, "atol": 2.0, "exact": False}},
    {"tolerances": {"rtol": 1e-5, "atol": 0.0, "exact": "no"}},
    {"tolerances": {"rtol": 1e-5, "atol": 0.0, "metrics": {"loss": {"atol": float("inf")}}}},
])
def test_tolerances_outside_their_caps_are_refused(entry):
    with pytest.raises(MetaError) as info:
        GoldenMeta.from_json(entry)
    assert next(iter(entry)) in str(info.value)


def test_tolerance_caps_accept_the_largest_allowed_values():
    from trainguard.core.meta import MAX_ATOL, MAX_CALIBRATED_ATOL, MAX_CALIBRATED_RTOL, MAX_RTOL

    meta = GoldenMeta.from_json({"calibrated": {"rtol": MAX_CALIBRATED_RTOL, "atol": MAX_CALIBRATED_ATOL},
                                 "tolerances": {"rtol": MAX_RTOL, "atol": MAX_ATOL, "exact": False, "metrics": {}}})
    assert meta.calibrated["rtol"] == 1e-2 and meta.tolerances["rtol"] == 0.5


def test_meta_is_replaced_never_edited():
    meta = GoldenMeta.from_json({"seed": 1, "reason": "a"})
    with pytest.raises(TypeError):
        meta["reason"] = "b"  # type: ignore[index]
    changed = meta.with_(reason="b", calibrated={"rtol": 1e-3, "atol": 0.0})
    assert meta["reason"] == "a" and changed["reason"] == "b" and "calibrated" in changed
    assert "calibrated" not in changed.without("calibrated")
    run = Run(meta={"seed": 2})  # a dict given to a Run is validated into a GoldenMeta
    assert isinstance(run.meta, GoldenMeta) and run.meta.seed == 2


def test_utc_stamp_is_iso_8601_with_z():
    import datetime as dt

    assert utc_stamp(dt.datetime(2026, 12, 1, 21, 57, 42, tzinfo=dt.timezone.utc)) == "2026-12-01T21:57:42Z"


def test_verdict_words_are_the_reported_strings():
    assert (IDENTICAL, CLOSE, CHANGED) == ("identical", "within tolerance", "changed")
    assert Verdict("no golden") is Verdict.NO_GOLDEN
    assert worst([IDENTICAL, CLOSE]) == CLOSE and worst([]) == IDENTICAL
