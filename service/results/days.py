"""Day tables of continuous recordings: one row per day from the scored nights, naps and non-wear, and a summary.

A day runs noon to noon on the recording's clock and is named by the evening's date. Its night is
the main sleep period of that day, scored like any stored night (:func:`service.results.scoring.score_night`,
so the same method, model version and cache); bed and rise times are the period's rest interval,
sleep onset and offset the first and last epoch the method scored sleep, and TST, SOL, WASO,
awakenings and sleep efficiency the night's :func:`models.sleep_parameters` over that interval.
Naps are the day's nap periods (their minutes from first to last sleep epoch as found by the
period finder), non-wear the day's minutes off the wrist. The summary gives means and SDs over
the days with a night, the mean mid-sleep clock time and its SD, social jetlag (free days:
nights before Saturday and Sunday, common practice) and the Sleep Regularity Index over the
recording's whole days (:func:`models.sleep_regularity_index`, non-wear and unscored epochs invalid).
"""

from __future__ import annotations

import json
import math
from datetime import date, timedelta
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session, sessionmaker

from models import clock_mean_h, clock_sd_h, mid_sleep, sleep_regularity_index, social_jetlag_h

from ..errors import Unprocessable
from ..store import recordings as store
from ..store.db import session_scope
from .scoring import SCORING_METHODS, score_night

__all__ = ["DAY_COLUMNS", "FALLBACK_RULE", "day_table", "export_days", "recording_days"]

#: the columns of a day row, in order
DAY_COLUMNS: tuple[str, ...] = (
    "date", "bed_time", "sleep_onset", "sleep_offset", "rise_time", "tst_min", "sol_min", "waso_min", "awakenings",
    "sleep_efficiency_pct", "naps", "nap_min", "nonwear_min", "source", "method", "model_version", "night_id")
_SUMMARY_COLUMNS = ("tst_min", "sol_min", "waso_min", "awakenings", "sleep_efficiency_pct", "nap_min", "nonwear_min")
#: the rule ``auto`` falls back to while the study has no trained model
FALLBACK_RULE = "cole-kripke"
#: weekdays of evenings before a free day (Friday, Saturday), common practice
FREE_EVENINGS = (4, 5)


def _scored(factory: sessionmaker[Session], *, study_id: str, participant_id: str, night_id: str,
            method: str) -> dict[str, Any]:
    return json.loads(score_night(factory, study_id=study_id, participant_id=participant_id, night_id=night_id,
                                  method=method))


def _noon(info: store.RecordingInfo, day: date) -> pd.Timestamp:
    return pd.Timestamp(day.isoformat() + " 12:00").tz_localize(info.start.tz)


def _day_epochs(info: store.RecordingInfo, day: date) -> tuple[int, int]:
    step = pd.Timedelta(seconds=info.epoch_seconds)
    first = int(np.clip(math.ceil((_noon(info, day) - info.start) / step), 0, info.n_epochs))
    stop = int(np.clip(math.ceil((_noon(info, day + timedelta(days=1)) - info.start) / step), 0, info.n_epochs))
    return first, stop


def _days(info: store.RecordingInfo) -> list[date]:
    first = (info.start - pd.Timedelta(hours=12)).date()
    last = (info.end - pd.Timedelta(seconds=1) - pd.Timedelta(hours=12)).date()
    return [first + timedelta(days=i) for i in range((last - first).days + 1)]


def day_table(factory: sessionmaker[Session], info: store.RecordingInfo, *, study_id: str,
              method: str = "auto") -> tuple[list[dict[str, Any]], np.ndarray, np.ndarray, str]:
    """Day rows of a recording and its sleep/valid series over the whole recording (for the SRI).

    Returns
    -------
    rows : list of dict
        One per day (:data:`DAY_COLUMNS`).
    sleep : ndarray of float64, shape (n_epochs,)
        1 sleep, 0 wake (outside the main periods: wake, naps: sleep), NaN unscored.
    valid : ndarray of bool, shape (n_epochs,)
        False off the wrist and on unscored epochs.
    used : str
        The method asked for, or the rule ``auto`` fell back to.
    """
    if method not in SCORING_METHODS:
        raise Unprocessable(f"unknown method {method!r}; choose one of {', '.join(SCORING_METHODS)}",
                            code="unknown_method")
    sleep = np.zeros(info.n_epochs)
    off = np.zeros(info.n_epochs, dtype=bool)
    for i in info.nonwear:
        off[i["start_epoch"]:i["end_epoch"]] = True
    step = pd.Timedelta(seconds=info.epoch_seconds)
    used = method
    by_day: dict[str, dict[str, Any]] = {}
    naps: dict[str, list[float]] = {}
    for p in info.periods:
        if p["kind"] == "nap":
            naps.setdefault(p["day"], []).append((p["offset_epoch"] - p["onset_epoch"]) * info.epoch_seconds / 60.0)
            sleep[p["onset_epoch"]:p["offset_epoch"]] = 1.0
            continue
        if not p.get("night_id"):
            continue
        try:
            body = _scored(factory, study_id=study_id, participant_id=info.participant_id, night_id=p["night_id"],
                           method=used)
        except Unprocessable as exc:
            if method != "auto" or exc.code != "no_model":
                raise
            used = FALLBACK_RULE
            body = _scored(factory, study_id=study_id, participant_id=info.participant_id, night_id=p["night_id"],
                           method=used)
        night_sleep = np.array([np.nan if v is None else v for v in body["sleep"]], dtype=np.float64)
        first = p["start_epoch"]
        sleep[first:first + night_sleep.size] = night_sleep
        params = body["parameters"]
        onset, final = params.get("sleep_onset_idx"), params.get("final_awakening_idx")
        start = info.epoch_time(first)
        by_day[p["day"]] = {
            "bed_time": info.epoch_time(p["start_epoch"]), "rise_time": info.epoch_time(p["end_epoch"]),
            "sleep_onset": None if onset is None else start + onset * step,
            "sleep_offset": None if final is None else start + final * step,
            **{k: params.get(k) for k in ("tst_min", "sol_min", "waso_min", "awakenings", "sleep_efficiency_pct")},
            "source": p["source"], "method": body["method"], "model_version": body.get("model_version"),
            "night_id": p["night_id"]}
    valid = ~off & ~np.isnan(sleep)
    rows = []
    for day in _days(info):
        key = day.isoformat()
        first, stop = _day_epochs(info, day)
        night = by_day.get(key, {})
        row = {c: None for c in DAY_COLUMNS} | night
        awakenings = row["awakenings"]
        row.update(date=key, naps=len(naps.get(key, [])), nap_min=float(sum(naps.get(key, []))),
                   nonwear_min=float(off[first:stop].sum() * info.epoch_seconds / 60.0),
                   awakenings=None if awakenings is None else int(awakenings),
                   method=row["method"] or used)
        rows.append(row)
    return rows, sleep, valid, used


