"""The review queue: which nights without PSG a person should look at first, and why.

Candidates are the study's nights without a reference (posted on their own or found in a
recording); nights with PSG are never queued. Each candidate's evidence is built from stored data:

- the deployed scoring (``auto``; the classical default rule while no model is trained): its
  parameters, and its ``intervals`` and ``uncertainty_min`` where the scoring body carries them
  (missing: unknown), and the expected relabelled in-bed minutes from its calibrated P(sleep) and
  calls (:func:`models.review.evidence.expected_relabel`; a rule has no P(sleep): unknown);
- the parameters of two classical rules (Cole-Kripke, Sadeh), for the methods' disagreement;
- the night's QC flag codes;
- the share of the rest period off-wrist: the recording's non-wear intervals for a night of a
  recording, else the share of in-bed epochs without counts;
- for a night of a recording with a diary: diary bed time minus the detected rest start and diary
  rise time minus the detected rest end, in minutes (the diary day whose bed time is nearest the
  night's start, within 12 h);
- the deployed parameters of the participant's other candidate nights.

The scorings are read (or computed and stored) for all candidates at once
(:func:`service.results.bulk_scoring.score_nights`: the same bodies a scoring request answers);
after a training they are usually stored already (:mod:`service.jobs.queue_warm`).

:func:`models.rank_nights` orders them; the status of each night comes from its reviews.
"""

from __future__ import annotations

import hashlib
import json
import math
import threading
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from cachetools import LRUCache
from sqlalchemy import Row, select
from sqlalchemy.orm import Session, sessionmaker

from models import NightEvidence, expected_relabel, rank_nights

from ..errors import Unprocessable
from ..store import db
from ..store.codec import night_from_row
from ..store.recording_codec import diary_from_records
from ..store.registry import find_study
from ..store.reviews import review_statuses
from .bulk_scoring import score_nights
from .model_flags import FALLBACK_RULE
from .scoring import score_night

__all__ = ["COMPARED_RULES", "QueueEntry", "model_version_shown", "review_queue", "shown_scoring"]

#: classical rules scored beside the deployed scoring, for the methods' disagreement
COMPARED_RULES: tuple[str, ...] = ("cole-kripke", "sadeh")
_DIARY_WINDOW = pd.Timedelta(hours=12)


def shown_scoring(factory: sessionmaker[Session], *, study_id: str, participant_id: str,
                  night_id: str) -> dict[str, Any]:
    """The scoring body a reviewer is shown: ``auto``, or the classical default rule while no model exists."""
    try:
        body = score_night(factory, study_id=study_id, participant_id=participant_id, night_id=night_id,
                           method="auto")
    except Unprocessable as exc:
        if exc.code != "no_model":
            raise
        body = score_night(factory, study_id=study_id, participant_id=participant_id, night_id=night_id,
                           method=FALLBACK_RULE)
    return json.loads(body)  # type: ignore[no-any-return]


def model_version_shown(body: Mapping[str, Any]) -> str:
    """The method and model version of a scoring body, as stored with reviews (``pooled+offset v3``)."""
    version = body.get("model_version")
    return str(body["method"]) if version is None else f"{body['method']} v{version}"


def _numbers(parameters: Mapping[str, Any]) -> dict[str, float]:
    return {k: math.nan if v is None else float(v) for k, v in parameters.items()
            if v is None or isinstance(v, int | float)}


@dataclass(frozen=True)
class QueueEntry:
    """One queued night: its ranking, status and what the listing shows."""

    night_id: str
    participant_id: str
    priority: float
    expected_change_min: float
    reasons: list[str]
    status: str
    label: str | None
    start: str

    def to_dict(self) -> dict[str, Any]:
        return {"night_id": self.night_id, "participant_id": self.participant_id, "priority": self.priority,
                "reasons": list(self.reasons), "status": self.status,
                "expected_change_min": self.expected_change_min, "label": self.label, "start": self.start}


@dataclass(frozen=True)
class _Candidate:
    pk: int
    night_id: str
    participant_id: str
    label: str | None
    start: str
    qc_codes: list[str]
    nonwear_share: float
    diary_offsets_min: dict[str, float]


