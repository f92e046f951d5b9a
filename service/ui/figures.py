"""Figures of the web pages, drawn with matplotlib on the server (Agg; SVG and PNG): style, encoding,
and the participant and study figures (the night figure is in :mod:`service.ui.night_figure`).

Every figure is built for print: axes carry units, text is at manuscript sizes (8-10 pt at the
stated width in inches), and colours come from the Okabe-Ito palette (Okabe & Ito 2008, "Color
Universal Design"), which stays distinguishable under the common colour-vision deficiencies;
methods also differ by marker shape, so a grey-scale print still tells them apart.

Drawing functions take plain arrays and tables (no database, no HTTP) and draw into a given
:class:`matplotlib.figure.Figure`; :func:`render` creates the figure, applies the style and
returns the encoded bytes. Output is reproducible: the SVG id salt is fixed and the file
metadata carry no date.
"""

from __future__ import annotations

import io
import re
import threading
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, cast

import matplotlib as mpl
import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator
from numpy.typing import NDArray
from scipy import stats as scipy_stats

__all__ = [
    "FIGURE_FORMATS",
    "GREY",
    "OKABE_ITO",
    "METHOD_STYLE",
    "MethodStyle",
    "PARAMETER_LABELS",
    "PARAMETER_UNITS",
    "draw_bland_altman",
    "draw_held_out_nights",
    "draw_roc",
    "inline_svg",
    "render",
    "style_of",
]

FIGURE_FORMATS: dict[str, str] = {"svg": "image/svg+xml", "png": "image/png"}

#: Okabe-Ito colours (hex), by name.
OKABE_ITO: dict[str, str] = {
    "black": "#000000", "orange": "#E69F00", "sky_blue": "#56B4E9", "bluish_green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "reddish_purple": "#CC79A7",
}
GREY = "#7F7F7F"


@dataclass(frozen=True)
class MethodStyle:
    """How one method is drawn: colour, marker and a short legend label."""

    colour: str
    marker: str
    label: str
    dash: Any = "-"


#: One style per method name (rules and models); the reference is drawn in black.
METHOD_STYLE: dict[str, MethodStyle] = {
    "reference": MethodStyle(OKABE_ITO["black"], "x", "PSG reference"),
    "personal": MethodStyle(OKABE_ITO["blue"], "o", "personal", "-"),
    "pooled": MethodStyle(OKABE_ITO["orange"], "s", "pooled", (0, (5, 2))),
    "pooled+offset": MethodStyle(OKABE_ITO["bluish_green"], "D", "pooled + offset", "-."),
    "auto": MethodStyle(OKABE_ITO["black"], "*", "auto (as deployed)", (0, (4, 1, 1, 1))),
    "cole-kripke": MethodStyle(OKABE_ITO["vermillion"], "^", "Cole-Kripke", (0, (1, 1))),
    "sadeh": MethodStyle(OKABE_ITO["reddish_purple"], "v", "Sadeh", (0, (3, 1, 1, 1, 1, 1))),
    "count-threshold": MethodStyle(OKABE_ITO["sky_blue"], "P", "count threshold", (0, (6, 1, 1, 1))),
    "always-sleep": MethodStyle(GREY, ".", "always sleep", (0, (1, 3))),
}

#: Manuscript text sizes in points; SVG text stays text (editable, searchable).
_STYLE: dict[str, Any] = {
    "font.family": "DejaVu Sans",
    "font.size": 8.5,
    "axes.titlesize": 9.5,
    "axes.labelsize": 9,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
    "legend.fontsize": 8,
    "figure.titlesize": 10,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.linewidth": 0.8,
    "lines.linewidth": 1.1,
    "svg.fonttype": "none",
    "text.parse_math": False,  # labels are the lab's text: a "$" is a dollar sign, not mathematics
    "svg.hashsalt": "nightbank",
    "figure.dpi": 100,
}
_PNG_DPI = 300
_LOCK = threading.Lock()  # rcParams are process-wide: one figure is styled and saved at a time


def style_of(method: str) -> MethodStyle:
    """The drawing style of ``method`` (``+webster`` variants share their rule's colour)."""
    base, _, suffix = method.partition("+")
    found = METHOD_STYLE.get(method) or METHOD_STYLE.get(base)
    if found is None:
        return MethodStyle(GREY, ".", method)
    if method in METHOD_STYLE:
        return found
    return MethodStyle(found.colour, found.marker, f"{found.label} + {suffix}", found.dash)


