"""The text of the store's JSON columns (qcfit.store.jsontext), on SQLite and PostgreSQL."""

from __future__ import annotations

import datetime as dt
import json
import math
from types import MappingProxyType

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from qcfit.store import charts as sql
from qcfit.store import jsontext
from qcfit.store.engine import read_tx, write_tx

_json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**53), 2**53) | st.text(max_size=8)
    | st.floats(allow_nan=False, allow_infinity=False),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=6), inner, max_size=4),
    max_leaves=20,
)


@given(_json_values)
def test_reads_back_what_the_standard_library_reads(value) -> None:
    text = jsontext.dumps(value)
    assert jsontext.loads(text) == value
    assert json.loads(text) == value  # any JSON reader gets the same values


def test_numpy_values_tuples_and_read_only_mappings_are_plain_json() -> None:
    value = {"n": np.int64(7), "p": np.float64(0.25), "a": np.arange(3), "t": (1, 2),
             "m": MappingProxyType({"x": 1}), "f32": np.float32(0.5)}
    assert jsontext.loads(jsontext.dumps(value)) == {
        "n": 7, "p": 0.25, "a": [0, 1, 2], "t": [1, 2], "m": {"x": 1}, "f32": 0.5}


def test_non_finite_floats_are_written_as_null() -> None:
    # JSON has no NaN/Infinity (PostgreSQL refuses them); the stdlib would write invalid JSON
    text = jsontext.dumps({"a": math.nan, "b": [math.inf, -math.inf, 1.5]})
    assert json.loads(text) == {"a": None, "b": [None, None, 1.5]}


def test_key_order_is_kept() -> None:
    assert jsontext.dumps({"z": 1, "a": 2}) == '{"z":1,"a":2}'


def test_json_column_round_trip_on_the_store(migrated_engine) -> None:
    details = {"limits": {"ewma": [1.25, -1.0]}, "n": np.int64(3), "why": "ok", "nan": math.nan}
    with write_tx(migrated_engine) as conn:
        sql.put_calibration(conn, {"key": "k1", "chart": "bank", "threshold": 2.5,
                                   "target_arl": 370.0, "details": details,
                                   "created_utc": dt.datetime(2026, 1, 1)})
    with read_tx(migrated_engine) as conn:
        got = sql.get_calibrations(conn, ["k1"])["k1"]["details"]
    assert got == {"limits": {"ewma": [1.25, -1.0]}, "n": 3, "why": "ok", "nan": None}
