"""Guessed profiles: exports written the way other systems write them are read back as pandas reads them."""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest

from models import ImportProfile, guess_profile, night_from_csv

# R&K 1968 stage numbers and their AASM 2007 counterparts (3 and 4 merge into N3; both from memory)
RK_TO_AASM = {"0": "W", "1": "N1", "2": "N2", "3": "N3", "4": "N3", "5": "R"}


def _frame(n: int, seconds: int, start: str, seed: int = 0) -> tuple[pd.DatetimeIndex, np.ndarray]:
    rng = np.random.default_rng(seed)
    return pd.date_range(start, periods=n, freq=f"{seconds}s"), rng.poisson(9, n)


def _check_read_back(data: bytes, times: pd.DatetimeIndex, counts: np.ndarray, zone: str = "UTC"):
    guess = guess_profile(data, name="sample")
    night = night_from_csv(data, profile=guess.profile)  # the guess must read its own sample
    np.testing.assert_array_equal(night.counts, counts.astype(float))
    want = times.tz_localize(zone) if times.tz is None else times
    assert night.epoch_times().equals(want.as_unit(night.epoch_times().unit))
    assert [row["time"] for row in guess.preview] == [t.isoformat() for t in want[:5]]
    assert [row["counts"] for row in guess.preview] == counts[:5].astype(float).tolist()
    return guess, night


def test_semicolon_export_with_preamble_split_day_first_and_decimal_comma() -> None:
    times, counts = _frame(600, 30, "2031-03-02 22:00:00")  # crosses midnight: 02.03 -> 03.03
    rk = np.random.default_rng(1).choice(list("012345"), 600)
    lines = ["Gerät;simuliert", "Export;2031-04-01", "", "Datum;Uhrzeit;Aktivität [counts];Schlafstadium;Lux"]
    lines += [f"{t:%d.%m.%Y};{t:%H:%M:%S};{c},0;{r};0" for t, c, r in zip(times, counts, rk, strict=True)]
    data = "\n".join(lines).encode("latin-1")
    guess, night = _check_read_back(data, times, counts)
    p = guess.profile
    assert (p.delimiter, p.skip_rows, p.decimal, p.encoding) == (";", 3, ",", "latin-1")
    assert p.columns == {"date": "Datum", "time": "Uhrzeit", "counts": "Aktivität [counts]",
                         "reference": "Schlafstadium"}
    assert p.datetime_format == "%d.%m.%Y %H:%M:%S" and p.tz == "UTC"
    assert any("UTC" in n and "tz" in n for n in guess.notes)
    assert guess.stage_codes_found == sorted(set(rk))
    assert {k: v for k, v in p.stage_codes.items()} == {k: RK_TO_AASM[k] for k in set(rk)}
    assert night.reference.tolist() == [RK_TO_AASM[r] for r in rk]
    # what pandas reads with the guessed layout given explicitly
    ref = pd.read_csv(io.BytesIO(data), sep=";", skiprows=3, decimal=",", encoding="latin-1")
    np.testing.assert_array_equal(night.counts, ref["Aktivität [counts]"].to_numpy())


def test_day_first_is_told_from_month_first_by_regular_spacing() -> None:
    times, counts = _frame(480, 60, "2031-03-02 20:00:00")  # 8 h from 20:00: the date changes at midnight
    text = "Date Time,Activity\n" + "\n".join(f"{t:%m/%d/%Y %H:%M:%S},{c}" for t, c in zip(times, counts,
                                                                                         strict=True))
    guess, _ = _check_read_back(text.encode(), times, counts)
    assert guess.profile.datetime_format == "%m/%d/%Y %H:%M:%S"  # day-first would jump a month at midnight


def test_ambiguous_day_and_month_are_noted() -> None:
    times, counts = _frame(240, 30, "2031-03-02 20:00:00")  # two hours, no date change: 02/03 reads both ways
    text = "Time,Activity\n" + "\n".join(f"{t:%d/%m/%Y %H:%M:%S},{c}" for t, c in zip(times, counts, strict=True))
    guess, _ = _check_read_back(text.encode(), times, counts)
    assert any("%m/%d/%Y %H:%M:%S" in n and "confirm" in n for n in guess.notes)


def test_iso_times_with_offsets_need_no_zone() -> None:
    times, counts = _frame(240, 30, "2031-03-02T22:00:00+01:00")
    text = "\ufeffepoch_start,counts (n)\n" + "\n".join(f"{t.isoformat()},{c}" for t, c in zip(times, counts,
                                                                                            strict=True))
    guess, _ = _check_read_back(text.encode("utf-8"), times, counts)
    assert guess.profile.datetime_format is None and guess.profile.tz is None
    assert guess.profile.encoding == "utf-8-sig"


def test_binary_reference_asks_for_the_polarity() -> None:
    times, counts = _frame(240, 30, "2031-03-02 22:00:00")
    sw = np.random.default_rng(2).integers(0, 2, 240)
    text = "Date,Time,Activity,Sleep/Wake\n" + "\n".join(
        f"{t:%Y-%m-%d},{t:%H:%M:%S},{c},{s}" for t, c, s in zip(times, counts, sw, strict=True))
    guess, night = _check_read_back(text.encode(), times, counts)
    assert guess.profile.stage_codes == {"0": "W", "1": "S"}
    assert any("polarity" in n for n in guess.notes)
    np.testing.assert_array_equal(night.reference_sleep(), sw.astype(float))


@pytest.mark.parametrize("words,aasm", [
    # AASM 2007 stage names and R&K 1968 words for the same stages (from memory)
    (["Stage W", "Stage N1", "Stage N2", "Stage N3", "Stage R"], ["W", "N1", "N2", "N3", "R"]),
    (["Wake", "Stage 1", "Stage 2", "Stage 3", "Stage 4", "REM"], ["W", "N1", "N2", "N3", "N3", "R"]),
])
def test_word_codes_are_proposed(words: list[str], aasm: list[str]) -> None:
    times, counts = _frame(240, 30, "2031-03-02T22:00:00Z")
    picked = [words[i % len(words)] for i in range(240)]
    text = "time\tcounts\tPSG stage\n" + "\n".join(f"{t.isoformat()}\t{c}\t{w}" for t, c, w in zip(times, counts,
                                                                                                  picked, strict=True))
    guess, night = _check_read_back(text.encode(), times, counts)
    assert guess.profile.delimiter == "\t"
    assert night.reference.tolist() == [aasm[i % len(words)] for i in range(240)]


def test_second_reference_like_column_is_ignored_with_a_note() -> None:
    times, counts = _frame(240, 30, "2031-03-02T22:00:00Z")
    text = "time,counts,psg_stage,device sleep/wake\n" + "\n".join(
        f"{t.isoformat()},{c},N2,1" for t, c in zip(times, counts, strict=True))
    guess, night = _check_read_back(text.encode(), times, counts)
    assert guess.profile.columns["reference"] == "psg_stage"
    assert guess.profile.ignore_columns == ("device sleep/wake",)
    assert any("device sleep/wake" in n for n in guess.notes) and night.unused_columns == ()


def test_guess_round_trips_as_a_profile() -> None:
    times, counts = _frame(240, 30, "2031-03-02 22:00:00")
    text = "Time;Counts\n" + "\n".join(f"{t:%d.%m.%Y %H:%M};{c}" for t, c in zip(times[::2], counts[::2],
                                                                                  strict=True))
    guess = guess_profile(text.encode())
    assert ImportProfile.from_dict(guess.to_dict()["profile"]) == guess.profile
    assert guess.profile.datetime_format == "%d.%m.%Y %H:%M"
