"""The model methods of a study and each participant's choice between them."""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["MODEL_METHODS", "choose_method"]

#: Model methods, in table order: the participant's own model, the pooled model of the fold that
#: left the participant out, and the same shifted by the participant's offset.
MODEL_METHODS: tuple[str, ...] = ("personal", "pooled", "pooled+offset")


def choose_method(night_metrics: pd.DataFrame, *, policy: str = "balanced_accuracy") -> tuple[str, str]:
    """Choose between a participant's personal and pooled model from held-out figures.

    Parameters
    ----------
    night_metrics : pandas.DataFrame
        The participant's held-out nights: a ``method`` column (``personal``, ``pooled``,
        ``pooled+offset``) and a column named ``policy``.
    policy : str, default="balanced_accuracy"
        Metric compared (higher is better), one of ``CHOICE_POLICIES``.

    Returns
    -------
    method : {"personal", "pooled"}
        ``"pooled"`` means the pooled model with the participant's offset (zero without labels).
    reason : str
        The figures behind the choice.

    Notes
    -----
    The pooled side is scored as deployed: ``pooled+offset`` when the participant has held-out
    offset figures, else ``pooled``. Personal wins only when its mean is strictly higher; ties go
    to pooled, the simpler model.
    """
    means = night_metrics.groupby("method")[policy].mean() if len(night_metrics) else pd.Series(dtype=float)
    pooled_method = "pooled+offset" if np.isfinite(means.get("pooled+offset", np.nan)) else "pooled"
    pooled, personal = means.get(pooled_method, np.nan), means.get("personal", np.nan)
    if not np.isfinite(personal):
        return "pooled", "no personal held-out figures (too few labelled nights)"
    if not np.isfinite(pooled) or personal > pooled:
        return "personal", f"personal {policy} {personal:.3f} > {pooled_method} {pooled:.3f}"
    return "pooled", f"{pooled_method} {policy} {pooled:.3f} >= personal {personal:.3f} (ties go to pooled)"
