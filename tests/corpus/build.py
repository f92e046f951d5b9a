"""Writes the bad-input corpus: malformed nights, each file named for its defect.

Run ``python tests/corpus/build.py`` to regenerate; the files are committed. ``expected.json`` maps
each file to the problem code nightbank must answer with. The 10-million-epoch night is too big to
commit and is written by the tests from ``LARGE`` below.
"""

from __future__ import annotations

import gzip
import json
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
START = pd.Timestamp("2031-03-02T22:40:00+01:00")
N = 240  # 2 hours of 30-s epochs


def _good() -> dict:
    rng = np.random.default_rng(11)
    return {"epoch_seconds": 30, "start": START.isoformat(), "counts": rng.poisson(5, N).tolist(),
            "reference": rng.choice(["W", "N1", "N2", "N3", "R"], N).tolist(), "label": "corpus"}


def _csv_rows(times=None, counts=None, sep=",", header="time,counts") -> str:
    times = pd.date_range(START, periods=N, freq="30s") if times is None else times
    counts = np.random.default_rng(12).poisson(5, len(times)).tolist() if counts is None else counts
    rows = (f"{t.isoformat()}{sep}{c}" for t, c in zip(times, counts, strict=True))
    return header.replace(",", sep) + "\n" + "\n".join(rows) + "\n"


def _json(obj) -> bytes:
    return json.dumps(obj).encode()


