"""Continuous recordings over HTTP on a live server: upload round trips (SQLite and PostgreSQL), diaries,
PSG alignment, day tables and refusals.

Recordings, diaries and PSG hypnograms come from the simulator (``models.simulate_recordings``), whose
ground truth (counts per epoch, the PSG clock offset) is the outside reference of these checks.
"""

from __future__ import annotations

import io
import math
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from backends import BACKENDS, World, live_world
from harness import cohort_bodies

STUDY = "s1"


# ---- bodies built from the simulator ------------------------------------------------------------
def simulated(n_days: int = 35, *, seed: int = 11, n_participants: int = 1, psg_nights: int = 2) -> list[Any]:
    """Simulated recordings (SIMULATED participants) with diaries and PSG nights."""
    from models import RecordingSpec, simulate_recordings

    spec = RecordingSpec(n_participants=n_participants, n_days=n_days, psg_nights=psg_nights, id_prefix="P")
    return simulate_recordings(spec, seed=seed)


def recording_csv(recording: Any) -> bytes:
    """The recording as a CSV export: one row per epoch with its time, counts and event marker."""
    times = recording.timestamps()
    frame = pd.DataFrame({"time": [t.isoformat() for t in times], "counts": recording.counts,
                          "marker": recording.markers.astype(int)})
    return frame.to_csv(index=False, na_rep="").encode()


def hypnogram_csv(psg: Any) -> bytes:
    """A PSG hypnogram on the PSG system's clock, one row per 30-s epoch: ``time,stage``."""
    times = pd.date_range(psg.start, periods=len(psg.stages), freq=pd.Timedelta(seconds=psg.epoch_seconds))
    return pd.DataFrame({"time": [t.isoformat() for t in times], "stage": psg.stages}).to_csv(index=False).encode()


def recordings_url(pid: str, *rest: str) -> str:
    return "/".join([f"/v1/studies/{STUDY}/participants/{pid}/recordings", *rest])


def post_recording(http: Any, sim: Any, **params: Any) -> Any:
    return http.post(recordings_url(sim.recording.participant_id), content=recording_csv(sim.recording),
                     headers={"Content-Type": "text/csv"}, params=params or None)


def post_text(http: Any, url: str, body: bytes, **params: Any) -> Any:
    return http.post(url, content=body, headers={"Content-Type": "text/csv"}, params=params or None)


@pytest.fixture(params=BACKENDS)
def world(request: Any, tmp_path: Path) -> Iterator[World]:
    with live_world(request.param, tmp_path) as w:
        yield w


@pytest.fixture
def sqlite_world(tmp_path: Path) -> Iterator[World]:
    with live_world("sqlite", tmp_path) as w:
        yield w


@pytest.fixture(scope="module")
def month() -> Any:
    return simulated(35)[0]


# ---- upload round trip ----------------------------------------------------------------------------
def test_a_35_day_recording_is_one_upload_stored_compactly_and_read_back_exactly(world: World, month: Any) -> None:
    from sqlalchemy import select

    from service.store import db

    rec = month.recording
    r = post_recording(world.http, month)
    assert r.status_code == 201, r.text
    body = r.json()
    assert body["n_epochs"] == rec.n_epochs == 35 * 2880  # 35 noon-to-noon days of 30-s epochs
    assert pd.Timestamp(body["start"]) == rec.start and pd.Timestamp(body["end"]) == rec.end
    again = post_recording(world.http, month)
    assert again.status_code == 200 and again.json()["recording_id"] == body["recording_id"]

    mains = [p for p in body["periods"] if p["kind"] == "main"]
    assert len(mains) >= 30  # one main period on (nearly) every simulated day
    nights = world.http.get(f"/v1/studies/{STUDY}/participants/P-01/nights", params={"limit": 500}).json()
    assert {n["night_id"] for n in nights["data"]} == {p["night_id"] for p in mains}

    nonwear = world.http.get(recordings_url("P-01", body["recording_id"], "nonwear")).json()["items"]
    off = np.zeros(rec.n_epochs, dtype=bool)
    step = pd.Timedelta(seconds=30)
    for item in nonwear:
        a, b = (int((pd.Timestamp(item[k]) - rec.start) / step) for k in ("start", "end"))
        off[a:b] = True
    for period in mains[:5]:  # a night's epochs are the recording's, without counts where it was off the wrist
        first = int((pd.Timestamp(period["start"]) - rec.start) / step)
        got = world.http.get(f"/v1/studies/{STUDY}/participants/P-01/nights/{period['night_id']}",
                             params={"epochs": "true"}).json()
        counts = np.array([np.nan if c is None else c for c in got["counts"]])
        expected = np.array(rec.counts[first:first + counts.size], dtype=np.float64)
        expected[off[first:first + counts.size]] = np.nan
        np.testing.assert_array_equal(counts, expected)

    with db.session_scope(world.factory) as session:
        row = session.scalar(select(db.RecordingRow))
        assert len(row.counts) < rec.n_epochs * 8 / 3  # zlib blob, not 8 bytes an epoch
        stored = np.frombuffer(__import__("zlib").decompress(row.counts), dtype="<f8")
        np.testing.assert_array_equal(stored, rec.counts)  # the simulator's counts, bit for bit
        views = session.execute(select(db.Night.counts, db.Night.recording_pk)).all()
        assert views and all(c == b"" and pk == row.pk for c, pk in views)  # nights are views, not copies


