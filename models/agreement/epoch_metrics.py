"""Epoch-by-epoch agreement between a reference and a predicted sleep/wake sequence.

Sleep is the positive class (1 = sleep, 0 = wake). Epochs that are NaN in the reference
(unscored, excluded) or in the prediction (unscored by the method, e.g. missing counts) are
dropped before anything is computed: ``n_epochs`` counts the compared epochs,
``excluded_epochs`` the dropped ones and ``unscored_epochs`` those the prediction left unscored.
The metrics are scikit-learn's (``sklearn.metrics``), computed here from the 2 x 2 confusion
with its formulas and order of operations (the tests compare both); where a metric is undefined
for the data at hand it is NaN, never a warning:

=====================  =====================================  ==========================================
name                   definition                             NaN when
=====================  =====================================  ==========================================
sensitivity            TP / (TP + FN), sleep recall           no reference sleep
specificity            TN / (TN + FP), wake recall            no reference wake
ppv / npv              TP / (TP + FP), TN / (TN + FN)         nothing predicted sleep / wake
accuracy               (TP + TN) / N                          no epochs
balanced_accuracy      (sensitivity + specificity) / 2        reference holds a single class
f1_sleep / f1_wake     2TP / (2TP + FP + FN), same for wake   class absent from reference and prediction
kappa                  Cohen's kappa                          both sequences hold the same single class
pabak                  2 x accuracy - 1                       no epochs
mcc                    Matthews correlation coefficient       either sequence holds a single class
auc                    ROC AUC of the continuous score        no score, a non-finite score, or one class
=====================  =====================================  ==========================================

(scikit-learn returns 0 for an undefined MCC; here it is NaN.) Every name is "higher is better".
Summaries (:func:`agreement_table`) are reported per night, per participant (mean and SD across
nights) and pooled over all epochs, each row labelled by ``level``: pooled figures hide the
spread between people.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from ..scoring.rescoring import InvalidSleepVectorError, as_sleep_vector

__all__ = ["ALWAYS_SLEEP", "EPOCH_COUNT_NAMES", "EPOCH_METRIC_NAMES", "ScoredNight", "agreement_table", "always_sleep",
           "epoch_agreement", "roc_auc"]

#: Method label of the "always sleep" baseline.
ALWAYS_SLEEP = "always-sleep"
#: Stable order of the metric columns.
EPOCH_METRIC_NAMES: tuple[str, ...] = (
    "sensitivity", "specificity", "ppv", "npv", "accuracy", "balanced_accuracy",
    "f1_sleep", "f1_wake", "kappa", "pabak", "mcc", "auc",
)
#: Epoch counts reported beside the metrics, in column order.
EPOCH_COUNT_NAMES: tuple[str, ...] = ("n_epochs", "excluded_epochs", "unscored_epochs")
_LABELS = [0, 1]


def always_sleep(reference: ArrayLike) -> NDArray[np.int8]:
    """The "always sleep" baseline: 1 for every epoch of ``reference``.

    Parameters
    ----------
    reference : array-like of shape (n_epochs,)

    Returns
    -------
    predicted : ndarray of int8, shape (n_epochs,)
    """
    return np.ones(np.shape(reference)[0], dtype=np.int8)


def epoch_agreement(reference: ArrayLike, predicted: ArrayLike, *,
                    score: ArrayLike | None = None) -> dict[str, float]:
    """Epoch-by-epoch agreement of one night (or of pooled epochs).

    Parameters
    ----------
    reference : array-like of shape (n_epochs,)
        Reference labels: 1 = sleep, 0 = wake, NaN = excluded.
    predicted : array-like of shape (n_epochs,)
        Predicted labels, 1 = sleep, 0 = wake, NaN = unscored (excluded).
    score : array-like of shape (n_epochs,), default=None
        Continuous score, higher = more likely sleep, for ROC AUC (read on the compared epochs
        only).

    Returns
    -------
    metrics : dict of str to float
        ``n_epochs`` (compared: scored on both sides), ``excluded_epochs`` (the others),
        ``unscored_epochs`` (NaN in the prediction) and every name in :data:`EPOCH_METRIC_NAMES`.

    Raises
    ------
    InvalidSleepVectorError
        If the inputs differ in length or hold values other than 0, 1 and NaN.

    Examples
    --------
    >>> m = epoch_agreement([1, 1, 0, 0], [1, 1, 1, 0])
    >>> m["sensitivity"], m["specificity"], m["pabak"]
    (1.0, 0.5, 0.5)
    """
    ref = as_sleep_vector(reference, allow_unscored=True, name="reference")
    pred = as_sleep_vector(predicted, allow_unscored=True, name="predicted")
    scores = None if score is None else np.asarray(score, dtype=np.float64)
    if pred.shape != ref.shape or (scores is not None and scores.shape != ref.shape):
        raise InvalidSleepVectorError(
            f"reference ({ref.size}), predicted ({pred.size}) and score must have the same length")
    unscored = np.isnan(pred)
    keep = ~np.isnan(ref) & ~unscored
    y, p = ref[keep].astype(np.int8), pred[keep].astype(np.int8)
    out: dict[str, float] = {"n_epochs": float(y.size), "excluded_epochs": float(ref.size - y.size),
                             "unscored_epochs": float(np.count_nonzero(unscored))}
    if y.size == 0:
        return out | dict.fromkeys(EPOCH_METRIC_NAMES, float("nan"))
    two_ref, two_pred = y.min() != y.max(), p.min() != p.max()
    # the 2 x 2 confusion (rows: reference wake, sleep; columns: predicted), then scikit-learn's formulas
    tp = float(np.count_nonzero(y & p))
    true_sleep, predicted_sleep = float(np.count_nonzero(y)), float(np.count_nonzero(p))
    fn, fp = true_sleep - tp, predicted_sleep - tp
    tn = float(y.size) - tp - fn - fp
    nan = float("nan")
    sensitivity, specificity = _ratio(tp, tp + fn), _ratio(tn, tn + fp)
    accuracy = (tp + tn) / float(y.size)
    out |= {
        "sensitivity": sensitivity, "specificity": specificity,
        "ppv": _ratio(tp, tp + fp), "npv": _ratio(tn, tn + fn),
        "accuracy": accuracy,
        "balanced_accuracy": (specificity + sensitivity) / 2.0 if two_ref else nan,  # numpy's mean of the two
        "f1_sleep": _ratio(2.0 * tp, true_sleep + predicted_sleep),
        "f1_wake": _ratio(2.0 * tn, (float(y.size) - true_sleep) + (float(y.size) - predicted_sleep)),
        "kappa": _kappa(tn, fp, fn, tp) if (two_ref or two_pred or y[0] != p[0]) else nan,
        "pabak": 2.0 * accuracy - 1.0,  # Byrt et al. 1993; Menghini et al. 2021 glossary
        "mcc": _mcc(tn, fp, fn, tp) if (two_ref and two_pred) else nan,
        "auc": nan,
    }
    if scores is not None and two_ref and np.isfinite(scores[keep]).all():
        out["auc"] = roc_auc(y, scores[keep])
    return out


def _ratio(numerator: float, denominator: float) -> float:
    return numerator / denominator if denominator else float("nan")


def _kappa(tn: float, fp: float, fn: float, tp: float) -> float:
    """Cohen's kappa of a 2 x 2 confusion, in the order of operations of ``sklearn.metrics.cohen_kappa_score``.

    ``1 - sum(W * C) / sum(W * E)`` with ``W`` zero on the diagonal and ``E = outer(col sums, row
    sums) / n``: the zero-weighted cells add exact zeros, so the sums are ``fp + fn`` and
    ``E[0, 1] + E[1, 0]`` in plain floats.
    """
    predicted_wake, predicted_sleep = tn + fn, fp + tp  # column sums
    true_wake, true_sleep = tn + fp, fn + tp  # row sums
    n = predicted_wake + predicted_sleep
    expected_off = predicted_wake * true_sleep / n + predicted_sleep * true_wake / n if n else 0.0
    if not expected_off:
        with np.errstate(invalid="ignore", divide="ignore"):
            return float(1 - np.float64(fp + fn) / np.float64(expected_off))
    return float(1 - (fp + fn) / expected_off)


def _mcc(tn: float, fp: float, fn: float, tp: float) -> float:
    """Matthews correlation of a 2 x 2 confusion, as ``sklearn.metrics.matthews_corrcoef`` computes it."""
    t_sum, p_sum = np.array([tn + fp, fn + tp]), np.array([tn + fn, fp + tp])
    n_samples = p_sum.sum()
    cov_ytyp = (tn + tp) * n_samples - np.dot(t_sum, p_sum)
    cov_ypyp_ytyt = (n_samples**2 - np.dot(p_sum, p_sum)) * (n_samples**2 - np.dot(t_sum, t_sum))
    return float(cov_ytyp / np.sqrt(cov_ypyp_ytyt)) if cov_ypyp_ytyt else 0.0


def roc_auc(y: NDArray[np.int8], score: NDArray[np.float64]) -> float:
    """Area under the ROC curve (both classes present), the trapezoids of ``sklearn.metrics.roc_curve``.

    The curve's points are those of ``roc_curve(drop_intermediate=True)``, so the sum of the
    trapezoids is taken over the same points in the same order.
    """
    order = np.argsort(-score, kind="stable")
    ordered, truth = score[order], y[order].astype(np.float64)
    thresholds = np.append(np.flatnonzero(np.diff(ordered)), truth.size - 1)
    tps = np.cumsum(truth)[thresholds]
    fps = 1 + thresholds.astype(np.float64) - tps
    if fps.shape[0] > 2:
        keep = np.concatenate(([True], np.logical_or(np.diff(fps, 2), np.diff(tps, 2)), [True]))
        fps, tps = fps[keep], tps[keep]
    fpr, tpr = np.concatenate(([0.0], fps)) / fps[-1], np.concatenate(([0.0], tps)) / tps[-1]
    return float(np.trapezoid(tpr, fpr))


@dataclass(frozen=True, eq=False)
class ScoredNight:
    """One method's output on one night, next to the reference (in-bed epochs only).

    Attributes
    ----------
    participant_id, night_id, method : str
    reference : ndarray of shape (n_epochs,)
        1 = sleep, 0 = wake, NaN = excluded.
    predicted : ndarray of shape (n_epochs,)
        1 = sleep, 0 = wake, NaN = unscored.
    score : ndarray of shape (n_epochs,) or None
        Continuous score, higher = more likely sleep.
    """

    participant_id: str
    night_id: str
    method: str
    reference: NDArray[np.float64]
    predicted: NDArray[np.generic]
    score: NDArray[np.float64] | None = None


def agreement_table(nights: Iterable[ScoredNight], *,
                    night_metrics: Sequence[Mapping[str, float]] | None = None) -> pd.DataFrame:
    """Epoch-by-epoch agreement per night, per participant and pooled, for every method.

    Parameters
    ----------
    nights : iterable of ScoredNight
        Any number of methods and participants; add the :func:`always_sleep` baseline as one
        more method to keep it in the table.
    night_metrics : sequence of mapping, default=None
        :func:`epoch_agreement` of each of ``nights`` (same order and length) when the caller
        has already computed them; None computes them here.

    Returns
    -------
    table : pandas.DataFrame
        Columns ``level``, ``method``, ``participant_id``, ``night_id``, ``statistic``,
        ``n_nights``, ``n_epochs``, ``excluded_epochs``, ``unscored_epochs`` and
        :data:`EPOCH_METRIC_NAMES`. Rows come
        in three blocks (night, participant, pooled), each ordered by method (in order of first
        appearance) and then as the nights were given:

        - ``level="night"``, ``statistic="value"``: one row per method and night;
        - ``level="participant"``, ``statistic="mean"`` and ``"sd"``: mean and SD (ddof=1; NaN
          for one night) across that participant's nights, NaN nights skipped; ``n_epochs``,
          ``excluded_epochs`` and ``unscored_epochs`` are totals;
        - ``level="pooled"``, ``statistic="value"``: one confusion over all epochs of all nights
          of the method (AUC only if every night has a score).
    """
    nights = list(nights)
    id_cols = ["level", "method", "participant_id", "night_id", "statistic", "n_nights"]
    counts = list(EPOCH_COUNT_NAMES)
    columns = id_cols + [*counts, *EPOCH_METRIC_NAMES]
    if not nights:
        return pd.DataFrame(columns=columns)
    if night_metrics is None:
        night_metrics = [epoch_agreement(n.reference, n.predicted, score=n.score) for n in nights]
    night_rows = pd.DataFrame([
        {"level": "night", "method": n.method, "participant_id": n.participant_id, "night_id": n.night_id,
         "statistic": "value", "n_nights": 1} | dict(metrics)
        for n, metrics in zip(nights, night_metrics, strict=True)])
    order = {method: i for i, method in enumerate(dict.fromkeys(n.method for n in nights))}
    night_rows = night_rows.sort_values("method", key=lambda col: col.map(order), kind="stable", ignore_index=True)
    grouped = night_rows.groupby(["method", "participant_id"], sort=False)
    metrics = grouped[list(EPOCH_METRIC_NAMES)]
    totals = grouped[counts].sum()
    n_nights = grouped.size().rename("n_nights")
    blocks = [values.join(totals).join(n_nights).reset_index().assign(
        level="participant", night_id=None, statistic=statistic)
        for statistic, values in (("mean", metrics.mean()), ("sd", metrics.std(ddof=1)))]
    participant_rows = pd.concat(blocks).sort_index(kind="stable")  # mean then sd for each participant
    pooled = []
    for method in order:
        mine = [n for n in nights if n.method == method]
        with_score = all(n.score is not None for n in mine)
        pooled.append({"level": "pooled", "method": method, "participant_id": None, "night_id": None,
                       "statistic": "value", "n_nights": len(mine)} | epoch_agreement(
            np.concatenate([np.asarray(n.reference, dtype=np.float64) for n in mine]),
            np.concatenate([np.asarray(n.predicted, dtype=np.float64) for n in mine]),
            score=np.concatenate([np.asarray(n.score) for n in mine]) if with_score else None))
    table = pd.concat([night_rows, participant_rows, pd.DataFrame(pooled)], ignore_index=True)
    table[["n_nights", *counts]] = table[["n_nights", *counts]].astype(np.int64)
    return table[columns]
