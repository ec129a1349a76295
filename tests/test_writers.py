"""CSV tables: the column-at-once writer gives the bytes pandas' ``DataFrame.to_csv`` gives.

Reference: pandas ``to_csv(index=False, float_format="%.10g")`` (a general-purpose library; the
format is the project's own choice, docs/outputs.md), on every kind of column the audit writes and
on the kinds the fast path hands back to pandas.
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest

from landcheck.outputs.writers import CSV_FLOAT_FORMAT, _csv_column_text, _write_csv_slice, csv_rows


def _mixed_frame(n: int = 257, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(0, 1e4, n)
    x[::17] = np.nan
    x[1] = -0.0
    x[2] = np.inf
    x[3] = 1e-300
    x[4] = 123456789012.5
    words = np.array(["plain", "with, comma", 'with "quotes"', "two\nlines", "", "m²  ≥ 18 %"], dtype=object)
    text = words[rng.integers(0, len(words), n)].copy()
    text[::13] = None
    return pd.DataFrame(
        {
            "parcel_id": np.arange(n, dtype=np.int64) * 7919,
            "area_m2": x,
            "share32": (rng.random(n) / 3).astype(np.float32),
            "flag": rng.random(n) > 0.5,
            "text": text,
            "arrow_text": pd.array([None if t is None else str(t) for t in text], dtype="string[pyarrow]"),
            "arrow_float": pd.array(np.where(np.isnan(x), None, x).tolist(), dtype="double[pyarrow]"),
            "nullable_int": pd.array([None if i % 5 == 0 else i for i in range(n)], dtype="Int64"),
            "nullable_bool": pd.array([None if i % 7 == 0 else bool(i % 2) for i in range(n)], dtype="boolean"),
            "empty": pd.array([None] * n, dtype="string[pyarrow]"),
        }
    )


def _pandas_text(frame: pd.DataFrame) -> str:
    buf = io.StringIO()
    frame.to_csv(buf, index=False, float_format=CSV_FLOAT_FORMAT)
    return buf.getvalue()


def _fast_text(frame: pd.DataFrame) -> str:
    buf = io.StringIO()
    _write_csv_slice(buf, frame, header=True)
    return buf.getvalue()


def test_every_column_kind_matches_pandas_bytes():
    frame = _mixed_frame()
    for name in frame.columns:  # each kind is handled by the fast path itself, not handed to pandas
        assert _csv_column_text(frame[name]) is not None, name
    assert _fast_text(frame) == _pandas_text(frame)


@pytest.mark.parametrize(
    "column",
    [
        pd.Series(pd.Categorical(["a", "b", None])),
        pd.Series(pd.to_datetime(["2026-01-02", None, "2026-03-04"])),
        pd.Series([1.5, "mixed", None], dtype=object),
    ],
    ids=["categorical", "datetime", "mixed-object"],
)
def test_other_kinds_are_left_to_pandas(column):
    frame = pd.DataFrame({"id": [1, 2, 3], "other": column})
    assert _csv_column_text(frame["other"]) is None
    assert _fast_text(frame) == _pandas_text(frame)


def test_slices_give_the_whole_table(tmp_path):
    frame = _mixed_frame(1000, seed=5)
    with csv_rows(tmp_path / "slices.csv") as add:
        for i in range(0, 1000, 333):
            add(frame.iloc[i : i + 333])
    assert (tmp_path / "slices.csv").read_text(encoding="utf-8") == _pandas_text(frame)
