"""Missing epochs (share present), aggregation to a study's epoch (pandas resample as reference)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from models import (
    InvalidNightError,
    Night,
    NightOptions,
    aggregate_epochs,
    night_from_csv,
    night_from_json,
    night_to_csv,
    to_study_epoch,
)

START = pd.Timestamp("2031-03-02T22:00:00+01:00")


def _problems(fn, *args, **kwargs):
    with pytest.raises(InvalidNightError) as info:
        fn(*args, **kwargs)
    return info.value.problems


def _night(counts, reference=None, seconds: int = 15, **kw) -> Night:
    return Night(participant_id="P", start=START, epoch_seconds=seconds, counts=np.asarray(counts, dtype=float),
                 reference=reference, **kw)


# ---- share of present epochs ------------------------------------------------------------------------------
def _gappy_csv(n: int, dropped: range) -> str:
    lines = night_to_csv(_night(np.arange(n) % 7, seconds=30)).splitlines()
    return "\n".join(line for i, line in enumerate(lines) if i - 1 not in dropped)


def test_half_present_is_accepted_and_less_refused() -> None:
    # 480 epochs, 240 missing: exactly 50 % present (the documented default minimum) is accepted
    night = night_from_csv(_gappy_csv(480, range(100, 340)), options=NightOptions(fill_gaps=True))
    assert night.n_epochs == 480 and int(night.missing.sum()) == 240
    problems = _problems(night_from_csv, _gappy_csv(480, range(100, 341)), options=NightOptions(fill_gaps=True))
    p = next(p for p in problems if p.code == "too_few_present_epochs")
    assert p.location == {"field": "counts", "values": [239, 480]} and "49.8%" in p.message


def test_min_present_pct_is_an_option() -> None:
    text = _gappy_csv(480, range(100, 400))
    with pytest.raises(InvalidNightError):
        night_from_csv(text, options=NightOptions(fill_gaps=True))
    night = night_from_csv(text, options=NightOptions(fill_gaps=True, min_present_pct=30.0))
    assert int(night.missing.sum()) == 300


def test_all_missing_is_always_refused() -> None:
    obj = {"epoch_seconds": 30, "start": START.isoformat(), "counts": [None] * 240}
    problems = _problems(night_from_json, obj, options=NightOptions(fill_gaps=True, min_present_pct=0.0))
    assert [p.code for p in problems] == ["too_few_present_epochs"]


def test_empty_count_cells_are_missing_with_fill_gaps() -> None:
    lines = night_to_csv(_night(np.arange(240) % 7, seconds=30)).splitlines()
    lines[10] = lines[10].split(",")[0] + ","
    night = night_from_csv("\n".join(lines), options=NightOptions(fill_gaps=True))
    assert np.flatnonzero(night.missing).tolist() == [9]


# ---- aggregation --------------------------------------------------------------------------------------------
def test_sums_match_pandas_resample() -> None:
    rng = np.random.default_rng(4)
    counts = rng.poisson(8, 963).astype(float)
    counts[[17, 500, 501, 962]] = np.nan  # missing sub-epochs (the trailing partial block is dropped)
    night = _night(counts)
    for seconds, k in ((30, 2), (60, 4)):
        agg = aggregate_epochs(night, seconds)
        series = pd.Series(counts, index=night.epoch_times())
        # pandas as reference; min_count=k: a block with any missing sub-epoch is missing (the documented rule)
        want = series.resample(f"{seconds}s", origin="start").sum(min_count=k).iloc[: 963 // k]
        np.testing.assert_array_equal(agg.counts, want.to_numpy())
        assert agg.epoch_times().equals(want.index.as_unit(agg.epoch_times().unit))
        assert agg.source_epoch_seconds == 15 and agg.epoch_seconds == seconds


def test_majority_of_scored_sub_epochs_wake_on_ties() -> None:
    # AASM: an epoch takes the stage filling most of it (Iber et al. 2007, from memory); ties -> wake (common
    # practice, the documented rule); unscored sub-epochs do not vote; none scored -> unscored
    groups = [("N2", "N2", "W", "?"), ("W", "N1", "?", "?"), ("?", "?", "?", "?"), ("?", "R", "?", "?"),
              ("W", "N1", "N2", "N2"), ("W", "W", "N3", "R"), ("N2", "N3", "N3", "N2"), ("N1", "W", "N2", "W")]
    night = _night(np.ones(4 * len(groups)), reference=np.array([s for g in groups for s in g]))
    agg = aggregate_epochs(night, 60)
    assert agg.reference.tolist() == ["N2", "W", "?", "R", "N2", "W", "N2", "W"]


def test_aggregated_night_keeps_its_source() -> None:
    night = _night(np.ones(480), label="n1", source_name="n1.csv", unused_columns=("Lux",))
    agg = aggregate_epochs(night, 30)
    assert (agg.label, agg.source_name, agg.unused_columns) == ("n1", "n1.csv", ("Lux",))


def test_to_study_epoch() -> None:
    night = _night(np.arange(480))
    assert to_study_epoch(night, 15) is night
    thirty = to_study_epoch(night, 30)
    assert thirty.epoch_seconds == 30 and thirty.source_epoch_seconds == 15
    assert to_study_epoch(thirty, 60).source_epoch_seconds == 15
    problems = _problems(to_study_epoch, _night(np.ones(240), seconds=60), 30)
    assert [p.code for p in problems] == ["epoch_length_mismatch"]
    assert "30-s" in problems[0].message and "60-s" in problems[0].message
    assert problems[0].location == {"field": "epoch_seconds", "values": [30, 60]}


def test_aggregation_is_content_but_source_length_is_not() -> None:
    night = _night(np.arange(480))
    agg = aggregate_epochs(night, 30)
    same = Night(participant_id="P", start=START, epoch_seconds=30, counts=agg.counts)
    assert same.content_hash == agg.content_hash and same.source_epoch_seconds is None
