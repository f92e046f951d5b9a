"""The model methods of a study, each participant's choice between them, and ``auto`` evaluated as deployed.

``auto`` is the method a participant is scored with: the candidate of :data:`MODEL_METHODS`
(``personal``, ``pooled``, ``pooled+offset``) with the best mean held-out figure. A figure of
"the chosen method" read off the same held-out nights the choice was made on is optimistic
(the choice picked whichever candidate happened to do best on them), so ``auto`` gets its own
held-out figures by nested evaluation (Cawley & Talbot 2010, JMLR 11:2079): for held-out night
``k`` the choice is made from the other nights' held-out figures only (the nights outside
``k``'s group: overlapping copies of a night are left out together), and auto's prediction
of night ``k`` is the chosen candidate's held-out prediction of night ``k``. Auto's figures
on night ``k`` are therefore that candidate's figures on night ``k``
(:func:`nested_choice` works on the night-metric table alone).

The choice shown for deployment (:attr:`MethodChoice.method`) uses all held-out nights; the
figure shown next to it is auto's nested figure (:attr:`MethodChoice.auto_value`), not the
winner's mean.

Rules of the choice: a candidate takes part when it has a finite held-out figure (and, in
the nested loop, a row for the night being predicted); the highest mean wins; ties go to the
simpler candidate, in the order pooled, pooled+offset, personal. Without any figure the choice
is ``pooled``: the pooled model with offset 0, which is also what ``pooled+offset`` is
without labelled nights.

Limitation: a candidate's held-out figure on another night ``j`` comes from a model (or an
offset) fitted on nights that include ``k``; fully nesting that as well would retrain every
personal model once per pair of nights. The choice for night ``k`` never uses night ``k``'s own
figures.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["AUTO", "MODEL_METHODS", "MethodChoice", "choose_method", "nested_choice"]

#: Model methods, in table order: the participant's own model, the pooled model of the fold that
#: left the participant out, and the same shifted by the participant's offset.
MODEL_METHODS: tuple[str, ...] = ("personal", "pooled", "pooled+offset")
#: The deployed choice among :data:`MODEL_METHODS`, with its own (nested) held-out figures.
AUTO = "auto"
#: Candidates from simplest to most fitted: ties go to the earlier one.
_SIMPLEST_FIRST: tuple[str, ...] = ("pooled", "pooled+offset", "personal")


@dataclass(frozen=True, eq=False)
class MethodChoice:
    """Result of :func:`nested_choice`.

    Attributes
    ----------
    method : {"personal", "pooled", "pooled+offset"}
        The choice from all held-out nights (what ``auto`` deploys).
    reason : str
        The candidates' means and auto's nested figure.
    policy : str
        Metric compared (higher is better).
    auto_value : float
        Mean of ``policy`` over auto's nested held-out nights (NaN without any).
    means : dict of str to float
        Each candidate's mean ``policy`` over all its held-out nights.
    per_night : pandas.DataFrame
        One row per held-out night, in the input's order of first appearance: the chosen
        candidate's row of that night (all its columns), ``method`` = ``"auto"`` and
        ``chosen`` = the candidate chosen from the other nights.
    """

    method: str
    reason: str
    policy: str
    auto_value: float
    means: dict[str, float]
    per_night: pd.DataFrame = field(repr=False)


def _pick(means: Mapping[str, float]) -> str | None:
    """The best finite mean; ties go to the simpler candidate; None without any."""
    finite = {m: v for m, v in means.items() if m in _SIMPLEST_FIRST and np.isfinite(v)}
    if not finite:
        return None
    best = max(finite.values())
    return next(m for m in _SIMPLEST_FIRST if finite.get(m) == best)


def _means(rows: pd.DataFrame, policy: str) -> dict[str, float]:
    if not len(rows):
        return {}
    values = rows.groupby("method")[policy].mean()
    return {str(m): float(v) for m, v in values.items()}


def _means_without_each_group(rows: pd.DataFrame, key: str, groups: Mapping[Any, int],
                              policy: str) -> dict[int, dict[str, float]]:
    """Per fold group: each method's mean ``policy`` over the rows of the *other* groups.

    One pandas groupby over the rows copied once per group left out (each copy keeps the rows'
    order), so every mean is the one :func:`_means` gives on that group's other nights.
    """
    if not len(rows):
        return {}
    tags = rows[key].map(groups).to_numpy()
    left_out = list(dict.fromkeys(groups.values()))
    taken = [np.flatnonzero(tags != g) for g in left_out]
    at = np.concatenate(taken)
    copies = pd.DataFrame({"_left_out": np.repeat(left_out, [t.size for t in taken]),
                           "method": rows["method"].to_numpy()[at], policy: rows[policy].to_numpy()[at]})
    found = copies.groupby(["_left_out", "method"])[policy].mean()
    out: dict[int, dict[str, float]] = {}
    for (g, m), v in zip(found.index.tolist(), found.tolist(), strict=True):
        out.setdefault(int(g), {})[str(m)] = float(v)
    return out


def nested_choice(night_metrics: pd.DataFrame, *, policy: str = "balanced_accuracy",
                  night_groups: Mapping[str, int] | None = None) -> MethodChoice:
    """Choose a participant's method, and evaluate that choice on nights it was not made on.

    Parameters
    ----------
    night_metrics : pandas.DataFrame
        One participant's held-out nights: ``method`` (rows of other methods are ignored),
        ``night_hash`` (or ``night_id``) naming the night, and a column named ``policy``.
    policy : str, default="balanced_accuracy"
        Metric compared (higher is better), one of ``CHOICE_POLICIES``.
    night_groups : mapping of str to int, default=None
        Night (``night_hash``, or ``night_id`` without that column) -> fold group
        (:func:`~models.learning.splits.fold_groups`); the nights of a group are left out
        together. None = every night its own group.

    Returns
    -------
    MethodChoice

    Examples
    --------
    Pooled wins over all three nights (0.8 against 0.767), but chosen without night ``c``
    personal wins (0.9 against 0.8), so auto's figure on ``c`` is personal's 0.5 and auto's
    mean (0.7) is below the winner's 0.8:

    >>> t = pd.DataFrame({"night_hash": list("abcabc"), "method": ["personal"] * 3 + ["pooled"] * 3,
    ...                   "balanced_accuracy": [0.9, 0.9, 0.5, 0.8, 0.8, 0.8]})
    >>> c = nested_choice(t)
    >>> c.method, c.per_night["chosen"].tolist(), round(c.auto_value, 4)
    ('pooled', ['pooled', 'pooled', 'personal'], 0.7)
    """
    key = "night_hash" if "night_hash" in night_metrics else "night_id"
    rows = night_metrics[night_metrics["method"].isin(MODEL_METHODS)] if len(night_metrics) else night_metrics
    if len(rows):
        rows = rows[np.isfinite(rows[policy].astype(np.float64))]
    means = _means(rows, policy)
    method = _pick(means) or "pooled"
    nights = list(dict.fromkeys(rows[key])) if len(rows) else []
    groups = {n: (night_groups or {}).get(n, -1 - i) for i, n in enumerate(nights)}
    left_out = _means_without_each_group(rows, key, groups, policy)
    keys, methods = rows[key].tolist() if len(rows) else [], rows["method"].tolist() if len(rows) else []
    first: dict[tuple[Any, str], int] = {}  # (night, method) -> position of its first row
    for position, pair in enumerate(zip(keys, methods, strict=True)):
        first.setdefault(pair, position)
    picked = []
    for night in nights:
        present = [m for (n, m) in first if n == night]
        found = left_out.get(groups[night], {})
        chosen = _pick({m: v for m, v in found.items() if m in present}) or "pooled"
        if chosen not in present:  # no figure elsewhere: the simplest candidate predicting the night
            chosen = next(m for m in _SIMPLEST_FIRST if m in present)
        picked.append(rows.iloc[first[(night, chosen)]].to_dict() | {"method": AUTO, "chosen": chosen})
    per_night = pd.DataFrame(picked, columns=[*night_metrics.columns, "chosen"])
    auto_value = float(per_night[policy].astype(np.float64).mean()) if len(per_night) else float("nan")
    return MethodChoice(method=method, reason=_reason(method, means, policy, auto_value, len(per_night)),
                        policy=policy, auto_value=auto_value, means=means, per_night=per_night)


def _reason(method: str, means: Mapping[str, float], policy: str, auto_value: float, n_nights: int) -> str:
    if not means:
        return "no held-out figures (no labelled night): the pooled model with offset 0"
    listed = ", ".join(f"{m} {means[m]:.3f}" for m in MODEL_METHODS if m in means)
    tie = " (ties go to the simpler model)" if sum(v == means[method] for v in means.values()) > 1 else ""
    return (f"{method}: highest mean held-out {policy} ({listed}){tie}; auto chosen without each night: "
            f"{policy} {auto_value:.3f} over {n_nights} night(s)")


def choose_method(night_metrics: pd.DataFrame, *, policy: str = "balanced_accuracy",
                  night_groups: Mapping[str, int] | None = None) -> tuple[str, str]:
    """Choose between a participant's personal, pooled and pooled+offset models from held-out figures.

    Parameters
    ----------
    night_metrics : pandas.DataFrame
        The participant's held-out nights: a ``method`` column (``personal``, ``pooled``,
        ``pooled+offset``), ``night_hash`` or ``night_id``, and a column named ``policy``.
    policy : str, default="balanced_accuracy"
        Metric compared (higher is better), one of ``CHOICE_POLICIES``.
    night_groups : mapping of str to int, default=None
        As :func:`nested_choice`.

    Returns
    -------
    method : {"personal", "pooled", "pooled+offset"}
        ``"pooled"`` is the pooled model without offset (offset 0).
    reason : str
        The candidates' means and auto's nested held-out figure (:func:`nested_choice`).
    """
    choice = nested_choice(night_metrics, policy=policy, night_groups=night_groups)
    return choice.method, choice.reason
