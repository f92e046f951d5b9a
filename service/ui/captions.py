"""Text alternatives of the participant and study figures, with the key numbers each figure shows."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import pandas as pd

from .curves import RocCurve
from .figures import PARAMETER_LABELS, PARAMETER_UNITS, style_of
from .templating import number, parameter_label

__all__ = ["bland_altman_alt", "bland_altman_caption", "held_out_alt", "roc_alt"]


def _num(value: Any, digits: int) -> str:
    return "–" if value is None or pd.isna(value) else f"{float(value):.{digits}f}"


def held_out_alt(summary: pd.DataFrame, n_nights: int) -> str:
    """Held-out nights plot: what is drawn, and each method's mean balanced accuracy and specificity."""
    means = "; ".join(f"{style_of(str(r.method)).label} {_num(r.balanced_accuracy_mean, 3)} / "
                      f"{_num(r.specificity_mean, 3)}" for r in summary.itertuples())
    return (f"Dot plot of balanced accuracy (left) and specificity (right) on each of {n_nights} held-out nights, "
            f"one marker shape per method. Mean balanced accuracy / specificity over nights: {means}.")


def roc_alt(curves: Sequence[RocCurve]) -> str:
    """ROC plot: one curve per method with its AUC and the epochs behind it."""
    parts = "; ".join(f"{style_of(c.method).label} AUC {c.auc:.3f} ({c.n_nights} nights, {c.n_epochs} epochs)"
                      for c in curves)
    return ("ROC curves of sleep detection on held-out in-bed epochs (sensitivity against 1 - specificity), "
            f"with the chance diagonal: {parts}.")


def bland_altman_alt(method: str, stats: Mapping[str, Mapping[str, Any]]) -> str:
    """Bland-Altman panels of one method: bias and 95% limits of agreement per parameter."""
    parts = []
    for name, s in stats.items():
        unit = PARAMETER_UNITS.get(name, "")
        parts.append(f"{PARAMETER_LABELS.get(name, name)}: bias {_num(s.get('bias'), 1)} {unit}, limits "
                     f"{_num(s.get('loa_lower'), 1)} to {_num(s.get('loa_upper'), 1)} (n = {s.get('n', 0)})")
    return (f"Bland-Altman plots of {style_of(method).label} against PSG, difference (method minus PSG) against "
            f"the mean of both, per night, with bias and 95% limits of agreement drawn: " + "; ".join(parts) + ".")


def _ci(s: Mapping[str, Any], key: str) -> str:
    low, high = s.get(f"{key}_ci") or (None, None)
    return "" if low is None or high is None else f" (CI {number(low)} to {number(high)})"


def bland_altman_caption(method: str, stats: Mapping[str, Mapping[str, Any]]) -> str:
    """Printed under the Bland-Altman figure: per parameter bias [limits of agreement], each with its CI where
    known, n nights and k participants."""
    numbers = "; ".join(f"{parameter_label(name)}: bias {number(s.get('bias'))} "
                        f"[{number(s.get('loa_lower'))}, {number(s.get('loa_upper'))}], n = {s.get('n', 0)}"
                        + (f" nights of k = {s['k']}" if s.get("k") else "")
                        + (f"; CIs: bias{_ci(s, 'bias')}, lower limit{_ci(s, 'loa_lower')}, upper limit"
                           f"{_ci(s, 'loa_upper')}" if s.get("bias_ci") else "")
                        for name, s in stats.items())
    return (f"{style_of(method).label} − PSG. Bias [95% limits of agreement] over nights nested in participants "
            f"(Bland & Altman 2007), shaded bands their CIs: {numbers}.")
