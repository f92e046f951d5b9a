"""Per-day rows and the summary of a recording, from its sleep periods and the parameters of its nights.

The caller finds the periods (:func:`~models.recordings.periods.find_periods`), scores each main
period's night (:func:`~models.recordings.periods.period_night`) with its method and passes the
parameters per night in; regularity figures that need their own method (Sleep Regularity Index,
social jetlag) are passed in as computed, so this module only gathers::

    rows = day_rows(recording, periods, nonwear=intervals)
    state, valid = sleep_state(recording, periods, nonwear=intervals)      # for the SRI
    summary = recording_summary(rows, night_parameters={day: {"tst_min": ...}, ...},
                                sri=..., social_jetlag_h=...)

Mid-sleep is halfway between sleep onset and offset (Wittmann et al. 2006, Chronobiol Int 23:497);
its mean and SD are taken as hours after the noon that opens each day, so a mid-sleep near
midnight has no wrap-around.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from .nonwear import NonwearInterval, nonwear_mask
from .periods import SleepPeriod
from .recording import Recording

__all__ = ["DayRow", "RecordingSummary", "day_rows", "recording_summary", "sleep_state"]


@dataclass(frozen=True)
class DayRow:
    """One noon-to-noon day of a recording.

    ``bed_time`` .. ``rise_time`` is the main period's rest interval, ``sleep_onset`` ..
    ``sleep_offset`` its sleep (all None on a day without a main period, ``source`` then
    ``"none"``). ``naps`` and ``nap_min`` count the day's naps and their sleep minutes;
    ``nonwear_min`` the day's minutes off the wrist; ``covered_min`` the day's minutes the recording covers.
    """

    date: dt.date
    bed_time: pd.Timestamp | None
    sleep_onset: pd.Timestamp | None
    sleep_offset: pd.Timestamp | None
    rise_time: pd.Timestamp | None
    naps: int
    nap_min: float
    nonwear_min: float
    covered_min: float
    source: str
    conflicts: tuple[str, ...] = ()

    @property
    def mid_sleep(self) -> pd.Timestamp | None:
        """Halfway between sleep onset and offset."""
        if self.sleep_onset is None or self.sleep_offset is None:
            return None
        return self.sleep_onset + (self.sleep_offset - self.sleep_onset) / 2

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe form (times as ISO 8601 text, None kept)."""
        out: dict[str, Any] = {"date": self.date.isoformat()}
        for key in ("bed_time", "sleep_onset", "sleep_offset", "rise_time", "mid_sleep"):
            value = getattr(self, key)
            out[key] = None if value is None else value.isoformat()
        out.update(naps=self.naps, nap_min=self.nap_min, nonwear_min=self.nonwear_min, covered_min=self.covered_min,
                   source=self.source, conflicts=list(self.conflicts))
        return out


def _day_start(recording: Recording, day: dt.date) -> pd.Timestamp:
    naive = pd.Timestamp(dt.datetime.combine(day, dt.time(12)))
    return naive.tz_localize(recording.start.tz, ambiguous=True, nonexistent="shift_forward")


def day_rows(recording: Recording, periods: Sequence[SleepPeriod], *,
             nonwear: Sequence[NonwearInterval] = ()) -> list[DayRow]:
    """One row per noon-to-noon day the recording touches, in date order.

    Parameters
    ----------
    recording : Recording
    periods : sequence of SleepPeriod
        From :func:`~models.recordings.periods.find_periods`.
    nonwear : sequence of NonwearInterval, default=()

    Returns
    -------
    list of DayRow
    """
    es = recording.epoch_seconds
    first = (recording.start - pd.Timedelta(hours=12)).date()
    last = (recording.end - pd.Timedelta(seconds=es) - pd.Timedelta(hours=12)).date()
    off = nonwear_mask(recording.n_epochs, nonwear)
    mains = {p.day: p for p in periods if p.kind == "main"}
    rows = []
    day = first
    while day <= last:
        a = recording.epoch_at(_day_start(recording, day))
        b = recording.epoch_at(_day_start(recording, day + dt.timedelta(days=1)))
        naps = [p for p in periods if p.kind == "nap" and p.day == day]
        main = mains.get(day)
        times: list[pd.Timestamp | None] = [None] * 4
        if main is not None:
            times = [recording.time_at(e) for e in (main.start_epoch, main.onset_epoch, main.offset_epoch,
                                                     main.end_epoch)]
        rows.append(DayRow(date=day, bed_time=times[0], sleep_onset=times[1], sleep_offset=times[2],
                           rise_time=times[3], naps=len(naps),
                           nap_min=sum(p.offset_epoch - p.onset_epoch for p in naps) * es / 60.0,
                           nonwear_min=float(off[a:b].sum()) * es / 60.0, covered_min=(b - a) * es / 60.0,
                           source=main.source if main is not None else "none",
                           conflicts=main.conflicts if main is not None else ()))
        day += dt.timedelta(days=1)
    return rows


