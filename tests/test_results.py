"""JSON-safe records: what the CLI prints and the store writes."""

from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pandas as pd

from diagnostics.results import FLAGS, jsonable, merge_flags, to_record


@dataclasses.dataclass(frozen=True)
class _Inner:
    sigma_m: float
    flags: tuple[str, ...] = ()


@dataclasses.dataclass(frozen=True)
class _Outer:
    name: str
    inner: _Inner
    values: np.ndarray
    count: np.int64
    ok: np.bool_
    when: pd.Timestamp


def test_jsonable_maps_every_value_kind_to_plain_json():
    value = _Outer("a", _Inner(float("nan"), ("clipped",)), np.array([1.0, np.inf]), np.int64(3),
                   np.bool_(True), pd.Timestamp("2026-11-30T06:00:00Z"))
    record = to_record(value, file="f.csv")
    assert list(record) == ["file", "name", "inner", "values", "count", "ok", "when"]
    assert record["inner"] == {"sigma_m": None, "flags": ["clipped"]}
    assert record["values"] == [1.0, None]
    assert record["count"] == 3 and type(record["count"]) is int
    assert record["ok"] is True
    assert record["when"] == "2026-11-30T06:00:00Z"
    # strict JSON: no NaN or Infinity tokens survive
    json.dumps(record, allow_nan=False)


def test_jsonable_keeps_plain_values_and_maps_non_finite_floats():
    assert jsonable(1.5) == 1.5 and jsonable(-math.inf) is None and jsonable(np.float32(2.0)) == 2.0
    assert jsonable("x") == "x" and jsonable(None) is None and jsonable(True) is True
    assert jsonable({1: np.nan}) == {"1": None}


def test_merge_flags_keeps_first_seen_order_and_known_flags():
    assert merge_flags(("clipped", "saturated"), ["saturated", "low_signal"]) == (
        "clipped", "saturated", "low_signal")
    assert all(flag in FLAGS for flag in merge_flags(("clipped",), ("low_signal",)))
