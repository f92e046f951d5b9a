"""Clock alignment of a separately recorded PSG hypnogram with an actigraph's counts.

The PSG system and the actigraph keep their own clocks; tens of seconds to minutes between them are
usual. :func:`estimate_clock_offset` finds the shift of the hypnogram that makes its wake epochs fall
on the actigraph's movement: the lag maximising the Pearson correlation between the PSG wake indicator
and the actigraph's log counts over a window of lags (±10 min by default; common practice).

Method
------
For a lag ``L`` (seconds added to every PSG time) each actigraph epoch gets its **wake share**: the
seconds of wake (``W``, ``0``, movement time) among the scored PSG seconds that cover it, computed
exactly from the PSG epochs shifted by ``L`` (no resampling: a lag that is not a whole number of
epochs splits an actigraph epoch between two PSG epochs by the seconds each covers). Epochs less than
half covered by scored PSG time, and epochs with missing counts, are left out, and so are epochs
that are not usable at *every* searched lag: all lags are compared on the same epochs (a shifted
hypnogram that reached into the active hours before lights-off would otherwise gain correlation
only by the epochs it adds). The correlation is Pearson's r between the wake shares and
``log(1 + counts)`` over those epochs (the log keeps a few large counts from deciding). Lags run
from ``-search_s`` to ``+search_s`` in steps of :attr:`AlignmentConfig.step_s` (5 s: a sixth of a
30-s epoch); the lag of the highest r is the estimate, the lag nearest zero among equal values.

Flags
-----
* ``at_edge``: the best lag is the first or last searched one, so the true offset may lie beyond the
  window (search wider).
* ``weak``: the estimate should not be trusted without a look; :attr:`ClockAlignment.reasons` says
  why: ``no_correlation`` (r undefined: flat counts, or a hypnogram all wake or all sleep),
  ``low_correlation`` (r below :attr:`AlignmentConfig.min_quality`), ``ambiguous_peak`` (a local
  maximum of r farther than :attr:`AlignmentConfig.peak_separation_s` from the peak comes within
  :attr:`AlignmentConfig.min_peak_margin` of it: another lag region fits about as well),
  ``short_overlap`` (fewer than :attr:`AlignmentConfig.min_overlap_min` minutes of usable epochs).

The thresholds are nightbank's choices (no published values): a night of 8 h has ~960 epochs of 30 s,
where the chance correlation of unrelated series is of the order of 1/√960 ≈ 0.03 per lag.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from ..errors import NightbankError
from ..nights import STAGE_CODES
from .hypnogram import Hypnogram

__all__ = ["AlignmentConfig", "AlignmentError", "ClockAlignment", "estimate_clock_offset"]


class AlignmentError(NightbankError):
    """The hypnogram cannot be aligned with the counts (e.g. it lies outside the recording)."""

    code = "alignment_impossible"


@dataclass(frozen=True)
class AlignmentConfig:
    """Options of :func:`estimate_clock_offset`.

    Parameters
    ----------
    step_s : float, default=5.0
        Spacing of the searched lags, seconds (> 0).
    min_quality : float, default=0.2
        Peak correlation below which the alignment is weak.
    min_peak_margin : float, default=0.02
        The peak must exceed every other local maximum of the correlation farther than
        ``peak_separation_s`` from it by at least this much.
    peak_separation_s : float, default=60.0
        Lags closer than this to the peak belong to the peak itself (two epochs of 30 s).
    min_overlap_min : float, default=60.0
        Fewest minutes of usable epochs (scored PSG and present counts) at the best lag.
    """

    step_s: float = 5.0
    min_quality: float = 0.2
    min_peak_margin: float = 0.02
    peak_separation_s: float = 60.0
    min_overlap_min: float = 60.0

    def __post_init__(self) -> None:
        if not (math.isfinite(self.step_s) and self.step_s > 0):
            raise NightbankError(f"step_s must be a positive number of seconds, got {self.step_s!r}",
                                 code="invalid_alignment_config")
        if not (math.isfinite(self.min_overlap_min) and self.min_overlap_min >= 0):
            raise NightbankError("min_overlap_min must be >= 0", code="invalid_alignment_config")


@dataclass(frozen=True)
class ClockAlignment:
    """The estimated clock offset of a hypnogram against an actigraph.

    Parameters
    ----------
    clock_offset_s : float
        Seconds to **add** to PSG times to land on the actigraph's clock.
    quality : float
        Pearson r at that lag (NaN when undefined).
    at_edge : bool
        The lag is at the edge of the searched window.
    weak : bool
        Not to be trusted without a look (``reasons`` says why).
    searched_s : float
        Half-width of the searched window, seconds (lags ``-searched_s .. +searched_s``).
    runner_up : float, default=nan
        Best r outside the peak's own region (NaN when the region spans the window).
    n_epochs : int, default=0
        Actigraph epochs the correlation at the chosen lag used.
    step_s : float, default=5.0
        Spacing of the searched lags, seconds.
    reasons : tuple of str, default=()
        Why the alignment is weak: ``no_correlation``, ``low_correlation``, ``ambiguous_peak``,
        ``short_overlap``.
    lags_s, correlations : tuple of float, default=()
        The searched lags (seconds) and r at each (NaN where undefined), for a figure.
    """

    clock_offset_s: float
    quality: float
    at_edge: bool
    weak: bool
    searched_s: float
    runner_up: float = float("nan")
    n_epochs: int = 0
    step_s: float = 5.0
    reasons: tuple[str, ...] = ()
    lags_s: tuple[float, ...] = field(default=(), repr=False)
    correlations: tuple[float, ...] = field(default=(), repr=False)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready values (NaN as None; the lag curve left out)."""
        out = {k: v for k, v in asdict(self).items() if k not in ("lags_s", "correlations")}
        out["reasons"] = list(self.reasons)
        return {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in out.items()}


