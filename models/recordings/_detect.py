"""Model-free detection on a recording's counts: rest blocks and per-epoch sleep calls (private to the package)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ._runs import close_gaps, drop_short, floor_level, rolling_mean, rolling_median, runs

__all__ = ["DetectionConfig", "moving_floor", "rest_blocks", "sleep_bounds", "sleep_calls"]


@dataclass(frozen=True)
class DetectionConfig:
    """Thresholds of the model-free detection (documented defaults).

    Parameters
    ----------
    median_minutes : float, default=5
        Width of the rolling median of counts (van Hees et al. 2018, from memory).
    rest_fraction : float, default=0.5
        Rest where the rolling median is below this share of the median of the rolling median over
        worn epochs (a person-specific threshold; principle from van Hees et al. 2018, value ours).
    min_block_minutes : float, default=30
        Shortest rest block (van Hees et al. 2018, from memory).
    merge_gap_minutes : float, default=60
        Gaps between rest blocks up to this long are merged (van Hees et al. 2018, from memory).
    still_minutes : float, default=10
        Window of the moving share that calls sleep (common practice for actigraphy windows).
    still_share : float, default=0.12
        An epoch is called sleep when at most this share of the 30-s epochs in its window move:
        quiet wake in bed moves in about a third of them, sleep in a few percent (our design).
        15-s epochs are paired into 30 s for the share; for 60-s epochs the share (and
        ``max_still_share``) is doubled, as a minute moves when either of its halves does.
    person_share_factor : float, default=1.5
        For a restless sleeper the share is raised to this multiple of the moving share inside
        the person's long rest blocks (at least 2 h) ...
    max_still_share : float, default=0.22
        ... but never above this (our design; keeps quiet wake out).
    onset_minutes : float, default=10
        Sleep onset is the first epoch of a run of at least this many minutes of sleep calls (in the
        spirit of Tudor-Locke et al. 2014's runs, from memory; length ours).
    offset_minutes : float, default=5
        Sleep offset ends the last run of sleep calls of at least this many minutes (shorter than
        the onset's: the morning's last sleep is often cut by brief movements; our design).
    floor_zero_share : float, default=0.2
        A recording with fewer exact zeros than this share of its worn epochs has a noise floor
        (a device whose counts never fall to zero) ...
    floor_peak_share : float, default=0.25
        ... and an epoch then moves when its count exceeds the floor's top: the most frequent
        whole count and the values above it at least this share as frequent (still sleep and
        off-wrist time pile up on the floor; :func:`~._runs.floor_level`, our design).
    p_threshold : float, default=0.5
        With a model's sleep probability, an epoch is called sleep at or above this (common practice).
    """

    median_minutes: float = 5.0
    rest_fraction: float = 0.5
    min_block_minutes: float = 30.0
    merge_gap_minutes: float = 60.0
    still_minutes: float = 10.0
    still_share: float = 0.12
    person_share_factor: float = 1.5
    max_still_share: float = 0.22
    onset_minutes: float = 10.0
    offset_minutes: float = 5.0
    floor_zero_share: float = 0.2
    floor_peak_share: float = 0.25
    p_threshold: float = 0.5


def rest_blocks(counts: NDArray[np.float64], worn: NDArray[np.bool_], epoch_seconds: int,
                config: DetectionConfig) -> list[tuple[int, int]]:
    """Low-activity blocks ``(start, stop)``: rolling median under a person-specific threshold, merged.

    Non-worn epochs are never rest and break blocks (a block does not bridge them). 15-s epochs are
    summed in pairs first (the counts of 30-s epochs).
    """
    per_min = 60.0 / epoch_seconds
    values = np.where(worn, counts, np.nan)
    if epoch_seconds == 15:  # levels of 30-s epochs, as the share of :func:`sleep_calls`
        pairs = np.nansum(np.pad(values, (0, values.size % 2)).reshape(-1, 2), axis=1)
        values = np.where(worn, np.repeat(pairs, 2)[: values.size], np.nan)
    med = rolling_median(values, max(1, int(round(config.median_minutes * per_min))) | 1)
    level = float(np.nanmedian(med[worn])) if worn.any() else 0.0
    low = worn & (med <= config.rest_fraction * max(level, 1.0))
    low = drop_short(low, int(round(config.min_block_minutes * per_min)))
    merged = close_gaps(low, int(round(config.merge_gap_minutes * per_min)))
    merged &= worn
    return [(int(a), int(b)) for a, b in zip(*runs(merged), strict=True)]


def sleep_calls(counts: NDArray[np.float64], worn: NDArray[np.bool_], epoch_seconds: int, config: DetectionConfig,
                p_sleep: NDArray[np.float64] | None = None,
                blocks: list[tuple[int, int]] | None = None) -> NDArray[np.bool_]:
    """Per-epoch sleep (True) / wake calls: a model's probability when given, else the moving share rule.

    ``blocks`` (rest blocks) set the person's own share (:class:`DetectionConfig`).
    """
    if p_sleep is not None:
        return np.asarray(worn & (np.nan_to_num(p_sleep, nan=0.0) >= config.p_threshold), dtype=bool)
    per_min = 60.0 / epoch_seconds
    moved = np.nan_to_num(counts, nan=0.0) > moving_floor(counts, worn, config)
    if epoch_seconds == 15:  # the share is one of 30-s epochs: a pair moves when either of its halves does
        pairs = np.pad(moved, (0, moved.size % 2)).reshape(-1, 2).any(axis=1)
        moved = np.repeat(pairs, 2)[: moved.size]
    moving = np.where(worn, moved.astype(np.float64), np.nan)
    share = rolling_mean(moving, max(1, int(round(config.still_minutes * per_min))) | 1)
    scale = 2.0 if epoch_seconds == 60 else 1.0  # a minute moves when either half does: about twice as often
    limit = config.still_share * scale
    long_blocks = [(a, b) for a, b in blocks or () if b - a >= 120 * per_min]
    if long_blocks:
        inside = np.concatenate([moving[a:b] for a, b in long_blocks])
        if np.isfinite(inside).any():
            limit = min(max(limit, config.person_share_factor * float(np.nanmean(inside))),
                        config.max_still_share * scale)
    return np.asarray(worn & (share <= limit), dtype=bool)


def moving_floor(counts: NDArray[np.float64], worn: NDArray[np.bool_], config: DetectionConfig) -> float:
    """Count above which an epoch moves: 0, or the top of the noise floor of a device with one."""
    return floor_level(counts[worn], zero_share=config.floor_zero_share, peak_share=config.floor_peak_share)


def sleep_bounds(calls: NDArray[np.bool_], start: int, stop: int, epoch_seconds: int,
                 config: DetectionConfig) -> tuple[int, int] | None:
    """(onset, offset) of the sleep in ``[start, stop)``: first and last run of sleep calls long enough."""
    per_min = 60.0 / epoch_seconds
    starts, stops = runs(calls[start:stop])
    keep_on = np.flatnonzero(stops - starts >= int(round(config.onset_minutes * per_min)))
    keep_off = np.flatnonzero(stops - starts >= int(round(config.offset_minutes * per_min)))
    if keep_on.size == 0 or keep_off.size == 0:
        return None
    onset, offset = start + int(starts[keep_on[0]]), start + int(stops[keep_off[-1]])
    return (onset, offset) if offset > onset else None
