"""Day tables of continuous recordings: one row per day from the scored nights, naps and non-wear, and a summary.

A day runs noon to noon on the recording's clock and is named by the evening's date
(:func:`models.day_rows`: bed and rise times are the main period's rest interval, naps and
non-wear the day's). Its night is scored like any stored night
(:func:`service.results.scoring.score_night`: the same method, model version and cache); sleep
onset and offset are the first and last epoch the method scored sleep, and TST, SOL, WASO,
awakenings and sleep efficiency the night's :func:`models.sleep_parameters` over the rest
interval. The summary (:func:`models.recording_summary`) gives means and SDs over the nights,
mid-sleep and its SD, social jetlag (:func:`models.social_jetlag_h`; free days: nights before
Saturday and Sunday, common practice) and the Sleep Regularity Index
(:func:`models.sleep_regularity_index` on :func:`models.sleep_state` with the method's calls;
off-wrist and unscored epochs invalid).
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterator
from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session, sessionmaker

from models import DayRow, day_rows, recording_summary, sleep_regularity_index, sleep_state, social_jetlag_h

from ..errors import Unprocessable
from ..store import recordings as store
from ..store.db import session_scope
from ..store.protocols import study_protocol
from ..store.recording_codec import nonwear_from_records, period_from_record
from .bulk_scoring import bulk_scorings
from .parquet_stream import parquet_chunks, schema_of
from .scoring import SCORING_METHODS, score_night

__all__ = ["DAY_COLUMNS", "FALLBACK_RULE", "day_table", "export_days_stream", "recording_days"]

#: the columns of a day row, in order
DAY_COLUMNS: tuple[str, ...] = (
    "date", "bed_time", "sleep_onset", "sleep_offset", "rise_time", "tst_min", "sol_min", "waso_min", "awakenings",
    "sleep_efficiency_pct", "naps", "nap_min", "nonwear_min", "source", "method", "model_version", "night_id")
_NIGHT_PARAMETERS = ("tst_min", "sol_min", "waso_min", "awakenings", "sleep_efficiency_pct")
#: the rule ``auto`` falls back to while the study has no trained model
FALLBACK_RULE = "cole-kripke"
#: weekdays of evenings before a free day (Friday, Saturday), common practice
FREE_EVENINGS = (4, 5)


#: (participant id, night id, method) -> a scoring body (or the error scoring it raised), computed ahead in bulk
Scored = dict[tuple[str, str, str], "bytes | Exception"]


def _scored(factory: sessionmaker[Session], *, study_id: str, participant_id: str, night_id: str,
            method: str, ahead: Scored | None = None) -> dict[str, Any]:
    found = None if ahead is None else ahead.get((participant_id, night_id, method))
    if isinstance(found, Exception):
        raise found
    if found is None:
        found = score_night(factory, study_id=study_id, participant_id=participant_id, night_id=night_id,
                            method=method)
    return json.loads(found)  # type: ignore[no-any-return]


def _finite(value: float | None) -> float | None:
    return None if value is None or not math.isfinite(value) else float(value)


def day_table(factory: sessionmaker[Session], *, study_id: str, participant_id: str, recording_id: str,
              method: str = "auto", ahead: Scored | None = None) -> tuple[list[dict[str, Any]], dict[str, Any], str]:
    """Day rows and summary of a recording, its nights scored with ``method`` (``ahead``: scorings computed in bulk).

    Returns
    -------
    rows : list of dict
        One per day (:data:`DAY_COLUMNS`).
    summary : dict
        :class:`models.RecordingSummary` fields (NaN as None).
    used : str
        The method asked for, or the rule ``auto`` fell back to while no model is trained.
    """
    if method not in SCORING_METHODS:
        raise Unprocessable(f"unknown method {method!r}; choose one of {', '.join(SCORING_METHODS)}",
                            code="unknown_method")
    with session_scope(factory) as session:
        info, recording, _ = store.load_recording(session, study_id=study_id, participant_id=participant_id,
                                                  recording_id=recording_id)
    periods = [period_from_record(p) for p in info.periods]
    nonwear = nonwear_from_records(info.nonwear)
    calls = np.full(info.n_epochs, np.nan)
    step = pd.Timedelta(seconds=info.epoch_seconds)
    used = method
    scored: dict[str, dict[str, Any]] = {}
    for record in info.periods:
        if record["kind"] != "main" or not record.get("night_id"):
            continue
        try:
            body = _scored(factory, study_id=study_id, participant_id=participant_id, night_id=record["night_id"],
                           method=used, ahead=ahead)
        except Unprocessable as exc:
            if method != "auto" or exc.code != "no_model":
                raise
            used = FALLBACK_RULE
            body = _scored(factory, study_id=study_id, participant_id=participant_id, night_id=record["night_id"],
                           method=used, ahead=ahead)
        first = record["start_epoch"]
        sleep = np.array([np.nan if v is None else v for v in body["sleep"]], dtype=np.float64)
        calls[first:first + sleep.size] = sleep
        params = body["parameters"]
        start = info.epoch_time(first)
        onset, final = params.get("sleep_onset_idx"), params.get("final_awakening_idx")
        scored[record["day"]] = {
            "sleep_onset": None if onset is None else start + onset * step,
            "sleep_offset": None if final is None else start + final * step,
            "parameters": {k: params[k] for k in _NIGHT_PARAMETERS if params.get(k) is not None},
            "method": body["method"], "model_version": body.get("model_version"), "night_id": record["night_id"]}
    days: list[DayRow] = []
    rows = []
    for day in day_rows(recording, periods, nonwear=nonwear):
        night = scored.get(day.date.isoformat())
        if night is not None:  # onset and offset as the method scored them
            day = replace(day, sleep_onset=night["sleep_onset"], sleep_offset=night["sleep_offset"])
        days.append(day)
        params = {} if night is None else night["parameters"]
        awakenings = params.get("awakenings")
        rows.append({
            "date": day.date.isoformat(), "bed_time": day.bed_time, "sleep_onset": day.sleep_onset,
            "sleep_offset": day.sleep_offset, "rise_time": day.rise_time,
            **{k: params.get(k) for k in _NIGHT_PARAMETERS},
            "awakenings": None if awakenings is None else int(awakenings), "naps": day.naps, "nap_min": day.nap_min,
            "nonwear_min": day.nonwear_min, "source": None if day.source == "none" else day.source,
            "method": used if night is None else night["method"],
            "model_version": None if night is None else night["model_version"],
            "night_id": None if night is None else night["night_id"]})
    # the method's calls inside the main periods; naps as the period finder found them
    state, valid = sleep_state(recording, [p for p in periods if p.kind == "nap"], nonwear=nonwear)
    inside = np.isfinite(calls)
    state[inside] = calls[inside]
    for p in periods:
        if p.kind == "main":
            valid[p.start_epoch:p.end_epoch] &= inside[p.start_epoch:p.end_epoch]
    free = np.array([d.date.weekday() in FREE_EVENINGS for d in days], dtype=bool)
    summary = recording_summary(
        days, night_parameters={d.date: scored[d.date.isoformat()]["parameters"] for d in days
                                if d.date.isoformat() in scored},
        sri=_finite(sleep_regularity_index(state, epoch_seconds=info.epoch_seconds, valid=valid)),
        social_jetlag_h=_finite(social_jetlag_h([d.mid_sleep for d in days], free)))
    return rows, _json_summary(summary.to_dict()), used


def _json_summary(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _json_summary(v) for k, v in value.items()}
    if isinstance(value, float):
        return _finite(value)
    return value


def _definitions(used: str, method: str) -> dict[str, Any]:
    return {
        "day": "noon to noon on the recording's clock, named by the evening's date",
        "night": "the day's main sleep period: its rest interval (bed_time to rise_time)",
        "scoring": used if used == method else f"{used} ({method} asked: no model trained yet)",
        "sleep_parameters": "models.sleep_parameters over the rest interval (TST, SOL from bed time to the first "
                            "sleep epoch, WASO, awakenings, sleep efficiency)",
        "sleep_onset_offset": "first and last sleep epoch the method scored within the rest interval",
        "naps": "nap periods of the day; minutes from their first to last sleep epoch",
        "nonwear": "minutes of the day detected off the wrist",
        "mid_sleep": "halfway between sleep onset and offset; mean and SD as hours after each day's noon",
        "social_jetlag": "mid-sleep on free days (nights before Saturday and Sunday) against work days, hours",
        "sri": "Sleep Regularity Index (Phillips et al. 2017) over the recording, off-wrist and unscored epochs "
               "left out",
    }


def recording_days(factory: sessionmaker[Session], *, study_id: str, participant_id: str, recording_id: str,
                   method: str = "auto") -> dict[str, Any]:
    """The day table of one recording: ``rows``, ``summary`` and ``definitions``."""
    rows, summary, used = day_table(factory, study_id=study_id, participant_id=participant_id,
                                    recording_id=recording_id, method=method)
    used_by_nights = sorted({r["method"] for r in rows if r["night_id"]})
    with session_scope(factory) as session:
        protocol = study_protocol(session, study_id).to_dict()
    return {"recording_id": recording_id, "method": used, "methods_used": used_by_nights, "rows": rows,
            "summary": summary,
            "definitions": _definitions(used, method) | {"methods_used": used_by_nights, "protocol": protocol}}


#: recordings computed and sent together by :func:`export_days_stream`
CHUNK_RECORDINGS = 10
_EXPORT_COLUMNS = ["participant_id", "recording_id", *DAY_COLUMNS]
_DAY_INTEGERS = ("model_version", "awakenings", "naps")
_DAY_FLOATS = ("tst_min", "sol_min", "waso_min", "sleep_efficiency_pct", "nap_min", "nonwear_min")


def _ahead(factory: sessionmaker[Session], study_id: str, infos: list[Any], method: str) -> Scored:
    """The scorings of the recordings' main-period nights with ``method``, in bulk (:func:`bulk_scorings`)."""
    nights = [(info.participant_id, p["night_id"]) for info in infos for p in info.periods
              if p["kind"] == "main" and p.get("night_id")]
    out: Scored = {}
    if method in SCORING_METHODS and nights:
        for chunk in bulk_scorings(factory, study_id=study_id, method=method, nights=nights, chunk=len(nights)):
            out |= {(pid, night_id, method): body for pid, night_id, body in chunk}
    return out


