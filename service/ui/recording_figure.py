"""The recording figure: one row per day, counts on a common scale, sleep periods, naps, non-wear, PSG nights, diary.

Colours are Okabe-Ito (:mod:`service.ui.figures`) and every layer also differs by form (fill,
hatching, a band, markers), so the figure reads under colour-vision deficiencies and in grey
scale. In SVG, each main period links to its night page.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import date, timedelta
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.patches import Patch, Rectangle
from numpy.typing import NDArray

from .figures import GREY, OKABE_ITO

__all__ = ["DAY_STARTS", "RecordingPanels", "day_windows", "draw_recording", "figure_height_in"]

#: where a row starts: local noon (a night in the middle of its row) or midnight
DAY_STARTS = {"noon": 12, "midnight": 0}
_MAIN = OKABE_ITO["sky_blue"]
_NAP = OKABE_ITO["orange"]
_PSG = OKABE_ITO["bluish_green"]
_DIARY = OKABE_ITO["black"]
_COUNTS = "#3A3A3A"
_BIN_MIN = 5  # counts drawn as the maximum per 5-min bin: the row stays readable and the SVG small


@dataclass(frozen=True, eq=False)
class RecordingPanels:
    """Everything the recording figure draws (epoch indices refer to ``counts``).

    Attributes
    ----------
    start : pandas.Timestamp
        Start of the first epoch, timezone-aware (rows are local days of its zone).
    epoch_seconds : int
    counts : ndarray of shape (n_epochs,)
        Counts per epoch, NaN missing.
    periods : list of tuple
        ``(kind, start_epoch, end_epoch, night_url, labelled)`` per sleep period (kind ``main`` or ``nap``).
    nonwear : list of tuple
        ``(start_epoch, end_epoch)`` off-wrist intervals.
    diary : list of tuple
        ``(bed_time, rise_time)`` diary times (either may be None).
    day_start : {"noon", "midnight"}
    """

    start: pd.Timestamp
    epoch_seconds: int
    counts: NDArray[np.float64]
    periods: Sequence[tuple[str, int, int, str | None, bool]] = ()
    nonwear: Sequence[tuple[int, int]] = ()
    diary: Sequence[tuple[pd.Timestamp | None, pd.Timestamp | None]] = ()
    day_start: str = "noon"
    scale: float = field(default=0.0)

    @property
    def end(self) -> pd.Timestamp:
        return self.start + pd.Timedelta(seconds=self.epoch_seconds * self.counts.size)


def day_windows(start: pd.Timestamp, end: pd.Timestamp, day_start: str = "noon") -> list[tuple[date, pd.Timestamp]]:
    """``(day, row start)`` of every row covering [start, end): local noons (or midnights) in the start's zone."""
    hour = DAY_STARTS[day_start]
    first = (start - pd.Timedelta(hours=hour)).date()
    last = (end - pd.Timedelta(seconds=1) - pd.Timedelta(hours=hour)).date()
    days = [first + timedelta(days=i) for i in range((last - first).days + 1)]
    return [(d, pd.Timestamp(f"{d.isoformat()} {hour:02d}:00").tz_localize(start.tz)) for d in days]


def figure_height_in(n_days: int) -> float:
    """Height of the figure for ``n_days`` rows, inches."""
    return 1.1 + 0.3 * max(n_days, 1)


def _hours(panels: RecordingPanels, epoch: int, row_start: pd.Timestamp) -> float:
    when = panels.start + pd.Timedelta(seconds=panels.epoch_seconds * int(epoch))
    return float((when - row_start) / pd.Timedelta(hours=1))


