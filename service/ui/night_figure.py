"""The night figure: counts, the reference hypnogram and one method's output over clock time."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import matplotlib.dates as mdates
import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from numpy.typing import NDArray

from .figures import GREY, OKABE_ITO, style_of

__all__ = ["NightPanels", "draw_night"]

_DISAGREE = OKABE_ITO["vermillion"]
_COUNTS = "#3A3A3A"
#: Canonical reference codes -> hypnogram level label (R&K S3 and S4 shown together as N3; movement
#: time at the wake level, as the default policy counts it; binary labels as unstaged sleep "S").
_HYPNOGRAM_LEVEL = {"W": "W", "0": "W", "MT": "W", "R": "R", "REM": "R", "N1": "N1", "S1": "N1", "N2": "N2",
                    "S2": "N2", "N3": "N3", "S3": "N3", "S4": "N3", "S": "S", "1": "S"}
_LEVEL_ORDER = ("W", "R", "N1", "N2", "N3", "S")
_CALL_STRIP = (-0.32, -0.12)  # y range of the sleep/wake call strip under the probability axis


@dataclass(frozen=True, eq=False)
class NightPanels:
    """Everything the night figure draws.

    Attributes
    ----------
    times : pandas.DatetimeIndex of shape (n_epochs,)
        Epoch start times, timezone-aware (the axis shows the night's own clock time).
    epoch_seconds : int
    counts : ndarray of shape (n_epochs,)
        Activity counts per epoch (NaN = missing).
    in_bed : tuple of int
        ``(first, stop)`` in-bed epoch indices (lights-off, lights-on).
    stages : ndarray of str of shape (n_epochs,) or None
        Canonical reference codes (``"?"`` unscored); None for an unlabelled night.
    method : str or None
        Method drawn in the lowest panel; None draws no method panel.
    sleep : ndarray of int of shape (n_epochs,) or None
        The method's calls, 1 = sleep.
    p_sleep : ndarray of float of shape (n_epochs,) or None
        The method's sleep probability (models only; calibrated for models with decoding).
    p_posterior : ndarray of float of shape (n_epochs,) or None
        Posterior P(sleep) of the HMM decoder (drawn dashed), NaN = unscored.
    threshold : float or None
        Probability threshold of the calls.
    disagree : ndarray of bool of shape (n_epochs,) or None
        In-bed scored epochs where the method's call differs from the reference.
    qc : list of tuple
        ``(start, stop, code)`` epoch ranges of QC flags.
    """

    times: pd.DatetimeIndex
    epoch_seconds: int
    counts: NDArray[np.float64]
    in_bed: tuple[int, int]
    stages: NDArray[np.str_] | None = None
    method: str | None = None
    sleep: NDArray[np.float64] | None = None  # 1 sleep, 0 wake, NaN unscored
    p_sleep: NDArray[np.float64] | None = None
    p_posterior: NDArray[np.float64] | None = None
    threshold: float | None = None
    disagree: NDArray[np.bool_] | None = None
    qc: Sequence[tuple[int, int, str]] = ()


def _edges(times: pd.DatetimeIndex, epoch_seconds: int) -> NDArray[np.float64]:
    """Matplotlib date numbers of the n + 1 epoch boundaries."""
    bounds = times.append(pd.DatetimeIndex([times[-1] + pd.Timedelta(seconds=epoch_seconds)]))
    return np.asarray(mdates.date2num(pd.DatetimeIndex(bounds).tz_convert("UTC").tz_localize(None).to_pydatetime()))


def _shade(ax: Any, edges: NDArray[np.float64], mask: NDArray[np.bool_], **style: Any) -> None:
    """Shade the epochs where ``mask`` is True over the full height of ``ax`` (one artist)."""
    if not mask.any():
        return
    values = np.append(mask, mask[-1]).astype(bool)
    ax.fill_between(edges, 0, 1, where=values, step="post", transform=ax.get_xaxis_transform(),
                    linewidth=0, **style)


def _qc_mask(n: int, ranges: Sequence[tuple[int, int, str]]) -> NDArray[np.bool_]:
    mask = np.zeros(n, dtype=bool)
    for start, stop, _ in ranges:
        mask[max(start, 0):min(stop, n)] = True
    return mask


def draw_night(fig: Figure, panels: NightPanels) -> None:
    """Counts (symmetric log scale), reference hypnogram and one method's output over clock time.

    Lights-off and lights-on are dashed vertical lines; epochs under a QC flag are shaded grey
    with hatching; in-bed epochs where the method and the reference disagree are shaded
    vermillion in the hypnogram and method panels.
    """
    n = panels.counts.size
    edges = _edges(panels.times, panels.epoch_seconds)
    rows = ["counts"] + (["stages"] if panels.stages is not None else []) + (["method"] if panels.method else [])
    heights = {"counts": 1.3, "stages": 1.0, "method": 1.0 if panels.p_sleep is not None else 0.25}
    axes = fig.subplots(len(rows), 1, sharex=True, gridspec_kw={"height_ratios": [heights[r] for r in rows]})
    axes = np.atleast_1d(axes)
    by_row = dict(zip(rows, axes, strict=True))
    qc = _qc_mask(n, panels.qc)
    tz = panels.times.tz
    lights = [edges[min(panels.in_bed[0], n)], edges[min(panels.in_bed[1], n)]]

    ax = by_row["counts"]
    ax.stairs(np.nan_to_num(panels.counts, nan=0.0), edges, fill=True, color=_COUNTS, linewidth=0)
    ax.set_yscale("symlog", linthresh=1.0)
    ax.set_ylim(bottom=0)
    ax.set_ylabel(f"counts per\n{panels.epoch_seconds}-s epoch\n(symlog)")
    for x, text in zip(lights, ("lights off", "lights on"), strict=True):
        ax.text(x, 1.0, text, transform=ax.get_xaxis_transform(), ha="center", va="bottom", fontsize=8)

    if "stages" in by_row and panels.stages is not None:
        ax = by_row["stages"]
        levels = [lv for lv in _LEVEL_ORDER if lv in {_HYPNOGRAM_LEVEL.get(s) for s in panels.stages}]
        position = {lv: len(levels) - 1 - i for i, lv in enumerate(levels)}
        y = np.array([position.get(_HYPNOGRAM_LEVEL.get(s, ""), np.nan) for s in panels.stages], dtype=np.float64)
        ax.stairs(y, edges, baseline=None, color=OKABE_ITO["black"], linewidth=1.0)
        ax.set_yticks(list(position.values()), list(position.keys()))
        ax.set_ylim(-0.5, len(levels) - 0.5)
        ax.set_ylabel("PSG stage")

    if "method" in by_row and panels.method:
        ax = by_row["method"]
        label = style_of(panels.method).label
        if panels.p_sleep is not None:
            ax.stairs(panels.p_sleep, edges, baseline=None, color=OKABE_ITO["blue"], linewidth=0.9,
                      label=f"{label}: P(sleep)")
        if panels.p_posterior is not None:
            ax.stairs(panels.p_posterior, edges, baseline=None, color=OKABE_ITO["reddish_purple"], linewidth=0.9,
                      linestyle="--", label="posterior P(sleep) (HMM)")
        if panels.threshold is not None:
            ax.axhline(panels.threshold, color=GREY, linestyle=":", linewidth=0.9,
                       label=f"threshold {panels.threshold:.2f}")
        if panels.sleep is not None:
            called = panels.sleep == 1  # unscored epochs (NaN) are not called sleep
            ax.fill_between(edges, _CALL_STRIP[0], _CALL_STRIP[1], where=np.append(called, called[-1]),
                            step="post", color=OKABE_ITO["blue"], linewidth=0, label=f"{label}: called sleep")
            ax.fill_between(edges, _CALL_STRIP[0], _CALL_STRIP[1], where=~np.append(called, called[-1]),
                            step="post", facecolor="white", edgecolor=GREY, linewidth=0.3)
        if panels.p_sleep is None:  # a rule: calls only
            ax.set_ylim(_CALL_STRIP[0] - 0.05, _CALL_STRIP[1] + 0.05)
            ax.set_yticks([sum(_CALL_STRIP) / 2], ["call"])
        else:
            ax.set_ylim(_CALL_STRIP[0] - 0.05, 1.05)
            ax.set_yticks([sum(_CALL_STRIP) / 2, 0, 0.5, 1], ["call", "0", "0.5", "1"])
            ax.set_ylabel("P(sleep)")

    for name, ax in by_row.items():
        _shade(ax, edges, qc, facecolor="none", edgecolor=GREY, hatch="////", label="QC flag" if name == "counts"
               else None)
        if panels.disagree is not None and name in ("stages", "method"):
            _shade(ax, edges, panels.disagree, color=_DISAGREE, alpha=0.3,
                   label="method ≠ reference" if name == "method" else None)
        for x in lights:
            ax.axvline(x, color=OKABE_ITO["black"], linestyle="--", linewidth=0.8)
    last = axes[-1]
    last.xaxis.set_major_locator(mdates.HourLocator(tz=tz))
    last.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M", tz=tz))
    last.set_xlim(edges[0], edges[-1])
    last.set_xlabel(f"clock time ({panels.times[0].strftime('%Z') or 'UTC'}, {panels.times[0]:%Y-%m-%d} start)")
    handles, labels = [], []
    for ax in axes:
        h, lab = ax.get_legend_handles_labels()
        handles += h
        labels += lab
    if handles:
        fig.legend(handles, labels, loc="outside lower center", ncols=min(len(handles), 4), frameon=False)