def test_altered_stored_counts_are_refused_on_load_not_served(sqlite_world: World) -> None:
    import zlib

    from sqlalchemy import select

    from service.store import db

    sim = simulated(3, seed=4)[0]
    body = post_recording(sqlite_world.http, sim).json()
    night_id = next(p["night_id"] for p in body["periods"] if p["kind"] == "main")
    with db.session_scope(sqlite_world.factory, write=True) as session:
        row = session.scalar(select(db.RecordingRow))
        counts = np.frombuffer(zlib.decompress(row.counts), dtype="<f8").copy()
        counts[100] += 1
        row.counts = zlib.compress(counts.tobytes())
    r = sqlite_world.http.get(f"/v1/studies/{STUDY}/participants/P-01/nights/{night_id}", params={"epochs": "true"})
    assert r.status_code == 500 and r.json()["code"] == "stored_data_mismatch"
    assert "damaged or altered" in r.json()["detail"]


def test_the_same_recording_for_another_participant_or_overlapping_one_is_refused(sqlite_world: World) -> None:
    http = sqlite_world.http
    sim = simulated(3, seed=43, psg_nights=0)[0]
    assert post_recording(http, sim).status_code == 201
    body = recording_csv(sim.recording)
    other = http.post(recordings_url("P-02"), content=body, headers={"Content-Type": "text/csv"})
    assert other.status_code == 409 and other.json()["code"] == "duplicate_recording"
    assert "'P-01'" in other.json()["detail"]
    allowed = http.post(recordings_url("P-02"), content=body, headers={"Content-Type": "text/csv"},
                        params={"allow_duplicate": "true"})
    assert allowed.status_code == 201
    later = simulated(3, seed=44, psg_nights=0)[0]  # the same days, other counts
    overlap = post_recording(http, later)
    assert overlap.status_code == 409 and overlap.json()["code"] == "overlapping_recording"
    assert post_recording(http, later, allow_overlap="true").status_code == 201


def test_recordings_are_listed_read_and_deleted_with_their_nights(sqlite_world: World) -> None:
    http = sqlite_world.http
    sim = simulated(4, seed=5)[0]
    body = post_recording(http, sim).json()
    listed = http.get(recordings_url("P-01")).json()
    assert listed["count"] == 1 and listed["data"][0]["recording_id"] == body["recording_id"]
    one = http.get(recordings_url("P-01", body["recording_id"])).json()
    assert one["n_epochs"] == sim.recording.n_epochs and one["night_ids"]
    gone = http.delete(recordings_url("P-01", body["recording_id"]))
    assert gone.status_code == 200 and set(gone.json()["nights_removed"]) == set(one["night_ids"])
    assert http.get(f"/v1/studies/{STUDY}/participants/P-01/nights").json()["count"] == 0
    assert http.get(recordings_url("P-01", body["recording_id"])).status_code == 404


