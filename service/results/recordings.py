"""Posting continuous recordings, their diaries and PSG references: read, check, derive, store in one transaction.

Each function reads and checks its input and computes everything it stores before the write
transaction, then stores it in that one transaction, so a refused input leaves nothing behind.
Used by the HTTP routes and by ``nightbank demo``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from models import (
    InvalidNightError,
    Problem,
    Recording,
    estimate_clock_offset,
    read_diary,
    read_hypnogram,
    read_recording,
    recording_to_epoch,
)

from ..errors import Conflict, Unprocessable
from ..store import profiles, registry
from ..store import recordings as store
from ..store.audit import record_audit
from ..store.db import session_scope
from ..store.recording_codec import diary_records, recording_columns
from ..store.recording_nights import Derived, derive, hypnogram_record, reference_overlap

__all__ = ["ReferenceResult", "conform_recording", "nonwear_items", "period_items", "post_diary", "post_recording",
           "post_reference", "zone_of"]

#: clock offsets searched when aligning a PSG reference, seconds either way
ALIGNMENT_SEARCH_S = 600.0


def conform_recording(recording: Recording, *, epoch_seconds: int, study_id: str) -> tuple[Recording, int | None]:
    """The recording at the study's epoch length (aggregated from a shorter one that divides it).

    Raises
    ------
    Unprocessable
        Code ``epoch_length_mismatch`` (location ``epoch_seconds``) for any other length.
    """
    if recording.epoch_seconds == epoch_seconds:
        return recording, None
    try:
        return recording_to_epoch(recording, epoch_seconds), int(recording.epoch_seconds)
    except InvalidNightError:
        message = (f"the recording has {recording.epoch_seconds}-s epochs but study {study_id!r} stores "
                   f"{epoch_seconds}-s epochs: post recordings with epochs of {epoch_seconds} s or a shorter length "
                   "that divides it")
        raise Unprocessable(message, code="epoch_length_mismatch",
                            problems=[Problem("epoch_length_mismatch", message, {"field": "epoch_seconds"})]) from None


def zone_of(info: store.RecordingInfo) -> str:
    """The IANA zone of a recording's local times: its own, else the fixed zone of its start's UTC offset.

    Raises
    ------
    Unprocessable
        Code ``time_zone_needed`` when the recording has no zone and its offset is not whole hours.
    """
    if info.tz:
        return info.tz
    offset = info.start.utcoffset()
    minutes = 0 if offset is None else int(offset.total_seconds() // 60)
    if minutes % 60:
        message = (f"the recording's times carry the UTC offset {minutes / 60:+.2f} h and no time zone; give the "
                   "zone of the diary's and reference's clock times as tz=<IANA zone>")
        raise Unprocessable(message, code="time_zone_needed", problems=[Problem("time_zone_needed", message,
                                                                               {"query": "tz"})])
    return "UTC" if minutes == 0 else f"Etc/GMT{-minutes // 60:+d}"  # POSIX sign: Etc/GMT-2 is UTC+02:00


def _write(factory: sessionmaker[Session], fn: Any) -> Any:
    for _ in range(3):  # a concurrent first upload of the same participant may win the insert
        try:
            with session_scope(factory, write=True) as session:
                return fn(session)
        except IntegrityError:
            continue
    raise Conflict("the recording could not be stored: concurrent changes to the participant won three times; "
                   "post it again", code="concurrent_change")


def post_recording(factory: sessionmaker[Session], *, study_id: str, participant_id: str, body: bytes, fmt: str,
                   actor: str, tz: str | None = None, fill_gaps: bool = False, profile: str | None = None,
                   source_name: str | None = None, allow_overlap: bool = False,
                   allow_duplicate: bool = False) -> tuple[store.RecordingInfo, bool, Recording]:
    """Read, conform, derive and store a recording; returns the stored snapshot, whether it is new, the recording."""
    with session_scope(factory) as session:
        epoch_seconds = registry.find_study(session, study_id).epoch_seconds
        layout = None if profile is None else profiles.get_profile(session, study_id, profile)
    recording = read_recording(body, fmt=fmt, participant_id=participant_id, profile=layout, tz=tz,
                               fill_gaps=fill_gaps, source_name=source_name)
    recording, source = conform_recording(recording, epoch_seconds=epoch_seconds, study_id=study_id)
    zone = tz or (layout.tz if layout is not None else None)
    columns = recording_columns(recording, tz=zone, source_format=fmt, source_epoch_seconds=source)
    derived = derive(recording)
    info, created = _write(factory, lambda session: store.ingest_recording(
        session, study_id=study_id, recording=recording, columns=columns, derived=derived, actor=actor,
        allow_overlap=allow_overlap, allow_duplicate=allow_duplicate))
    return info, created, recording


def _rederive(session: Session, *, study_id: str, participant_id: str, recording_id: str, derived: Derived,
              **changes: Any) -> tuple[store.RecordingInfo, dict[str, Any]]:
    row, study, participant = store.recording_row(session, study_id=study_id, participant_id=participant_id,
                                                  recording_id=recording_id)
    for key, value in changes.items():
        setattr(row, key, value)
    changed = store.replace_derived(session, study=study, row=row, participant_pk=participant.pk, derived=derived,
                                    source_epoch_seconds=row.source_epoch_seconds)
    return store.recording_snapshot(row, participant_id), changed


def post_diary(factory: sessionmaker[Session], *, study_id: str, participant_id: str, recording_id: str, body: bytes,
               fmt: str, actor: str, tz: str | None = None) -> tuple[store.RecordingInfo, dict[str, Any], int]:
    """Store a recording's diary (replacing any earlier one) and recompute its periods and nights."""
    with session_scope(factory) as session:
        info, recording, _ = store.load_recording(session, study_id=study_id, participant_id=participant_id,
                                                  recording_id=recording_id)
    days = read_diary(body, fmt=fmt, tz=tz or zone_of(info))
    derived = derive(recording, diary=days, references=info.references)

    def write(session: Session) -> tuple[store.RecordingInfo, dict[str, Any]]:
        out = _rederive(session, study_id=study_id, participant_id=participant_id, recording_id=recording_id,
                        derived=derived, diary=diary_records(days))
        record_audit(session, actor=actor, action="recording.diary", study_id=study_id, subject=participant_id,
                     detail={"recording_id": recording_id, "days": len(days), **out[1]})
        return out

    new, changed = _write(factory, write)
    return new, changed, len(days)