def build() -> dict[str, str]:
    files: dict[str, tuple[bytes, str]] = {}
    g = _good()
    files["truncated.json"] = (_json(g)[:700], "malformed_json")
    files["epoch-seconds-as-string.json"] = (_json({**g, "epoch_seconds": "30"}), "unsupported_epoch_length")
    files["counts-as-strings.json"] = (_json({**g, "counts": [str(c) for c in g["counts"]]}), "non_numeric_count")
    files["counts-boolean.json"] = (_json({**g, "counts": [True] * N}), "non_numeric_count")
    files["counts-nested-lists.json"] = (_json({**g, "counts": [[c] for c in g["counts"]]}), "non_numeric_count")
    files["counts-not-a-list.json"] = (_json({**g, "counts": "0,1,2"}), "invalid_field")
    files["negative-counts.json"] = (_json({**g, "counts": [-1] + g["counts"][1:]}), "negative_count")
    files["infinite-count.json"] = (_json({**g, "counts": g["counts"][:5] + [float("inf")] + g["counts"][6:]}),
                                    "non_finite_count")
    files["empty-counts.json"] = (_json({**g, "counts": [], "reference": []}), "empty_recording")
    files["reference-wrong-length.json"] = (_json({**g, "reference": g["reference"][:-1]}), "reference_length")
    files["unknown-stage-codes.json"] = (_json({**g, "reference": ["N4"] + g["reference"][1:]}), "unknown_stage")
    files["reference-numeric-2.json"] = (_json({**g, "reference": [2] * N}), "unknown_stage")
    files["lights-on-before-lights-off.json"] = (_json({**g, "lights_off": "2031-03-02T23:30:00+01:00",
                                                        "lights_on": "2031-03-02T23:00:00+01:00"}), "lights_order")
    files["lights-outside-recording.json"] = (_json({**g, "lights_on": "2031-03-03T12:00:00+01:00"}),
                                              "lights_outside_recording")
    files["epoch-20-seconds.json"] = (_json({**g, "epoch_seconds": 20}), "unsupported_epoch_length")
    files["missing-timezone.json"] = (_json({**g, "start": "2031-03-02T22:40:00"}), "missing_timezone")
    files["start-null.json"] = (_json({**g, "start": None}), "invalid_timestamp")
    files["start-not-a-date.json"] = (_json({**g, "start": "last tuesday"}), "invalid_timestamp")
    files["too-short-30-minutes.json"] = (_json({**g, "counts": g["counts"][:60], "reference": g["reference"][:60]}),
                                          "too_short")
    files["too-long-60-hours.json"] = (_json({**g, "counts": [0] * 7200, "reference": ["W"] * 7200}), "too_long")
    files["top-level-array.json"] = (_json([g]), "malformed_json")
    files["unknown-field.json"] = (_json({**g, "participant": "P01"}), "unknown_field")
    files["missing-counts-field.json"] = (_json({k: v for k, v in g.items() if k != "counts"}), "missing_field")
    files["gzip-compressed.json.gz"] = (gzip.compress(_json(g), mtime=0), "not_utf8")
    files["utf16.csv"] = (_csv_rows().encode("utf-16"), "not_utf8")
    files["bom-mid-file-concatenated.csv"] = (
        (_csv_rows() + "\ufeff" + _csv_rows().split("\n", 1)[1]).encode("utf-8"), "invalid_timestamp")
    files["binary-garbage.csv"] = (np.random.default_rng(13).integers(0, 256, 4096, dtype=np.uint8).tobytes(),
                                   "not_utf8")
    files["empty.csv"] = (b"", "empty_file")
    files["header-only.csv"] = (b"time,counts\n", "empty_recording")
    files["missing-counts-column.csv"] = (_csv_rows(header="time,steps").encode(), "missing_column")
    files["mixed-delimiters.csv"] = (_csv_rows().replace("\n2031-03-02T23:00:00+01:00,", "\n2031-03-02T23:00:00+01:00;",
                                                         1).encode(), "malformed_csv")
    times = pd.date_range(START, periods=N, freq="30s")
    files["duplicate-timestamps.csv"] = (_csv_rows(times.delete(50).insert(50, times[49])).encode(),
                                         "duplicate_timestamp")
    files["time-going-backwards.csv"] = (_csv_rows(times[:100].append(times[90:100]).append(times[100:])).encode(),
                                         "time_not_increasing")
    files["gap-13-hours.csv"] = (_csv_rows(times[:120].append(times[120:] + pd.Timedelta(hours=13))).encode(),
                                 "irregular_spacing")
    dst = pd.date_range("2031-03-30T00:00:00+01:00", periods=N, freq="30s")
    jumped = dst.where(dst < pd.Timestamp("2031-03-30T01:00:00+01:00"), dst + pd.Timedelta(hours=1))
    files["dst-jump-offset-not-updated.csv"] = (_csv_rows(jumped).encode(), "irregular_spacing")
    files["one-second-epochs.csv"] = (_csv_rows(pd.date_range(START, periods=4000, freq="1s")).encode(),
                                      "unsupported_epoch_length")
    files["nan-counts.csv"] = (_csv_rows(counts=["NaN"] + [3] * (N - 1)).encode(), "non_finite_count")
    files["time-not-iso.csv"] = (_csv_rows().replace("2031-03-02T22:45:00+01:00", "yesterday 22:45").encode(),
                                 "invalid_timestamp")
    files["mixed-offset-and-naive-times.csv"] = (_csv_rows().replace("2031-03-02T22:45:00+01:00",
                                                                     "2031-03-02T22:45:00").encode(), "mixed_timezones")
    files["html-error-page.csv"] = (b"<html><head><title>502 Bad Gateway</title></head><body>bad gateway</body>"
                                    b"</html>\n", "missing_column")
    for name, (data, _) in files.items():
        (HERE / name).write_bytes(data)
    expected = {name: code for name, (_, code) in sorted(files.items())}
    (HERE / "expected.json").write_text(json.dumps(expected, indent=1) + "\n")
    return expected


#: too large to commit: written by the tests (10 million epochs of zeros, 30-s epochs)
LARGE = {"ten-million-epochs.json": "too_many_epochs"}


def write_large(directory: Path) -> Path:
    path = directory / "ten-million-epochs.json"
    with path.open("w") as fh:
        fh.write('{"epoch_seconds": 30, "start": "2031-03-02T22:40:00+01:00", "counts": [')
        fh.write("0," * 9_999_999 + "0]}")
    return path


if __name__ == "__main__":
    print(f"{len(build())} files written to {HERE}")