# ---- diary ------------------------------------------------------------------------------------------
def test_a_diary_sets_the_periods_and_posting_it_again_replaces_it(sqlite_world: World) -> None:
    http = sqlite_world.http
    sim = simulated(10, seed=7)[0]
    rid = post_recording(http, sim).json()["recording_id"]
    first = post_text(http, recordings_url("P-01", rid, "diary"), sim.diary_csv.encode())
    assert first.status_code == 200, first.text
    assert first.json()["diary_days"] == len(sim.diary)
    periods = http.get(recordings_url("P-01", rid, "periods")).json()["items"]
    assert any(p["source"] == "diary" for p in periods)

    frame = pd.read_csv(io.StringIO(sim.diary_csv), dtype=str, keep_default_na=False)
    row = next(i for i in range(len(frame)) if frame.loc[i, "bed_time"])
    day = frame.loc[row, "date"]
    frame.loc[row, "bed_time"] = (pd.Timestamp(f"2000-01-01 {frame.loc[row, 'bed_time']}")
                                  - pd.Timedelta(hours=2)).strftime("%H:%M")
    second = post_text(http, recordings_url("P-01", rid, "diary"), frame.to_csv(index=False).encode())
    assert second.status_code == 200, second.text
    changed = second.json()
    assert len(changed["nights_removed"]) == len(changed["nights_added"]) >= 1
    after = {p["day"]: p for p in http.get(recordings_url("P-01", rid, "periods")).json()["items"]
             if p["kind"] == "main"}
    before = {p["day"]: p for p in periods if p["kind"] == "main"}
    assert after[day]["start"] != before[day]["start"]
    kept = [d for d in before if d != day and d in after]
    assert kept and all(after[d]["night_id"] == before[d]["night_id"] for d in kept)  # other nights untouched
    nights = {n["night_id"] for n in http.get(f"/v1/studies/{STUDY}/participants/P-01/nights",
                                              params={"limit": 500}).json()["data"]}
    assert nights == {p["night_id"] for p in after.values()}


# ---- PSG reference --------------------------------------------------------------------------------
def test_a_psg_hypnogram_is_aligned_to_the_simulated_clock_offset_and_labels_its_night(sqlite_world: World) -> None:
    http = sqlite_world.http
    sim = simulated(8, seed=3, psg_nights=2)[0]
    rid = post_recording(http, sim).json()["recording_id"]
    for psg in sim.psg:
        r = post_text(http, recordings_url("P-01", rid, "reference"), hypnogram_csv(psg))
        assert r.status_code == 200, r.text
        answer = r.json()
        assert abs(answer["clock_offset_s"] - psg.clock_offset_s) <= 30  # the simulator's offset, within one epoch
        assert answer["alignment_quality"] is not None and not answer["offset_given"]
        night = http.get(f"/v1/studies/{STUDY}/participants/P-01/nights/{answer['night_id']}",
                         params={"epochs": "true"}).json()
        assert night["labelled"] is True
        scored = [s for s in night["reference"] if s != "?"]
        assert len(scored) >= 0.8 * len(psg.stages)
    participants = http.get(f"/v1/studies/{STUDY}/participants").json()["data"]
    assert participants[0]["n_labelled_nights"] == len(sim.psg)  # labelled for training like posted nights


def test_a_hypnogram_that_cannot_be_placed_is_refused_unless_the_offset_is_given(sqlite_world: World) -> None:
    http = sqlite_world.http
    sim = simulated(6, seed=9, psg_nights=1)[0]
    rid = post_recording(http, sim).json()["recording_id"]
    psg = sim.psg[0]
    rng = np.random.default_rng(0)  # the same stages in a random order carry no timing
    shuffled = type(psg)(date=psg.date, start=psg.start, epoch_seconds=psg.epoch_seconds,
                         stages=rng.permutation(psg.stages), clock_offset_s=psg.clock_offset_s,
                         true_start=psg.true_start)
    refused = post_text(http, recordings_url("P-01", rid, "reference"), hypnogram_csv(shuffled))
    assert refused.status_code == 422
    assert refused.json()["code"] in ("alignment_weak", "alignment_at_edge")
    assert refused.json()["problems"][0]["location"] == {"query": "clock_offset_s"}
    assert http.get(f"/v1/studies/{STUDY}/participants").json()["data"][0]["n_labelled_nights"] == 0  # none stored
    given = post_text(http, recordings_url("P-01", rid, "reference"), hypnogram_csv(psg),
                      clock_offset_s=psg.clock_offset_s)
    assert given.status_code == 200, given.text
    assert given.json()["clock_offset_s"] == psg.clock_offset_s and given.json()["offset_given"]