@dataclass(frozen=True)
class ReferenceResult:
    night_id: str
    clock_offset_s: float
    alignment_quality: float | None
    offset_given: bool
    qc: list[dict[str, Any]]


def _aligned(recording: Recording, hypnogram: Any) -> Any:
    step = pd.Timedelta(seconds=recording.epoch_seconds)
    margin = pd.Timedelta(seconds=ALIGNMENT_SEARCH_S) + pd.Timedelta(hours=1)
    first = int(np.clip((hypnogram.start - margin - recording.start) // step, 0, recording.n_epochs))
    stop = int(np.clip(-(-(hypnogram.end + margin - recording.start) // step), first, recording.n_epochs))
    if stop - first < 2:
        raise Unprocessable(f"the reference ({hypnogram.start.isoformat()} to {hypnogram.end.isoformat()}) lies "
                            f"outside the recording ({recording.start.isoformat()} to {recording.end.isoformat()})",
                            code="reference_outside_recording",
                            problems=[Problem("reference_outside_recording", "no epoch of the recording is near "
                                              "the reference", {"field": "start"})])
    return estimate_clock_offset(recording.counts[first:stop], counts_start=recording.start + first * step,
                                 epoch_seconds=recording.epoch_seconds, hypnogram=hypnogram,
                                 search_s=ALIGNMENT_SEARCH_S)


def post_reference(factory: sessionmaker[Session], *, study_id: str, participant_id: str, recording_id: str,
                   body: bytes, fmt: str, actor: str, tz: str | None = None, profile: str | None = None,
                   clock_offset_s: float | None = None, accept_implausible: bool = False) -> ReferenceResult:
    """Align a PSG hypnogram to a recording, label the main period it covers and store it.

    Raises
    ------
    Unprocessable
        ``alignment_weak`` / ``alignment_at_edge`` when the offset cannot be trusted and none is
        given; ``reference_outside_recording``, ``no_matching_period`` when no main period covers
        it; ``reference_implausible`` (unless ``accept_implausible``).
    """
    with session_scope(factory) as session:
        layout = None if profile is None else profiles.get_profile(session, study_id, profile)
        info, recording, diary = store.load_recording(session, study_id=study_id, participant_id=participant_id,
                                                      recording_id=recording_id)
    hypnogram = read_hypnogram(body, fmt=fmt, profile=layout, tz=tz or zone_of(info))
    quality, given = None, clock_offset_s is not None
    if clock_offset_s is None:
        found = _aligned(recording, hypnogram)
        quality = float(found.quality) if np.isfinite(found.quality) else None
        if found.weak or found.at_edge or quality is None:
            code = "alignment_at_edge" if found.at_edge else "alignment_weak"
            shown = "undefined" if quality is None else f"{quality:.2f}"
            why = (f"the best clock offset, {found.clock_offset_s:+.0f} s, is at the edge of the ±"
                   f"{found.searched_s:.0f}-s search" if found.at_edge else
                   f"movement and PSG wake agree too little to place the reference (quality {shown}; "
                   f"{', '.join(found.reasons).replace('_', ' ') or 'weak'})")
            message = f"{why}; post it again with clock_offset_s=<seconds> if the offset is known"
            raise Unprocessable(message, code=code, problems=[Problem(code, message, {"query": "clock_offset_s"})])
        clock_offset_s = float(found.clock_offset_s)
    record = hypnogram_record(hypnogram, clock_offset_s=clock_offset_s, quality=quality,
                              accept_implausible=accept_implausible)
    # a new reference for the same night replaces the earlier one
    span = (hypnogram.start + pd.Timedelta(seconds=clock_offset_s),
            hypnogram.end + pd.Timedelta(seconds=clock_offset_s))
    references = [r for r in info.references if reference_overlap(r, start=span[0], end=span[1]) <= 0]
    references.append(record)
    try:
        derived = derive(recording, diary=diary, references=references)
    except InvalidNightError as exc:
        raise Unprocessable(exc.problems[0].message + "; post it with accept_implausible=true to store it with a "
                            "quality flag", code="reference_implausible", problems=exc.problems) from None
    night = next((n for n in derived.nights if n.reference_index == len(references) - 1), None)
    if night is None:
        raise Unprocessable(f"no main sleep period of recording {recording_id!r} overlaps the reference "
                            f"({span[0].isoformat()} to {span[1].isoformat()} on the recording's clock)",
                            code="no_matching_period",
                            problems=[Problem("no_matching_period", "the reference covers no main sleep period",
                                              {"field": "start"})])

    def write(session: Session) -> Any:
        out = _rederive(session, study_id=study_id, participant_id=participant_id, recording_id=recording_id,
                        derived=derived, references=references)
        record_audit(session, actor=actor, action="recording.reference", study_id=study_id, subject=participant_id,
                     detail={"recording_id": recording_id, "night_id": night.night.night_id,
                             "clock_offset_s": clock_offset_s, **out[1]})
        return out

    _write(factory, write)
    return ReferenceResult(night_id=night.night.night_id, clock_offset_s=float(clock_offset_s),
                           alignment_quality=quality, offset_given=given, qc=night.qc)


def period_items(info: store.RecordingInfo) -> list[dict[str, Any]]:
    """The stored periods as response items (times on the recording's clock)."""
    out = []
    for p in info.periods:
        has_sleep = p["offset_epoch"] > p["onset_epoch"]
        out.append({"kind": p["kind"], "day": p["day"], "start": info.epoch_time(p["start_epoch"]),
                    "end": info.epoch_time(p["end_epoch"]),
                    "sleep_onset": info.epoch_time(p["onset_epoch"]) if has_sleep else None,
                    "sleep_offset": info.epoch_time(p["offset_epoch"]) if has_sleep else None,
                    "source": p["source"], "night_id": p.get("night_id"), "conflicts": list(p["conflicts"])})
    return out


def nonwear_items(info: store.RecordingInfo) -> list[dict[str, Any]]:
    """The stored non-wear intervals as response items."""
    return [{"start": info.epoch_time(i["start_epoch"]), "end": info.epoch_time(i["end_epoch"]),
             "minutes": (i["end_epoch"] - i["start_epoch"]) * info.epoch_seconds / 60.0, "reason": i["reason"]}
            for i in info.nonwear]