def _frame(factory: sessionmaker[Session], study_id: str, infos: list[Any], method: str) -> pd.DataFrame:
    """The day rows of ``infos`` (recordings), typed as the export has them."""
    ahead = _ahead(factory, study_id, infos, method)
    frames = []
    for info in infos:
        rows, _, _ = day_table(factory, study_id=study_id, participant_id=info.participant_id,
                               recording_id=info.recording_id, method=method, ahead=ahead)
        frames.append(pd.DataFrame(rows, columns=list(DAY_COLUMNS)).assign(
            participant_id=info.participant_id, recording_id=info.recording_id))
    frame = pd.concat(frames, ignore_index=True)[_EXPORT_COLUMNS] if frames else pd.DataFrame(columns=_EXPORT_COLUMNS)
    for c in ("bed_time", "sleep_onset", "sleep_offset", "rise_time"):
        frame[c] = frame[c].map(lambda t: None if t is None or t is pd.NaT else pd.Timestamp(t).isoformat())
    for c in _DAY_INTEGERS:
        frame[c] = pd.to_numeric(frame[c]).astype("Int64")
    for c in _DAY_FLOATS:
        frame[c] = pd.to_numeric(frame[c]).astype("float64")
    return frame


def _recordings(factory: sessionmaker[Session], study_id: str, participant_id: str | None) -> list[Any]:
    with session_scope(factory) as session:
        infos, _ = store.list_recordings(session, study_id=study_id, participant_id=participant_id, limit=10**6)
    return infos


