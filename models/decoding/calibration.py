"""Calibration of per-epoch sleep probabilities, fitted on inner-fold predictions only.

Two back-ends share one small interface (:class:`Calibrator`: ``fit``, ``transform``,
``to_dict``) and are listed by name in :data:`CALIBRATORS`:

- ``"platt"`` (:class:`PlattCalibrator`): logistic regression on the logit of the probability,
  ``p' = 1 / (1 + exp(a * logit(p) + b))``, fitted by Newton's method on Platt's smoothed targets
  (Platt 1999, "Probabilistic outputs for support vector machines", section 2.2);
- ``"isotonic"`` (:class:`IsotonicCalibrator`): the increasing step function of least squared
  error (pool adjacent violators; Zadrozny & Elkan 2002), read between its breakpoints by linear
  interpolation and clipped outside them.

The fitted state is plain numbers (``a_``, ``b_``; ``X_thresholds_``, ``y_thresholds_``), stored as
JSON by ``to_dict`` and read back by :func:`calibrator_from_dict` (no pickle). Epochs whose
probability or label is NaN (unscored) are left out of fitting and stay NaN in ``transform``.

Checks: :func:`brier_score` (mean squared error of the probability) and
:func:`reliability_curve` (observed sleep frequency against mean predicted probability per bin).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Literal, Protocol

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import isotonic_regression

from ..errors import NightbankError, NotFittedError

__all__ = ["CALIBRATORS", "Calibrator", "InvalidCalibrationError", "IsotonicCalibrator", "PlattCalibrator",
           "ReliabilityCurve", "brier_score", "calibrator_from_dict", "reliability_curve"]

#: Probabilities are clipped to [_EPS, 1 - _EPS] before taking the logit (common practice).
_EPS = 1e-12


class InvalidCalibrationError(NightbankError):
    """Calibration input or a stored calibration is invalid (the message names what and where)."""

    code = "invalid_calibration"


class Calibrator(Protocol):
    """A probability calibration: ``fit`` on (inner-fold) predictions, then ``transform``."""

    method: str

    def fit(self, p_sleep: ArrayLike, labels: ArrayLike) -> Calibrator: ...

    def transform(self, p_sleep: ArrayLike) -> NDArray[np.float64]: ...

    def to_dict(self) -> dict[str, Any]: ...


def _probabilities(p_sleep: ArrayLike, name: str = "p_sleep") -> NDArray[np.float64]:
    p = np.asarray(p_sleep, dtype=np.float64)
    if p.ndim != 1:
        raise InvalidCalibrationError(f"{name} must be 1-D, got shape {p.shape}")
    bad = np.flatnonzero(~np.isnan(p) & ((p < 0) | (p > 1)))
    if bad.size:
        raise InvalidCalibrationError(f"{name} must lie in [0, 1] (or be NaN); first bad epochs: {bad[:5].tolist()}")
    return p


def _scored(p_sleep: ArrayLike, labels: ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """The (probability, label) pairs of the epochs both score; raises when their shapes differ."""
    p = _probabilities(p_sleep)
    y = np.asarray(labels, dtype=np.float64)
    if y.shape != p.shape:
        raise InvalidCalibrationError(f"labels ({y.shape}) and p_sleep ({p.shape}) must have the same shape")
    keep = ~np.isnan(p) & ~np.isnan(y)
    return p[keep], y[keep]


def _pairs(p_sleep: ArrayLike, labels: ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """The scored (probability, label) pairs; raises unless both classes are present."""
    p, y = _scored(p_sleep, labels)
    bad = np.flatnonzero((y != 0) & (y != 1))
    if bad.size:
        raise InvalidCalibrationError(f"labels must be 0, 1 or NaN; first bad scored epochs: {bad[:5].tolist()}")
    if y.size == 0 or y.min() == y.max():
        raise InvalidCalibrationError("calibration needs scored epochs of both classes (sleep and wake)")
    return p, y


def _logit(p: NDArray[np.float64]) -> NDArray[np.float64]:
    q = np.clip(p, _EPS, 1.0 - _EPS)
    return np.asarray(np.log(q) - np.log1p(-q))


def _keep_nan(p: NDArray[np.float64], values: NDArray[np.float64]) -> NDArray[np.float64]:
    return np.where(np.isnan(p), np.nan, values)


@dataclass
class PlattCalibrator:
    """Platt scaling on the logit: ``p' = 1 / (1 + exp(a_ * logit(p) + b_))``.

    Parameters
    ----------
    smoothed_targets : bool, default=True
        Fit to Platt's targets ``(N+ + 1) / (N+ + 2)`` and ``1 / (N- + 2)`` instead of 1 and 0
        (Platt 1999, section 2.2; also what scikit-learn's sigmoid calibration does).
    max_iter : int, default=100
        Newton iterations (the loss is convex; convergence usually takes < 10).

    Attributes
    ----------
    a_, b_ : float
        Slope and intercept (Platt's sign convention: a negative ``a_`` means higher input
        probability, higher output probability).
    """

    smoothed_targets: bool = True
    max_iter: int = 100
    a_: float | None = None
    b_: float | None = None
    method: str = field(default="platt", init=False)

    def fit(self, p_sleep: ArrayLike, labels: ArrayLike) -> PlattCalibrator:
        """Fit on probabilities of shape (n_epochs,) and labels (1 = sleep, 0 = wake, NaN = unscored)."""
        p, y = _pairs(p_sleep, labels)
        f = _logit(p)
        n_pos = float(y.sum())
        n_neg = y.size - n_pos
        t = np.where(y == 1, (n_pos + 1) / (n_pos + 2), 1 / (n_neg + 2)) if self.smoothed_targets else y
        design = np.column_stack([f, np.ones_like(f)])

        def loss(ab: NDArray[np.float64]) -> float:
            z = design @ ab  # P(sleep) = 1 / (1 + exp(z))
            return float(np.sum(np.logaddexp(0.0, z) - (1.0 - t) * z))

        ab = np.array([-1.0, 0.0])  # identity map as the start
        for _ in range(self.max_iter):
            z = design @ ab
            q = 1.0 / (1.0 + np.exp(-z))  # 1 - P(sleep)
            grad = design.T @ (q - (1.0 - t))
            hess = (design * (q * (1.0 - q))[:, None]).T @ design + 1e-12 * np.eye(2)
            step = np.linalg.solve(hess, grad)
            current, scale = loss(ab), 1.0
            while loss(ab - scale * step) > current and scale > 1e-10:  # backtracking line search
                scale /= 2.0
            ab = ab - scale * step
            if np.max(np.abs(scale * step)) < 1e-10:
                break
        self.a_, self.b_ = float(ab[0]), float(ab[1])
        return self

    def transform(self, p_sleep: ArrayLike) -> NDArray[np.float64]:
        """Calibrated probabilities, shape (n_epochs,); NaN stays NaN."""
        if self.a_ is None or self.b_ is None:
            raise NotFittedError("PlattCalibrator.transform called before fit")
        p = _probabilities(p_sleep)
        z = self.a_ * _logit(np.nan_to_num(p, nan=0.5)) + self.b_
        return _keep_nan(p, np.asarray(1.0 / (1.0 + np.exp(z))))

    def to_dict(self) -> dict[str, Any]:
        """The fitted state as JSON-safe numbers."""
        if self.a_ is None or self.b_ is None:
            raise NotFittedError("PlattCalibrator.to_dict called before fit")
        return {"method": self.method, "a": self.a_, "b": self.b_, "smoothed_targets": self.smoothed_targets}


@dataclass
class IsotonicCalibrator:
    """Isotonic (increasing) calibration, clipped outside the fitted range.

    Equal input probabilities are pooled first (their labels averaged), then the pool adjacent
    violators algorithm (:func:`scipy.optimize.isotonic_regression`) gives the increasing fit;
    only the breakpoints where the fitted value changes are kept.

    Attributes
    ----------
    X_thresholds_ : ndarray of float64, shape (n_breakpoints,)
        Increasing input probabilities of the breakpoints.
    y_thresholds_ : ndarray of float64, shape (n_breakpoints,)
        Calibrated probability at each breakpoint (non-decreasing).
    """

    X_thresholds_: NDArray[np.float64] | None = None
    y_thresholds_: NDArray[np.float64] | None = None
    method: str = field(default="isotonic", init=False)

    def fit(self, p_sleep: ArrayLike, labels: ArrayLike) -> IsotonicCalibrator:
        """Fit on probabilities of shape (n_epochs,) and labels (1 = sleep, 0 = wake, NaN = unscored)."""
        p, y = _pairs(p_sleep, labels)
        x_unique, inverse, counts = np.unique(p, return_inverse=True, return_counts=True)
        y_mean = np.bincount(inverse, weights=y) / counts
        fitted = np.asarray(isotonic_regression(y_mean, weights=counts.astype(np.float64)).x, dtype=np.float64)
        keep = np.ones(fitted.size, dtype=bool)  # drop the inner points of constant stretches
        if fitted.size > 2:
            keep[1:-1] = (fitted[1:-1] != fitted[:-2]) | (fitted[1:-1] != fitted[2:])
        self.X_thresholds_, self.y_thresholds_ = x_unique[keep], fitted[keep]
        return self

    def transform(self, p_sleep: ArrayLike) -> NDArray[np.float64]:
        """Calibrated probabilities, shape (n_epochs,); NaN stays NaN."""
        if self.X_thresholds_ is None or self.y_thresholds_ is None:
            raise NotFittedError("IsotonicCalibrator.transform called before fit")
        p = _probabilities(p_sleep)
        return _keep_nan(p, np.interp(np.nan_to_num(p, nan=0.5), self.X_thresholds_, self.y_thresholds_))

    def to_dict(self) -> dict[str, Any]:
        """The fitted breakpoints as JSON-safe lists."""
        if self.X_thresholds_ is None or self.y_thresholds_ is None:
            raise NotFittedError("IsotonicCalibrator.to_dict called before fit")
        return {"method": self.method, "X_thresholds": self.X_thresholds_.tolist(),
                "y_thresholds": self.y_thresholds_.tolist()}


#: Calibration back-ends by name.
CALIBRATORS: Mapping[str, type[PlattCalibrator] | type[IsotonicCalibrator]] = {
    "isotonic": IsotonicCalibrator, "platt": PlattCalibrator}


def _finite(values: object, where: str) -> NDArray[np.float64]:
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidCalibrationError(f"{where} must be numbers") from None
    if not np.isfinite(arr).all():
        raise InvalidCalibrationError(f"{where} must be finite numbers")
    return arr


def calibrator_from_dict(values: Mapping[str, Any]) -> PlattCalibrator | IsotonicCalibrator:
    """A fitted calibrator from what its ``to_dict`` gave.

    Raises
    ------
    InvalidCalibrationError
        For an unknown ``method`` or missing, non-finite or out-of-order fields (named).
    """
    if not isinstance(values, Mapping) or values.get("method") not in CALIBRATORS:
        method = values.get("method") if isinstance(values, Mapping) else values
        raise InvalidCalibrationError(f"calibration.method must be one of {sorted(CALIBRATORS)}, got {method!r}")
    missing = [k for k in (("a", "b") if values["method"] == "platt" else ("X_thresholds", "y_thresholds"))
               if k not in values]
    if missing:
        raise InvalidCalibrationError(f"calibration is missing {', '.join(missing)}")
    if values["method"] == "platt":
        a, b = (float(_finite(values[k], f"calibration.{k}")) for k in ("a", "b"))
        return PlattCalibrator(smoothed_targets=bool(values.get("smoothed_targets", True)), a_=a, b_=b)
    x = _finite(values["X_thresholds"], "calibration.X_thresholds")
    y = _finite(values["y_thresholds"], "calibration.y_thresholds")
    if x.ndim != 1 or x.shape != y.shape or x.size == 0:
        raise InvalidCalibrationError("calibration.X_thresholds and y_thresholds must be 1-D, equally long, non-empty")
    if np.any(np.diff(x) <= 0) or np.any(np.diff(y) < 0) or y.min() < 0 or y.max() > 1:
        raise InvalidCalibrationError("calibration thresholds must increase and y_thresholds lie in [0, 1]")
    return IsotonicCalibrator(X_thresholds_=x, y_thresholds_=y)


def brier_score(labels: ArrayLike, p_sleep: ArrayLike) -> float:
    """Brier score: mean of ``(p_sleep - label)**2`` over the scored epochs (Brier 1950); lower is better.

    Parameters
    ----------
    labels : array-like of shape (n_epochs,)
        1 = sleep, 0 = wake, NaN = unscored (left out).
    p_sleep : array-like of shape (n_epochs,)
        Probability of sleep; NaN = unscored (left out).
    """
    p, y = _scored(p_sleep, labels)
    return float(np.mean((p - y) ** 2)) if p.size else float("nan")


@dataclass(frozen=True)
class ReliabilityCurve:
    """Reliability (calibration) curve; arrays of shape (n_bins,) except ``bin_edges`` (n_bins + 1).

    Empty bins hold NaN in ``observed_frequency`` and ``mean_predicted`` and 0 in ``counts``.
    """

    bin_edges: NDArray[np.float64]
    observed_frequency: NDArray[np.float64]
    mean_predicted: NDArray[np.float64]
    counts: NDArray[np.int64]

    def to_dict(self) -> dict[str, list[float | None] | list[int]]:
        """JSON-safe lists (NaN as None)."""
        def clean(a: NDArray[np.float64]) -> list[float | None]:
            return [None if np.isnan(v) else float(v) for v in a]
        return {"bin_edges": clean(self.bin_edges), "observed_frequency": clean(self.observed_frequency),
                "mean_predicted": clean(self.mean_predicted), "counts": self.counts.tolist()}


def reliability_curve(labels: ArrayLike, p_sleep: ArrayLike, *, n_bins: int = 10,
                      strategy: Literal["uniform", "quantile"] = "uniform") -> ReliabilityCurve:
    """Observed sleep frequency against mean predicted probability, per probability bin.

    Parameters
    ----------
    labels, p_sleep : array-like of shape (n_epochs,)
        As for :func:`brier_score` (NaN epochs are left out).
    n_bins : int, default=10
    strategy : {"uniform", "quantile"}, default="uniform"
        Equal-width bins on [0, 1], or bins holding equal shares of the predictions.

    Returns
    -------
    ReliabilityCurve
        A probability equal to an inner bin edge falls in the bin below it (bins are
        ``[e0, e1], (e1, e2], ...``, as scikit-learn's ``calibration_curve`` bins them).
    """
    if isinstance(n_bins, bool) or not isinstance(n_bins, int) or n_bins < 1:
        raise InvalidCalibrationError(f"n_bins must be an integer >= 1, got {n_bins!r}")
    p, y = _scored(p_sleep, labels)
    if strategy == "uniform":
        edges = np.linspace(0.0, 1.0, n_bins + 1)
    elif strategy == "quantile" and p.size:
        edges = np.percentile(p, np.linspace(0, 100, n_bins + 1))
    else:
        raise InvalidCalibrationError(f"strategy must be 'uniform' or 'quantile' (with data), got {strategy!r}")
    ids = np.searchsorted(edges[1:-1], p)
    counts = np.bincount(ids, minlength=n_bins).astype(np.int64)
    with np.errstate(invalid="ignore", divide="ignore"):
        observed = np.bincount(ids, weights=y, minlength=n_bins) / counts
        predicted = np.bincount(ids, weights=p, minlength=n_bins) / counts
    return ReliabilityCurve(bin_edges=edges, observed_frequency=np.where(counts > 0, observed, np.nan),
                            mean_predicted=np.where(counts > 0, predicted, np.nan), counts=counts)