def _nonwear_share(row: db.Night, recording: db.RecordingRow | None, in_bed: tuple[int, int],
                   missing: np.ndarray) -> float:
    first, stop = in_bed
    if stop <= first:
        return 0.0
    if recording is None or row.first_epoch is None:
        return float(np.mean(missing[first:stop]))
    lo, hi = row.first_epoch + first, row.first_epoch + stop
    covered = sum(max(0, min(hi, int(i["end_epoch"])) - max(lo, int(i["start_epoch"]))) for i in recording.nonwear)
    return min(1.0, covered / (hi - lo))


def _diary_offsets(recording: db.RecordingRow | None, start: pd.Timestamp, end: pd.Timestamp) -> dict[str, float]:
    if recording is None or not recording.diary:
        return {}
    days = [d for d in diary_from_records(recording.diary, tz=recording.tz) if d.bed_time is not None]
    near = [d for d in days if abs(d.bed_time - start) <= _DIARY_WINDOW]  # type: ignore[operator]
    if not near:
        return {}
    day = min(near, key=lambda d: abs(d.bed_time - start))  # type: ignore[operator]
    out = {"bed_time": (day.bed_time - start).total_seconds() / 60.0}  # type: ignore[operator]
    if day.rise_time is not None:
        out["wake_time"] = (day.rise_time - end).total_seconds() / 60.0
    return out


def _candidates(session: Session, study_id: str) -> list[_Candidate]:
    study = find_study(session, study_id)
    rows = session.execute(
        select(db.Night, db.Participant.participant_id)
        .join(db.Participant, db.Participant.pk == db.Night.participant_pk)
        .where(db.Participant.study_pk == study.pk, db.Night.labelled.is_(False))
        .order_by(db.Participant.participant_id, db.Night.start_utc, db.Night.pk))
    out = []
    for row, pid in rows:
        night = night_from_row(row, participant_id=pid)
        recording = None if row.recording_pk is None else session.get(db.RecordingRow, row.recording_pk)
        out.append(_Candidate(
            pk=row.pk, night_id=row.night_id, participant_id=pid, label=row.label, start=row.start,
            qc_codes=[str(f.get("code")) for f in row.qc or [] if isinstance(f, dict) and f.get("code")],
            nonwear_share=_nonwear_share(row, recording, night.in_bed, night.missing),
            diary_offsets_min=_diary_offsets(recording, night.start, night.end)))
    return out


def _evidence(factory: sessionmaker[Session], study_id: str, candidates: Sequence[_Candidate]) -> list[NightEvidence]:
    methods = tuple(dict.fromkeys(("auto", FALLBACK_RULE, *COMPARED_RULES)))
    bodies = score_nights(factory, study_id=study_id, nights=[(c.participant_id, c.night_id) for c in candidates],
                          methods=methods)

    def body_of(c: _Candidate, method: str) -> dict[str, Any]:
        answer = bodies[(c.participant_id, c.night_id, method)]
        if isinstance(answer, Exception):
            raise answer
        return json.loads(answer)  # type: ignore[no-any-return]

    # a night deleted since the candidates were read has no scoring: it leaves the queue
    candidates = [c for c in candidates if (c.participant_id, c.night_id, "auto") in bodies]
    shown: dict[int, dict[str, Any]] = {}
    rules: dict[int, dict[str, dict[str, float]]] = {}
    for c in candidates:
        auto = bodies[(c.participant_id, c.night_id, "auto")]
        no_model = isinstance(auto, Unprocessable) and auto.code == "no_model"
        shown[c.pk] = body_of(c, FALLBACK_RULE if no_model else "auto")
        rules[c.pk] = {m: _numbers(body_of(c, m)["parameters"]) for m in COMPARED_RULES}
    by_participant: dict[str, list[_Candidate]] = {}
    for c in candidates:
        by_participant.setdefault(c.participant_id, []).append(c)
    out = []
    for c in candidates:
        body = shown[c.pk]
        history = [_numbers(shown[o.pk]["parameters"]) for o in by_participant[c.participant_id] if o.pk != c.pk]
        uncertainty = body.get("uncertainty_min")
        intervals = {k: [float(b) for b in v] for k, v in (body.get("intervals") or {}).items()
                     if isinstance(v, list | tuple) and len(v) == 2 and all(isinstance(b, int | float) for b in v)}
        relabel = None
        if isinstance(body.get("p_sleep"), list) and isinstance(body.get("sleep"), list):  # null = unscored (NaN)
            relabel = expected_relabel(body["p_sleep"], body["sleep"], (int(body["in_bed"][0]), int(body["in_bed"][1])),
                                       int(body["epoch_seconds"]))
        out.append(NightEvidence(
            night_id=c.night_id, participant_id=c.participant_id, epoch_seconds=int(body["epoch_seconds"]),
            parameters={"auto": _numbers(body["parameters"]), **rules[c.pk]},
            intervals=intervals or None, uncertainty_min=None if uncertainty is None else float(uncertainty),
            qc_flags=tuple(c.qc_codes), nonwear_share=c.nonwear_share, diary_offsets_min=c.diary_offsets_min,
            history=tuple(history), relabel_min=relabel))
    return out


