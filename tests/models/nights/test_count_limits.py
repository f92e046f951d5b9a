"""Plausibility limits of counts (per second of epoch length) and of dates, in every reader.

The limit, 10,000 counts per second of epoch (``NightOptions.max_counts_per_second``), is common
practice: over twice what a 16-bit count register holds per 15-s epoch (65,535, from memory of
count-device exports). The plausible date range 1990 .. 2100 is the readers' documented one.
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest
from factories import make_night, one_problem, problems_of

from models import (
    InvalidNightError,
    NightOptions,
    night_from_csv,
    night_from_json,
    night_from_parquet,
    night_to_csv,
    night_to_json,
    night_to_parquet,
    read_diary,
    read_recording,
)

LIMIT_PER_SECOND = 10_000  # common practice (module docstring)


@pytest.mark.parametrize("epoch_seconds", [15, 30, 60])
def test_a_count_at_the_limit_is_read_and_one_above_is_refused_with_its_epoch(epoch_seconds: int) -> None:
    limit = LIMIT_PER_SECOND * epoch_seconds
    night = make_night(240 * 30 // epoch_seconds, epoch_seconds=epoch_seconds)
    body = night_to_json(night)
    body["counts"][3] = limit
    assert night_from_json(body).counts[3] == limit
    body["counts"][5] = limit + 1
    body["counts"][9] = 1e308
    problem = one_problem(problems_of(night_from_json, body), "implausible_count")
    assert problem.location["epoch"] == 5 and problem.location["epochs"] == [5, 9]
    assert problem.location["values"] == [limit + 1, 1e308]
    assert problem.location["time"] == (night.start + pd.Timedelta(seconds=5 * epoch_seconds)).isoformat()
    assert "epoch 5" in problem.message


def test_csv_and_parquet_name_the_row_of_an_implausible_count() -> None:
    night = make_night(240)
    counts = night.counts.copy()
    counts[17] = 5e6
    bad = type(night)(participant_id="", start=night.start, epoch_seconds=30, counts=counts,
                      reference=night.reference)
    csv_problem = one_problem(problems_of(night_from_csv, night_to_csv(bad).encode()), "implausible_count")
    assert csv_problem.location["epoch"] == 17 and csv_problem.location["row"] == 19  # header is row 1
    parquet_problem = one_problem(problems_of(night_from_parquet, night_to_parquet(bad)), "implausible_count")
    assert parquet_problem.location["epoch"] == 17


def test_the_limit_is_an_option() -> None:
    body = night_to_json(make_night(240))
    body["counts"][0] = 31
    with pytest.raises(InvalidNightError):
        night_from_json(body, options=NightOptions(max_counts_per_second=1.0))
    assert night_from_json(body, options=NightOptions(max_counts_per_second=31 / 30)).counts[0] == 31


def test_the_recording_reader_refuses_implausible_counts_with_their_row() -> None:
    n = 6 * 3600 // 30
    times = pd.date_range("2031-03-02T18:00:00+01:00", periods=n, freq="30s")
    counts = np.random.default_rng(2).poisson(20, n).astype(float)
    counts[100] = 5e6
    frame = pd.DataFrame({"time": [t.isoformat() for t in times], "counts": counts})
    with pytest.raises(InvalidNightError) as info:
        read_recording(frame.to_csv(index=False).encode(), fmt="csv")
    problem = one_problem(info.value.problems, "implausible_count")
    assert problem.location["epoch"] == 100 and problem.location["row"] == 102


@pytest.mark.parametrize("date", ["9999-12-31", "0001-01-01", "1989-12-31", "2100-01-01"])
def test_diary_dates_outside_the_plausible_range_are_refused(date: str) -> None:
    from models import InvalidDiaryError

    text = f"date,bed_time,rise_time\n2031-05-04,22:40,06:10\n{date},22:40,06:10\n"
    with pytest.raises(InvalidDiaryError) as info:
        read_diary(text.encode(), tz="Europe/Oslo")
    problem = one_problem(info.value.problems, "implausible_date")
    assert problem.location["row"] == 3 and problem.location["field"] == "date"


def test_parquet_with_more_rows_than_the_limit_is_refused_from_its_metadata() -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    n = 300
    table = pa.table({"time": pa.array(pd.date_range("2031-03-02T22:41:00+01:00", periods=n, freq="30s")),
                      "counts": pa.array(np.zeros(n))})
    buffer = io.BytesIO()
    pq.write_table(table, buffer)
    problem = one_problem(problems_of(night_from_parquet, buffer.getvalue(), options=NightOptions(max_epochs=299)),
                          "too_many_epochs")
    assert "metadata" in problem.message and problem.location["values"] == [300, 299]


def test_csv_with_more_rows_than_the_limit_is_refused_before_its_cells_are_read() -> None:
    text = night_to_csv(make_night(240))
    problem = one_problem(problems_of(night_from_csv, text.encode(), options=NightOptions(max_epochs=239)),
                          "too_many_epochs")
    assert "before reading" in problem.message and problem.location["values"] == [240, 239]
    assert night_from_csv((text + "\n\n").encode(), options=NightOptions(max_epochs=240)).n_epochs == 240