# ---- day table ------------------------------------------------------------------------------------
def test_the_day_table_has_a_row_per_day_and_a_summary_with_its_definitions(sqlite_world: World) -> None:
    http = sqlite_world.http
    sim = simulated(14, seed=2)[0]
    rid = post_recording(http, sim).json()["recording_id"]
    post_text(http, recordings_url("P-01", rid, "diary"), sim.diary_csv.encode())
    r = http.get(recordings_url("P-01", rid, "days"), params={"method": "cole-kripke"})
    assert r.status_code == 200, r.text
    table = r.json()
    assert [row["date"] for row in table["rows"]] == [d.date.isoformat() for d in sim.days]
    night_rows = [row for row in table["rows"] if row["night_id"]]
    assert len(night_rows) >= 12
    for row in night_rows:  # sleep efficiency = TST / time in bed (definition of the parameter)
        in_bed_min = (pd.Timestamp(row["rise_time"]) - pd.Timestamp(row["bed_time"])).total_seconds() / 60
        assert row["sleep_efficiency_pct"] == pytest.approx(100 * row["tst_min"] / in_bed_min, abs=0.01)
        assert row["method"] == "cole-kripke"
    tst = [row["tst_min"] for row in night_rows]
    summary = table["summary"]
    assert summary["parameters"]["tst_min"]["mean"] == pytest.approx(np.mean(tst))
    assert summary["parameters"]["tst_min"]["sd"] == pytest.approx(np.std(tst, ddof=1))  # sample SD, numpy
    assert -100 <= summary["sri"] <= 100  # the index's range (Phillips et al. 2017)
    assert summary["n_days"] == len(sim.days) and summary["n_main_periods"] == len(night_rows)
    assert "scoring" in table["definitions"] and "sri" in table["definitions"]
    assert table["methods_used"] == ["cole-kripke"]

    csv = http.get(f"/v1/studies/{STUDY}/exports/days", params={"method": "cole-kripke"})
    assert csv.status_code == 200 and csv.headers["content-type"].startswith("text/csv")
    frame = pd.read_csv(io.BytesIO(csv.content))
    assert len(frame) == len(table["rows"]) and set(frame["recording_id"]) == {rid}
    parquet = http.get(f"/v1/studies/{STUDY}/exports/days", params={"format": "parquet", "method": "cole-kripke"})
    assert pd.read_parquet(io.BytesIO(parquet.content))["tst_min"].sum() == pytest.approx(frame["tst_min"].sum())
    auto = http.get(recordings_url("P-01", rid, "days")).json()  # no model trained yet: the stated fallback
    assert auto["method"] == "cole-kripke" and "no model" in auto["definitions"]["scoring"]


def test_the_day_table_applies_and_states_the_study_protocol(sqlite_world: World) -> None:
    http = sqlite_world.http
    sim = simulated(7, seed=4)[0]
    rid = post_recording(http, sim).json()["recording_id"]
    before = http.get(recordings_url("P-01", rid, "days"), params={"method": "cole-kripke"}).json()
    assert before["definitions"]["protocol"]["waso_end"] == "lights_on"
    put = http.put(f"/v1/studies/{STUDY}/protocol", json={"waso_end": "final_awakening"})
    assert put.status_code == 200, put.text
    after = http.get(recordings_url("P-01", rid, "days"), params={"method": "cole-kripke"}).json()
    assert after["definitions"]["protocol"]["waso_end"] == "final_awakening"
    pairs = [(b, a) for b, a in zip(before["rows"], after["rows"], strict=True) if b["night_id"]]
    assert pairs
    # with WASO ending at the final awakening, the final wake bout is neither WASO nor an awakening
    # (the protocol's definition), so neither figure can grow and TST is unchanged
    for b, a in pairs:
        assert a["awakenings"] <= b["awakenings"] and a["waso_min"] <= b["waso_min"]
        assert a["tst_min"] == pytest.approx(b["tst_min"])
    assert any(a["waso_min"] < b["waso_min"] for b, a in pairs)


# ---- refusals -------------------------------------------------------------------------------------
def _nothing_stored(http: Any) -> bool:
    return http.get(f"/v1/studies/{STUDY}/participants").json()["count"] == 0


