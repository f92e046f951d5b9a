"""The PSG hypnogram of one night and its stages on an actigraph's epochs.

A :class:`Hypnogram` holds the stages a PSG system scored, one per 30-s epoch (AASM; Iber et al. 2007),
with the start of its first epoch **on the PSG system's own clock**, which may differ from the
actigraph's by seconds to minutes (:mod:`models.recordings.alignment` estimates the difference).

Reading (:func:`read_hypnogram`)
--------------------------------
CSV: a header row, then one row per epoch with a time column and a stage column (headers found by the
night readers' aliases, :data:`~models.nights.columns.COLUMN_ALIASES` ``time`` and ``reference``). Times
follow the night readers' rules (:mod:`models.nights.timestamps`): strict ISO 8601, or an import
profile's ``datetime_format`` (with a separate date column when the profile maps ``date``), placed in
``tz`` (or the profile's) when written without an offset. Of an
:class:`~models.nights.profiles.ImportProfile` apply ``skip_rows``, ``delimiter``, ``encoding``,
``columns`` (roles ``time``, ``date``, ``reference`` = the stage column), ``datetime_format``, ``tz``,
``stage_codes`` and ``ignore_columns``. Leading ``#`` lines are skipped. Rows must be exactly 30 s apart.

JSON::

    {"start": "2031-03-02T22:41:00+01:00", "epoch_seconds": 30, "stages": ["W", "N1", ...]}

Stages are read like night references (:func:`~models.nights.night.canonical_stage`): AASM, R&K, binary,
and ``?``/``U``/``-``/empty for unscored; a profile's ``stage_codes`` are applied first.

Every problem is reported at once (:class:`InvalidHypnogramError`), each with a stable code and its
location (``field``, 1-based file ``row``, 0-based ``epoch``): ``empty_file``, ``malformed_csv``,
``malformed_json``, ``missing_column``, ``unmapped_reference_column``, ``unknown_field``,
``missing_field``, ``invalid_field``, ``invalid_timestamp``, ``missing_timezone``, ``mixed_timezones``,
``daylight_saving``, ``implausible_date``, ``unknown_time_zone``, ``duplicate_timestamp``,
``time_not_increasing``, ``irregular_spacing``, ``unsupported_epoch_length``, ``too_short``,
``too_many_epochs``, ``unknown_stage``, ``no_scored_epochs``, ``not_utf8``, ``undecodable_text``,
``unsupported_format``.

Stages on actigraph epochs (:func:`hypnogram_on_epochs`)
--------------------------------------------------------
The hypnogram is first moved onto the actigraph's clock (``clock_offset_s`` added to every PSG time).
Each actigraph epoch then takes its stage from the PSG time it overlaps, by one rule for 15-, 30- and
60-s epochs:

1. An epoch less than half of which is covered by *scored* PSG time (outside the hypnogram or
   ``?``) is ``"?"``.
2. Sleep or wake by the covered seconds: sleep when the seconds of sleep stages exceed those of wake
   (``W``, ``0``, movement time ``MT``), **wake on a tie**.
3. The stage is the one of the winning side with the most seconds; between equal shares the later
   PSG epoch's stage.

So a 15-s epoch takes the stage of the PSG epoch that covers it (or covers more of it), a 30-s epoch
on the PSG grid its PSG epoch's stage, and a 60-s epoch on the grid the majority of its two scored
sub-epochs with wake on ties, exactly as :func:`~models.nights.resample.majority_stage`; off the grid
the covered shares decide in place of whole sub-epochs.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..errors import InvalidNightError, Problem
from ..nights import STAGE_CODES, ImportProfile, canonical_stage, stages_to_sleep
from ._hypnogram_io import EPOCH_SECONDS, MAX_EPOCHS, HypnogramParts, hypnogram_from_csv, hypnogram_from_json

__all__ = [
    "HYPNOGRAM_EPOCH_SECONDS",
    "HYPNOGRAM_MAX_EPOCHS",
    "Hypnogram",
    "InvalidHypnogramError",
    "hypnogram_on_epochs",
    "read_hypnogram",
]

#: the PSG epoch length, seconds (AASM scoring epoch; Iber et al. 2007)
HYPNOGRAM_EPOCH_SECONDS = EPOCH_SECONDS
#: most epochs a hypnogram may have (48 h of 30-s epochs: one night with a wide margin)
HYPNOGRAM_MAX_EPOCHS = MAX_EPOCHS


class InvalidHypnogramError(InvalidNightError):
    """A hypnogram failed validation; ``problems`` lists every defect with its location."""

    code = "invalid_hypnogram"


@dataclass(frozen=True, eq=False)
class Hypnogram:
    """The scored stages of one PSG night.

    Parameters
    ----------
    start : pandas.Timestamp
        Start of the first epoch on the PSG system's clock, timezone-aware.
    epoch_seconds : int
        :data:`HYPNOGRAM_EPOCH_SECONDS` (30).
    stages : ndarray of str, shape (n_epochs,)
        Canonical stage codes (:func:`~models.nights.night.canonical_stage`), ``"?"`` unscored.
    source_name : str, optional
        File the hypnogram was read from.
    unused_columns : tuple of str, default=()
        Columns of the source file that no role used.

    Raises
    ------
    InvalidHypnogramError
        A naive ``start``, another epoch length, no epochs or non-canonical stage codes.
    """

    start: pd.Timestamp
    epoch_seconds: int
    stages: NDArray[np.str_]
    source_name: str | None = field(default=None, compare=False)
    unused_columns: tuple[str, ...] = field(default=(), compare=False)

    def __post_init__(self) -> None:
        stages = np.array(self.stages, dtype="<U3")
        stages.setflags(write=False)
        object.__setattr__(self, "stages", stages)
        object.__setattr__(self, "unused_columns", tuple(self.unused_columns))
        problems = []
        if not isinstance(self.start, pd.Timestamp) or self.start.tzinfo is None:
            problems.append(Problem("missing_timezone", "a hypnogram's start must be a timezone-aware time",
                                    {"field": "start"}))
        if self.epoch_seconds != HYPNOGRAM_EPOCH_SECONDS:
            problems.append(Problem("unsupported_epoch_length", f"PSG epochs must be {HYPNOGRAM_EPOCH_SECONDS} s, "
                                    f"got {self.epoch_seconds!r}", {"field": "epoch_seconds"}))
        if stages.ndim != 1 or stages.size == 0:
            problems.append(Problem("too_short", "a hypnogram needs at least one epoch", {"field": "stages"}))
        else:
            bad = [s for s in np.unique(stages) if canonical_stage(str(s)) != s]
            if bad:
                i = int(np.flatnonzero(np.isin(stages, bad))[0])
                problems.append(Problem("unknown_stage", f"stages {bad[:5]!r} are not canonical codes, first at "
                                        f"epoch {i}", {"field": "stages", "epoch": i, "values": bad[:5]}))
        if problems:
            raise InvalidHypnogramError(problems, source=self.source_name)

    @property
    def n_epochs(self) -> int:
        return int(self.stages.size)

    @property
    def end(self) -> pd.Timestamp:
        """End of the last epoch (PSG clock)."""
        return self.start + pd.Timedelta(seconds=self.n_epochs * self.epoch_seconds)

    def timestamps(self) -> pd.DatetimeIndex:
        """Start of every epoch (PSG clock), shape (n_epochs,)."""
        return pd.date_range(self.start, periods=self.n_epochs, freq=pd.Timedelta(seconds=self.epoch_seconds))

    def to_json(self) -> dict[str, object]:
        """The JSON form :func:`read_hypnogram` reads back (``start`` with its UTC offset)."""
        return {"start": self.start.isoformat(), "epoch_seconds": self.epoch_seconds, "stages": self.stages.tolist()}

    def sleep(self) -> NDArray[np.float64]:
        """Sleep (1.0), wake (0.0, movement time included) or unscored (NaN) per epoch, shape (n_epochs,)."""
        return stages_to_sleep(self.stages, movement_time="wake")


def read_hypnogram(source: str | Path | bytes | Mapping[str, object], *, fmt: str | None = None,
                   profile: ImportProfile | None = None, tz: str | None = None,
                   source_name: str | None = None) -> Hypnogram:
    """Read a PSG hypnogram (format rules in the module docstring).

    Parameters
    ----------
    source : str, Path, bytes or dict
        A path, the file's content, or an already decoded JSON object.
    fmt : {"csv", "json"}, optional
        By default from the suffix of the path or ``source_name``, else from the content.
    profile : ImportProfile, optional
        The export's layout.
    tz : str, optional
        IANA zone of times written without a UTC offset (overrides the profile's ``tz``).
    source_name : str, optional
        File name for errors and :attr:`Hypnogram.source_name` when ``source`` is not a path.

    Returns
    -------
    Hypnogram

    Raises
    ------
    InvalidHypnogramError
        Listing every problem with its location.
    """
    if isinstance(source, Mapping):
        return _build(lambda: hypnogram_from_json(source, profile=profile, tz=tz, source=source_name), source_name)
    if isinstance(source, bytes):
        data, name = source, source_name
    else:
        path = Path(source)
        data, name = path.read_bytes(), source_name or str(path)
    if fmt is None:
        suffix = Path(name).suffix.lower().lstrip(".") if name else ""
        head = data.lstrip(b"\xef\xbb\xbf \t\r\n")[:1]
        fmt = suffix if suffix in ("csv", "json") else "json" if head in (b"{", b"[") else "csv"
    if fmt not in ("csv", "json"):
        raise InvalidHypnogramError([Problem("unsupported_format", f"hypnograms are CSV or JSON, not {fmt!r}",
                                             {"field": "fmt"})], source=name)
    reader = hypnogram_from_json if fmt == "json" else hypnogram_from_csv
    return _build(lambda: reader(data, profile=profile, tz=tz, source=name), name)


def _build(read: Callable[[], HypnogramParts], source: str | None) -> Hypnogram:
    """The hypnogram of a reader's parts; the reader's problems as :class:`InvalidHypnogramError`."""
    try:
        parts = read()
    except InvalidNightError as exc:
        if isinstance(exc, InvalidHypnogramError):
            raise
        raise InvalidHypnogramError(exc.problems, source=exc.source or source) from None
    return Hypnogram(start=parts.start, epoch_seconds=HYPNOGRAM_EPOCH_SECONDS, stages=parts.stages,
                     source_name=parts.source_name, unused_columns=parts.unused_columns)


def hypnogram_on_epochs(hypnogram: Hypnogram, *, start: pd.Timestamp, epoch_seconds: int, n_epochs: int,
                        clock_offset_s: float = 0.0) -> NDArray[np.str_]:
    """The hypnogram's stages on an actigraph's epochs (rule in the module docstring).

    Parameters
    ----------
    hypnogram : Hypnogram
    start : pandas.Timestamp
        Start of the actigraph's first epoch (actigraph clock), timezone-aware.
    epoch_seconds : int
        The actigraph's epoch length: 15, 30 or 60 s.
    n_epochs : int
        Number of actigraph epochs.
    clock_offset_s : float, default=0.0
        Seconds to add to PSG times to land on the actigraph's clock
        (:attr:`ClockAlignment.clock_offset_s <models.recordings.alignment.ClockAlignment.clock_offset_s>`).

    Returns
    -------
    stages : ndarray of str, shape (n_epochs,)
        Canonical stage codes, ``"?"`` where the hypnogram does not cover (at least half of) an epoch.
    """
    if start.tzinfo is None:
        raise ValueError("start must be timezone-aware")
    if epoch_seconds not in (15, 30, 60):
        raise ValueError(f"actigraph epochs are 15, 30 or 60 s, got {epoch_seconds!r}")
    if n_epochs < 0 or not np.isfinite(clock_offset_s):
        raise ValueError("n_epochs must be >= 0 and clock_offset_s finite")
    seconds, stage_ids, codes = _stage_seconds(hypnogram, start=start, epoch_seconds=epoch_seconds,
                                              n_epochs=n_epochs, clock_offset_s=clock_offset_s)
    is_sleep = np.array([STAGE_CODES.get(str(c)) == 1 for c in codes])
    is_scored = codes != "?"
    # per epoch and code: covered seconds and the last PSG epoch (position) giving it
    k = seconds.shape[1]
    tally = np.zeros((n_epochs, codes.size))
    last = np.full((n_epochs, codes.size), -1)
    rows = np.arange(n_epochs)
    for j in range(k):
        np.add.at(tally, (rows, stage_ids[:, j]), seconds[:, j])
        last[rows, stage_ids[:, j]] = np.where(seconds[:, j] > 0, j, last[rows, stage_ids[:, j]])
    tally = np.round(tally, 6)  # overlaps of a fractional offset: equal shares compare equal
    sleep_s = tally[:, is_sleep].sum(axis=1)
    wake_s = tally[:, is_scored & ~is_sleep].sum(axis=1)
    side = np.where((sleep_s > wake_s)[:, None], is_sleep[None, :], (is_scored & ~is_sleep)[None, :])
    # the larger share first (shares differ by >= 1e-6 after rounding), the later PSG epoch (last <= 3) on ties
    rank = np.where(side & (tally > 0), tally + last * 1e-8, -1.0)
    out = codes[rank.argmax(axis=1)]
    covered = (sleep_s + wake_s) >= epoch_seconds / 2
    return np.where(covered, out, "?").astype("<U3")


def _stage_seconds(hypnogram: Hypnogram, *, start: pd.Timestamp, epoch_seconds: int, n_epochs: int,
                  clock_offset_s: float) -> tuple[NDArray[np.float64], NDArray[np.intp], NDArray[np.str_]]:
    """Seconds of each actigraph epoch covered by each PSG epoch it overlaps.

    Returns
    -------
    seconds : ndarray of float64, shape (n_epochs, k)
        Overlap in seconds with the k PSG epochs that may overlap the epoch, in time order.
    stage_ids : ndarray of intp, shape (n_epochs, k)
        Index into ``codes`` of each of those PSG epochs' stage (``"?"`` outside the hypnogram).
    codes : ndarray of str, shape (n_codes,)
        The distinct codes, ``"?"`` included.
    """
    psg = float(hypnogram.epoch_seconds)
    rel0 = (hypnogram.start - start).total_seconds() + clock_offset_s  # PSG start on the actigraph time axis
    a = np.arange(n_epochs, dtype=np.float64) * epoch_seconds
    first = np.floor((a - rel0) / psg).astype(np.int64)
    k = int(np.ceil(epoch_seconds / psg)) + 1
    idx = first[:, None] + np.arange(k)[None, :]
    p0 = rel0 + idx * psg
    seconds = np.clip(np.minimum(a[:, None] + epoch_seconds, p0 + psg) - np.maximum(a[:, None], p0), 0.0, None)
    codes = np.unique(np.append(hypnogram.stages, "?"))
    ids = np.searchsorted(codes, hypnogram.stages)
    unscored = int(np.searchsorted(codes, "?"))
    inside = (idx >= 0) & (idx < hypnogram.n_epochs)
    stage_ids = np.where(inside, ids[np.clip(idx, 0, hypnogram.n_epochs - 1)], unscored)
    return seconds, stage_ids.astype(np.intp), codes
