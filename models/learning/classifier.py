"""The fitted sleep/wake model: features -> optional standardise + PCA -> XGBoost -> calibration -> decoding.

A :class:`SleepModel` is built by :func:`models.learning.personal.train_personal` or
:func:`models.learning.pooled.train_pooled`, saved and restored by :mod:`models.learning.artifacts`; it
is never pickled. Prediction always goes through the same numpy and XGBoost calls, so a restored model
gives bit-identical probabilities.

A model with a :class:`~models.decoding.fitting.NightDecoding` (``decoding_``, fitted on inner
validation nights only) returns *calibrated* probabilities from :meth:`SleepModel.predict_proba`
(:meth:`SleepModel.raw_proba` gives the uncalibrated ones), makes its calls with the fitted
decoder and gives per-night parameter intervals (:meth:`SleepModel.intervals`). A model without
one (stored before decoding existed) thresholds its raw probabilities at ``threshold_``.

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

from ..decoding.fitting import NightDecoding
from ..decoding.intervals import DEFAULT_INTERVAL_LEVEL, NightIntervals
from ..features.matrix import FeatureConfig, FeatureMatrix, FeatureSetMismatchError, check_feature_set
from ..features.source import FeatureSource, night_features
from ..nights.night import Night
from ..scoring.protocol import DEFAULT_PROTOCOL, StudyProtocol
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
        Raw probability of sleep at or above which an epoch is called sleep when there is no
        ``decoding_``: chosen on validation predictions (never on held-out nights) to maximise
        Youden's J = balanced accuracy among thresholds meeting ``TrainingConfig.min_sensitivity``.
    decoding_ : NightDecoding or None
        Calibration, decoder and interval settings fitted on validation predictions (never on
        held-out nights); None for models without decoding (calls at ``threshold_``).
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
                 training_nights: tuple[str, ...] = (), info: Mapping[str, Any] | None = None,
                 decoding: NightDecoding | None = None) -> None:
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
        self.decoding_ = decoding
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

    def raw_proba(self, night: Night, *, offset: float = 0.0, descriptors: Mapping[str, float] | None = None,
                  features: FeatureMatrix | None = None,
                  feature_cache: FeatureSource | None = None) -> NDArray[np.float64]:
        """Uncalibrated probability of sleep per epoch, ``expit(decision_function)``, shape (n_epochs,),
        NaN at missing epochs (arguments as :meth:`decision_function`)."""
        margin = self.decision_function(night, offset=offset, descriptors=descriptors, features=features,
                                        feature_cache=feature_cache)
        return np.asarray(expit(margin), dtype=np.float64)

    def proba_from_margin(self, margin: NDArray[np.float64]) -> NDArray[np.float64]:
        """Probability of sleep from log-odds (offset included): calibrated when ``decoding_`` is set.

        Parameters
        ----------
        margin : ndarray of float64, shape (n_epochs,)
            As :meth:`decision_function` (NaN stays NaN). A participant offset is added to the
            margin *before* calibration.
        """
        p = np.asarray(expit(np.asarray(margin, dtype=np.float64)), dtype=np.float64)
        return p if self.decoding_ is None else self.decoding_.calibrate(p)

    def predict_proba(self, night: Night, *, offset: float = 0.0, descriptors: Mapping[str, float] | None = None,
                      features: FeatureMatrix | None = None,
                      feature_cache: FeatureSource | None = None) -> NDArray[np.float64]:
        """Probability of sleep per epoch, shape (n_epochs,), float64, NaN at missing epochs: calibrated
        by ``decoding_`` when set, raw otherwise (arguments as :meth:`decision_function`)."""
        margin = self.decision_function(night, offset=offset, descriptors=descriptors, features=features,
                                        feature_cache=feature_cache)
        return self.proba_from_margin(margin)

    def predict(self, night: Night, *, offset: float = 0.0, descriptors: Mapping[str, float] | None = None,
                features: FeatureMatrix | None = None,
                feature_cache: FeatureSource | None = None) -> NDArray[np.float64]:
        """Sleep (1.0) / wake (0.0) per epoch (:meth:`calls`), NaN at missing epochs; shape (n_epochs,)."""
        p = self.predict_proba(night, offset=offset, descriptors=descriptors, features=features,
                               feature_cache=feature_cache)
        return self.calls(p)

    def calls(self, p_sleep: NDArray[np.float64]) -> NDArray[np.float64]:
        """Calls from probabilities of sleep: decoded by ``decoding_`` when set, else at ``threshold_``.

        Parameters
        ----------
        p_sleep : ndarray of float64, shape (n_epochs,)
            As :meth:`predict_proba` (the whole recording); NaN = unscored.

        Returns
        -------
        sleep : ndarray of float64, shape (n_epochs,)
            1.0 sleep, 0.0 wake, NaN where ``p_sleep`` is NaN.

        Examples
        --------
        A model without decoding and threshold 0.6 calls ``[0.7, 0.2, nan]`` ``[1.0, 0.0, nan]``.
        """
        p = np.asarray(p_sleep, dtype=np.float64)
        if self.decoding_ is not None:
            return self.decoding_.decode(p)
        return np.where(np.isnan(p), np.nan, (p >= self.threshold_).astype(np.float64))

    def intervals(self, p_sleep: NDArray[np.float64], night: Night, *, level: float = DEFAULT_INTERVAL_LEVEL,
                  n_paths: int = 200, seed: int = 0,
                  protocol: StudyProtocol = DEFAULT_PROTOCOL) -> NightIntervals | None:
        """Per-night intervals of the sleep parameters (:meth:`NightDecoding.intervals`), or None without
        ``decoding_``.

        Parameters
        ----------
        p_sleep : ndarray of float64, shape (n_epochs,)
            Output of :meth:`predict_proba` for ``night``.
        night : Night
            Gives the epoch length and lights off/on (``night.in_bed``).
        level : float, default=0.9
        n_paths : int, default=200
        seed : int, default=0
        protocol : StudyProtocol, default=DEFAULT_PROTOCOL
        """
        if self.decoding_ is None:
            return None
        first, stop = night.in_bed
        return self.decoding_.intervals(p_sleep, epoch_seconds=night.epoch_seconds, lights_off_idx=first,
                                        lights_on_idx=stop, level=level, n_paths=n_paths, seed=seed,
                                        protocol=protocol)
