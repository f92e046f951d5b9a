"""The fitted sleep/wake model: features -> optional standardise + PCA -> XGBoost -> threshold.

A :class:`SleepModel` is built by :func:`models.learning.personal.train_personal` or
:func:`models.learning.pooled.train_pooled`, saved and restored by :mod:`models.learning.artifacts`; it
is never pickled. Prediction always goes through the same numpy and XGBoost calls, so a restored model
gives bit-identical probabilities.

Missing epochs (NaN counts, :attr:`Night.missing <models.nights.night.Night.missing>`) are never
trained on (:mod:`models.learning.rows`) and never predicted: their margin, probability and call
are NaN (unscored). XGBoost would route the NaN features of such an epoch down its default
branches and return a number that looks like a prediction; it is discarded.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import xgboost as xgb
from numpy.typing import NDArray
from scipy.special import expit
from sklearn.decomposition import PCA
from sklearn.preprocessing import StandardScaler

from ..features.matrix import FeatureConfig, FeatureMatrix, FeatureSetMismatchError, check_feature_set
from ..features.source import FeatureSource, night_features
from ..nights.night import Night
from .descriptors import participant_descriptors

__all__ = ["ModelKind", "Projection", "SleepModel"]

ModelKind = Literal["personal", "pooled"]


@dataclass(frozen=True, eq=False)
class Projection:
    """Median imputation, standardisation and PCA, as plain arrays.

    ``Z = (((X with NaN -> fill) - mean) / scale - pca_mean) @ components.T``

    Attributes
    ----------
    fill, mean, scale : ndarray of float64, shape (n_features,)
    pca_mean : ndarray of float64, shape (n_features,)
    components : ndarray of float64, shape (n_components, n_features)
    variance : float
        Share of variance the components were chosen to explain.
    """

    fill: NDArray[np.float64]
    mean: NDArray[np.float64]
    scale: NDArray[np.float64]
    pca_mean: NDArray[np.float64]
    components: NDArray[np.float64]
    variance: float

    @classmethod
    def fit(cls, X: NDArray[np.floating[Any]], *, variance: float) -> Projection:
        """Fit on training rows (NaN allowed) with scikit-learn's StandardScaler and PCA.

        Parameters
        ----------
        X : ndarray of shape (n_rows, n_features)
        variance : float in (0, 1)
            Smallest share of the standardised variance the kept components explain.
        """
        X64 = np.asarray(X, dtype=np.float64)
        with np.errstate(all="ignore"):
            fill = np.nanmedian(np.where(np.isnan(X64).all(axis=0), 0.0, X64), axis=0)
        filled = np.where(np.isnan(X64), fill, X64)
        scaler = StandardScaler().fit(filled)
        pca = PCA(n_components=variance, svd_solver="covariance_eigh").fit(scaler.transform(filled))
        return cls(fill=fill, mean=scaler.mean_, scale=scaler.scale_, pca_mean=pca.mean_,
                   components=pca.components_, variance=float(variance))

    def transform(self, X: NDArray[np.floating[Any]]) -> NDArray[np.float32]:
        """Project rows, shape (n_rows, n_features) -> (n_rows, n_components), float32."""
        X64 = np.asarray(X, dtype=np.float64)
        filled = np.where(np.isnan(X64), self.fill, X64)
        return (((filled - self.mean) / self.scale - self.pca_mean) @ self.components.T).astype(np.float32)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able form (float64 values survive a JSON round trip exactly)."""
        return {"fill": self.fill.tolist(), "mean": self.mean.tolist(), "scale": self.scale.tolist(),
                "pca_mean": self.pca_mean.tolist(), "components": self.components.tolist(),
                "variance": self.variance}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Projection:
        """Inverse of :meth:`to_dict`."""
        arrays = {k: np.asarray(data[k], dtype=np.float64) for k in ("fill", "mean", "scale", "pca_mean")}
        components = np.asarray(data["components"], dtype=np.float64).reshape(-1, arrays["mean"].size)
        return cls(components=components, variance=float(data["variance"]), **arrays)


