"""Per-epoch features: sliding windows, summaries, dynamics, entropies, context, the feature matrix and its sources."""

from __future__ import annotations

from .cache import (
    FeatureCache,
)
from .context import (
    lag_features,
    movement_context,
    night_normalisers,
    night_scale,
    rule_scores,
    time_context,
)
from .dynamics import (
    crossing_points,
    flat_spots,
    lag1_autocorrelation,
    lumpiness,
    max_level_shift,
    max_var_shift,
    stability,
)
from .entropies import (
    permutation_entropy,
    sample_entropy,
    spectral_entropy,
)
from .matrix import (
    FAMILIES,
    FeatureConfig,
    FeatureInputError,
    FeatureMatrix,
    FeatureSetMismatchError,
    check_feature_set,
    compute_features,
)
from .source import (
    FeatureSource,
    PrecomputedFeatures,
    night_features,
)
from .summaries import (
    SHARE_STATISTICS,
    SUMMARY_STATISTICS,
    window_shares,
    window_summaries,
)
from .windows import (
    CentredWindows,
    half_width_epochs,
    rolling_mean_var,
    window_bounds,
    window_counts,
)

__all__ = [
    "CentredWindows",
    "FAMILIES",
    "FeatureCache",
    "FeatureConfig",
    "FeatureInputError",
    "FeatureMatrix",
    "FeatureSetMismatchError",
    "FeatureSource",
    "PrecomputedFeatures",
    "SHARE_STATISTICS",
    "SUMMARY_STATISTICS",
    "check_feature_set",
    "compute_features",
    "crossing_points",
    "flat_spots",
    "half_width_epochs",
    "lag1_autocorrelation",
    "lag_features",
    "lumpiness",
    "max_level_shift",
    "max_var_shift",
    "movement_context",
    "night_features",
    "night_normalisers",
    "night_scale",
    "permutation_entropy",
    "rolling_mean_var",
    "rule_scores",
    "sample_entropy",
    "spectral_entropy",
    "stability",
    "time_context",
    "window_bounds",
    "window_counts",
    "window_shares",
    "window_summaries",
]
