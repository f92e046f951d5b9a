"""Quality control of a night: warnings stored with the night that never change its data."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .night import Night

__all__ = ["QCConfig", "QCFlag", "quality_flags"]


@dataclass(frozen=True)
class QCConfig:
    """Thresholds of the quality flags (documented defaults).

    Parameters
    ----------
    off_wrist_min : float, default=60.0
        A run of exact zero counts at least this long (minutes) is flagged as suspected
        off-wrist (common practice; device dependent).
    spike_ceiling : float, default=20000.0
        Counts per epoch above this are flagged as spikes (common practice for count devices).
    spike_factor : float, default=10.0
        Counts above ``spike_factor`` × the night's 99th percentile are flagged as spikes too.
    stuck_run : int, default=10
        This many identical non-zero values in a row are flagged as a stuck sensor.
    unscored_max_pct : float, default=10.0
        A reference with more than this share (%) of unscored epochs is flagged low coverage.
    """

    off_wrist_min: float = 60.0
    spike_ceiling: float = 20000.0
    spike_factor: float = 10.0
    stuck_run: int = 10
    unscored_max_pct: float = 10.0


@dataclass(frozen=True)
class QCFlag:
    """A quality warning: its code, a sentence, epoch ranges ``[start, stop)`` and the threshold used."""

    code: str
    message: str
    ranges: list[tuple[int, int]] = field(default_factory=list)
    threshold: dict[str, float] = field(default_factory=dict)

    @property
    def n_epochs(self) -> int:
        return int(sum(b - a for a, b in self.ranges))

    def to_dict(self) -> dict[str, Any]:
        return {
            "code": self.code,
            "message": self.message,
            "ranges": [list(r) for r in self.ranges],
            "n_epochs": self.n_epochs,
            "threshold": dict(self.threshold),
        }


def _runs_of(mask: ArrayLike) -> NDArray[np.intp]:
    """Runs of True in a boolean vector.

    Returns
    -------
    runs : ndarray of intp, shape (n_runs, 2)
        ``[start, stop)`` epoch indices of each run.
    """
    m = np.concatenate(([False], np.asarray(mask, dtype=bool), [False]))
    edges = np.flatnonzero(m[1:] != m[:-1])
    return edges.reshape(-1, 2)


def _ranges(mask: ArrayLike) -> list[tuple[int, int]]:
    """:func:`_runs_of` as a list of ``(start, stop)`` pairs of Python ints."""
    return [(int(a), int(b)) for a, b in _runs_of(mask)]


def quality_flags(night: Night, *, config: QCConfig = QCConfig()) -> list[QCFlag]:
    """Quality warnings of a night; the data are never changed.

    Returns
    -------
    flags : list of QCFlag
        Codes: ``off_wrist``, ``spike``, ``stuck_sensor``, ``missing_epochs``,
        ``low_reference_coverage``, ``movement_time``.
    """
    flags: list[QCFlag] = []
    counts = night.counts
    epoch_min = night.epoch_seconds / 60
    min_epochs = int(np.ceil(config.off_wrist_min / epoch_min - 1e-9))
    long_zero = [(a, b) for a, b in _ranges(counts == 0) if b - a >= min_epochs]
    if long_zero:
        total = sum(b - a for a, b in long_zero) * epoch_min
        flags.append(QCFlag("off_wrist", f"{len(long_zero)} run(s) of exact zeros of >= {config.off_wrist_min:g} min "
                            f"({total:g} min in all): device possibly off the wrist",
                            long_zero, {"off_wrist_min": config.off_wrist_min}))
    finite = counts[np.isfinite(counts)]
    q99 = float(np.quantile(finite, 0.99)) if finite.size else 0.0
    limit = min(config.spike_ceiling, config.spike_factor * q99) if q99 > 0 else config.spike_ceiling
    spikes = _ranges(counts > limit)
    if spikes:
        flags.append(QCFlag("spike", f"{sum(b - a for a, b in spikes)} epoch(s) above {limit:g} counts",
                            spikes, {"spike_ceiling": config.spike_ceiling, "spike_factor": config.spike_factor,
                                     "limit": limit}))
    same = np.concatenate(([False], (counts[1:] == counts[:-1]) & (counts[1:] > 0)))
    stuck: list[tuple[int, int]] = []
    for a, b in _runs_of(same):  # a run of k equal pairs is k+1 equal values starting at a-1
        if b - a + 1 >= config.stuck_run:
            stuck.append((int(a - 1), int(b)))
    if stuck:
        flags.append(QCFlag("stuck_sensor", f"{len(stuck)} run(s) of >= {config.stuck_run} identical non-zero counts",
                            stuck, {"stuck_run": config.stuck_run}))
    missing = _ranges(night.missing)
    if missing:
        flags.append(QCFlag("missing_epochs", f"{sum(b - a for a, b in missing)} epoch(s) were filled as missing",
                            missing, {}))
    if night.reference is not None:
        unscored = night.reference == "?"
        pct = 100 * float(unscored.mean()) if unscored.size else 0.0
        if pct > config.unscored_max_pct:
            flags.append(QCFlag("low_reference_coverage",
                                f"{pct:.1f}% of reference epochs are unscored (limit {config.unscored_max_pct:g}%)",
                                _ranges(unscored),
                                {"unscored_max_pct": config.unscored_max_pct}))
        mt = night.reference == "MT"
        if mt.any():
            flags.append(QCFlag("movement_time", f"{int(mt.sum())} movement-time epoch(s) in the reference",
                                _ranges(mt), {}))
    return flags
