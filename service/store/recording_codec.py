"""Compact storage of continuous recordings, and nights that are views of one.

A recording's counts are zlib-compressed little-endian float64 bytes (NaN kept for missing
epochs), its markers zlib-compressed packed bits; the rebuilt :class:`models.Recording` must
have the content hash stored beside them, else :class:`StoredDataMismatch` is raised (never a
silent difference). Non-wear intervals, sleep periods and diary days are JSON records.

A night of a recording (``nights.recording_pk`` set) stores no counts of its own: its epochs
are the recording's ``[first_epoch, first_epoch + n_epochs)``, non-wear epochs NaN (unscored);
its reference (PSG labels, when posted) is stored with the night as for any night.
:func:`view_night` rebuilds it and checks its content hash too.
"""

from __future__ import annotations

import threading
import zlib
from datetime import date
from typing import Any

import numpy as np
import pandas as pd
from cachetools import LRUCache
from sqlalchemy.orm import object_session

from models import DiaryDay, Night, NonwearInterval, Recording, SleepPeriod, nonwear_mask

from ..errors import ServiceError
from . import db

__all__ = [
    "StoredDataMismatch",
    "decode_markers",
    "diary_from_records",
    "diary_records",
    "encode_markers",
    "nonwear_from_records",
    "nonwear_records",
    "period_from_record",
    "period_record",
    "recording_columns",
    "recording_from_row",
    "view_night",
]


class StoredDataMismatch(ServiceError):
    """Stored arrays do not rebuild the content they were stored as (damaged or altered storage)."""

    code = "stored_data_mismatch"
    status = 500


def encode_markers(markers: np.ndarray) -> bytes:
    """Marker flags of shape (n_epochs,) -> compressed packed bits."""
    return zlib.compress(np.packbits(np.asarray(markers, dtype=bool)).tobytes(), 1)


def decode_markers(blob: bytes, n_epochs: int) -> np.ndarray:
    """Compressed packed bits -> marker flags, bool of shape (n_epochs,)."""
    bits = np.unpackbits(np.frombuffer(zlib.decompress(blob), dtype=np.uint8), count=n_epochs)
    return bits.astype(bool)


def _encode_counts(counts: np.ndarray) -> bytes:
    return zlib.compress(np.ascontiguousarray(counts, dtype="<f8").tobytes(), 1)


def _decode_counts(blob: bytes) -> np.ndarray:
    return np.frombuffer(zlib.decompress(blob), dtype="<f8").astype(np.float64)


def recording_columns(recording: Recording, *, tz: str | None, source_format: str,
                      source_epoch_seconds: int | None) -> dict[str, Any]:
    """Column values of a ``recordings`` row for ``recording`` (arrays encoded; derived JSON not included)."""
    content_hash = recording.content_hash()
    return {
        "recording_id": content_hash[:20],
        "content_hash": content_hash,
        "start": pd.Timestamp(recording.start).isoformat(),
        "tz": tz,
        "start_utc": recording.start.tz_convert("UTC").to_pydatetime(),
        "end_utc": recording.end.tz_convert("UTC").to_pydatetime(),
        "epoch_seconds": int(recording.epoch_seconds),
        "source_epoch_seconds": source_epoch_seconds,
        "n_epochs": recording.n_epochs,
        "counts": _encode_counts(recording.counts),
        "markers": encode_markers(recording.markers),
        "source_format": source_format,
        "source_name": recording.source_name,
    }


def _start(row: db.RecordingRow) -> pd.Timestamp:
    start = pd.Timestamp(row.start)
    return start.tz_convert(row.tz) if row.tz else start


def recording_from_row(row: db.RecordingRow, *, participant_id: str) -> Recording:
    """Rebuild the :class:`models.Recording` stored in ``row``, checking its content hash.

    Raises
    ------
    StoredDataMismatch
        If the rebuilt recording's content hash differs from the stored one.
    """
    counts = _decode_counts(row.counts)
    recording = Recording(participant_id=participant_id, start=_start(row), epoch_seconds=row.epoch_seconds,
                          counts=counts, markers=decode_markers(row.markers, counts.size),
                          source_name=row.source_name)
    if recording.content_hash() != row.content_hash:
        raise StoredDataMismatch(f"stored recording {row.recording_id!r} of participant {participant_id!r} does "
                                 "not rebuild its content: its stored arrays were damaged or altered; delete it "
                                 "and post the recording again")
    return recording