def _inputs_key(session: Session, study_id: str) -> str:
    """A digest of everything the ranking reads: the candidate nights, the models ``auto`` may choose,
    the participants' choices, the protocol and the recordings' diaries and non-wear."""
    study = find_study(session, study_id)
    parts: list[Any] = [study.pk]
    parts.append(session.execute(
        select(db.Night.pk, db.Night.content_hash, db.Night.labelled, db.Night.label)
        .join(db.Participant, db.Participant.pk == db.Night.participant_pk)
        .where(db.Participant.study_pk == study.pk).order_by(db.Night.pk)).all())
    parts.append(session.execute(select(db.ModelVersion.uid).where(
        db.ModelVersion.study_pk == study.pk, db.ModelVersion.is_active).order_by(db.ModelVersion.uid)).all())
    parts.append(session.execute(select(db.Participant.pk, db.Participant.participant_id,  # ids: renames
                                        db.Participant.chosen_method).where(
        db.Participant.study_pk == study.pk).order_by(db.Participant.pk)).all())
    parts.append(session.execute(select(db.StudyProtocolRow.fingerprint, db.StudyProtocolRow.model_floor).where(
        db.StudyProtocolRow.study_pk == study.pk)).all())
    parts.append(session.execute(
        select(db.RecordingRow.pk, db.RecordingRow.content_hash, db.RecordingRow.diary, db.RecordingRow.nonwear)
        .join(db.Participant, db.Participant.pk == db.RecordingRow.participant_pk)
        .where(db.Participant.study_pk == study.pk).order_by(db.RecordingRow.pk)).all())
    text = json.dumps([[list(r) if isinstance(r, tuple | Row) else r for r in p] if isinstance(p, list) else p
                       for p in parts], default=str, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()


#: ranked queues by (study id, digest of their inputs): a repeat request ranks nothing again
_RANKED: LRUCache[tuple[str, str], list[tuple[Any, _Candidate]]] = LRUCache(maxsize=16)
_RANKED_LOCK = threading.Lock()


def review_queue(factory: sessionmaker[Session], *, study_id: str) -> list[QueueEntry]:
    """Every candidate night of the study, highest priority first, with its review status.

    The ranking is kept in memory per digest of its inputs (:func:`_inputs_key`), so it is
    computed again exactly when a night, a model choice, the protocol or a recording changes;
    the statuses are read on every call.

    Raises
    ------
    NotFound
        If the study does not exist.
    """
    with db.session_scope(factory) as session:
        key = (study_id, _inputs_key(session, study_id))
    with _RANKED_LOCK:
        found = _RANKED.get(key)
    if found is None:
        with db.session_scope(factory) as session:
            candidates = _candidates(session, study_id)
        ranked = rank_nights(_evidence(factory, study_id, candidates))
        by_key = {(c.participant_id, c.night_id): c for c in candidates}
        found = [(item, by_key[(item.participant_id, item.night_id)]) for item in ranked]
        with _RANKED_LOCK:
            _RANKED[key] = found
    with db.session_scope(factory) as session:
        statuses = review_statuses(session, [c.pk for _, c in found])
    out = []
    for item, c in found:
        out.append(QueueEntry(night_id=item.night_id, participant_id=item.participant_id,
                              priority=float(item.priority), expected_change_min=float(item.expected_change_min),
                              reasons=list(item.reasons), status=statuses[c.pk], label=c.label, start=c.start))
    return out
