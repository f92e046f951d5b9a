"""JSON-safe records: what the standard library's strict JSON encoder accepts (``allow_nan=False``)."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from models.records import json_record, json_records, json_value


def test_non_finite_numbers_become_null_and_numpy_scalars_plain_numbers() -> None:
    frame = pd.DataFrame({"id": ["a", None], "n": [np.int64(3), np.int64(4)], "x": [np.nan, np.inf],
                          "y": [2.5, -np.inf], "flag": [True, False]})
    records = json_records(frame)
    # the strict encoder refuses NaN and infinities (Python docs, json.dumps allow_nan)
    with pytest.raises(ValueError):
        json.dumps(frame.to_dict(orient="records"), allow_nan=False)
    text = json.dumps(records, allow_nan=False)
    assert json.loads(text) == [{"id": "a", "n": 3, "x": None, "y": 2.5, "flag": True},
                                {"id": None, "n": 4, "x": None, "y": None, "flag": False}]
    assert list(records[0]) == list(frame.columns)


def test_values_keep_their_kind() -> None:
    record = json_record({"count": np.float64(480.0), "idx": np.int32(7), "none": None, "text": "t",
                          "nan": np.float32("nan"), "ok": np.bool_(True)})
    assert json.dumps(record, allow_nan=False) == (
        '{"count": 480.0, "idx": 7, "none": null, "text": "t", "nan": null, "ok": true}')
    assert type(json_value(np.float32(1.5))) is float and type(json_value(np.int64(2))) is int
