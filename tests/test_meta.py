"""core.meta and core.verdicts: the metadata's JSON keys, validation and immutability; verdict words."""

from __future__ import annotations

import json

import pytest

from trainguard.core.meta import GoldenMeta, MetaError, utc_stamp
from trainguard.core.records import Run
from trainguard.core.verdicts import CHANGED, CLOSE, IDENTICAL, Verdict, worst


def test_json_keys_are_kept_and_unknown_keys_pass_through():
    data = {"nodeid": "t.py::test_rye", "seed": 4, "deterministic": "warn", "reason": "new flour",
            "calibrated": {"rtol": 1e-4}, "kiln": {"zone": [1, 2]}}
    meta = GoldenMeta.from_json(data, format_version=2)
    assert meta.to_json() == data and "format_version" not in meta.to_json()
    assert meta["format_version"] == 2 and meta.seed == 4 and meta.extra == {"kiln": {"zone": [1, 2]}}
    assert json.loads(json.dumps(meta.to_json(), sort_keys=True)) == data


@pytest.mark.parametrize("key, value", [("seed", "7"), ("seed", True), ("reason", 3), ("tolerances", [1]),
                                        ("max_values", 1.5)])
def test_wrong_types_are_refused_naming_the_key(key, value):
    with pytest.raises(MetaError, match=repr(key)):
        GoldenMeta.from_json({key: value})


def test_meta_is_replaced_never_edited():
    meta = GoldenMeta.from_json({"seed": 1, "reason": "a"})
    with pytest.raises(TypeError):
        meta["reason"] = "b"  # type: ignore[index]
    changed = meta.with_(reason="b", calibrated={"rtol": 1e-3})
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