def draw_recording(fig: Figure, panels: RecordingPanels) -> None:
    """Draw one row per day of ``panels`` into ``fig``."""
    ax = fig.add_subplot()
    rows = day_windows(panels.start, panels.end, panels.day_start)
    counts = np.asarray(panels.counts, dtype=np.float64)
    finite = counts[np.isfinite(counts)]
    scale = panels.scale or (float(np.percentile(finite, 99)) if finite.size else 1.0) or 1.0
    step_h = panels.epoch_seconds / 3600.0
    per_bin = max(1, int(_BIN_MIN * 60 // panels.epoch_seconds))
    for r, (_, row_start) in enumerate(rows):
        base = r + 0.9
        first = int(np.clip(np.ceil((row_start - panels.start) / pd.Timedelta(seconds=panels.epoch_seconds)),
                            0, counts.size))
        row_end = row_start + pd.Timedelta(days=1)
        stop = int(np.clip(np.ceil((row_end - panels.start) / pd.Timedelta(seconds=panels.epoch_seconds)),
                           0, counts.size))
        for a, b in panels.nonwear:
            lo, hi = max(a, first), min(b, stop)
            if hi > lo:
                ax.add_patch(Rectangle((_hours(panels, lo, row_start), r + 0.05), (hi - lo) * step_h, 0.9,
                                       facecolor=GREY, alpha=0.3, hatch="////", edgecolor=GREY, linewidth=0))
        for kind, a, b, url, labelled in panels.periods:
            lo, hi = max(a, first), min(b, stop)
            if hi <= lo:
                continue
            x0, width = _hours(panels, lo, row_start), (hi - lo) * step_h
            patch = Rectangle((x0, r + 0.05), width, 0.9, facecolor=_MAIN if kind == "main" else _NAP,
                              alpha=0.35 if kind == "main" else 0.5, linewidth=0)
            if url:
                patch.set_url(url)
            ax.add_patch(patch)
            if labelled:
                ax.add_patch(Rectangle((x0, r + 0.05), width, 0.14, facecolor=_PSG, linewidth=0))
        if stop > first:
            seg = counts[first:stop]
            n_bins = -(-seg.size // per_bin)
            padded = np.full(n_bins * per_bin, np.nan)
            padded[:seg.size] = seg
            with np.errstate(invalid="ignore"):
                binned = np.nanmax(np.where(np.isnan(padded), -1.0, padded).reshape(n_bins, per_bin), axis=1)
            heights = np.clip(np.where(binned < 0, 0.0, binned) / scale, 0, 1) * 0.8
            x0 = _hours(panels, first, row_start)
            edges = x0 + np.arange(n_bins + 1) * per_bin * step_h
            ax.stairs(base - heights, edges, baseline=base, fill=True, color=_COUNTS, linewidth=0)
        for bed, rise in panels.diary:
            for when, marker in ((bed, "v"), (rise, "^")):
                if when is not None and row_start <= when < row_end:
                    ax.plot([(when - row_start) / pd.Timedelta(hours=1)], [r + 0.12 if marker == "v" else r + 0.88],
                            marker=marker, color=_DIARY, markersize=4, linestyle="none")
    ax.set_xlim(0, 24)
    ax.set_ylim(len(rows), 0)
    hour0 = DAY_STARTS[panels.day_start]
    ticks = list(range(0, 25, 3))
    ax.set_xticks(ticks, [f"{(hour0 + t) % 24:02d}:00" for t in ticks])
    ax.set_yticks([r + 0.5 for r in range(len(rows))],
                  [f"{d:%a %d %b}" for d, _ in rows], fontsize=6.5)
    ax.set_xlabel(f"clock time ({panels.start.tz}); each row a day from {'noon' if hour0 else 'midnight'}")
    ax.tick_params(axis="y", length=0)
    for spine in ("top", "right"):
        ax.spines[spine].set_visible(False)
    handles: list[Any] = [Patch(facecolor=_MAIN, alpha=0.35, label="main sleep period (a night)"),
               Patch(facecolor=_NAP, alpha=0.5, label="nap"),
               Patch(facecolor=_PSG, label="PSG-labelled night"),
               Patch(facecolor=GREY, alpha=0.3, hatch="////", edgecolor=GREY, label="off the wrist"),
               Patch(facecolor=_COUNTS, label=f"counts (full height = {scale:.0f})")]
    if panels.diary:
        handles.append(ax.plot([], [], marker="v", color=_DIARY, linestyle="none", label="diary bed / rise")[0])
    fig.legend(handles=handles, loc="outside upper center", ncol=3, frameon=False, fontsize=7)
