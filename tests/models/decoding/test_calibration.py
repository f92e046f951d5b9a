"""Calibration checked against scikit-learn (IsotonicRegression, CalibratedClassifierCV with the
sigmoid method, LogisticRegression, brier_score_loss, calibration_curve)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.calibration import CalibratedClassifierCV, calibration_curve
from sklearn.frozen import FrozenEstimator
from sklearn.isotonic import IsotonicRegression
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import brier_score_loss

from models.decoding.calibration import (
    CALIBRATORS,
    InvalidCalibrationError,
    IsotonicCalibrator,
    PlattCalibrator,
    brier_score,
    calibrator_from_dict,
    reliability_curve,
)
from models.errors import NotFittedError


def _miscalibrated(seed: int, n: int = 600) -> tuple[np.ndarray, np.ndarray]:
    """Overconfident probabilities: the true P(sleep) is sigmoid(z / 2), the reported one sigmoid(z)."""
    rng = np.random.default_rng(seed)
    z = rng.normal(0.8, 2.5, n)
    y = (rng.random(n) < 1 / (1 + np.exp(-z / 2))).astype(float)
    p = np.clip(1 / (1 + np.exp(-z)), 1e-3, 1 - 1e-3)
    return p, y


class _LogitScores(ClassifierMixin, BaseEstimator):
    """A fixed 'classifier' whose decision function is the logit of its one input column."""

    def fit(self, X, y):  # noqa: N803 - scikit-learn's names
        self.classes_ = np.array([0.0, 1.0])
        return self

    def decision_function(self, X):  # noqa: N803
        p = np.asarray(X)[:, 0]
        return np.log(p) - np.log1p(-p)

    def predict(self, X):  # noqa: N803
        return (np.asarray(X)[:, 0] >= 0.5).astype(float)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_isotonic_matches_scikit_learn(seed: int) -> None:
    # scikit-learn IsotonicRegression(out_of_bounds="clip"): same fitted function, queried inside and outside
    p, y = _miscalibrated(seed)
    p = np.round(p, 2)  # ties in the input, pooled the same way
    ours = IsotonicCalibrator().fit(p, y)
    ref = IsotonicRegression(out_of_bounds="clip").fit(p, y)
    query = np.concatenate([np.linspace(0, 1, 501), p])
    np.testing.assert_allclose(ours.transform(query), ref.predict(query), atol=1e-12)
    np.testing.assert_allclose(ours.X_thresholds_, ref.X_thresholds_)
    np.testing.assert_allclose(ours.y_thresholds_, ref.y_thresholds_, atol=1e-12)


@pytest.mark.parametrize("seed", [0, 3])
def test_platt_matches_scikit_learn_sigmoid_calibration(seed: int) -> None:
    # scikit-learn CalibratedClassifierCV(method="sigmoid") on a frozen model whose decision function is
    # logit(p), ensemble=False (one calibrator on every epoch's out-of-fold score, and a frozen model's scores
    # are the same in every fold): Platt's smoothed targets (Platt 1999 section 2.2), fitted by its own optimiser
    p, y = _miscalibrated(seed)
    ours = PlattCalibrator().fit(p, y)
    ref = CalibratedClassifierCV(FrozenEstimator(_LogitScores().fit(p[:, None], y)), method="sigmoid",
                                 ensemble=False)
    ref.fit(p[:, None], y)
    query = np.linspace(0.001, 0.999, 200)
    np.testing.assert_allclose(ours.transform(query), ref.predict_proba(query[:, None])[:, 1], atol=1e-4)
    # the data were made overconfident by a factor 2 on the logit: the slope comes out near -1/2
    assert -0.7 < ours.a_ < -0.35


def test_platt_without_smoothing_is_unpenalised_logistic_regression() -> None:
    # scikit-learn LogisticRegression(C=inf) on the logit feature: P = 1 / (1 + exp(-(w f + c))), so a = -w, b = -c
    p, y = _miscalibrated(5)
    ours = PlattCalibrator(smoothed_targets=False).fit(p, y)
    f = (np.log(p) - np.log1p(-p))[:, None]
    lr = LogisticRegression(C=np.inf, tol=1e-10, max_iter=10_000).fit(f, y)
    assert ours.a_ == pytest.approx(-lr.coef_[0, 0], abs=1e-5)
    assert ours.b_ == pytest.approx(-lr.intercept_[0], abs=1e-5)


@pytest.mark.parametrize("method", sorted(CALIBRATORS))
def test_calibration_lowers_brier_and_round_trips_through_json(method: str) -> None:
    p, y = _miscalibrated(7, n=2000)
    fitted = CALIBRATORS[method]().fit(p[:1000], y[:1000])
    held_out = fitted.transform(p[1000:])
    # overconfident inputs: calibration on other epochs improves the held-out Brier score (Brier 1950)
    assert brier_score(y[1000:], held_out) < brier_score(y[1000:], p[1000:]) - 0.005
    again = calibrator_from_dict(json.loads(json.dumps(fitted.to_dict())))
    np.testing.assert_array_equal(again.transform(p), fitted.transform(p))


def test_unscored_epochs_are_left_out_and_stay_unscored() -> None:
    p, y = _miscalibrated(8)
    p_nan, y_nan = p.copy(), y.copy()
    p_nan[::7] = np.nan
    y_nan[3::11] = np.nan
    keep = ~np.isnan(p_nan) & ~np.isnan(y_nan)
    for cls in (IsotonicCalibrator, PlattCalibrator):
        with_gaps = cls().fit(p_nan, y_nan)
        without = cls().fit(p[keep], y[keep])
        out = with_gaps.transform(p_nan)
        assert np.isnan(out[::7]).all()
        np.testing.assert_allclose(out[keep], without.transform(p[keep]))


def test_bad_input_is_refused_with_its_reason() -> None:
    with pytest.raises(InvalidCalibrationError, match="both classes"):
        IsotonicCalibrator().fit([0.2, 0.3], [1, 1])
    with pytest.raises(InvalidCalibrationError, match=r"\[0, 1\].*\[1\]"):
        PlattCalibrator().fit([0.2, 1.3], [0, 1])
    with pytest.raises(NotFittedError):
        PlattCalibrator().transform([0.5])
    with pytest.raises(InvalidCalibrationError, match="method"):
        calibrator_from_dict({"method": "pickle"})
    with pytest.raises(InvalidCalibrationError, match="increase"):
        calibrator_from_dict({"method": "isotonic", "X_thresholds": [0.5, 0.2], "y_thresholds": [0.1, 0.3]})
    with pytest.raises(InvalidCalibrationError, match="missing b"):
        calibrator_from_dict({"method": "platt", "a": -1.0})


def test_brier_score_matches_scikit_learn() -> None:
    p, y = _miscalibrated(9)
    assert brier_score(y, p) == pytest.approx(brier_score_loss(y, p), rel=1e-12)
    p[::5] = np.nan  # left out
    keep = ~np.isnan(p)
    assert brier_score(y, p) == pytest.approx(brier_score_loss(y[keep], p[keep]), rel=1e-12)


@pytest.mark.parametrize("strategy", ["uniform", "quantile"])
def test_reliability_curve_matches_scikit_learn(strategy: str) -> None:
    p, y = _miscalibrated(10)
    p[:5] = [0.1, 0.2, 0.3, 0.5, 0.9]  # values on inner edges of the uniform bins
    ours = reliability_curve(y, p, n_bins=8, strategy=strategy)
    prob_true, prob_pred = calibration_curve(y, p, n_bins=8, strategy=strategy)  # non-empty bins only
    full = ours.counts > 0
    np.testing.assert_allclose(ours.observed_frequency[full], prob_true, rtol=1e-12)
    np.testing.assert_allclose(ours.mean_predicted[full], prob_pred, rtol=1e-12)
    assert ours.counts.sum() == p.size
    assert np.isnan(ours.observed_frequency[~full]).all()
    json.dumps(ours.to_dict())