def test_bad_recordings_are_refused_with_the_problem_and_where_it_is(sqlite_world: World) -> None:
    http = sqlite_world.http
    sim = simulated(2, seed=6)[0]
    text = recording_csv(sim.recording).decode().splitlines()
    text[50] = text[50].split(",")[0] + ",-5,0"  # a negative count on data row 50
    r = http.post(recordings_url("P-01"), content="\n".join(text).encode(), headers={"Content-Type": "text/csv"})
    assert r.status_code == 422, r.text
    assert r.json()["problems"] and any("row" in p["location"] for p in r.json()["problems"])
    assert http.post(recordings_url("P-01"), content=b"x", headers={"Content-Type": "text/plain"}).status_code == 415
    sixty = http.post("/v1/studies", json={"study_id": "s60", "name": "sixty", "epoch_seconds": 60})
    assert sixty.status_code == 201
    from models import recording_to_epoch

    coarse = recording_to_epoch(sim.recording, 60)
    http.post("/v1/studies", json={"study_id": "s30", "name": "thirty"})
    r = http.post("/v1/studies/s30/participants/P-01/recordings", content=recording_csv(coarse),
                  headers={"Content-Type": "text/csv"})
    assert r.status_code == 422 and r.json()["code"] == "epoch_length_mismatch"
    ok = http.post("/v1/studies/s60/participants/P-01/recordings", content=recording_csv(sim.recording),
                   headers={"Content-Type": "text/csv"})  # 30-s epochs summed into the study's 60 s
    assert ok.status_code == 201 and ok.json()["epoch_seconds"] == 60 and ok.json()["source_epoch_seconds"] == 30
    assert ok.json()["n_epochs"] == math.ceil(sim.recording.n_epochs / 2)
    assert _nothing_stored(http)


def test_a_bad_diary_or_hypnogram_changes_nothing(sqlite_world: World) -> None:
    http = sqlite_world.http
    sim = simulated(4, seed=8, psg_nights=1)[0]
    rid = post_recording(http, sim).json()["recording_id"]
    before = http.get(recordings_url("P-01", rid, "periods")).json()
    bad = post_text(http, recordings_url("P-01", rid, "diary"), b"date,bed_time,rise_time\n2031-05-05,25:61,07:00\n")
    assert bad.status_code == 422 and bad.json()["problems"][0]["location"]
    hyp = post_text(http, recordings_url("P-01", rid, "reference"), b"time,stage\n2031-05-05T23:00:00+02:00,Q\n")
    assert hyp.status_code == 422 and hyp.json()["problems"]
    far = sim.psg[0]
    moved = type(far)(date=far.date, start=far.start + pd.Timedelta(days=60), epoch_seconds=30, stages=far.stages,
                      clock_offset_s=0.0, true_start=far.true_start)
    outside = post_text(http, recordings_url("P-01", rid, "reference"), hypnogram_csv(moved))
    assert outside.status_code == 422 and outside.json()["code"] == "reference_outside_recording"
    assert http.get(recordings_url("P-01", rid, "periods")).json() == before
    assert http.get(recordings_url("P-01", rid)).json()["has_diary"] is False


def test_the_demo_study_recordings_post_and_their_psg_lands_on_the_simulated_offsets(sqlite_world: World) -> None:
    import json

    from models import DEMO_STUDY_ID

    root = Path(__file__).resolve().parents[2] / "demo_data" / DEMO_STUDY_ID
    study = json.loads((root / "study.json").read_text())
    manifest = study["recordings"]
    assert manifest and study["simulated"] and "SIMULATED" in study["name"]
    entry = manifest[0]
    pid = entry["participant_id"]
    files = {Path(f).name: root / f for f in entry["files"]}
    r = sqlite_world.http.post(recordings_url(pid), content=files["recording.json"].read_bytes(),
                               headers={"Content-Type": "application/json"})
    assert r.status_code == 201, r.text
    rid = r.json()["recording_id"]
    assert post_text(sqlite_world.http, recordings_url(pid, rid, "diary"), files["diary.csv"].read_bytes()).is_success
    for k, offset in enumerate(entry["psg_clock_offsets_s"], start=1):
        answer = sqlite_world.http.post(recordings_url(pid, rid, "reference"),
                                        content=files[f"psg{k}.json"].read_bytes(),
                                        headers={"Content-Type": "application/json"})
        assert answer.status_code == 200, answer.text
        assert abs(answer.json()["clock_offset_s"] - offset) <= 30  # the simulator's offset, within one epoch


