"""The night: one actigraphy recording of one participant, with optional PSG reference labels.

A :class:`Night` is immutable. It is built by the readers of :mod:`models.nights.formats` (JSON, CSV, Parquet) after
:func:`models.nights.checks.validate_night_fields` has accepted its fields, so every ``Night`` in memory
is valid. Derived values (end time, duration, in-bed epochs, content hash) are computed from the
stored fields.

Reference labels
----------------
Labels are stored as canonical upper-case codes. Accepted inputs (case-insensitive):

============================  ==========================================  =========
system                        codes                                       sleep/wake
============================  ==========================================  =========
AASM (Iber et al. 2007)       W / N1, N2, N3, R                           0 / 1
R&K (Rechtschaffen & Kales)   W / S1, S2, S3, S4, REM ; MT                0 / 1 ; setting
binary                        W, 0 / S, 1                                 0 / 1
unscored / artefact           ?, U, -, empty                              excluded
============================  ==========================================  =========

Movement time (``MT``, R&K only) is mapped by :class:`MovementTimePolicy`; the default maps it to
wake (conservative: the epoch is dominated by movement, which an actigraph calls wake). The other
choices are ``"sleep"`` (MT is only scored between sleep epochs) and ``"exclude"``.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import pandas as pd
from numpy.typing import NDArray

__all__ = [
    "MovementTimePolicy",
    "Night",
    "STAGE_CODES",
    "SUPPORTED_EPOCH_SECONDS",
    "UNSCORED_CODES",
    "canonical_stage",
    "stages_to_sleep",
]

SUPPORTED_EPOCH_SECONDS: tuple[int, ...] = (15, 30, 60)

#: canonical code -> 1 (sleep), 0 (wake), None (unscored) or "MT" (policy decides)
STAGE_CODES: dict[str, int | str | None] = {
    "W": 0, "0": 0,
    "N1": 1, "N2": 1, "N3": 1, "R": 1,
    "S1": 1, "S2": 1, "S3": 1, "S4": 1, "REM": 1,
    "S": 1, "1": 1,
    "MT": "MT",
    "?": None,
}
#: inputs that mean "not scored" (artefact, unknown); all stored as "?"
UNSCORED_CODES: frozenset[str] = frozenset({"?", "U", "-", ""})

MovementTimePolicy = Literal["wake", "sleep", "exclude"]


def canonical_stage(code: object) -> str | None:
    """Canonical upper-case stage code, or ``None`` if ``code`` is not a known label.

    ``None``/NaN and the unscored codes give ``"?"``; ``1.0``/``0.0`` floats give ``"1"``/``"0"``.
    """
    if code is None or (isinstance(code, float) and np.isnan(code)):
        return "?"
    if isinstance(code, (bool, np.bool_)):
        return None
    if isinstance(code, (int, np.integer, float, np.floating)):
        if float(code) in (0.0, 1.0):
            return str(int(code))
        return None
    text = str(code).strip().upper()
    if text in UNSCORED_CODES:
        return "?"
    return text if text in STAGE_CODES else None


def stages_to_sleep(stages: NDArray[np.str_], *,
                    movement_time: MovementTimePolicy = "wake") -> NDArray[np.float64]:
    """Map canonical stage codes to sleep (1.0), wake (0.0) or excluded (NaN).

    Parameters
    ----------
    stages : ndarray of str, shape (n_epochs,)
        Canonical codes (see module docstring).
    movement_time : {"wake", "sleep", "exclude"}, default="wake"
        How R&K movement-time epochs are counted.

    Returns
    -------
    sleep : ndarray of float64, shape (n_epochs,)
    """
    mt_value = {"wake": 0.0, "sleep": 1.0, "exclude": np.nan}[movement_time]
    table = {code: (np.nan if v is None else mt_value if v == "MT" else float(v)) for code, v in STAGE_CODES.items()}
    uniq, inverse = np.unique(np.asarray(stages, dtype=str), return_inverse=True)
    return np.array([table[u] for u in uniq], dtype=np.float64)[inverse]


@dataclass(frozen=True, eq=False)
class Night:
    """One recording of one participant.

    Parameters
    ----------
    participant_id : str
        Pseudonymous participant id.
    start : pandas.Timestamp
        Start of the first epoch, timezone-aware.
    epoch_seconds : int
        Epoch length in seconds: 15, 30 or 60.
    counts : ndarray of float64, shape (n_epochs,)
        Activity counts per epoch, non-negative. NaN only where a gap was filled on request
        (those epochs are also listed in ``missing``).
    reference : ndarray of str, shape (n_epochs,), optional
        Canonical reference stage codes (PSG), ``"?"`` for unscored epochs.
    lights_off, lights_on : pandas.Timestamp, optional
        In-bed interval; default is the whole recording.
    label : str, optional
        The lab's own id for the night (not part of the content hash).
    unused_columns : tuple of str, default=()
        Columns of the source file that no role used and the import profile did not list in
        ``ignore_columns`` (not part of the content hash).
    source_name : str, optional
        Name of the file the night was read from (not part of the content hash).
    source_epoch_seconds : int, optional
        Epoch length of the recording before :func:`~models.nights.resample.aggregate_epochs` summed
        its epochs; None when the epochs are as recorded (not part of the content hash).
    """

    participant_id: str
    start: pd.Timestamp
    epoch_seconds: int
    counts: NDArray[np.float64]
    reference: NDArray[np.str_] | None = None
    lights_off: pd.Timestamp | None = None
    lights_on: pd.Timestamp | None = None
    label: str | None = None
    unused_columns: tuple[str, ...] = field(default=(), compare=False)
    source_name: str | None = field(default=None, compare=False)
    source_epoch_seconds: int | None = field(default=None, compare=False)
    _hash: str = field(default="", repr=False, compare=False)

    def __post_init__(self) -> None:
        counts = np.array(self.counts, dtype=np.float64)  # own copy: the caller keeps a writable array
        counts.setflags(write=False)
        object.__setattr__(self, "counts", counts)
        object.__setattr__(self, "unused_columns", tuple(self.unused_columns))
        if self.reference is not None:
            ref = np.array(self.reference, dtype="<U3")
            ref.setflags(write=False)
            object.__setattr__(self, "reference", ref)
        object.__setattr__(self, "_hash", self._compute_hash())

    # ---- derived -------------------------------------------------------------------------
    @property
    def n_epochs(self) -> int:
        return int(self.counts.shape[0])

    @property
    def end(self) -> pd.Timestamp:
        """End of the last epoch."""
        return self.start + pd.Timedelta(seconds=self.epoch_seconds * self.n_epochs)

    @property
    def duration_hours(self) -> float:
        return self.n_epochs * self.epoch_seconds / 3600.0

    @property
    def missing(self) -> NDArray[np.bool_]:
        """Boolean mask, shape (n_epochs,): epochs added by gap filling (counts are NaN)."""
        return np.isnan(self.counts)

    @property
    def has_reference(self) -> bool:
        return self.reference is not None and bool(np.any(self.reference != "?"))

    @property
    def content_hash(self) -> str:
        """SHA-256 of the content (start, epoch length, counts, reference, lights), hex.

        Stable over formats: the same night read from JSON, CSV or Parquet hashes the same.
        ``participant_id``, ``label``, ``unused_columns``, ``source_name`` and
        ``source_epoch_seconds`` are not content.
        """
        return self._hash

    @property
    def night_id(self) -> str:
        """The night's identifier in every table and stored record: the first 20 hex digits of
        :attr:`content_hash` (the lab's ``label`` is kept beside it, as its own value)."""
        return self._hash[:20]

    def epoch_index(self, when: pd.Timestamp) -> int:
        """Index of the first epoch starting at or after ``when`` (0..n_epochs)."""
        offset_s = (when - self.start).total_seconds()
        return int(min(max(np.ceil(offset_s / self.epoch_seconds - 1e-9), 0), self.n_epochs))

    @property
    def in_bed(self) -> tuple[int, int]:
        """In-bed epochs as ``(first, stop)`` indices: epochs starting in [lights_off, lights_on)."""
        first = 0 if self.lights_off is None else self.epoch_index(self.lights_off)
        stop = self.n_epochs if self.lights_on is None else self.epoch_index(self.lights_on)
        return first, stop

    def epoch_times(self) -> pd.DatetimeIndex:
        """Start time of every epoch, shape (n_epochs,)."""
        return pd.date_range(self.start, periods=self.n_epochs, freq=pd.Timedelta(seconds=self.epoch_seconds))

    def reference_sleep(self, *, movement_time: MovementTimePolicy = "wake") -> NDArray[np.float64] | None:
        """Reference as sleep (1.0) / wake (0.0) / excluded (NaN), or None without reference."""
        if self.reference is None:
            return None
        return stages_to_sleep(self.reference, movement_time=movement_time)

    # ---- hashing -------------------------------------------------------------------------
    def _compute_hash(self) -> str:
        h = hashlib.sha256()
        head = {
            "start": _utc_iso(self.start),
            "epoch_seconds": int(self.epoch_seconds),
            "lights_off": _utc_iso(self.lights_off),
            "lights_on": _utc_iso(self.lights_on),
            "n_epochs": self.n_epochs,
        }
        h.update(json.dumps(head, sort_keys=True).encode())
        h.update(np.where(np.isnan(self.counts), -1.0, self.counts).astype("<f8").tobytes())  # NaN (filled gap) -> -1
        if self.reference is not None:
            h.update(b"\x00ref\x00")
            h.update(np.ascontiguousarray(self.reference, dtype="<U3").tobytes())
        return h.hexdigest()


def _utc_iso(ts: pd.Timestamp | None) -> str | None:
    if ts is None:
        return None
    return pd.Timestamp(ts).tz_convert("UTC").isoformat()
