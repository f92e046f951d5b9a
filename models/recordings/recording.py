"""The continuous recording: one participant's whole wear period (1 h .. 42 days) of epoch counts.

A :class:`Recording` holds counts per epoch (15, 30 or 60 s, as recorded) and the event markers
(button presses) that fell in each epoch. :func:`read_recording` reads CSV, JSON and Parquet with the
night readers' machinery (:mod:`models.nights.formats`): the same column aliases, timestamp rules,
import profiles, gap filling and problem locations. On top of a night file a recording file may
have a marker column (the profile's ``marker`` role, or a header ``marker``, ``event`` or
``button``); a cell marks its epoch when it is a positive number or ``true``/``yes``/``x``, and
not when it is blank, ``0``, ``false`` or ``no``.

JSON::

    {"participant_id": "P-01", "start": "2031-03-02T12:00:00+01:00", "epoch_seconds": 30,
     "counts": [0, 12, ...], "markers": [1301, 4410]}

``markers`` lists the epoch indexes of the presses (or gives one boolean per epoch); it and
``participant_id`` are optional. A file with a reference column is read, the reference left unused
(its header is listed in :attr:`Recording.unused_columns`).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..errors import InvalidNightError, Problem
from ..nights import ImportProfile, Night, NightOptions, detect_format, night_from_csv, night_from_json
from ..nights._decoding import decode_json
from ..nights.tabular import night_from_parquet
from ..nights.timestamps import zone_of
from ._markers import csv_markers, json_markers, parquet_markers

__all__ = [
    "RECORDING_MAX_DAYS",
    "RECORDING_MIN_HOURS",
    "InvalidRecordingError",
    "Recording",
    "read_recording",
    "recording_from_json",
    "recording_to_epoch",
    "recording_to_json",
]

#: longest accepted recording, days (a 35-day protocol with a week of margin)
RECORDING_MAX_DAYS = 42
#: shortest accepted recording, hours
RECORDING_MIN_HOURS = 1
_JSON_EXTRA = ("participant_id", "markers")


class InvalidRecordingError(InvalidNightError):
    """A recording failed validation; ``problems`` lists every defect with its location."""

    code = "invalid_recording"


@dataclass(frozen=True, eq=False)
class Recording:
    """One participant's continuous recording.

    Parameters
    ----------
    participant_id : str
    start : pandas.Timestamp
        Start of the first epoch, timezone-aware.
    epoch_seconds : int
        15, 30 or 60, as recorded (see :func:`recording_to_epoch`).
    counts : ndarray of float64, shape (n_epochs,)
        Counts per epoch, NaN where an epoch is missing (filled gap).
    markers : ndarray of bool, shape (n_epochs,)
        True where an event marker fell in the epoch.
    source_name : str, optional
        File the recording was read from (not content).
    unused_columns : tuple of str, default=()
        Columns of the source file no role used (not content).
    source_epoch_seconds : int, optional
        Epoch length as recorded when :func:`recording_to_epoch` summed epochs (not content).
    """

    participant_id: str
    start: pd.Timestamp
    epoch_seconds: int
    counts: NDArray[np.float64]
    markers: NDArray[np.bool_]
    source_name: str | None = None
    unused_columns: tuple[str, ...] = ()
    source_epoch_seconds: int | None = field(default=None)
    _hash: str = field(default="", init=False, repr=False)

    def __post_init__(self) -> None:
        counts = np.array(self.counts, dtype=np.float64)
        counts.setflags(write=False)
        markers = np.array(self.markers, dtype=bool)
        if markers.shape != counts.shape:
            raise ValueError(f"markers have shape {markers.shape}, counts {counts.shape}")
        markers.setflags(write=False)
        object.__setattr__(self, "counts", counts)
        object.__setattr__(self, "markers", markers)
        object.__setattr__(self, "unused_columns", tuple(self.unused_columns))
        object.__setattr__(self, "_hash", "")

    @property
    def n_epochs(self) -> int:
        return int(self.counts.shape[0])

    @property
    def end(self) -> pd.Timestamp:
        """End of the last epoch."""
        return self.start + pd.Timedelta(seconds=self.epoch_seconds * self.n_epochs)

    @property
    def days(self) -> float:
        """Length in days."""
        return self.n_epochs * self.epoch_seconds / 86400.0

    def timestamps(self) -> pd.DatetimeIndex:
        """Start time of every epoch, shape (n_epochs,), in the start's zone."""
        return pd.date_range(self.start, periods=self.n_epochs, freq=pd.Timedelta(seconds=self.epoch_seconds))

    def epoch_at(self, when: pd.Timestamp) -> int:
        """Index of the epoch containing ``when``, clipped to 0..n_epochs."""
        offset_s = (when - self.start).total_seconds()
        return int(min(max(np.floor(offset_s / self.epoch_seconds + 1e-9), 0), self.n_epochs))

    def time_at(self, epoch: int) -> pd.Timestamp:
        """Start time of epoch ``epoch`` (``n_epochs`` gives :attr:`end`)."""
        return self.start + pd.Timedelta(seconds=self.epoch_seconds * int(epoch))

    def content_hash(self) -> str:
        """SHA-256 (hex) of start (UTC), epoch length, counts (NaN as -1) and markers; stable over formats."""
        if not self._hash:
            h = hashlib.sha256()
            head = {"start": pd.Timestamp(self.start).tz_convert("UTC").isoformat(),
                    "epoch_seconds": int(self.epoch_seconds), "n_epochs": self.n_epochs}
            h.update(b"recording\x00" + json.dumps(head, sort_keys=True).encode())
            h.update(np.where(np.isnan(self.counts), -1.0, self.counts).astype("<f8").tobytes())
            h.update(b"\x00markers\x00" + np.flatnonzero(self.markers).astype("<i8").tobytes())
            object.__setattr__(self, "_hash", h.hexdigest())
        return self._hash