def _cumulative(hypnogram: Hypnogram) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """PSG epoch boundaries (s from the first epoch) and the cumulative wake and scored seconds at each."""
    psg = float(hypnogram.epoch_seconds)
    codes = hypnogram.stages
    scored = codes != "?"
    wake = scored & np.array([STAGE_CODES.get(str(c)) != 1 for c in codes], dtype=bool)
    edges = np.arange(hypnogram.n_epochs + 1, dtype=np.float64) * psg
    zero = np.zeros(1)
    return edges, np.concatenate([zero, np.cumsum(wake * psg)]), np.concatenate([zero, np.cumsum(scored * psg)])


def wake_shares(hypnogram: Hypnogram, *, start: pd.Timestamp, epoch_seconds: int, n_epochs: int,
                lags_s: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Wake share and scored PSG seconds of each actigraph epoch at each lag.

    Returns
    -------
    share : ndarray of float64, shape (n_lags, n_epochs)
        Wake seconds / scored seconds (NaN where nothing scored covers the epoch).
    scored_s : ndarray of float64, shape (n_lags, n_epochs)
    """
    edges, wake_cum, scored_cum = _cumulative(hypnogram)
    rel0 = (hypnogram.start - start).total_seconds()
    a = np.arange(n_epochs, dtype=np.float64) * epoch_seconds
    u0 = a[None, :] - rel0 - np.asarray(lags_s, dtype=np.float64)[:, None]  # epoch start on the PSG time axis
    u1 = u0 + epoch_seconds
    wake_s = np.interp(u1, edges, wake_cum) - np.interp(u0, edges, wake_cum)
    scored_s = np.interp(u1, edges, scored_cum) - np.interp(u0, edges, scored_cum)
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(scored_s > 1e-9, wake_s / scored_s, np.nan)
    return share, scored_s


def _pearson_rows(x: NDArray[np.float64], y: NDArray[np.float64],
                  use: NDArray[np.bool_]) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    """Pearson r of each row of ``x`` with ``y`` over the row's ``use`` mask; NaN where undefined."""
    n = use.sum(axis=1)
    xs = np.where(use, x, 0.0)
    ys = np.where(use, y[None, :], 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mx = xs.sum(axis=1) / n
        my = ys.sum(axis=1) / n
        dx = np.where(use, x - mx[:, None], 0.0)
        dy = np.where(use, y[None, :] - my[:, None], 0.0)
        sxy = (dx * dy).sum(axis=1)
        sxx = (dx * dx).sum(axis=1)
        syy = (dy * dy).sum(axis=1)
        r = sxy / np.sqrt(sxx * syy)
    defined = (n >= 3) & (sxx > 1e-12) & (syy > 1e-12)
    return np.where(defined, np.clip(r, -1.0, 1.0), np.nan), n.astype(np.int64)


def _runner_up(r: NDArray[np.float64], lags: NDArray[np.float64], best: int, separation_s: float) -> float:
    """Highest local maximum of ``r`` farther than ``separation_s`` from the best lag (NaN when none)."""
    inner = np.arange(1, r.size - 1)
    peak = (r[inner] >= r[inner - 1]) & (r[inner] >= r[inner + 1]) & (np.abs(lags[inner] - lags[best]) > separation_s)
    values = r[inner][peak & np.isfinite(r[inner])]
    return float(values.max()) if values.size else float("nan")


def estimate_clock_offset(counts: ArrayLike, *, counts_start: pd.Timestamp, epoch_seconds: int,
                          hypnogram: Hypnogram, search_s: float = 600.0,
                          config: AlignmentConfig = AlignmentConfig()) -> ClockAlignment:
    """Estimate the offset between the PSG clock and the actigraph's (method in the module docstring).

    Parameters
    ----------
    counts : array_like of float, shape (n_epochs,)
        The actigraph's counts (NaN = missing epoch), e.g. a whole recording or one night.
    counts_start : pandas.Timestamp
        Start of the first count epoch (actigraph clock), timezone-aware.
    epoch_seconds : int
        15, 30 or 60.
    hypnogram : Hypnogram
    search_s : float, default=600.0
        Half-width of the searched window of lags, seconds (rounded down to whole steps).
    config : AlignmentConfig

    Returns
    -------
    ClockAlignment

    Raises
    ------
    AlignmentError
        ``hypnogram_outside_recording`` when no count epoch lies under the hypnogram at any searched lag.
    ValueError
        Counts not one-dimensional, a naive start, another epoch length, a negative ``search_s``.
    """
    y_all = np.asarray(counts, dtype=np.float64)
    if y_all.ndim != 1:
        raise ValueError("counts must be one-dimensional")
    if counts_start.tzinfo is None:
        raise ValueError("counts_start must be timezone-aware")
    if epoch_seconds not in (15, 30, 60):
        raise ValueError(f"actigraph epochs are 15, 30 or 60 s, got {epoch_seconds!r}")
    if not (math.isfinite(search_s) and search_s >= 0):
        raise ValueError(f"search_s must be >= 0 seconds, got {search_s!r}")
    step = float(config.step_s)
    n_side = int(math.floor(search_s / step + 1e-9))
    searched = n_side * step
    lags = step * np.arange(-n_side, n_side + 1, dtype=np.float64)
    # only the count epochs the hypnogram can reach at some lag
    rel0 = (hypnogram.start - counts_start).total_seconds()
    span = hypnogram.n_epochs * hypnogram.epoch_seconds
    lo = max(0, int(math.floor((rel0 - searched) / epoch_seconds)) - 1)
    hi = min(y_all.size, int(math.ceil((rel0 + span + searched) / epoch_seconds)) + 1)
    if hi <= lo:
        raise AlignmentError(f"the hypnogram ({hypnogram.start.isoformat()} .. {hypnogram.end.isoformat()}, PSG "
                             f"clock) lies outside the counts even when shifted by up to {searched:g} s",
                             code="hypnogram_outside_recording")
    y = np.log1p(np.clip(y_all[lo:hi], 0.0, None))
    start = counts_start + pd.Timedelta(seconds=lo * epoch_seconds)
    share, scored_s = wake_shares(hypnogram, start=start, epoch_seconds=epoch_seconds, n_epochs=hi - lo,
                                  lags_s=lags)
    use = (scored_s >= epoch_seconds / 2) & np.isfinite(y)[None, :]
    if not use.any():
        raise AlignmentError("no count epoch lies under the scored part of the hypnogram at any searched lag",
                             code="hypnogram_outside_recording")
    fixed: NDArray[np.bool_] = np.all(use, axis=0)  # the same epochs at every lag, so that the correlations compare
    if fixed.sum() >= 3:
        use = use & fixed[None, :]
    r, n_used = _pearson_rows(share, y, use)
    reasons: list[str] = []
    if np.isnan(r).all():
        best = int(np.argmin(np.abs(lags)))
        reasons.append("no_correlation")
        runner_up = float("nan")
    else:
        order = np.argsort(np.abs(lags), kind="stable")  # nearest zero first among equal r
        best = int(order[np.nanargmax(r[order])])
        runner_up = _runner_up(r, lags, best, config.peak_separation_s)
        if r[best] < config.min_quality:
            reasons.append("low_correlation")
        if math.isfinite(runner_up) and r[best] - runner_up < config.min_peak_margin:
            reasons.append("ambiguous_peak")
    if n_used[best] * epoch_seconds / 60 < config.min_overlap_min:
        reasons.append("short_overlap")
    return ClockAlignment(clock_offset_s=float(lags[best]), quality=float(r[best]),
                          at_edge=bool(n_side > 0 and best in (0, lags.size - 1)), weak=bool(reasons),
                          searched_s=searched, runner_up=runner_up, n_epochs=int(n_used[best]), step_s=step,
                          reasons=tuple(reasons), lags_s=tuple(lags.tolist()), correlations=tuple(r.tolist()))
