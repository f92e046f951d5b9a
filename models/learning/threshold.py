"""The decision threshold (the probability cut that maximises Youden's J under a sensitivity floor) and the AUC."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray
from sklearn.metrics import roc_curve

from ..agreement import roc_auc

__all__ = ["binary_auc", "youden_threshold"]


def binary_auc(y: NDArray[np.float64], p: NDArray[np.float64]) -> float:
    """Area under the ROC curve of ``p`` for ``y`` (1 = sleep), NaN when ``y`` holds a single class.

    The same number as :func:`sklearn.metrics.roc_auc_score`: the epoch agreement's
    :func:`~models.agreement.epoch_metrics.roc_auc` (trapezoids over the points of
    :func:`~sklearn.metrics.roc_curve`), without scikit-learn's input checks, which cost more than
    the area itself on a few thousand epochs.

    Parameters
    ----------
    y : ndarray of shape (n_epochs,)
        1 = sleep, 0 = wake.
    p : ndarray of shape (n_epochs,)
        Score (probability of sleep).

    Returns
    -------
    float

    Examples
    --------
    >>> binary_auc(np.array([0, 0, 1, 1.0]), np.array([0.1, 0.4, 0.35, 0.8]))
    0.75
    >>> binary_auc(np.array([1, 1.0]), np.array([0.1, 0.4]))
    nan
    """
    if np.unique(y).size != 2:
        return float("nan")
    return roc_auc(np.asarray(y, dtype=np.int8), np.asarray(p, dtype=np.float64))


def youden_threshold(y: NDArray[np.float64], p: NDArray[np.float64], *, min_sensitivity: float = 0.0) -> float:
    """Probability threshold maximising Youden's J = sensitivity + specificity - 1.

    Uses :func:`sklearn.metrics.roc_curve` (sleep = positive); an epoch is called sleep when
    ``p >= threshold``. Only thresholds whose sensitivity is at least ``min_sensitivity`` compete
    (the point calling everything sleep always qualifies); among equal J the highest threshold
    wins. Returns 0.5 when ``y`` holds a single class.

    Parameters
    ----------
    y : ndarray of shape (n_epochs,)
        1 = sleep, 0 = wake.
    p : ndarray of shape (n_epochs,)
        Probability of sleep.
    min_sensitivity : float, default=0.0
        Sensitivity floor; 0 is plain Youden's J (maximum balanced accuracy).

    Returns
    -------
    float

    Examples
    --------
    >>> y, p = np.array([0, 0, 1, 1.0]), np.array([0.1, 0.4, 0.35, 0.8])
    >>> youden_threshold(y, p), youden_threshold(y, p, min_sensitivity=0.9)
    (0.8, 0.35)
    """
    y = np.asarray(y, dtype=np.float64)
    if np.unique(y).size < 2:
        return 0.5
    fpr, tpr, thresholds = roc_curve(y, p)
    # the first point is the "nothing called sleep" corner (threshold inf)
    j = np.where(tpr >= min_sensitivity, tpr - fpr, -np.inf)[1:]
    return float(thresholds[1:][int(np.argmax(j))])