def _options(tz: str | None, fill_gaps: bool) -> NightOptions:
    return NightOptions(min_hours=float(RECORDING_MIN_HOURS), max_hours=24.0 * RECORDING_MAX_DAYS,
                        max_epochs=RECORDING_MAX_DAYS * 86400 // 15, fill_gaps=fill_gaps, tz=tz,
                        min_present_pct=0.0)


def _recording_problems(problems: list[Problem]) -> list[Problem]:
    """Night-reader problems in a recording's terms (length limits in days)."""
    out = []
    for p in problems:
        if p.code == "too_long":
            p = Problem(p.code, p.message.split(", longer")[0].replace("recording lasts", "recording of")
                        + f" is longer than the maximum of {RECORDING_MAX_DAYS} days", p.location)
        elif p.code == "too_many_epochs":
            p = Problem(p.code, p.message + f" (at most {RECORDING_MAX_DAYS} days of 15-s epochs)", p.location)
        out.append(p)
    return out


def read_recording(source: str | Path | bytes, *, fmt: str | None = None, participant_id: str | None = None,
                   profile: ImportProfile | None = None, tz: str | None = None, fill_gaps: bool = False,
                   source_name: str | None = None) -> Recording:
    """Read a continuous recording from a file path or a file's bytes.

    Parameters
    ----------
    source : str, Path or bytes
        A path (str or Path) or the file's content (bytes).
    fmt : {"csv", "json", "parquet"}, optional
        By default from the suffix of the path or ``source_name``, else from the content.
    participant_id : str, optional
        Overrides the JSON's ``participant_id``; "" when neither gives one.
    profile : ImportProfile, optional
        The export's layout (as for nights), including an optional ``marker`` column role.
    tz : str, optional
        IANA zone of times without a UTC offset (overrides the profile's ``tz``).
    fill_gaps : bool, default=False
        Accept whole-epoch gaps and empty count cells as missing epochs (NaN counts).
    source_name : str, optional
        File name for errors and :attr:`Recording.source_name` when ``source`` is bytes.

    Returns
    -------
    Recording

    Raises
    ------
    InvalidRecordingError
        Listing every problem with its location (``field``, ``row``, ``epoch``); also for a recording
        shorter than :data:`RECORDING_MIN_HOURS` h or longer than :data:`RECORDING_MAX_DAYS` days.
    """
    if isinstance(source, bytes):
        data, name = source, source_name
    else:
        path = Path(source)
        data, name = path.read_bytes(), source_name or str(path)
    fmt = fmt or detect_format(name, data)
    options = _options(tz, fill_gaps)
    zone_problems: list[Problem] = []
    if tz is not None and zone_of(tz, zone_problems) is None:  # stored with the recording: checked even if unused
        raise InvalidRecordingError(zone_problems, source=name)
    try:
        if fmt == "json":
            return _from_json_bytes(data, participant_id, options, name, profile)
        reader = {"csv": night_from_csv, "parquet": night_from_parquet}[fmt]
        night = reader(data, participant_id=participant_id or "", options=options, source=name, profile=profile)
        finder = csv_markers if fmt == "csv" else parquet_markers
        markers, unused = finder(data, night, options, profile, name)
    except InvalidRecordingError:
        raise
    except InvalidNightError as exc:
        raise InvalidRecordingError(_recording_problems(exc.problems), source=name) from None
    return _from_night(night, markers, unused)


