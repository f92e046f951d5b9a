"""Readers with import profiles: lab exports written the way other systems write them, compared with pandas.

Each export is written here (simulated data), read through a profile, and read again with pandas'
own ``read_csv`` given the same layout explicitly (sep, skiprows, decimal, encoding) and its times
parsed with ``pandas.to_datetime(format=..., exact=True)`` and localised with ``tz_localize``: pandas
is the outside reference for counts and times.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pandas as pd
from factories import one_problem, problems_of

from models import (
    ImportProfile,
    NightOptions,
    night_from_csv,
    night_from_json,
    night_from_parquet,
    read_night,
)

BERLIN = "Europe/Berlin"
PREAMBLE = ["Gerät;simuliert", "Seriennummer;0000", "Epoche;30 s", ""]
# R&K (Rechtschaffen & Kales 1968): 0 wake, 1-4 sleep stages 1-4, 5 REM. AASM (Iber et al. 2007): W, N1, N2,
# N3, R, with R&K stages 3 and 4 together forming N3 (both from memory).
RK_TO_AASM = {"0": "W", "1": "N1", "2": "N2", "3": "N3", "4": "N3", "5": "R"}


def _german_export(n: int = 600, *, seed: int = 0, start: str = "2031-03-02 22:00:00") -> tuple[bytes, pd.DataFrame]:
    """A semicolon export with preamble, split day-first date/time, decimal comma and R&K numbers (Latin-1)."""
    rng = np.random.default_rng(seed)
    local = pd.date_range(start, periods=n, freq="30s")
    frame = pd.DataFrame({"Datum": local.strftime("%d.%m.%Y"), "Uhrzeit": local.strftime("%H:%M:%S"),
                          "Aktivität [counts]": rng.gamma(1.0, 25.0, n).round(2),
                          "Schlafstadium": rng.choice([0, 1, 2, 3, 4, 5], n), "Lux": rng.integers(0, 50, n)})
    body = frame.to_csv(sep=";", decimal=",", index=False, lineterminator="\n")
    return ("\n".join(PREAMBLE) + "\n" + body).encode("latin-1"), frame


GERMAN = ImportProfile(name="lab-de", delimiter=";", skip_rows=len(PREAMBLE), decimal=",", encoding="latin-1",
                       columns={"date": "Datum", "time": "Uhrzeit", "counts": "Aktivität [counts]",
                                "reference": "Schlafstadium"},
                       datetime_format="%d.%m.%Y %H:%M:%S", tz=BERLIN, stage_codes=RK_TO_AASM)


def test_german_export_matches_pandas_read_csv() -> None:
    data, _ = _german_export()
    night = night_from_csv(data, profile=GERMAN, source="exports/night-07.csv")
    ref = pd.read_csv(io.BytesIO(data), sep=";", skiprows=len(PREAMBLE), decimal=",", encoding="latin-1")
    times = pd.to_datetime(ref["Datum"] + " " + ref["Uhrzeit"], format="%d.%m.%Y %H:%M:%S", exact=True)
    times = pd.DatetimeIndex(times).tz_localize(BERLIN)
    np.testing.assert_array_equal(night.counts, ref["Aktivität [counts]"].to_numpy(dtype=float))
    assert night.epoch_times().equals(times.as_unit(night.epoch_times().unit))
    assert night.start == times[0] and night.epoch_seconds == 30
    # R&K numbers map onto AASM codes: 0 -> W, 3 and 4 -> N3, 5 -> R (Rechtschaffen & Kales 1968; Iber et al. 2007)
    assert night.reference.tolist() == [RK_TO_AASM[str(v)] for v in ref["Schlafstadium"]]
    assert night.unused_columns == ("Lux",) and night.source_name == "night-07.csv"


def test_rk_codes_give_sleep_and_wake_by_the_published_definitions() -> None:
    data, frame = _german_export()
    sleep = night_from_csv(data, profile=GERMAN).reference_sleep()
    # R&K 1968: stage 0 is wakefulness, 1-4 and REM (5) are sleep
    np.testing.assert_array_equal(sleep, (frame["Schlafstadium"].to_numpy() != 0).astype(float))


def test_month_first_twelve_hour_times_in_one_column() -> None:
    local = pd.date_range("2031-03-02 21:30:00", periods=300, freq="60s")
    counts = np.arange(300) % 17
    text = "Timestamp,Activity (counts/min)\n" + "\n".join(
        f"{t.strftime('%m/%d/%Y %I:%M:%S %p')},{c}" for t, c in zip(local, counts, strict=True))
    profile = ImportProfile(name="us", datetime_format="%m/%d/%Y %I:%M:%S %p", tz="America/Chicago")
    night = night_from_csv(text, profile=profile)
    ref = pd.read_csv(io.StringIO(text))
    times = pd.DatetimeIndex(pd.to_datetime(ref["Timestamp"], format="%m/%d/%Y %I:%M:%S %p", exact=True))
    assert night.epoch_times().equals(times.tz_localize("America/Chicago").as_unit(night.epoch_times().unit))
    np.testing.assert_array_equal(night.counts, ref["Activity (counts/min)"].to_numpy(dtype=float))
    assert night.epoch_seconds == 60


def test_fractional_second_format_is_read_by_pandas_rules() -> None:
    local = pd.date_range("2031-03-02 23:00:00", periods=240, freq="15s")
    text = "t|n\n" + "\n".join(f"{t.strftime('%d/%m/%Y %H:%M:%S')}.000|{i % 5}" for i, t in enumerate(local))
    profile = ImportProfile(name="frac", delimiter="|", columns={"time": "t", "counts": "n"},
                            datetime_format="%d/%m/%Y %H:%M:%S.%f", tz="UTC")
    night = night_from_csv(text, profile=profile)
    ref = pd.read_csv(io.StringIO(text), sep="|")
    times = pd.DatetimeIndex(pd.to_datetime(ref["t"], format="%d/%m/%Y %H:%M:%S.%f", exact=True)).tz_localize("UTC")
    assert night.epoch_times().equals(times.as_unit(night.epoch_times().unit)) and night.epoch_seconds == 15


def test_unit_suffixed_headers_found_without_a_profile() -> None:
    times = pd.date_range("2031-03-02T22:00:00+01:00", periods=240, freq="30s")
    lines = ["Time [ISO],Activity [counts],Stage (AASM)"] + [
        f"{t.isoformat()},{i % 9},{'W' if i % 4 else 'N2'}" for i, t in enumerate(times)]
    night = night_from_csv("\n".join(lines))
    ref = pd.read_csv(io.StringIO("\n".join(lines)))
    np.testing.assert_array_equal(night.counts, ref["Activity [counts]"].to_numpy(dtype=float))
    assert night.reference.tolist() == ref["Stage (AASM)"].tolist() and night.start == times[0]


def test_word_codes_mapped_by_the_profile() -> None:
    times = pd.date_range("2031-03-02T22:00:00Z", periods=240, freq="30s")
    words = np.array(["Wake", "Stage 1", "Stage 2", "Stage 3", "Stage 4", "REM", "Artefact"])
    codes = {"Wake": "W", "Stage 1": "N1", "Stage 2": "N2", "Stage 3": "N3", "Stage 4": "N3", "REM": "R",
             "Artefact": "?"}
    text = "time,counts,hypnogram\n" + "\n".join(f"{t.isoformat()},1,{words[i % 7]}" for i, t in enumerate(times))
    night = night_from_csv(text, profile=ImportProfile(name="words", columns={"reference": "hypnogram"},
                                                       stage_codes=codes))
    assert night.reference.tolist() == [codes[w] for w in words[np.arange(240) % 7]]


def test_reference_like_column_not_mapped_is_refused_until_ignored() -> None:
    data, _ = _german_export()
    text = data.decode("latin-1").replace(";Lux", ";Lux;Gerät Schlaf/Wach")
    lines = text.split("\n")
    lines = lines[: len(PREAMBLE) + 1] + [line + ";1" if line else line for line in lines[len(PREAMBLE) + 1:]]
    export = "\n".join(lines).encode("latin-1")
    p = one_problem(problems_of(night_from_csv, export, profile=GERMAN), "unmapped_reference_column")
    assert p.location == {"field": "Gerät Schlaf/Wach", "row": len(PREAMBLE) + 1}
    ignoring = ImportProfile.from_dict({**GERMAN.to_dict(), "ignore_columns": ["Gerät Schlaf/Wach"]})
    assert night_from_csv(export, profile=ignoring).unused_columns == ("Lux",)


def test_second_reference_alias_without_profile_is_refused() -> None:
    times = pd.date_range("2031-03-02T22:00:00Z", periods=240, freq="30s")
    text = "time,counts,stage,psg\n" + "\n".join(f"{t.isoformat()},1,W,W" for t in times)
    assert one_problem(problems_of(night_from_csv, text), "unmapped_reference_column").location["field"] == "psg"


def test_profile_column_missing_names_the_header_row() -> None:
    data, _ = _german_export()
    profile = ImportProfile.from_dict({**GERMAN.to_dict(), "columns": {**GERMAN.columns, "counts": "Counts"}})
    p = one_problem(problems_of(night_from_csv, data, profile=profile), "missing_column")
    assert p.location == {"field": "Counts", "row": len(PREAMBLE) + 1} and "lab-de" in p.message


def test_time_not_in_the_format_names_the_file_row() -> None:
    data, _ = _german_export()
    lines = data.decode("latin-1").split("\n")
    at = len(PREAMBLE) + 1 + 10  # file line (1-based) of the 11th data row
    lines[at - 1] = lines[at - 1].replace(".2031;", ".31;", 1)
    problems = problems_of(night_from_csv, "\n".join(lines).encode("latin-1"), profile=GERMAN)
    p = one_problem(problems, "invalid_timestamp")
    assert p.location["row"] == at and "%d.%m.%Y %H:%M:%S" in p.message


def test_unused_columns_and_source_are_not_content() -> None:
    data, _ = _german_export()
    with_lux = night_from_csv(data, profile=GERMAN, source="a.csv")
    text = data.decode("latin-1").split("\n")
    without = "\n".join(line.rsplit(";", 1)[0] if i >= len(PREAMBLE) else line for i, line in enumerate(text))
    plain = night_from_csv(without.encode("latin-1"), profile=GERMAN)
    assert plain.unused_columns == () and plain.source_name is None
    assert plain.content_hash == with_lux.content_hash


def test_read_night_keeps_the_file_name_and_labels_by_stem(tmp_path) -> None:
    data, _ = _german_export()
    path = tmp_path / "P07-night3.csv"
    path.write_bytes(data)
    night = read_night(path, profile=GERMAN)
    assert night.label == "P07-night3" and night.source_name == "P07-night3.csv"
    labelled = tmp_path / "other.csv"
    labelled.write_bytes(data.replace(b"Ger\xe4t;simuliert", b"# label: n-3", 1))
    assert read_night(labelled, profile=GERMAN).label == "n-3"


def test_json_takes_the_profile_stage_codes_and_zone() -> None:
    obj = {"epoch_seconds": 30, "start": "2031-03-02T22:00:00", "counts": [1] * 240,
           "reference": [int(c) for c in "012345" * 40]}
    night = night_from_json(json.dumps(obj), profile=GERMAN, source="/x/n.json")
    assert night.reference.tolist() == [RK_TO_AASM[c] for c in "012345" * 40]
    assert night.start == pd.Timestamp("2031-03-02T22:00:00", tz=BERLIN) and night.source_name == "n.json"


def test_parquet_with_german_columns_and_codes() -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    local = pd.date_range("2031-03-02 22:00:00", periods=240, freq="30s")
    table = pa.table({"Zeit": local.strftime("%d.%m.%Y %H:%M:%S"), "Aktivität": np.arange(240) % 11,
                      "Stadium": pa.array([str(i % 6) for i in range(240)])})
    buffer = io.BytesIO()
    pq.write_table(table, buffer)
    profile = ImportProfile(name="pq", columns={"time": "Zeit", "counts": "Aktivität", "reference": "Stadium"},
                            datetime_format="%d.%m.%Y %H:%M:%S", tz=BERLIN, stage_codes=RK_TO_AASM)
    night = night_from_parquet(buffer.getvalue(), profile=profile)
    assert night.start == local[0].tz_localize(BERLIN)
    assert night.reference.tolist() == [RK_TO_AASM[str(i % 6)] for i in range(240)]


def test_options_zone_overrides_the_profile_zone() -> None:
    data, _ = _german_export()
    night = night_from_csv(data, profile=GERMAN, options=NightOptions(tz="UTC"))
    assert night.start == pd.Timestamp("2031-03-02T22:00:00Z")
