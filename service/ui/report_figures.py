"""Figures of the validation report: Bland-Altman plots with participants told apart, epoch figures per
participant with the group mean and its CI, and the paired comparisons as an interval plot.

Participants are told apart by colour *and* marker: colours from the Okabe-Ito palette (Okabe &
Ito 2008; yellow left out, too pale on white) cycled with a set of marker shapes, so every pair is
distinct for the first 77 participants and a grey-scale print still separates them by shape.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from .figures import GREY, OKABE_ITO, PARAMETER_LABELS, PARAMETER_UNITS, style_of

__all__ = ["PARTICIPANT_COLOURS", "PARTICIPANT_MARKERS", "draw_paired_differences", "draw_participant_epochs",
           "draw_repeated_bland_altman", "participant_style"]

PARTICIPANT_COLOURS: tuple[str, ...] = tuple(OKABE_ITO[k] for k in (
    "blue", "vermillion", "bluish_green", "reddish_purple", "orange", "sky_blue", "black"))
PARTICIPANT_MARKERS: tuple[str, ...] = ("o", "s", "^", "D", "v", "P", "X", "<", ">", "h", "*")


def participant_style(index: int) -> tuple[str, str]:
    """Colour and marker of the ``index``-th participant (distinct pairs for the first 77)."""
    colours, markers = len(PARTICIPANT_COLOURS), len(PARTICIPANT_MARKERS)
    return PARTICIPANT_COLOURS[index % colours], PARTICIPANT_MARKERS[(index + index // colours) % markers]


def _finite(value: Any) -> bool:
    return value is not None and bool(np.isfinite(value))


def draw_repeated_bland_altman(fig: Figure, method: str, pairs: Mapping[str, pd.DataFrame],
                               stats: Mapping[str, Mapping[str, Any]], participants: Sequence[str]) -> None:
    """Bland-Altman plots of one method against PSG, one panel per parameter, participants told apart.

    Parameters
    ----------
    pairs : mapping of str to DataFrame
        Per parameter: one row per night with ``participant_id``, ``method`` and ``reference``
        values (the parameter's unit).
    stats : mapping of str to mapping
        Per parameter, the repeated-measures Bland-Altman entry (``bias``, ``loa_lower``,
        ``loa_upper`` and their ``*_ci``, ``n_participants``, ``n_nights``).
    participants : sequence of str
        Every participant, in legend order (gives each its colour and marker).
    """
    names = list(pairs)
    cols = min(3, max(1, len(names)))
    rows = -(-len(names) // cols)
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False)).ravel()
    order = {p: i for i, p in enumerate(participants)}
    for ax, name in zip(axes, names, strict=False):
        frame = pairs[name].dropna(subset=["method", "reference"])
        for pid, mine in frame.groupby("participant_id", sort=False):
            colour, marker = participant_style(order.get(str(pid), 0))
            mean = (mine["method"] + mine["reference"]) / 2.0
            ax.plot(mean, mine["method"] - mine["reference"], linestyle="none", marker=marker, color=colour,
                    markersize=4.5, alpha=0.9, label=str(pid))
        s = stats.get(name, {})
        for key, dash in (("bias", "-"), ("loa_lower", "--"), ("loa_upper", "--")):
            value, ci = s.get(key), s.get(f"{key}_ci")
            if not _finite(value):
                continue
            ax.axhline(value, color=OKABE_ITO["black"], linestyle=dash, linewidth=0.9)
            if ci and _finite(ci[0]) and _finite(ci[1]):
                ax.axhspan(ci[0], ci[1], color=GREY, alpha=0.18, linewidth=0)
        ax.axhline(0.0, color=GREY, linewidth=0.6, linestyle=":")
        unit = PARAMETER_UNITS.get(name, "")
        ax.set_title(f"{PARAMETER_LABELS.get(name, name)} (k = {s.get('n_participants', 0)}, "
                     f"n = {s.get('n_nights', 0)})")
        ax.set_xlabel(f"mean of method and PSG ({unit})")
        ax.set_ylabel(f"method − PSG ({unit})")
        ax.locator_params(axis="x", nbins=4)
    for ax in axes[len(names):]:
        ax.set_axis_off()
    handles, labels = axes[0].get_legend_handles_labels()
    if handles:
        fig.legend(handles, labels, loc="outside right upper", title="participant", frameon=False,
                   ncols=1 if len(handles) <= 16 else 2)
    fig.suptitle(f"{style_of(method).label} against PSG: solid line bias, dashed lines 95% limits of agreement "
                 "(repeated measures); shaded bands their CIs")


def draw_participant_epochs(fig: Figure, participants: pd.DataFrame, group: pd.DataFrame, *,
                            methods: Sequence[str], metric: str, participant_ids: Sequence[str]) -> None:
    """One row per method: each participant's figure (their nights pooled) and the group mean with its CI.

    Parameters
    ----------
    participants : DataFrame
        ``method``, ``participant_id`` and ``metric`` (0-1).
    group : DataFrame
        ``method``, ``metric``, ``mean``, ``ci_low``, ``ci_high``, ``n_participants``.
    """
    ax = fig.subplots()
    order = {p: i for i, p in enumerate(participant_ids)}
    seen: set[str] = set()
    for row, method in enumerate(methods):
        mine = participants[participants["method"] == method]
        for _, r in mine.iterrows():
            pid = str(r["participant_id"])
            colour, marker = participant_style(order.get(pid, 0))
            ax.plot(r[metric], row, linestyle="none", marker=marker, color=colour, markersize=5, alpha=0.85,
                    label=None if pid in seen else pid)
            seen.add(pid)
        g = group[(group["method"] == method) & (group["metric"] == metric)]
        if len(g) and _finite(g.iloc[0]["mean"]):
            low, high = g.iloc[0]["ci_low"], g.iloc[0]["ci_high"]
            if _finite(low) and _finite(high):
                ax.plot([low, high], [row - 0.3, row - 0.3], color=OKABE_ITO["black"], linewidth=1.6)
            ax.plot(g.iloc[0]["mean"], row - 0.3, marker="|", color=OKABE_ITO["black"], markersize=10)
    ax.set_yticks(range(len(methods)), [style_of(m).label for m in methods])
    ax.invert_yaxis()
    ax.set_xlim(0, 1.02)
    ax.set_xlabel(f"{metric.replace('_', ' ')} (0-1; one marker per participant, black: group mean and CI)")
    ax.grid(axis="x", linewidth=0.4, alpha=0.5)
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        fig.legend(handles, labels, loc="outside right upper", title="participant", frameon=False)


def draw_paired_differences(fig: Figure, rows: Sequence[Mapping[str, Any]]) -> None:
    """Mean per-participant differences (a − b) with their bootstrap CIs, one line each."""
    ax = fig.subplots()
    labels = []
    for k, r in enumerate(rows):
        low, high = r.get("ci") or (None, None)
        if low is not None and high is not None and _finite(low) and _finite(high):
            ax.plot([float(low), float(high)], [k, k], color=OKABE_ITO["blue"], linewidth=1.6)
        if _finite(r.get("mean_difference")):
            ax.plot(r["mean_difference"], k, marker="o", color=OKABE_ITO["blue"], markersize=5)
        labels.append(f"{style_of(r['label_a']).label} − {style_of(r['label_b']).label}\n"
                      f"{r['metric'].replace('_', ' ')} (k = {r.get('n_participants', 0)})")
    ax.axvline(0.0, color=GREY, linestyle=":", linewidth=0.8)
    ax.set_yticks(range(len(rows)), labels)
    ax.invert_yaxis()
    ax.set_xlabel("mean difference over participants (a − b) with its CI")
    ax.grid(axis="x", linewidth=0.4, alpha=0.5)