def _from_night(night: Night, markers: NDArray[np.bool_], unused: tuple[str, ...]) -> Recording:
    return Recording(participant_id=night.participant_id, start=night.start, epoch_seconds=night.epoch_seconds,
                     counts=night.counts, markers=markers, source_name=night.source_name, unused_columns=unused)


def _from_json_bytes(data: bytes | dict[str, Any], participant_id: str | None, options: NightOptions,
                     name: str | None, profile: ImportProfile | None) -> Recording:
    obj: object = data
    if isinstance(data, bytes):
        try:
            obj = decode_json(data, name)
        except InvalidNightError as exc:  # bad byte, syntax, nesting or number length: named by the reader
            raise InvalidRecordingError(exc.problems, source=name) from None
    if not isinstance(obj, dict):  # the night reader names the defect (bad byte, line and column, top level)
        night_from_json(data if isinstance(data, bytes) else b"", options=options, source=name)
        raise InvalidRecordingError([Problem("malformed_json", "the top level must be an object", {"field": "$"})],
                                    source=name)
    body = {k: v for k, v in obj.items() if k not in _JSON_EXTRA and k != "reference"}
    problems: list[Problem] = []
    pid = obj.get("participant_id", "")
    if not isinstance(pid, str):
        problems.append(Problem("invalid_field", "participant_id must be text", {"field": "participant_id"}))
        pid = ""
    try:
        night = night_from_json(body, participant_id=participant_id or pid, options=options, source=name,
                                profile=profile)
    except InvalidNightError as exc:
        raise InvalidRecordingError([*problems, *_recording_problems(exc.problems)], source=name) from None
    markers = json_markers(obj.get("markers"), night.n_epochs, problems)
    if problems:
        raise InvalidRecordingError(problems, source=name)
    return _from_night(night, markers, ("reference",) if "reference" in obj else ())


def recording_from_json(data: bytes | str | dict[str, Any], *, participant_id: str | None = None,
                        tz: str | None = None, fill_gaps: bool = True, source_name: str | None = None) -> Recording:
    """Recording from its JSON form (bytes, text or a decoded object); ``null`` counts are missing epochs."""
    options = _options(tz, fill_gaps)
    raw: bytes | dict[str, Any] = data.encode() if isinstance(data, str) else data
    return _from_json_bytes(raw, participant_id, options, source_name, None)


def recording_to_json(recording: Recording) -> dict[str, Any]:
    """JSON object of a recording (missing epochs as ``null``, markers as epoch indexes)."""
    counts = recording.counts
    as_int = bool(np.all(np.isnan(counts) | (counts == np.round(counts))))
    values = [None if c != c else (int(c) if as_int else float(c)) for c in counts.tolist()]
    return {"participant_id": recording.participant_id, "start": recording.start.isoformat(),
            "epoch_seconds": recording.epoch_seconds, "counts": values,
            "markers": np.flatnonzero(recording.markers).tolist()}


def recording_to_epoch(recording: Recording, epoch_seconds: int) -> Recording:
    """The recording in a longer epoch length (15 -> 30 or 60 s, 30 -> 60 s), or itself when equal.

    Counts are summed per new epoch; a new epoch with a missing sub-epoch is missing (as
    :func:`~models.nights.resample.aggregate_epochs`); a marker in any sub-epoch marks the new
    epoch; a trailing incomplete group is dropped.

    Raises
    ------
    InvalidRecordingError
        ``epoch_length_mismatch`` when the new length is not longer and a multiple of the recorded one.
    """
    if epoch_seconds == recording.epoch_seconds:
        return recording
    k, rem = divmod(epoch_seconds, recording.epoch_seconds)
    if rem or k < 2 or epoch_seconds not in (30, 60):
        raise InvalidRecordingError([Problem(
            "epoch_length_mismatch", f"the study uses {epoch_seconds}-s epochs but the recording has "
            f"{recording.epoch_seconds}-s epochs; only shorter epochs that divide the study's are summed into it",
            {"field": "epoch_seconds", "values": [epoch_seconds, recording.epoch_seconds]})],
            source=recording.source_name)
    n = recording.n_epochs // k
    counts = recording.counts[: n * k].reshape(n, k).sum(axis=1)
    markers = np.asarray(recording.markers[: n * k].reshape(n, k).any(axis=1), dtype=bool)
    return Recording(participant_id=recording.participant_id, start=recording.start, epoch_seconds=epoch_seconds,
                     counts=counts, markers=markers, source_name=recording.source_name,
                     unused_columns=recording.unused_columns,
                     source_epoch_seconds=recording.source_epoch_seconds or recording.epoch_seconds)
