"""Integer codes for text keys: the shortcuts that skip reading every row's text must give
exactly what the plain text route gives (the reference here is polars' own string handling)."""

from __future__ import annotations

from datetime import date

import numpy as np
import polars as pl
import pyarrow as pa
import pytest
from polars.testing import assert_frame_equal, assert_series_equal

from attribution.decompose import _enum_column, _text_codes
from attribution.runner import _attach_series_extra
from attribution.timing_inputs import book_positions


def _plain_positions(values: pl.Series, book: list[str]) -> np.ndarray:
    where = {text: i for i, text in enumerate(book)}
    return np.array([where[v] for v in values.cast(pl.String).to_list()])


@pytest.mark.parametrize(
    "book",
    [["a", "b", "c"], ["a", "b", "c", "d"], ["0", "a", "b", "c"]],
    ids=["same", "wider", "shifted"],
)
def test_book_positions_of_an_enum_equal_the_text_lookup(book: list[str]) -> None:
    values = pl.Series("portfolio_id", ["b", "a", "c", "a", "b"]).cast(pl.Enum(["a", "b", "c"]))
    np.testing.assert_array_equal(book_positions(values, book), _plain_positions(values, book))


def test_book_positions_of_text_and_of_an_enum_with_unused_categories() -> None:
    # A skipped portfolio stays in the shard's dictionary but has no rows: harmless.
    text = pl.Series("portfolio_id", ["p2", "p1", "p2"])
    enum = text.cast(pl.Enum(["p0", "p1", "p2"]))
    book = ["p1", "p2"]
    np.testing.assert_array_equal(book_positions(text, book), [1, 0, 1])
    np.testing.assert_array_equal(book_positions(enum, book), [1, 0, 1])


def test_book_positions_refuses_a_used_category_outside_the_book() -> None:
    values = pl.Series("asset_class", ["x", "y"]).cast(pl.Enum(["x", "y"]))
    with pytest.raises(ValueError, match="asset_class"):
        book_positions(values, ["x"])


def test_enum_column_from_codes_equals_the_text() -> None:
    book = tuple(f"pf{i:04d}" for i in range(300))  # more than 256: a UInt16 physical type
    codes = np.random.default_rng(7).integers(0, len(book), size=2_000)
    column = pa.chunked_array([_text_codes(codes, book)])
    got = _enum_column("portfolio_id", column)
    assert isinstance(got.dtype, pl.Enum)
    assert got.dtype.categories.to_list() == list(book)
    expected = pl.Series("portfolio_id", [book[c] for c in codes])
    assert_series_equal(got.cast(pl.String), expected)


def test_enum_column_with_different_dictionaries_falls_back_to_the_text() -> None:
    column = pa.chunked_array(
        [_text_codes(np.array([1, 0]), ("a", "b")), _text_codes(np.array([0]), ("c",))]
    )
    got = _enum_column("asset_class", column)
    assert got.cast(pl.String).to_list() == ["b", "a", "c"]


def _series_and_extra() -> tuple[pl.DataFrame, pl.DataFrame]:
    dates = [date(2024, 1, 31), date(2024, 2, 29)]
    series = pl.DataFrame(
        {
            "portfolio_id": ["a", "a", "b", "b"],
            "period_end": dates * 2,
            "active_return": [0.01, 0.02, 0.03, 0.04],
        }
    )
    extra = series.select("portfolio_id", "period_end").with_columns(
        exposure=pl.Series([1.0, 2.0, 3.0, 4.0])
    )
    return series, extra


def test_attach_series_extra_side_by_side_equals_the_join() -> None:
    series, extra = _series_and_extra()
    joined = series.join(extra, on=["portfolio_id", "period_end"], how="left")
    assert_frame_equal(_attach_series_extra(series, extra), joined)


@pytest.mark.parametrize("change", ["reordered", "fewer_rows"])
def test_attach_series_extra_joins_when_the_keys_do_not_line_up(change: str) -> None:
    series, extra = _series_and_extra()
    extra = extra.reverse() if change == "reordered" else extra.head(3)
    joined = series.join(extra, on=["portfolio_id", "period_end"], how="left")
    assert_frame_equal(_attach_series_extra(series, extra), joined)


@pytest.mark.parametrize("ids_known", [True, False], ids=["ids-known", "ids-unknown"])
def test_shard_read_keeps_only_the_shard_when_an_orphan_sits_inside_its_range(
    tmp_path, ids_known: bool
) -> None:
    # "b2" lies between "b1" and "b3" but is not in the shard (a portfolio without holdings):
    # the range filter alone would let it in; the reader must fall back to the id set.
    from attribution.load import TableReader

    path = tmp_path / "segment_returns.parquet"
    pl.DataFrame(
        {
            "portfolio_id": ["a", "b1", "b2", "b3", "c"],
            "period_end": [date(2024, 1, 31)] * 5,
            "asset_class": ["x"] * 5,
            "return": [0.1, 0.2, 0.3, 0.4, 0.5],
        }
    ).write_parquet(path)
    reader = TableReader(path, "segment_returns")
    if ids_known:
        assert reader.portfolio_ids().to_list() == ["a", "b1", "b2", "b3", "c"]
    assert reader.read_shard(["b1", "b3"])["portfolio_id"].to_list() == ["b1", "b3"]
    assert reader.read_shard(["b1", "b2", "b3"])["return"].to_list() == [0.2, 0.3, 0.4]