def test_psg_labels_stay_with_their_night_when_a_diary_recomputes_the_periods(sqlite_world: World) -> None:
    http = sqlite_world.http
    sim = simulated(7, seed=17, psg_nights=1)[0]
    rid = post_recording(http, sim).json()["recording_id"]
    psg = sim.psg[0]
    labelled = post_text(http, recordings_url("P-01", rid, "reference"), hypnogram_csv(psg)).json()
    before = http.get(f"/v1/studies/{STUDY}/participants/P-01/nights/{labelled['night_id']}",
                      params={"epochs": "true"}).json()
    assert post_text(http, recordings_url("P-01", rid, "diary"), sim.diary_csv.encode()).status_code == 200
    recording = http.get(recordings_url("P-01", rid)).json()
    assert len(recording["labelled_night_ids"]) == 1
    after = http.get(f"/v1/studies/{STUDY}/participants/P-01/nights/{recording['labelled_night_ids'][0]}",
                     params={"epochs": "true"}).json()
    true_start = psg.true_start  # where the simulator put the PSG on the recording's clock
    for night in (before, after):  # the same hypnogram epochs land on the same clock times
        first = next(i for i, s in enumerate(night["reference"]) if s != "?")
        landed = pd.Timestamp(night["start"]) + pd.Timedelta(seconds=30 * first)
        assert abs((landed - true_start).total_seconds()) <= 60
    assert sum(s != "?" for s in after["reference"]) >= 0.8 * len(psg.stages)


def test_an_implausible_reference_is_refused_or_flagged_on_request(sqlite_world: World) -> None:
    http = sqlite_world.http
    sim = simulated(5, seed=19, psg_nights=1)[0]
    rid = post_recording(http, sim).json()["recording_id"]
    psg = sim.psg[0]
    flipped = np.where(psg.stages == "W", "N2", "W")  # sleep where the wrist moves, wake where it is still
    upside_down = type(psg)(date=psg.date, start=psg.start, epoch_seconds=30, stages=flipped,
                            clock_offset_s=psg.clock_offset_s, true_start=psg.true_start)
    refused = post_text(http, recordings_url("P-01", rid, "reference"), hypnogram_csv(upside_down),
                        clock_offset_s=psg.clock_offset_s)
    assert refused.status_code == 422 and refused.json()["code"] == "reference_implausible"
    assert http.get(recordings_url("P-01", rid)).json()["labelled_night_ids"] == []
    kept = post_text(http, recordings_url("P-01", rid, "reference"), hypnogram_csv(upside_down),
                     clock_offset_s=psg.clock_offset_s, accept_implausible="true")
    assert kept.status_code == 200 and any(f["code"] == "reference_implausible" for f in kept.json()["qc"])
    night = http.get(f"/v1/studies/{STUDY}/participants/P-01/nights/{kept.json()['night_id']}").json()
    assert any(f["code"] == "reference_implausible" for f in night["qc"])


def test_deleting_one_night_of_a_recording_leaves_its_day_without_a_night(sqlite_world: World) -> None:
    http = sqlite_world.http
    sim = simulated(4, seed=23, psg_nights=0)[0]
    rid = post_recording(http, sim).json()["recording_id"]
    mains = [p for p in http.get(recordings_url("P-01", rid, "periods")).json()["items"] if p["kind"] == "main"]
    gone = mains[1]
    assert http.delete(f"/v1/studies/{STUDY}/participants/P-01/nights/{gone['night_id']}").status_code == 200
    periods = {p["day"]: p for p in http.get(recordings_url("P-01", rid, "periods")).json()["items"]
               if p["kind"] == "main"}
    assert periods[gone["day"]]["night_id"] is None
    table = http.get(recordings_url("P-01", rid, "days"), params={"method": "sadeh"}).json()
    rows = {r["date"]: r for r in table["rows"]}
    assert rows[gone["day"]]["night_id"] is None and rows[gone["day"]]["tst_min"] is None
    assert all(rows[p["day"]]["tst_min"] is not None for p in mains if p["day"] != gone["day"])