def render(draw: Callable[..., None], /, *args: Any, fmt: str, size_in: tuple[float, float],
           salt: str | None = None, **kwargs: Any) -> bytes:
    """Create a figure of ``size_in`` (width, height in inches), call ``draw(fig, *args, **kwargs)``, encode it.

    Parameters
    ----------
    draw : callable
        One of the ``draw_*`` functions of this module.
    fmt : {"svg", "png"}
        Output format; PNG at 300 dots per inch.
    size_in : tuple of float
        Figure width and height in inches (7.0 is a full manuscript page width).
    salt : str, optional
        SVG id salt (default ``nightbank``): figures inlined in one document need their own, so
        their element ids do not collide.

    The saved area is the drawn area (``bbox_inches="tight"``), so legends and labels placed
    outside the axes are never cut off.

    Returns
    -------
    bytes
        The encoded figure.
    """
    buffer = io.BytesIO()
    style = _STYLE if salt is None else _STYLE | {"svg.hashsalt": salt}
    with _LOCK, mpl.rc_context(cast(Any, style)):
        fig = Figure(figsize=size_in, layout="constrained")
        draw(fig, *args, **kwargs)
        metadata: dict[str, Any] = {"Date": None} if fmt == "svg" else {"Software": None}
        fig.savefig(buffer, format=fmt, dpi=_PNG_DPI if fmt == "png" else 72, metadata=metadata,
                    bbox_inches="tight", pad_inches=0.05)
    return buffer.getvalue()


_XML_HEAD = re.compile(r"^<\?xml[^>]*>\s*(<!DOCTYPE[^>]*>\s*)?", re.S)
_ID = re.compile(r'\b(id)="([^"]+)"')
_REF = re.compile(r'(url\(|href=")#([^)"]+)')


def inline_svg(draw: Callable[..., None], /, *args: Any, size_in: tuple[float, float], salt: str,
               **kwargs: Any) -> str:
    """A figure of :func:`render` as an inline ``<svg>`` element whose element ids all start with ``salt``
    (so several figures in one page never share an id)."""
    text = _XML_HEAD.sub("", render(draw, *args, fmt="svg", size_in=size_in, salt=salt, **kwargs).decode())
    # matplotlib numbers its element ids per figure (figure_1, axes_1, ...): give each figure its own prefix
    text = _ID.sub(lambda m: f'{m.group(1)}="{salt}-{m.group(2)}"', text)
    return _REF.sub(lambda m: f"{m.group(1)}#{salt}-{m.group(2)}", text)