def sleep_state(recording: Recording, periods: Sequence[SleepPeriod], *, nonwear: Sequence[NonwearInterval] = (),
                epoch_sleep: NDArray[np.float64] | None = None) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """Sleep (1) / wake (0) per epoch over the whole recording, and where it is valid (for the SRI).

    Parameters
    ----------
    recording : Recording
    periods : sequence of SleepPeriod
        Epochs from a period's onset to its offset are sleep, all others wake ...
    nonwear : sequence of NonwearInterval, default=()
    epoch_sleep : ndarray of float64, shape (n_epochs,), optional
        ... unless a scorer's calls (1 sleep, 0 wake) are given: then they decide inside the periods
        (awakenings count as wake).

    Returns
    -------
    state : ndarray of float64, shape (n_epochs,)
    valid : ndarray of bool, shape (n_epochs,)
        False on off-wrist and missing epochs (left out of the SRI, Phillips et al. 2017).
    """
    state = np.zeros(recording.n_epochs)
    for p in periods:
        inside = slice(p.onset_epoch, p.offset_epoch)
        state[inside] = 1.0 if epoch_sleep is None else np.nan_to_num(np.asarray(epoch_sleep)[inside], nan=0.0)
    valid = ~nonwear_mask(recording.n_epochs, nonwear) & np.isfinite(recording.counts)
    return state, valid


@dataclass(frozen=True)
class RecordingSummary:
    """Summary over a recording's days (minutes and hours as the names say).

    ``parameters`` maps each night parameter to ``{"mean", "sd", "n"}`` over the nights that have
    it (SD with ddof=1, NaN with fewer than two nights); ``mid_sleep_h`` is the mean mid-sleep as
    local clock hours after midnight (0 <= h < 24), ``mid_sleep_sd_min`` its SD.
    """

    n_days: int
    n_main_periods: int
    n_naps: int
    nap_min_per_day: float
    nonwear_min: float
    wear_pct: float
    parameters: dict[str, dict[str, float]]
    mid_sleep_h: float | None
    mid_sleep_sd_min: float | None
    social_jetlag_h: float | None
    sri: float | None
    n_conflicts: int

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form (NaN left as float NaN; see :mod:`models.records` for null)."""
        return dict(self.__dict__)


def _mean_sd(values: Sequence[float]) -> dict[str, float]:
    x = np.asarray([v for v in values if v is not None and np.isfinite(v)], dtype=float)
    return {"mean": float(x.mean()) if x.size else float("nan"),
            "sd": float(x.std(ddof=1)) if x.size > 1 else float("nan"), "n": float(x.size)}


def recording_summary(rows: Sequence[DayRow], *, night_parameters: Mapping[dt.date, Mapping[str, float]] | None = None,
                      sri: float | None = None, social_jetlag_h: float | None = None) -> RecordingSummary:
    """Means and SDs over the nights, mid-sleep and its variability, non-wear, with the regularity figures given.

    Parameters
    ----------
    rows : sequence of DayRow
        From :func:`day_rows`.
    night_parameters : mapping of date to mapping of str to float, optional
        Each main period's parameters (e.g. ``tst_min``, ``sol_min``, ``waso_min``,
        ``sleep_efficiency_pct``) as the caller's scorer gave them, keyed by the period's day.
    sri : float, optional
        Sleep Regularity Index computed on :func:`sleep_state`'s series.
    social_jetlag_h : float, optional
        Social jetlag computed from the rows' mid-sleeps.

    Returns
    -------
    RecordingSummary
    """
    names = sorted({k for params in (night_parameters or {}).values() for k in params})
    params = {name: _mean_sd([p[name] for p in (night_parameters or {}).values() if name in p]) for name in names}
    mids = []
    for r in rows:
        if r.mid_sleep is not None:
            noon = pd.Timestamp(dt.datetime.combine(r.date, dt.time(12))).tz_localize(r.mid_sleep.tz, ambiguous=True,
                                                                                     nonexistent="shift_forward")
            mids.append(12.0 + (r.mid_sleep - noon).total_seconds() / 3600.0)
    mid = _mean_sd(mids)
    covered = sum(r.covered_min for r in rows)
    nonwear = sum(r.nonwear_min for r in rows)
    return RecordingSummary(
        n_days=len(rows), n_main_periods=sum(r.source != "none" for r in rows), n_naps=sum(r.naps for r in rows),
        nap_min_per_day=sum(r.nap_min for r in rows) / len(rows) if rows else float("nan"),
        nonwear_min=nonwear, wear_pct=100.0 * (1 - nonwear / covered) if covered else float("nan"),
        parameters=params, mid_sleep_h=mid["mean"] % 24.0 if mids else None,
        mid_sleep_sd_min=mid["sd"] * 60.0 if len(mids) > 1 else None,
        social_jetlag_h=social_jetlag_h, sri=sri, n_conflicts=sum(len(r.conflicts) for r in rows))
