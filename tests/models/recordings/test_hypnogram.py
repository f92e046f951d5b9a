"""PSG hypnograms: reading (pandas as the outside reference for times), located problems, stages on actigraph epochs.

The exports are written here (simulated data). Stage mapping onto actigraph epochs is checked against
hand-worked examples of the documented rule (covered shares; wake on a sleep/wake tie, common practice)
and, for 60-s epochs on the PSG grid, against :func:`models.nights.majority_stage`, the study's rule for
summing 30-s epochs.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pandas as pd
import pytest
from factories import one_problem

from models import (
    Hypnogram,
    ImportProfile,
    InvalidHypnogramError,
    InvalidNightError,
    hypnogram_on_epochs,
    read_hypnogram,
)
from models.nights import majority_stage

BERLIN = "Europe/Berlin"
# R&K (Rechtschaffen & Kales 1968): 0 wake, 1-4 sleep stages 1-4, 5 REM; AASM (Iber et al. 2007) joins 3 and 4
# into N3 (both from memory)
RK_TO_AASM = {"0": "W", "1": "N1", "2": "N2", "3": "N3", "4": "N3", "5": "R"}
STAGES = np.array(["W", "N1", "N2", "N3", "R"])


def _problems(source, **kwargs) -> list:
    with pytest.raises(InvalidHypnogramError) as info:
        read_hypnogram(source, **kwargs)
    assert isinstance(info.value, InvalidNightError) and info.value.code == "invalid_hypnogram"
    return info.value.problems


def _iso_csv(stages, start: str = "2031-03-02T23:00:00+01:00", header: str = "time,stage") -> bytes:
    times = pd.date_range(start, periods=len(stages), freq="30s")
    return (header + "\n" + "\n".join(f"{t.isoformat()},{s}" for t, s in zip(times, stages, strict=True))
            + "\n").encode()


def _hyp(stages, start: str = "2031-03-02T23:00:00+01:00") -> Hypnogram:
    return Hypnogram(start=pd.Timestamp(start), epoch_seconds=30, stages=np.asarray(stages))


# ---- reading ---------------------------------------------------------------------------------------------


def test_iso_csv_matches_pandas() -> None:
    rng = np.random.default_rng(1)
    stages = rng.choice(STAGES, 900)
    data = _iso_csv(stages)
    hyp = read_hypnogram(data, source_name="psg/night-3.csv")
    ref = pd.read_csv(io.BytesIO(data))
    times = pd.DatetimeIndex(pd.to_datetime(ref["time"], format="ISO8601"))
    assert hyp.start == times[0] and hyp.epoch_seconds == 30 and hyp.n_epochs == len(ref)
    assert hyp.timestamps().equals(times.as_unit(hyp.timestamps().unit))
    assert hyp.stages.tolist() == ref["stage"].tolist()
    assert hyp.source_name == "night-3.csv" and hyp.end == times[-1] + pd.Timedelta(seconds=30)


def test_lab_export_through_a_profile_matches_pandas(tmp_path) -> None:
    rng = np.random.default_rng(2)
    local = pd.date_range("2031-10-25 22:30:00", periods=400, freq="30s")
    frame = pd.DataFrame({"Datum": local.strftime("%d.%m.%Y"), "Uhrzeit": local.strftime("%H:%M:%S"),
                          "Stadium": rng.choice([0, 1, 2, 3, 4, 5], local.size), "Lage": rng.integers(0, 4, 400)})
    text = "Hypnogramm;simuliert\nSystem;0000\n" + frame.to_csv(sep=";", index=False, lineterminator="\n")
    path = tmp_path / "n7.csv"
    path.write_bytes(text.encode("latin-1"))
    profile = ImportProfile(name="psg-de", delimiter=";", skip_rows=2, encoding="latin-1",
                            columns={"date": "Datum", "time": "Uhrzeit", "reference": "Stadium"},
                            datetime_format="%d.%m.%Y %H:%M:%S", tz=BERLIN, stage_codes=RK_TO_AASM)
    hyp = read_hypnogram(path, profile=profile)
    ref = pd.read_csv(path, sep=";", skiprows=2, encoding="latin-1")
    times = pd.DatetimeIndex(pd.to_datetime(ref["Datum"] + " " + ref["Uhrzeit"], format="%d.%m.%Y %H:%M:%S",
                                            exact=True)).tz_localize(BERLIN)
    assert hyp.start == times[0] and str(hyp.start.tz) == BERLIN
    assert hyp.stages.tolist() == [RK_TO_AASM[str(v)] for v in ref["Stadium"]]
    assert hyp.unused_columns == ("Lage",) and hyp.source_name == "n7.csv"
    # a profile that only names the columns: ISO times keep the offset they were written with
    iso = read_hypnogram(_iso_csv(["W", "N1"], start="2031-03-02T23:00:00-05:00", header="Zeit,Stadium"),
                         profile=ImportProfile(name="cols", columns={"time": "Zeit", "reference": "Stadium"}))
    assert iso.start.isoformat() == "2031-03-02T23:00:00-05:00"


def test_json_form_reads_back() -> None:
    hyp = read_hypnogram(_iso_csv(["W", "N1", "?", "R", "MT"]))
    back = read_hypnogram(json.dumps(hyp.to_json()).encode(), source_name="h.json")
    assert back.start == hyp.start and back.start.utcoffset() == hyp.start.utcoffset()
    assert back.stages.tolist() == ["W", "N1", "?", "R", "MT"] and back.source_name == "h.json"


def test_naive_times_take_the_zone_given() -> None:
    data = b"time,stage\n2031-03-02T23:00:00,W\n2031-03-02T23:00:30,N1\n"
    assert read_hypnogram(data, tz=BERLIN).start == pd.Timestamp("2031-03-02 23:00:00").tz_localize(BERLIN)
    p = one_problem(_problems(data), "missing_timezone")
    assert p.location["row"] == 2 and p.location["field"] == "time"


def test_json_with_profile_codes() -> None:
    obj = {"start": "2031-03-02T23:00:00", "epoch_seconds": 30, "stages": [0, 2, 5, None, "4"]}
    hyp = read_hypnogram(json.dumps(obj).encode(), profile=ImportProfile(name="rk", stage_codes=RK_TO_AASM),
                         tz=BERLIN)
    assert hyp.stages.tolist() == ["W", "N2", "R", "?", "N3"]
    assert read_hypnogram({**obj, "stages": ["w", "n2", "REM", ""]}, tz="UTC").stages.tolist() == ["W", "N2", "REM",
                                                                                                   "?"]


def test_json_problems_name_their_fields() -> None:
    problems = _problems({"start": "today", "epoch_seconds": 20, "stages": ["W", "Q"], "scorer": "x"})
    assert {p.code: p.location.get("field") for p in problems} == {
        "unknown_field": "scorer", "invalid_timestamp": "start", "unsupported_epoch_length": "epoch_seconds",
        "unknown_stage": "stages"}
    assert one_problem(problems, "unknown_stage").location["epoch"] == 1
    assert one_problem(_problems(b"{\"start\": 1,"), "malformed_json").location["row"] == 1
    assert one_problem(_problems({"epoch_seconds": 30}), "missing_field").location["field"] == "start"


def test_csv_problems_are_all_reported_with_rows() -> None:
    text = ("time;stage;psg\n2031-03-02T23:00:00+01:00;W;W\n2031-03-02T23:00:30+01:00;X;W\n"
            "2031-03-02T23:01:10+01:00;N2;W\n")
    problems = _problems(text.encode())
    assert one_problem(problems, "unmapped_reference_column").location == {"field": "psg", "row": 1}
    unknown = one_problem(problems, "unknown_stage")
    assert unknown.location["row"] == 3 and unknown.location["values"] == ["X"] and "row 3" in unknown.message
    spacing = one_problem(problems, "irregular_spacing")
    assert spacing.location["row"] == 4 and "row 4" in spacing.message


@pytest.mark.parametrize(("rows", "code", "row"), [
    (["2031-03-02T23:00:00Z,W", "2031-03-02T23:00:00Z,N1"], "duplicate_timestamp", 3),
    (["2031-03-02T23:00:30Z,W", "2031-03-02T23:00:00Z,N1"], "time_not_increasing", 3),
    (["2031-03-02T23:00:00Z,W", "2031-03-02T23:00:20Z,N1", "2031-03-02T23:00:40Z,N1"], "unsupported_epoch_length",
     3),
    (["2031-03-02T23:00:00Z,W", "31.02.2031 23:00,N1"], "invalid_timestamp", 3),
    (["1931-03-02T23:00:00Z,W", "1931-03-02T23:00:30Z,N1"], "implausible_date", 2),
    (["2031-03-02T23:00:00Z,W", "2031-03-02T23:00:30Z,N1,extra"], "malformed_csv", 3),
    (["2031-03-02T23:00:00Z,W"], "too_short", 2),
])
def test_time_problems_name_the_row(rows, code, row) -> None:
    p = one_problem(_problems(("time,stage\n" + "\n".join(rows) + "\n").encode()), code)
    assert p.location["row"] == row


def test_files_that_cannot_be_hypnograms() -> None:
    assert one_problem(_problems(b""), "empty_file").location["row"] == 1
    missing = one_problem(_problems(b"time,counts\n2031-03-02T23:00:00Z,3\n"), "missing_column")
    assert missing.location == {"field": "stage", "row": 1}
    assert one_problem(_problems(_iso_csv(["?", "U", "-"])), "no_scored_epochs").location["field"] == "stage"
    assert one_problem(_problems("time,stage\n2031-03-02T23:00:00Z,Wach\u00e4\n".encode("latin-1")),
                       "not_utf8").location["row"] == 2
    assert one_problem(_problems(b"{}", fmt="parquet"), "unsupported_format").location["field"] == "fmt"
    profile = ImportProfile(name="p", columns={"time": "Zeit", "reference": "Stadium"})
    assert one_problem(_problems(_iso_csv(["W", "N1"]), profile=profile), "missing_column").location["field"] \
        == "Zeit"


def test_the_type_refuses_what_a_reader_would() -> None:
    with pytest.raises(InvalidHypnogramError, match="timezone-aware"):
        Hypnogram(start=pd.Timestamp("2031-03-02 23:00"), epoch_seconds=30, stages=np.array(["W"]))
    with pytest.raises(InvalidHypnogramError, match="30 s"):
        _hyp(["W"]).__class__(start=pd.Timestamp("2031-03-02T23:00Z"), epoch_seconds=20, stages=np.array(["W"]))
    with pytest.raises(InvalidHypnogramError, match="canonical"):
        _hyp(["W", "n2"])


# ---- stages on actigraph epochs ------------------------------------------------------------------------


def test_on_the_psg_grid_15_and_30_s_epochs_take_the_covering_psg_epoch() -> None:
    rng = np.random.default_rng(5)
    stages = rng.choice(STAGES, 200)
    hyp = _hyp(stages)
    same = hypnogram_on_epochs(hyp, start=hyp.start, epoch_seconds=30, n_epochs=200)
    assert same.tolist() == stages.tolist()
    halves = hypnogram_on_epochs(hyp, start=hyp.start, epoch_seconds=15, n_epochs=400)
    assert halves.tolist() == np.repeat(stages, 2).tolist()  # each 15-s epoch lies inside one PSG epoch


def test_on_the_psg_grid_60_s_epochs_follow_the_majority_rule() -> None:
    rng = np.random.default_rng(6)
    stages = rng.choice(np.r_[STAGES, ["?"]], 400)
    hyp = _hyp(stages)
    got = hypnogram_on_epochs(hyp, start=hyp.start, epoch_seconds=60, n_epochs=200)
    np.testing.assert_array_equal(got, majority_stage(stages.reshape(200, 2)))
    # worked by hand: W+N1 is a sleep/wake tie -> W (common practice); N2+R both sleep, equal shares -> the
    # later R; ?+N2 -> N2 (only scored time counts); ?+? -> ?
    small = _hyp(["W", "N1", "N2", "R", "?", "N2", "?", "?"])
    assert hypnogram_on_epochs(small, start=small.start, epoch_seconds=60, n_epochs=4).tolist() == \
        ["W", "R", "N2", "?"]


def test_a_clock_offset_moves_the_stages_by_covered_share() -> None:
    hyp = _hyp(["W", "N1", "N2", "W", "R"])
    at = hyp.start
    # +30 s: the PSG night starts one epoch later on the actigraph clock
    assert hypnogram_on_epochs(hyp, start=at, epoch_seconds=30, n_epochs=6, clock_offset_s=30).tolist() == \
        ["?", "W", "N1", "N2", "W", "R"]
    # +10 s: actigraph epoch i holds 20 s of PSG epoch i and 10 s of i-1 -> the larger share, epoch i
    assert hypnogram_on_epochs(hyp, start=at, epoch_seconds=30, n_epochs=6, clock_offset_s=10).tolist() == \
        ["W", "N1", "N2", "W", "R", "?"]
    assert hypnogram_on_epochs(hyp, start=at, epoch_seconds=30, n_epochs=6, clock_offset_s=7.3).tolist() == \
        ["W", "N1", "N2", "W", "R", "?"]
    # -22.4 s, 15-s epochs: 7.6 s of N1 then 7.4 s of N2 -> N1 (the larger share, though the earlier epoch);
    # the third epoch holds 7.6 s of N2, just over half of it
    n1n2 = _hyp(["N1", "N2"])
    assert hypnogram_on_epochs(n1n2, start=at, epoch_seconds=15, n_epochs=4, clock_offset_s=-22.4).tolist() == \
        ["N1", "N2", "N2", "?"]
    # +20 s: 20 s of PSG epoch i-1 and 10 s of i -> epoch i-1; the first epoch is only a third covered -> ?
    assert hypnogram_on_epochs(hyp, start=at, epoch_seconds=30, n_epochs=6, clock_offset_s=20).tolist() == \
        ["?", "W", "N1", "N2", "W", "R"]
    # +15 s: half and half. W|N1 and N2|W are sleep/wake ties -> W; N1|N2 equal sleep shares -> the later N2;
    # the first epoch is exactly half covered (by W) and the last half covered (by R)
    assert hypnogram_on_epochs(hyp, start=at, epoch_seconds=30, n_epochs=6, clock_offset_s=15).tolist() == \
        ["W", "W", "N2", "W", "W", "R"]
    # -15 s with 60-s epochs: epoch 0 holds 15 s of W, 30 s of N1 and 15 s of N2 -> sleep 45 s > wake 15 s, N1
    # has the larger share; epoch 1 holds 15 s N2, 30 s W, 15 s R -> a tie 30/30 -> W; epoch 2: 15 s R -> ?
    assert hypnogram_on_epochs(hyp, start=at, epoch_seconds=60, n_epochs=3, clock_offset_s=-15).tolist() == \
        ["N1", "W", "?"]
    # -45 s: epoch 0 holds 15 s N1, 30 s N2, 15 s W -> N2; epoch 1 15 s W, 30 s R and 15 s past the end -> R
    assert hypnogram_on_epochs(hyp, start=at, epoch_seconds=60, n_epochs=3, clock_offset_s=-45).tolist() == \
        ["N2", "R", "?"]


def test_epochs_are_placed_by_absolute_time_not_by_the_zone_written() -> None:
    hyp = _hyp(["W", "N1", "N2", "N3"], start="2031-03-02T23:00:00+01:00")
    elsewhere = pd.Timestamp("2031-03-02T22:00:30Z")  # 23:00:30 in Berlin: one epoch into the hypnogram
    assert hypnogram_on_epochs(hyp, start=elsewhere, epoch_seconds=30, n_epochs=4).tolist() == \
        ["N1", "N2", "N3", "?"]
    with pytest.raises(ValueError, match="15, 30 or 60"):
        hypnogram_on_epochs(hyp, start=elsewhere, epoch_seconds=20, n_epochs=4)
    with pytest.raises(ValueError, match="timezone-aware"):
        hypnogram_on_epochs(hyp, start=pd.Timestamp("2031-03-02 23:00"), epoch_seconds=30, n_epochs=4)