# ---- participant --------------------------------------------------------------------------------
def draw_held_out_nights(fig: Figure, table: pd.DataFrame, *, metrics: Sequence[str] = ("balanced_accuracy",
                                                                                        "specificity")) -> None:
    """Per held-out night, each method's metric values as markers (one panel per metric), and at the right the
    mean over nights with its 95% t-interval (common practice; one interval per method).

    Parameters
    ----------
    table : pandas.DataFrame
        One row per night and method: ``night``, ``method`` and the ``metrics`` columns (0-1).
    metrics : sequence of str
        Columns drawn, one panel each.
    """
    nights = list(dict.fromkeys(table["night"]))
    methods = list(dict.fromkeys(table["method"]))
    axes = np.atleast_1d(fig.subplots(1, len(metrics), sharey=True))
    width = 0.7
    panel_in = fig.get_figwidth() / len(metrics)
    max_labels = max(2, int(panel_in / 0.22))  # a 45-degree 8-pt label needs about 0.22 in along the axis
    for ax, metric in zip(axes, metrics, strict=True):
        for k, method in enumerate(methods):
            style = style_of(method)
            own = table[table["method"] == method].set_index("night")[metric].reindex(nights).astype(float)
            x = np.arange(len(nights)) + (k - (len(methods) - 1) / 2) * width / max(len(methods), 1)
            ax.plot(x, own.to_numpy(), linestyle="none", marker=style.marker, color=style.colour, markersize=4.5,
                    label=style.label)
            values = own.to_numpy()[np.isfinite(own.to_numpy())]
            if values.size >= 2:
                half = float(scipy_stats.t.ppf(0.975, values.size - 1) * values.std(ddof=1) / np.sqrt(values.size))
                ax.errorbar(len(nights) + 0.4 + (k - (len(methods) - 1) / 2) * width / max(len(methods), 1),
                            values.mean(), yerr=half, marker=style.marker, color=style.colour, markersize=4.5,
                            capsize=2, linewidth=1.0)
        # small panels: label every step-th night only, so the rotated names never run into each other
        step = max(1, -(-len(nights) // max_labels))
        shown = [str(n) if i % step == 0 else "" for i, n in enumerate(nights)]
        ax.set_xticks(np.arange(len(nights) + 1) + np.r_[np.zeros(len(nights)), 0.4],
                      [*shown, "mean, 95% CI"], rotation=45, ha="right", rotation_mode="anchor")
        ax.axvline(len(nights) - 0.3, color=GREY, linewidth=0.5)
        ax.set_title(metric.replace("_", " "))
        ax.set_xlabel("held-out night")
        ax.set_ylim(0, 1.02)
        ax.grid(axis="y", linewidth=0.4, alpha=0.5)
    axes[0].set_ylabel("value (0-1, higher is better)")
    handles, labels = axes[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncols=min(len(handles), 4), frameon=False)


def draw_roc(fig: Figure, curves: Mapping[str, tuple[NDArray[np.float64], NDArray[np.float64], float]]) -> None:
    """Held-out ROC curves of sleep detection, one per method, with the AUC in the legend.

    Parameters
    ----------
    curves : mapping of str to (fpr, tpr, auc)
        Per method: false-positive rate (wake epochs called sleep, 1 - specificity), true-positive
        rate (sleep epochs called sleep, sensitivity), both of shape (n_points,), and the AUC.
    """
    ax = fig.subplots()
    ax.plot([0, 1], [0, 1], color=GREY, linestyle=":", linewidth=0.8, label="chance")
    for method, (fpr, tpr, auc) in curves.items():
        style = style_of(method)
        ax.plot(fpr, tpr, color=style.colour, linestyle=style.dash, label=f"{style.label} (AUC {auc:.3f})")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1.01)
    ax.set_aspect("equal")
    ax.set_xlabel("1 - specificity (wake epochs called sleep)")
    ax.set_ylabel("sensitivity (sleep epochs called sleep)")
    ax.legend(loc="lower right", frameon=False)


#: Units of the Bland-Altman parameters, for axis labels.
PARAMETER_UNITS: dict[str, str] = {
    "time_in_bed_min": "min", "sol_min": "min", "tst_min": "min", "waso_min": "min", "awakenings": "count",
    "sleep_efficiency_pct": "%",
    "lps_min": "min", "spt_min": "min", "mean_awakening_min": "min", "longest_awakening_min": "min",
}
PARAMETER_LABELS: dict[str, str] = {
    "sol_min": "SOL", "tst_min": "TST", "waso_min": "WASO", "awakenings": "awakenings",
    "sleep_efficiency_pct": "sleep efficiency", "lps_min": "LPS", "spt_min": "SPT",
    "mean_awakening_min": "mean awakening", "longest_awakening_min": "longest awakening",
    "time_in_bed_min": "time in bed", "unscored_epochs": "unscored epochs",
}


def _one_decimal(value: float) -> str:
    text = f"{value:.1f}"
    return "0.0" if text == "-0.0" else text


def draw_bland_altman(fig: Figure, method: str, pairs: Mapping[str, tuple[NDArray[np.float64], NDArray[np.float64]]],
                      stats: Mapping[str, Mapping[str, Any]]) -> None:
    """Bland-Altman plots of one method against the reference, one panel per parameter.

    Parameters
    ----------
    method : str
    pairs : mapping of str to (method_values, reference_values)
        Per parameter, the night values of shape (n_nights,) (NaN pairs are skipped).
    stats : mapping of str to mapping
        Per parameter: ``bias``, ``loa_lower``, ``loa_upper`` and ``n`` (None where undefined),
        drawn as lines and printed; their CIs ``bias_ci``, ``loa_lower_ci``, ``loa_upper_ci``
        (low, high), where given, are drawn as shaded bands.
    """
    names = list(pairs)
    cols = 3
    rows = -(-len(names) // cols)
    axes = np.atleast_1d(fig.subplots(rows, cols)).ravel()
    style = style_of(method)
    for ax, name in zip(axes, names, strict=False):
        own, ref = (np.asarray(v, dtype=np.float64) for v in pairs[name])
        both = np.isfinite(own) & np.isfinite(ref)
        mean, diff = (own[both] + ref[both]) / 2.0, own[both] - ref[both]
        ax.plot(mean, diff, linestyle="none", marker=style.marker, color=style.colour, markersize=4, alpha=0.85)
        s = stats.get(name, {})
        unit = PARAMETER_UNITS.get(name, "")
        lines = (("bias", s.get("bias"), "-"), ("+1.96 SD", s.get("loa_upper"), "--"),
                 ("-1.96 SD", s.get("loa_lower"), "--"))
        for label, value, dash in lines:
            if value is None or not np.isfinite(value):
                continue
            ax.axhline(value, color=OKABE_ITO["black"], linestyle=dash, linewidth=0.9)
            ax.text(1.0, value, f" {label} {_one_decimal(value)}", transform=ax.get_yaxis_transform(),
                    va="center", ha="left", fontsize=7.5, clip_on=False)
        for key in ("bias_ci", "loa_lower_ci", "loa_upper_ci"):
            ci: Any = s.get(key) or (None, None)
            low, high = ci
            if low is not None and high is not None and np.isfinite(low) and np.isfinite(high):
                ax.axhspan(low, high, color=GREY, alpha=0.2, linewidth=0)
        ax.axhline(0.0, color=GREY, linewidth=0.6, linestyle=":")
        ax.set_title(f"{PARAMETER_LABELS.get(name, name)} (n = {s.get('n', int(both.sum()))})")
        ax.set_xlabel(f"mean of method and PSG\n({unit})")
        ax.set_ylabel(f"method − PSG ({unit})")
        ax.xaxis.set_major_locator(MaxNLocator(nbins=4))  # small panels: few ticks, so labels never collide
    for ax in axes[len(names):]:
        ax.set_axis_off()
    axes[-1].text(0.05, 0.5, "one marker per night\nsolid line: bias (mean difference)\n"
                  "dashed lines: 95% limits of agreement\n(bias ± 1.96 SD of the differences,\n"
                  "SD over participants and nights)\nshaded bands: their CIs\ndotted line: no difference",
                  transform=axes[-1].transAxes, va="center", fontsize=8)
    fig.suptitle(f"{style.label} against PSG: Bland-Altman plots")