# ---- JSON records of what is derived from a recording ---------------------------------------
def nonwear_records(intervals: list[NonwearInterval]) -> list[dict[str, Any]]:
    return [{"start_epoch": int(i.start_epoch), "end_epoch": int(i.end_epoch), "reason": i.reason}
            for i in intervals]


def nonwear_from_records(records: list[dict[str, Any]]) -> list[NonwearInterval]:
    return [NonwearInterval(start_epoch=int(r["start_epoch"]), end_epoch=int(r["end_epoch"]), reason=r["reason"])
            for r in records]


def period_record(period: SleepPeriod) -> dict[str, Any]:
    return {"kind": period.kind, "day": period.day.isoformat(), "start_epoch": int(period.start_epoch),
            "end_epoch": int(period.end_epoch), "onset_epoch": int(period.onset_epoch),
            "offset_epoch": int(period.offset_epoch), "source": period.source, "conflicts": list(period.conflicts)}


def period_from_record(record: dict[str, Any]) -> SleepPeriod:
    return SleepPeriod(kind=record["kind"], day=date.fromisoformat(record["day"]),
                       start_epoch=int(record["start_epoch"]), end_epoch=int(record["end_epoch"]),
                       onset_epoch=int(record["onset_epoch"]), offset_epoch=int(record["offset_epoch"]),
                       source=record["source"], conflicts=tuple(record["conflicts"]))


def _iso(ts: pd.Timestamp | None) -> str | None:
    return None if ts is None else pd.Timestamp(ts).isoformat()


def _ts(text: str | None) -> pd.Timestamp | None:
    return None if text is None else pd.Timestamp(text)


def diary_records(days: list[DiaryDay]) -> list[dict[str, Any]]:
    return [{"date": d.date.isoformat(), "bed_time": _iso(d.bed_time), "rise_time": _iso(d.rise_time),
             "naps": [[_iso(a), _iso(b)] for a, b in d.naps]} for d in days]


def diary_from_records(records: list[dict[str, Any]], *, tz: str | None = None) -> list[DiaryDay]:
    def local(text: str | None) -> pd.Timestamp | None:
        ts = _ts(text)
        return ts.tz_convert(tz) if ts is not None and tz else ts

    return [DiaryDay(date=date.fromisoformat(r["date"]), bed_time=local(r["bed_time"]),
                     rise_time=local(r["rise_time"]),
                     naps=tuple((local(a), local(b)) for a, b in r["naps"]))  # type: ignore[misc]
            for r in records]


# ---- nights that are views of a recording ---------------------------------------------------
_EPOCHS: LRUCache[tuple[int, str], np.ndarray] = LRUCache(maxsize=8)
_EPOCHS_LOCK = threading.Lock()


def _view_counts(recording: db.RecordingRow, participant_id: str) -> np.ndarray:
    """The recording's counts with its non-wear epochs NaN (cached per stored recording)."""
    key = (recording.pk, recording.content_hash)
    with _EPOCHS_LOCK:
        found = _EPOCHS.get(key)
    if found is not None:
        return found
    rec = recording_from_row(recording, participant_id=participant_id)
    counts = np.array(rec.counts, dtype=np.float64)
    counts[nonwear_mask(rec.n_epochs, nonwear_from_records(recording.nonwear))] = np.nan
    counts.setflags(write=False)
    with _EPOCHS_LOCK:
        _EPOCHS[key] = counts
    return counts


def view_night(row: db.Night, *, participant_id: str, reference: np.ndarray | None) -> Night:
    """Rebuild a night of a recording from the recording's epochs (``row`` must be in a session).

    Raises
    ------
    StoredDataMismatch
        If the recording or the rebuilt night does not match its stored content hash.
    """
    session = object_session(row)
    recording = None if session is None else session.get(db.RecordingRow, row.recording_pk)
    if recording is None:
        raise StoredDataMismatch(f"night {row.night_id!r} is a view of a recording that cannot be read")
    first = int(row.first_epoch or 0)
    counts = _view_counts(recording, participant_id)[first:first + row.n_epochs]
    night = Night(participant_id=participant_id, start=pd.Timestamp(row.start), epoch_seconds=row.epoch_seconds,
                  counts=counts, reference=reference, lights_off=_ts(row.lights_off), lights_on=_ts(row.lights_on),
                  label=row.label)
    if night.content_hash != row.content_hash or counts.size != row.n_epochs:
        raise StoredDataMismatch(f"night {row.night_id!r} of participant {participant_id!r} does not rebuild from "
                                 f"its recording {recording.recording_id!r}: the stored data were damaged or altered")
    return night