class SleepModel:
    """A fitted personal or pooled sleep/wake model (sleep = 1, the positive class).

    Built by the training functions; all attributes are fitted state.

    Attributes
    ----------
    kind_ : {"personal", "pooled"}
    booster_ : xgboost.Booster
        Trained with ``tree_method="hist"``; exactly ``n_rounds_`` trees are used.
    threshold_ : float
        Probability of sleep at or above which an epoch is called sleep: chosen on validation
        predictions (never on held-out nights) to maximise Youden's J = balanced accuracy among
        thresholds meeting ``TrainingConfig.min_sensitivity``.
    feature_config_ : FeatureConfig
    feature_version_ : str
        Version of the feature set, e.g. ``fs2-...-30s`` (includes the epoch length).
    feature_names_ : tuple of str
        Feature names, in column order.
    descriptor_names_ : tuple of str
        Participant descriptor columns appended after the features (pooled models only).
    projection_ : Projection or None
        Standardise + PCA step, None when PCA is off.
    params_ : dict
        Hyperparameters (tuned or fixed), including ``n_rounds`` and ``scale_pos_weight``.
    n_rounds_ : int
    offset_baseline_ : float
        Pooled models: class-balanced intercept of the validation participants' log-odds, the
        reference point of participant offsets (:mod:`models.learning.offset`); 0.0 for personal models.
    participant_id_ : str or None
        Owner of a personal model.
    training_nights_ : tuple of str
        Content hashes of the labelled nights the final model was trained on.
    info_ : dict
        JSON-able extras (seed, library versions, tuning summary).
    """

    def __init__(self, *, kind: ModelKind, booster: xgb.Booster, threshold: float, feature_config: FeatureConfig,
                 feature_version: str, feature_names: tuple[str, ...], params: Mapping[str, Any], n_rounds: int,
                 projection: Projection | None = None, descriptor_names: tuple[str, ...] = (),
                 offset_baseline: float = 0.0, participant_id: str | None = None,
                 training_nights: tuple[str, ...] = (), info: Mapping[str, Any] | None = None) -> None:
        self.kind_ = kind
        self.booster_ = booster
        self.threshold_ = float(threshold)
        self.feature_config_ = feature_config
        self.feature_version_ = feature_version
        self.feature_names_ = tuple(feature_names)
        self.params_ = dict(params)
        self.n_rounds_ = int(n_rounds)
        self.projection_ = projection
        self.descriptor_names_ = tuple(descriptor_names)
        self.offset_baseline_ = float(offset_baseline)
        self.participant_id_ = participant_id
        self.training_nights_ = tuple(training_nights)
        self.info_ = dict(info or {})
        self.booster_.set_param({"nthread": 1})

    def __repr__(self) -> str:
        owner = f", participant_id={self.participant_id_!r}" if self.participant_id_ else ""
        return (f"SleepModel(kind={self.kind_!r}{owner}, threshold={self.threshold_:.4f}, "
                f"n_rounds={self.n_rounds_}, feature_version={self.feature_version_!r})")

    # ---- rows -----------------------------------------------------------------------------------
    def design_matrix(self, features: FeatureMatrix,
                      descriptors: Mapping[str, float] | None = None) -> NDArray[np.float32]:
        """Model inputs from a night's features: (n_epochs, n_inputs), float32, before projection.

        Raises
        ------
        FeatureSetMismatchError
            If the features were computed with another feature set, or a pooled model gets no
            descriptors.
        """
        check_feature_set(features, version=self.feature_version_, names=self.feature_names_)
        X = features.values
        if not self.descriptor_names_:
            return X
        if descriptors is None or any(name not in descriptors for name in self.descriptor_names_):
            raise FeatureSetMismatchError(f"a pooled model needs the descriptors {list(self.descriptor_names_)}")
        row = np.array([descriptors[name] for name in self.descriptor_names_], dtype=np.float32)
        return np.hstack([X, np.broadcast_to(row, (X.shape[0], row.size))])

    def margin_from_matrix(self, X: NDArray[np.float32]) -> NDArray[np.float64]:
        """Log-odds of sleep for design-matrix rows (no offset)."""
        Z = X if self.projection_ is None else self.projection_.transform(X)
        margin = self.booster_.inplace_predict(np.ascontiguousarray(Z, dtype=np.float32), predict_type="margin",
                                               iteration_range=(0, self.n_rounds_))
        return np.asarray(margin, dtype=np.float64)

    # ---- prediction -----------------------------------------------------------------------------
    def decision_function(self, night: Night, *, offset: float = 0.0, descriptors: Mapping[str, float] | None = None,
                          features: FeatureMatrix | None = None,
                          feature_cache: FeatureSource | None = None) -> NDArray[np.float64]:
        """Log-odds of sleep per epoch, plus ``offset``.

        Parameters
        ----------
        night : Night
        offset : float, default=0.0
            Participant offset in log-odds, added to the margin (see :mod:`models.learning.offset`).
        descriptors : mapping of str to float, default=None
            Pooled models: the participant's :func:`~models.learning.descriptors.participant_descriptors`
            (over all their nights). None computes them from this night alone.
        features : FeatureMatrix, default=None
            Precomputed features of ``night``; when None they come from ``feature_cache``.
        feature_cache : FeatureSource, default=None
            Where the night's features (``feature_config_``) are looked up, and kept when
            computed; None computes them (:func:`models.features.source.night_features`).

        Returns
        -------
        margin : ndarray of float64, shape (n_epochs,)
            NaN at missing epochs (unscored).

        Raises
        ------
        FeatureSetMismatchError
            (code ``feature_set_mismatch``) if the night's features come from another feature
            set (other configuration, code revision or epoch length).
        """
        if features is None:
            features = (night_features(night, self.feature_config_) if feature_cache is None
                        else feature_cache.features(night, self.feature_config_))
        if self.descriptor_names_ and descriptors is None:
            descriptors = participant_descriptors([night])
        margin = self.margin_from_matrix(self.design_matrix(features, descriptors)) + float(offset)
        missing = night.missing
        if missing.shape == margin.shape and missing.any():
            margin[missing] = np.nan
        return margin

    def predict_proba(self, night: Night, *, offset: float = 0.0, descriptors: Mapping[str, float] | None = None,
                      features: FeatureMatrix | None = None,
                      feature_cache: FeatureSource | None = None) -> NDArray[np.float64]:
        """Probability of sleep per epoch, shape (n_epochs,), float64, NaN at missing epochs (see
        :meth:`decision_function`)."""
        margin = self.decision_function(night, offset=offset, descriptors=descriptors, features=features,
                                        feature_cache=feature_cache)
        return np.asarray(expit(margin), dtype=np.float64)

    def predict(self, night: Night, *, offset: float = 0.0, descriptors: Mapping[str, float] | None = None,
                features: FeatureMatrix | None = None,
                feature_cache: FeatureSource | None = None) -> NDArray[np.float64]:
        """Sleep (1.0) / wake (0.0) per epoch at ``threshold_``, NaN at missing epochs; shape (n_epochs,)."""
        p = self.predict_proba(night, offset=offset, descriptors=descriptors, features=features,
                               feature_cache=feature_cache)
        return self.calls(p)

    def calls(self, p_sleep: NDArray[np.float64]) -> NDArray[np.float64]:
        """Calls at ``threshold_`` from probabilities of sleep.

        Parameters
        ----------
        p_sleep : ndarray of float64, shape (n_epochs,)
            As :meth:`predict_proba`; NaN = unscored.

        Returns
        -------
        sleep : ndarray of float64, shape (n_epochs,)
            1.0 where ``p_sleep >= threshold_``, 0.0 below, NaN where ``p_sleep`` is NaN.

        Examples
        --------
        A model with threshold 0.6 calls ``[0.7, 0.2, nan]`` ``[1.0, 0.0, nan]``.
        """
        p = np.asarray(p_sleep, dtype=np.float64)
        return np.where(np.isnan(p), np.nan, (p >= self.threshold_).astype(np.float64))