def _finite(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


def _summary(info: store.RecordingInfo, rows: list[dict[str, Any]], sleep: np.ndarray,
             valid: np.ndarray) -> dict[str, Any]:
    frame = pd.DataFrame(rows)
    out: dict[str, Any] = {"days": len(rows), "nights": int(frame["night_id"].notna().sum())}
    for c in _SUMMARY_COLUMNS:
        values = pd.to_numeric(frame[c], errors="coerce").dropna()
        out[c] = {"mean": None if values.empty else float(values.mean()),
                  "sd": None if values.size < 2 else float(values.std(ddof=1)), "n": int(values.size)}
    mids, free = [], []
    for r in rows:
        if r["sleep_onset"] is not None and r["sleep_offset"] is not None:
            mids.append(mid_sleep(r["sleep_onset"], r["sleep_offset"]).tz_convert(info.start.tz))
            free.append(date.fromisoformat(r["date"]).weekday() in FREE_EVENINGS)
    mean_h, sd_h = clock_mean_h(mids), clock_sd_h(mids)
    out["mid_sleep_clock_h"] = {"mean": _finite(mean_h), "sd_min": None if len(mids) < 2 else _finite(sd_h * 60)}
    out["social_jetlag_h"] = _finite(social_jetlag_h(mids, np.array(free, dtype=bool))) if mids else None
    day0 = _days(info)[0]
    first = _day_epochs(info, day0 + timedelta(days=1) if info.start > _noon(info, day0) else day0)[0]
    per_day = 86400 // info.epoch_seconds
    whole = (info.n_epochs - first) // per_day * per_day
    sri = (sleep_regularity_index(np.nan_to_num(sleep[first:first + whole]), epoch_seconds=info.epoch_seconds,
                                  valid=valid[first:first + whole]) if whole >= 2 * per_day else math.nan)
    out["sri"] = _finite(sri)
    return out


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
        "mid_sleep": "halfway between sleep onset and offset; mean and SD on the 24-h circle",
        "social_jetlag": "mid-sleep on free days (nights before Saturday and Sunday) minus work days, hours",
        "sri": "Sleep Regularity Index (Phillips et al. 2017) over the recording's whole days",
    }


def recording_days(factory: sessionmaker[Session], *, study_id: str, participant_id: str, recording_id: str,
                   method: str = "auto") -> dict[str, Any]:
    """The day table of one recording: ``rows``, ``summary`` and ``definitions``."""
    with session_scope(factory) as session:
        row, _, _ = store.recording_row(session, study_id=study_id, participant_id=participant_id,
                                        recording_id=recording_id)
        info = store.recording_snapshot(row, participant_id)
    rows, sleep, valid, used = day_table(factory, info, study_id=study_id, method=method)
    return {"recording_id": recording_id, "method": used, "rows": rows, "summary": _summary(info, rows, sleep, valid),
            "definitions": _definitions(used, method)}


def export_days(factory: sessionmaker[Session], *, study_id: str, fmt: str = "csv", method: str = "auto",
                participant_id: str | None = None) -> bytes:
    """Day rows of every recording of the study (or of one participant), as CSV or Parquet bytes."""
    with session_scope(factory) as session:
        infos, _ = store.list_recordings(session, study_id=study_id, participant_id=participant_id, limit=10**6)
    frames = []
    for info in infos:
        rows, _, _, _ = day_table(factory, info, study_id=study_id, method=method)
        frames.append(pd.DataFrame(rows, columns=list(DAY_COLUMNS)).assign(
            participant_id=info.participant_id, recording_id=info.recording_id))
    columns = ["participant_id", "recording_id", *DAY_COLUMNS]
    frame = pd.concat(frames, ignore_index=True)[columns] if frames else pd.DataFrame(columns=columns)
    for c in ("bed_time", "sleep_onset", "sleep_offset", "rise_time"):
        frame[c] = frame[c].map(lambda t: None if t is None or t is pd.NaT else pd.Timestamp(t).isoformat())
    frame["model_version"] = frame["model_version"].astype("Int64")
    frame["awakenings"] = pd.to_numeric(frame["awakenings"]).astype("Int64")
    if fmt == "parquet":
        return frame.to_parquet(index=False)  # type: ignore[no-any-return]
    return frame.to_csv(index=False).encode()