def export_days_stream(factory: sessionmaker[Session], *, study_id: str, fmt: str = "csv", method: str = "auto",
                       participant_id: str | None = None) -> tuple[int, Iterator[bytes]]:
    """Day rows of every recording of the study (or of one participant) as a stream: the number of recordings
    and the bytes, a chunk of recordings at a time (CSV rows; Parquet: a row group each,
    :func:`~service.results.parquet_stream.parquet_chunks`).

    The study and participant are checked before the stream starts (NotFound).
    """
    infos = _recordings(factory, study_id, participant_id)
    if infos and method not in SCORING_METHODS:  # the answer day_table gives, before the stream starts
        raise Unprocessable(f"unknown method {method!r}; choose one of {', '.join(SCORING_METHODS)}",
                            code="unknown_method")

    def frames() -> Iterator[pd.DataFrame]:
        for start in range(0, len(infos), CHUNK_RECORDINGS):
            yield _frame(factory, study_id, infos[start:start + CHUNK_RECORDINGS], method)

    def chunks() -> Iterator[bytes]:
        yield pd.DataFrame(columns=_EXPORT_COLUMNS).to_csv(index=False).encode()
        for frame in frames():
            yield frame.to_csv(index=False, header=False).encode()

    if fmt == "parquet":
        return len(infos), parquet_chunks(frames(), schema=schema_of(_frame(factory, study_id, [], method)))
    return len(infos), chunks()
