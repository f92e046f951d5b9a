"""Versioned feature set: one night's counts -> float32 matrix (n_epochs, n_features) + names.

A stored model keeps the feature names and the feature-set version it was trained on and calls
:func:`check_feature_set` before predicting, so it refuses features computed with any other
configuration, epoch length or code revision.

Feature families (``FeatureConfig.families``), in column order:

``summary`` (per window, on ``log1p(counts)``)
    ``log_<stat>_<W>`` for mean, population SD, min, p10, p25, median, p75, p90, max, skewness
    and Fisher kurtosis (scipy defaults, ``bias=True``); and on the counts ``zero_share_<W>``,
    ``move_share_<W>`` and ``coverage_<W>`` (share of the full window observed). See
    :mod:`models.features.summaries`.
``dynamics`` (per window, on ``log1p(counts)``)
    ``sampen_<W>`` (fixed tolerance, strict ``<``), ``permen_<W>``, ``specen_<W>`` (see
    :mod:`models.features.entropies`); ``level_shift_<W>``, ``var_shift_<W>``, ``lumpiness_<W>``,
    ``stability_<W>``, ``flat_spots_<W>``, ``crossings_<W>``, ``acf1_<W>`` (see
    :mod:`models.features.dynamics`).
``lags``
    ``lag_-h`` .. ``lag_+h``: counts of the epoch and its neighbours within the smallest window,
    divided by the night's robust scale.
``context``
    ``since_lights_off_min``, ``to_lights_on_min``, ``since_move_min``, ``to_move_min``,
    ``still_run_min``.
``rules``
    ``rule_<name>``: the classical count rules' continuous scores (NaN at missing epochs).
``night``
    ``night_p<q>``: the night's count quantiles on every row.

Definitions, parameters (embedding dimensions, tolerances, tie rules, sub-window widths) and the
values for still windows are in the docstrings of those modules. The version string carries the
epoch length because lag names, window lengths in epochs and count levels depend on it.

``<W>`` is the window duration, e.g. ``10m``. Windows are centred, ``2h + 1`` epochs long with
``h`` from :func:`models.features.windows.half_width_epochs`, truncated (not zero-padded) at the night's
ends. Missing (gap-filled) epochs are NaN in the input: window statistics leave them out, they
lower coverage, and they end still runs, so they never look like stillness. NaN marks an
undefined value (XGBoost routes it). No feature uses reference labels: none are accepted.

Locality: every ``summary`` and ``dynamics`` value of epoch ``i`` depends only on epochs within
the largest window around ``i``; lags (night scale), context, rules and night features are
global by design. Long recordings are processed in chunks with a halo of the largest
half-width, which gives the same values as one pass (up to last-bit rounding).
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import NightbankError
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
from .entropies import permutation_entropy, sample_entropy, spectral_entropy
from .summaries import (
    SHARE_STATISTICS,
    SUMMARY_STATISTICS,
    window_shares,
    window_summaries,
)
from .windows import CentredWindows, half_width_epochs

__all__ = [
    "FAMILIES", "FeatureConfig", "FeatureInputError", "FeatureMatrix", "FeatureSetMismatchError",
    "check_feature_set", "compute_features",
]

#: Revision of the feature code; part of every version string. Bump when any value changes.
#: 2: the ``rules`` family leaves missing epochs out of the rules' windows instead of reading them as 0.
FEATURE_REVISION = 2
#: Every feature family, in column order.
FAMILIES: tuple[str, ...] = ("summary", "dynamics", "lags", "context", "rules", "night")
DYNAMIC_STATISTICS: tuple[str, ...] = (
    "sampen", "permen", "specen", "level_shift", "var_shift", "lumpiness", "stability",
    "flat_spots", "crossings", "acf1",
)


class FeatureInputError(NightbankError):
    """Counts, epoch length, lights indices or feature configuration are invalid."""

    code = "invalid_feature_input"


class FeatureSetMismatchError(NightbankError):
    """Features were computed with another feature set than the one a model expects."""

    code = "feature_set_mismatch"


@dataclass(frozen=True)
class FeatureConfig:
    """Configuration of the feature set; its :attr:`version` identifies it.

    Parameters
    ----------
    windows_min : tuple of float, default=(10, 30, 60, 90)
        Centred window durations in minutes (21, 61, 121 and 181 epochs at 30 s).
    families : tuple of str, default=FAMILIES
        Feature families to compute, any of :data:`FAMILIES` (stored in canonical order).
    movement_cpm : float, default=40.0
        Movement level in counts per minute (scaled to counts per epoch): an epoch with more
        counts is a movement epoch. 40 is the usual medium wake threshold of the weighted
        count-threshold rule in its device's units (common practice); calibrate for other devices.
    tile_min : float, default=5.0
        Sub-window width in minutes for level/variance shift, lumpiness and stability (10 epochs
        at 30 s, R tsfeatures' default width for non-seasonal series).
    sampen_order : int, default=2
        Sample entropy embedding dimension m.
    sampen_tolerance : float, default=0.2
        Sample entropy tolerance r in log1p-count units (fixed, see
        :func:`models.features.entropies.sample_entropy`).
    permen_order : int, default=3
        Permutation entropy order (delay 1).
    night_quantiles : tuple of float, default=(50, 75, 90, 95)
        Percentiles of the night's counts broadcast as night-level normalisers.
    """

    windows_min: tuple[float, ...] = (10.0, 30.0, 60.0, 90.0)
    families: tuple[str, ...] = FAMILIES
    movement_cpm: float = 40.0
    tile_min: float = 5.0
    sampen_order: int = 2
    sampen_tolerance: float = 0.2
    permen_order: int = 3
    night_quantiles: tuple[float, ...] = (50.0, 75.0, 90.0, 95.0)

    def __post_init__(self) -> None:
        windows = tuple(sorted({float(m) for m in self.windows_min}))
        unknown = sorted(set(self.families) - set(FAMILIES))
        problems = []
        if not windows or windows[0] <= 0:
            problems.append(f"windows_min must hold positive minutes, got {self.windows_min!r}")
        if unknown or not self.families:
            problems.append(f"families must be a non-empty subset of {FAMILIES}, got {self.families!r}")
        if not (self.movement_cpm >= 0 and self.tile_min > 0 and self.sampen_tolerance > 0):
            problems.append("movement_cpm must be >= 0, tile_min and sampen_tolerance > 0")
        if not (1 <= self.sampen_order <= 5 and 2 <= self.permen_order <= 5):
            problems.append("sampen_order must be in 1..5 and permen_order in 2..5")
        if any(not 0 <= q <= 100 for q in self.night_quantiles):
            problems.append(f"night_quantiles must be percentiles in 0..100, got {self.night_quantiles!r}")
        if problems:
            raise FeatureInputError("; ".join(problems))
        object.__setattr__(self, "windows_min", windows)
        object.__setattr__(self, "families", tuple(f for f in FAMILIES if f in self.families))
        object.__setattr__(self, "night_quantiles", tuple(float(q) for q in self.night_quantiles))
        for name in ("movement_cpm", "tile_min", "sampen_tolerance"):
            object.__setattr__(self, name, float(getattr(self, name)))

    @property
    def version(self) -> str:
        """Stable identifier: ``fs<revision>-<first 16 hex digits of SHA-256 of the config>``."""
        payload = json.dumps({"revision": FEATURE_REVISION, **self.to_dict()}, sort_keys=True)
        return f"fs{FEATURE_REVISION}-{hashlib.sha256(payload.encode()).hexdigest()[:16]}"

    def version_for(self, epoch_seconds: float) -> str:
        """:attr:`FeatureMatrix.version` of features of ``epoch_seconds``-s nights."""
        return f"{self.version}-{epoch_seconds:g}s"

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict of the fields (lists for tuples)."""
        return {k: list(v) if isinstance(v, tuple) else v for k, v in asdict(self).items()}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> FeatureConfig:
        """Inverse of :meth:`to_dict`; raises :class:`FeatureInputError` on unknown keys."""
        unknown = sorted(set(data) - set(cls.__dataclass_fields__))
        if unknown:
            raise FeatureInputError(f"unknown feature configuration keys: {unknown}")
        fields: dict[str, Any] = {k: tuple(v) if isinstance(v, list) else v for k, v in data.items()}
        return cls(**fields)


@dataclass(frozen=True, eq=False)
class FeatureMatrix:
    """Features of one night.

    Attributes
    ----------
    values : ndarray of float32, shape (n_epochs, n_features)
        Read-only; NaN where a feature is undefined.
    names : tuple of str, length n_features
    version : str
        ``<FeatureConfig.version>-<epoch_seconds>s``, e.g. ``fs2-0123456789abcdef-30s``.
    """

    values: NDArray[np.float32]
    names: tuple[str, ...]
    version: str = field(default="")

    def __post_init__(self) -> None:
        values = np.asarray(self.values, dtype=np.float32)
        if values.ndim != 2 or values.shape[1] != len(self.names):
            raise FeatureInputError(f"values of shape {values.shape} do not match {len(self.names)} names")
        values.setflags(write=False)
        object.__setattr__(self, "values", values)
        object.__setattr__(self, "names", tuple(self.names))


def check_feature_set(features: FeatureMatrix, *, version: str, names: Sequence[str]) -> None:
    """Raise unless ``features`` were computed with the expected feature set.

    Parameters
    ----------
    features : FeatureMatrix
    version : str
        The version a model was trained with.
    names : sequence of str
        The feature names a model was trained with, in order.

    Raises
    ------
    FeatureSetMismatchError
        If the version or the names (or their order) differ; the message says how.
    """
    names = tuple(names)
    problems = []
    if features.version != version:
        problems.append(f"version {features.version!r} != expected {version!r}")
    if features.names != names:
        missing = [n for n in names if n not in set(features.names)]
        extra = [n for n in features.names if n not in set(names)]
        detail = f"{len(features.names)} names vs {len(names)} expected"
        if missing or extra:
            detail += f"; missing {missing[:5]}, unexpected {extra[:5]}"
        else:
            detail += "; same names in another order"
        problems.append(detail)
    if problems:
        raise FeatureSetMismatchError("feature set mismatch: " + "; ".join(problems))


def _window_names(config: FeatureConfig) -> list[str]:
    names = []
    for minutes in config.windows_min:
        label = f"{minutes:g}m"
        if "summary" in config.families:
            names += [f"log_{s}_{label}" for s in SUMMARY_STATISTICS] + [f"{s}_{label}" for s in SHARE_STATISTICS]
        if "dynamics" in config.families:
            names += [f"{s}_{label}" for s in DYNAMIC_STATISTICS]
    return names


def _window_columns(counts: NDArray[np.float64], epoch_seconds: float,
                    config: FeatureConfig) -> list[NDArray[np.float64]]:
    """Window-family columns for one segment of a night, in :func:`_window_names` order."""
    logs = np.log1p(counts)
    half_widths = tuple(half_width_epochs(m, epoch_seconds) for m in config.windows_min)
    tile = max(2, round(config.tile_min * 60.0 / epoch_seconds))
    level = config.movement_cpm * epoch_seconds / 60.0
    dynamic = "dynamics" in config.families
    if dynamic:
        sampen = sample_entropy(logs, half_widths, order=config.sampen_order, tolerance=config.sampen_tolerance)
        permen = permutation_entropy(logs, half_widths, order=config.permen_order)
    columns: list[NDArray[np.float64]] = []
    shared: dict[int, tuple[NDArray[np.float64], NDArray[np.float64]]] = {}  # tile statistics of any window size
    for col, h in enumerate(half_widths):
        windows = CentredWindows(logs, h, shared=shared)
        if "summary" in config.families:
            columns += list(window_summaries(windows).values())
            columns += list(window_shares(counts, h, movement_level=level).values())
        if dynamic:
            columns += [
                sampen[:, col], permen[:, col], spectral_entropy(windows),
                max_level_shift(windows, width=tile), max_var_shift(windows, width=tile),
                lumpiness(windows, width=tile), stability(windows, width=tile),
                flat_spots(windows), crossing_points(windows), lag1_autocorrelation(windows),
            ]
    return columns


def _validated(counts: ArrayLike, epoch_seconds: float, lights_off_epoch: int,
               lights_on_epoch: int | None, chunk_epochs: int) -> NDArray[np.float64]:
    x = np.array(counts, dtype=np.float64)
    problems = []
    if x.ndim != 1 or x.shape[0] == 0:
        problems.append(f"counts must be a non-empty 1-D array, got shape {x.shape}")
    elif np.isinf(x).any() or (x < 0).any():
        problems.append("counts must be finite and non-negative (NaN marks a missing epoch)")
    if not (np.isfinite(epoch_seconds) and epoch_seconds > 0):
        problems.append(f"epoch_seconds must be a positive number, got {epoch_seconds!r}")
    n = x.shape[0] if x.ndim == 1 else 0
    if not 0 <= lights_off_epoch <= n:
        problems.append(f"lights_off_epoch must be in 0..{n}, got {lights_off_epoch}")
    if lights_on_epoch is not None and not lights_off_epoch <= lights_on_epoch <= n:
        problems.append(f"lights_on_epoch must be in lights_off_epoch..{n}, got {lights_on_epoch}")
    if chunk_epochs < 1:
        problems.append(f"chunk_epochs must be at least 1, got {chunk_epochs}")
    if problems:
        raise FeatureInputError("; ".join(problems))
    return x


def compute_features(counts: ArrayLike, epoch_seconds: float, *, config: FeatureConfig = FeatureConfig(),
                     lights_off_epoch: int = 0, lights_on_epoch: int | None = None,
                     chunk_epochs: int = 4096) -> FeatureMatrix:
    """Compute the feature matrix of one night.

    Parameters
    ----------
    counts : array-like of float, shape (n_epochs,)
        Activity counts per epoch, non-negative; NaN marks a missing (gap-filled) epoch.
    epoch_seconds : float
        Epoch length in seconds (15, 30 or 60 for the ``rules`` family).
    config : FeatureConfig, default=FeatureConfig()
        Which features, and their parameters.
    lights_off_epoch : int, default=0
        Index of the first epoch after lights-off (0 = recording start).
    lights_on_epoch : int or None, default=None
        Index of the first epoch after lights-on; None if unknown.
    chunk_epochs : int, default=4096
        Window features are computed in chunks of this many epochs (plus a halo of the largest
        half-width on each side) to bound memory; the values do not depend on it (up to
        rounding in the last bits of the spectral matrix product).

    Returns
    -------
    FeatureMatrix
        ``values`` float32 of shape (n_epochs, n_features), ``names`` and ``version``.

    Raises
    ------
    FeatureInputError
        If counts are not a non-empty 1-D array of non-negative numbers or NaN, if
        ``epoch_seconds`` is not positive, if a lights index lies outside the night, or if
        ``chunk_epochs`` < 1.
    """
    x = _validated(counts, epoch_seconds, lights_off_epoch, lights_on_epoch, chunk_epochs)
    n = x.shape[0]
    names, blocks = _window_names(config), []
    if names:
        halo = max(half_width_epochs(m, epoch_seconds) for m in config.windows_min)
        window_block = np.empty((n, len(names)), dtype=np.float32)
        for start in range(0, n, chunk_epochs):
            stop = min(n, start + chunk_epochs)
            seg_lo, seg_hi = max(0, start - halo), min(n, stop + halo)
            columns = _window_columns(x[seg_lo:seg_hi], epoch_seconds, config)
            window_block[start:stop] = np.column_stack(columns)[start - seg_lo:stop - seg_lo]
        blocks.append(window_block)
    extra: dict[str, NDArray[np.float64]] = {}
    if "lags" in config.families:
        extra |= lag_features(x, half_width_epochs(config.windows_min[0], epoch_seconds), scale=night_scale(x))
    if "context" in config.families:
        extra |= time_context(n, epoch_seconds, lights_off_epoch=lights_off_epoch, lights_on_epoch=lights_on_epoch)
        extra |= movement_context(x, epoch_seconds, movement_level=config.movement_cpm * epoch_seconds / 60.0)
    if "rules" in config.families:
        extra |= rule_scores(x, epoch_seconds)
    if "night" in config.families:
        extra |= night_normalisers(x, n, quantiles=config.night_quantiles)
    if extra:
        names += list(extra)
        blocks.append(np.column_stack(list(extra.values())).astype(np.float32))
    return FeatureMatrix(values=np.hstack(blocks), names=tuple(names),
                         version=config.version_for(epoch_seconds))
