"""Benchmark of the default feature set against a per-window loop over reference libraries.

Measures, on one core (BLAS limited to one thread):

- ``ms_per_night``: default features (all families) for 200 simulated nights of 1,000 30-s epochs
  (wall clock; ``cpu_ms_per_night`` is the process CPU time, less sensitive to other load);
- ``long_recording_s``: the same for one simulated 14-day, 24-hour recording (40,320 epochs);
- ``peak_rss_mb``: peak resident memory of the process after both, before any reference library
  is imported;
- ``reference_ms_per_night``: the same window features for one night through a plain Python loop
  over the 4 x 1,000 windows calling antropy / scipy / statsmodels / pandas / numpy (the R-only
  features as direct numpy re-statements of their definitions), after warm-up;
- ``speedup_vs_reference``: reference_ms_per_night / ms_per_night.

All counts are simulated (seeded). Run from the project root: ``python bench/features.py``.
The last printed line is one JSON object with the figures.
"""

from __future__ import annotations

import json
import resource
import time
import warnings

import numpy as np
from threadpoolctl import threadpool_limits

from models.features.matrix import FeatureConfig, compute_features
from models.features.windows import half_width_epochs

N_NIGHTS, N_EPOCHS, LONG_EPOCHS, EPOCH_SECONDS = 200, 1000, 40_320, 30


def simulated_night(rng: np.random.Generator, n: int) -> np.ndarray:
    """Simulated counts: a restless start and end around a sleep period with sparse twitches."""
    awake = int(n * rng.uniform(0.05, 0.2))
    sleep = n - 2 * awake
    gain = rng.uniform(0.5, 2.0)  # device / person movement level
    counts = np.concatenate([
        rng.poisson(150 * gain, awake),
        rng.poisson(20 * gain, sleep) * (rng.random(sleep) < rng.uniform(0.05, 0.3)),
        rng.poisson(120 * gain, awake),
    ]).astype(float)
    if rng.random() < 0.2:  # some nights have a short gap
        start = int(rng.integers(awake, n - awake - 20))
        counts[start:start + 20] = np.nan
    return counts


def simulated_recording(rng: np.random.Generator, days: int) -> np.ndarray:
    """Simulated 24-hour recording: alternating 16-h days of activity and 8-h nights."""
    per_day = 24 * 3600 // EPOCH_SECONDS
    parts = []
    for _ in range(days):
        day, night = per_day * 2 // 3, per_day // 3
        parts.append(rng.poisson(300, day) * (rng.random(day) < 0.7))
        parts.append(rng.poisson(15, night) * (rng.random(night) < 0.12))
    return np.concatenate(parts).astype(float)


def reference_window_features(counts: np.ndarray, config: FeatureConfig) -> int:
    """Window features of one night computed window by window with the reference libraries."""
    import antropy as ant
    import pandas as pd
    import scipy.stats as st
    from statsmodels.tsa.stattools import acf

    logs = np.log1p(counts)
    tile = round(config.tile_min * 60 / EPOCH_SECONDS)
    n_values = 0
    for minutes in config.windows_min:
        h = half_width_epochs(minutes, EPOCH_SECONDS)
        for i in range(logs.size):
            w = logs[max(0, i - h):i + h + 1]
            w = w[~np.isnan(w)]
            if w.size < 2 * tile:  # windows inside a gap: nothing comparable to compute
                continue
            c = counts[max(0, i - h):i + h + 1]
            values = [np.mean(w), np.std(w), *np.percentile(w, [0, 10, 25, 50, 75, 90, 100]),
                      st.skew(w), st.kurtosis(w), np.mean(c == 0), np.mean(c > 20), w.size / (2 * h + 1),
                      ant.sample_entropy(w, order=2, tolerance=config.sampen_tolerance),
                      ant.perm_entropy(w, order=3, delay=1, normalize=True),
                      ant.spectral_entropy(w, sf=1, method="fft", normalize=True)]
            tiles = np.lib.stride_tricks.sliding_window_view(w, tile)
            means, variances = tiles.mean(axis=1), tiles.var(axis=1, ddof=1)
            values += [np.max(np.abs(means[tile:] - means[:-tile])),
                       np.max(np.abs(variances[tile:] - variances[:-tile]))]
            z = (w - w.mean()) / (w.std(ddof=1) or 1.0)
            blocks = z[:(w.size // tile) * tile].reshape(-1, tile)
            values += [blocks.var(axis=1, ddof=1).var(ddof=1), blocks.mean(axis=1).var(ddof=1)]
            below = w <= np.median(w)
            labels = pd.cut(w, bins=10, labels=False)
            runs = np.diff(np.flatnonzero(np.diff(np.r_[np.nan, labels, np.nan]) != 0))
            values += [np.sum(below[1:] != below[:-1]), runs.max(), acf(w, nlags=1, fft=False)[1]]
            n_values += len(values)
    return n_values


def main() -> None:
    rng = np.random.default_rng(20311)
    nights = [simulated_night(rng, N_EPOCHS) for _ in range(N_NIGHTS)]
    recording = simulated_recording(rng, 14)
    assert recording.size == LONG_EPOCHS
    config = FeatureConfig()
    with threadpool_limits(1):
        n_features = compute_features(nights[0], EPOCH_SECONDS).values.shape[1]  # warm-up
        start, cpu_start = time.perf_counter(), time.process_time()
        for counts in nights:
            compute_features(counts, EPOCH_SECONDS, config=config)
        ms_per_night = (time.perf_counter() - start) / N_NIGHTS * 1e3
        cpu_ms_per_night = (time.process_time() - cpu_start) / N_NIGHTS * 1e3
        start = time.perf_counter()
        compute_features(recording, EPOCH_SECONDS, config=config)
        long_recording_s = time.perf_counter() - start
    peak_rss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux: KiB

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the references warn on constant windows (that is the point)
        reference_window_features(nights[1][:60], config)  # imports and numba warm-up, not timed
        start = time.perf_counter()
        reference_window_features(nights[1], config)
        reference_ms = (time.perf_counter() - start) * 1e3

    figures = {
        "ms_per_night": round(ms_per_night, 2),
        "cpu_ms_per_night": round(cpu_ms_per_night, 2),
        "speedup_vs_reference": round(reference_ms / ms_per_night, 1),
        "peak_rss_mb": round(peak_rss_mb, 1),
        "long_recording_s": round(long_recording_s, 3),
        "reference_ms_per_night": round(reference_ms, 1),
        "n_nights": N_NIGHTS,
        "n_epochs": N_EPOCHS,
        "n_features": n_features,
        "feature_version": config.version + f"-{EPOCH_SECONDS}s",
    }
    print(f"default features: {ms_per_night:.1f} ms per {N_EPOCHS}-epoch night ({n_features} features), "
          f"{long_recording_s:.2f} s for {LONG_EPOCHS} epochs, peak RSS {peak_rss_mb:.0f} MB")
    print(f"reference loop: {reference_ms / 1e3:.1f} s per night -> {reference_ms / ms_per_night:.0f}x")
    print(json.dumps(figures))


if __name__ == "__main__":
    main()