def test_a_lab_export_is_read_with_a_saved_profile_and_15_s_epochs_are_summed(sqlite_world: World) -> None:
    http = sqlite_world.http
    sim = simulated(2, seed=29, psg_nights=0)[0]
    profile = {"name": "wrist-export", "delimiter": ";", "skip_rows": 1,
               "columns": {"date": "Datum", "time": "Zeit", "counts": "Aktivitaet"},
               "datetime_format": "%d.%m.%Y %H:%M:%S", "tz": "Europe/Oslo"}
    assert http.post(f"/v1/studies/{STUDY}/import-profiles", json=profile).status_code == 201
    rec = sim.recording
    fine = np.repeat(rec.counts / 2, 2)  # 15-s epochs whose pairs sum to the 30-s counts
    times = pd.date_range(rec.start, periods=fine.size, freq=pd.Timedelta(seconds=15)).tz_convert("Europe/Oslo")
    lines = ["exported by the wrist device"] + ["Datum;Zeit;Aktivitaet"] + [
        f"{t:%d.%m.%Y};{t:%H:%M:%S};{c:g}" for t, c in zip(times, fine, strict=True)]
    r = http.post(recordings_url("P-01"), content="\n".join(lines).encode(), headers={"Content-Type": "text/csv"},
                  params={"profile": "wrist-export"})
    assert r.status_code == 201, r.text
    body = r.json()
    assert body["epoch_seconds"] == 30 and body["source_epoch_seconds"] == 15 and body["n_epochs"] == rec.n_epochs
    missing = http.post(recordings_url("P-02"), content=b"x", headers={"Content-Type": "text/csv"},
                        params={"profile": "no-such-profile"})
    assert missing.status_code == 404 and "no-such-profile" in missing.json()["detail"]
    main = next(p for p in body["periods"] if p["kind"] == "main")
    night = http.get(f"/v1/studies/{STUDY}/participants/P-01/nights/{main['night_id']}", params={"epochs": "true"})
    got = np.array([np.nan if c is None else c for c in night.json()["counts"]])
    first = int((pd.Timestamp(main["start"]) - rec.start) / pd.Timedelta(seconds=30))
    worn = ~np.isnan(got)
    assert worn.any()
    np.testing.assert_allclose(got[worn], rec.counts[first:first + got.size][worn])  # pairs summed back


def test_downgrading_below_recordings_removes_them_and_their_nights_only(tmp_path: Path) -> None:
    from sqlalchemy import create_engine, text

    from service.config import Settings
    from service.store.schema import downgrade, upgrade

    with live_world("sqlite", tmp_path) as w:
        http = w.http
        posted = cohort_bodies(n_participants=1, nights=1, seed=47)["P-01"]
        for body in posted:
            assert http.post(f"/v1/studies/{STUDY}/participants/P-01/nights", json=body).status_code == 201
        body = post_recording(http, simulated(3, seed=47, psg_nights=0)[0]).json()
        night_id = next(p["night_id"] for p in body["periods"] if p["kind"] == "main")
        assert http.get(f"/v1/studies/{STUDY}/participants/P-01/nights/{night_id}/scoring",
                        params={"method": "sadeh"}).status_code == 200
    settings = Settings(db=f"sqlite:///{tmp_path / 'nightbank.db'}")
    downgrade(settings, "0002")
    engine = create_engine(settings.db)
    with engine.connect() as conn:
        assert conn.execute(text("SELECT count(*) FROM nights")).scalar() == len(posted)  # posted nights stay
        orphans = conn.execute(text("SELECT count(*) FROM scorings WHERE night_pk NOT IN (SELECT pk FROM nights)"))
        assert orphans.scalar() == 0
    engine.dispose()
    upgrade(settings)


def test_a_participant_renamed_or_merged_keeps_its_recording_and_nights(sqlite_world: World) -> None:
    http = sqlite_world.http
    first, second = simulated(3, seed=53, n_participants=2, psg_nights=0)
    for sim in (first, second):
        assert post_recording(http, sim).status_code == 201
    rename = f"/v1/studies/{STUDY}/participants/P-02/rename"
    # the two simulated wearers' recordings cover the same dates: their nights overlap in clock time
    refused = http.post(rename, json={"to": "P-01"})
    assert refused.status_code == 409 and refused.json()["code"] == "overlapping_night"
    merged = http.post(rename, params={"allow_overlap": "true"}, json={"to": "P-01"})
    assert merged.status_code == 200, merged.text
    listed = http.get(recordings_url("P-01")).json()
    assert listed["count"] == 2
    for rec in listed["data"]:
        assert rec["night_ids"]
        for night_id in rec["night_ids"]:  # each night still reads its epochs from its recording
            r = http.get(f"/v1/studies/{STUDY}/participants/P-01/nights/{night_id}", params={"epochs": "true"})
            assert r.status_code == 200 and len(r.json()["counts"]) == r.json()["n_epochs"]
    assert http.get(recordings_url("P-02")).status_code == 404
