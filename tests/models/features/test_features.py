"""The feature matrix: names, versioning, locality, scale, missing epochs, edge cases."""

from __future__ import annotations

import inspect
import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from models.features.matrix import (
    FAMILIES,
    FeatureConfig,
    FeatureInputError,
    FeatureMatrix,
    FeatureSetMismatchError,
    check_feature_set,
    compute_features,
)
from models.features.windows import half_width_epochs

WINDOW_ONLY = FeatureConfig(families=("summary", "dynamics"))
LOCAL_NAME = re.compile(r"_\d+(\.\d+)?m$")  # window features end in the window length, e.g. "_10m"


def _night(n: int = 600, seed: int = 0) -> np.ndarray:
    """Simulated night: restless start and end, sleep with sparse small counts in between."""
    rng = np.random.default_rng(seed)
    awake = n // 8
    x = np.concatenate([
        rng.poisson(150, awake), rng.poisson(20, n - 2 * awake) * (rng.random(n - 2 * awake) < 0.15),
        rng.poisson(120, awake),
    ]).astype(float)
    return x


def _column(fm: FeatureMatrix, name: str) -> np.ndarray:
    return fm.values[:, fm.names.index(name)]


# ---- shape, names, version -----------------------------------------------------------------

def test_default_feature_set_layout():
    fm = compute_features(_night(), 30)
    assert fm.values.dtype == np.float32 and fm.values.shape == (600, len(fm.names))
    assert len(set(fm.names)) == len(fm.names)
    # 4 windows x (11 summary + 3 shares + 10 dynamics), 21 lags, 5 context, 3 rules, 4 night
    assert len(fm.names) == 4 * 24 + 21 + 5 + 3 + 4
    assert fm.names[:2] == ("log_mean_10m", "log_sd_10m") and "sampen_90m" in fm.names
    assert fm.names[-4:] == ("night_p50", "night_p75", "night_p90", "night_p95")
    assert fm.version == FeatureConfig().version + "-30s"
    assert not fm.values.flags.writeable


def test_version_identifies_configuration_and_epoch_length():
    base = FeatureConfig()
    assert FeatureConfig(windows_min=(90, 60, 30, 10)).version == base.version  # canonical order
    assert FeatureConfig(families=tuple(reversed(FAMILIES))).version == base.version
    assert FeatureConfig(sampen_tolerance=0.3).version != base.version
    assert FeatureConfig(windows_min=(10, 30)).version != base.version
    assert compute_features(_night(), 60).version != compute_features(_night(), 30).version
    assert FeatureConfig.from_dict(FeatureConfig(tile_min=4).to_dict()) == FeatureConfig(tile_min=4)


def test_config_rejects_invalid_values():
    with pytest.raises(FeatureInputError, match="families") as err:
        FeatureConfig(families=("summary", "spectra"))
    assert err.value.code == "invalid_feature_input"
    with pytest.raises(FeatureInputError, match="windows_min"):
        FeatureConfig(windows_min=(0, 10))
    with pytest.raises(FeatureInputError, match="unknown"):
        FeatureConfig.from_dict({"window": [10]})


def test_check_feature_set_refuses_a_mismatch():
    fm = compute_features(_night(), 30)
    check_feature_set(fm, version=fm.version, names=fm.names)  # same set: no error
    with pytest.raises(FeatureSetMismatchError, match="version") as err:
        check_feature_set(fm, version=FeatureConfig(tile_min=4).version + "-30s", names=fm.names)
    assert err.value.code == "feature_set_mismatch"
    with pytest.raises(FeatureSetMismatchError, match="missing \\['extra'\\]"):
        check_feature_set(fm, version=fm.version, names=(*fm.names, "extra"))
    with pytest.raises(FeatureSetMismatchError, match="another order"):
        check_feature_set(fm, version=fm.version, names=fm.names[::-1])


@pytest.mark.parametrize(("counts", "message"), [
    (np.array([1.0, -2.0, 3.0]), "non-negative"), (np.array([1.0, np.inf]), "finite"),
    (np.zeros((3, 2)), "1-D"), (np.zeros(0), "non-empty"),
])
def test_invalid_counts_are_refused(counts, message):
    with pytest.raises(FeatureInputError, match=message):
        compute_features(counts, 30)


def test_invalid_lights_are_refused():
    with pytest.raises(FeatureInputError, match="lights_on_epoch"):
        compute_features(_night(100), 30, lights_off_epoch=50, lights_on_epoch=20)


def test_features_take_no_reference_labels():
    params = set(inspect.signature(compute_features).parameters)
    assert params == {"counts", "epoch_seconds", "config", "lights_off_epoch", "lights_on_epoch", "chunk_epochs"}


# ---- windows in minutes, missing epochs ------------------------------------------------------

@pytest.mark.parametrize(("epoch_seconds", "minutes", "width"), [
    # hand computation: a window of m minutes spans m * 60 / epoch_seconds epochs plus the centre epoch
    (15, 10, 41), (15, 90, 361), (30, 10, 21), (30, 90, 181), (60, 10, 11), (60, 90, 91),
])
def test_windows_span_the_same_minutes_at_every_epoch_length(epoch_seconds, minutes, width):
    fm = compute_features(_night(400), epoch_seconds, config=WINDOW_ONLY)
    # at the first epoch only the centre and the (width - 1) / 2 epochs after it lie in the recording
    assert _column(fm, f"coverage_{minutes}m")[0] == pytest.approx(((width - 1) / 2 + 1) / width)


def test_missing_epochs_do_not_look_like_stillness():
    x = _night(400, 3)
    x[200:230] = 300.0  # a movement bout ...
    gap, zeros = x.copy(), x.copy()
    gap[200:230], zeros[200:230] = np.nan, 0.0  # ... lost to a gap, versus truly still
    fg, fz = compute_features(gap, 30), compute_features(zeros, 30)
    i = 215
    assert _column(fg, "coverage_10m")[i] < 0.5 and _column(fz, "coverage_10m")[i] == 1.0
    assert np.isnan(_column(fg, "log_mean_10m")[i])  # nothing observed in the window
    assert _column(fg, "zero_share_30m")[i] < _column(fz, "zero_share_30m")[i]
    assert np.isnan(_column(fg, "since_move_min")[i]) and np.isnan(_column(fg, "lag_+0")[i])
    assert _column(fg, "still_run_min")[235] < _column(fz, "still_run_min")[235]


# ---- locality and scale ------------------------------------------------------------------------

@settings(max_examples=25, deadline=None)
@given(data=st.data())
def test_window_features_are_local(data):
    epoch_seconds = data.draw(st.sampled_from([30, 60]), label="epoch_seconds")
    n = data.draw(st.integers(200, 320), label="n")
    levels = [0.0, 0.0, 0.0, 1.0, 2.0, 5.0, 40.0, 300.0, np.nan]
    x = np.array(data.draw(st.lists(st.sampled_from(levels), min_size=n, max_size=n), label="counts"))
    c = data.draw(st.integers(0, n - 1), label="epoch")
    h_max = half_width_epochs(max(WINDOW_ONLY.windows_min), epoch_seconds)
    outside = np.abs(np.arange(n) - c) > h_max
    noise = data.draw(st.lists(st.sampled_from([0.0, 3.0, 77.0, 1000.0, np.nan]), min_size=n, max_size=n))
    y = np.where(outside, np.array(noise), x)
    fx = compute_features(x, epoch_seconds, config=WINDOW_ONLY)
    fy = compute_features(y, epoch_seconds, config=WINDOW_ONLY)
    assert all(LOCAL_NAME.search(name) for name in fx.names)
    np.testing.assert_array_equal(fx.values[c], fy.values[c])


@pytest.mark.parametrize("factor", [0.25, 3.7, 1000.0])
@pytest.mark.parametrize("quiet", [False, True])  # quiet: over 90% zeros, the scale falls back
def test_lag_features_cancel_device_gain(factor, quiet):
    x = _night(300, 5)
    if quiet:
        x[np.random.default_rng(1).random(300) < 0.95] = 0.0
    cfg = FeatureConfig(families=("lags",))
    a, b = compute_features(x, 30, config=cfg), compute_features(x * factor, 30, config=cfg)
    np.testing.assert_allclose(a.values, b.values, rtol=1e-6)
    assert np.nanmax(a.values) > 0


def test_chunked_computation_gives_the_same_values():
    x = _night(1500, 9)
    x[700:720] = np.nan
    whole = compute_features(x, 30, config=WINDOW_ONLY, chunk_epochs=10_000)
    chunked = compute_features(x, 30, config=WINDOW_ONLY, chunk_epochs=400)
    np.testing.assert_allclose(chunked.values, whole.values, rtol=1e-6, atol=1e-7)


# ---- still nights -----------------------------------------------------------------------------

@pytest.mark.filterwarnings("error")
@pytest.mark.parametrize("value", [0.0, 4.0])
def test_still_nights_give_finite_or_nan_without_warnings(value):
    fm = compute_features(np.full(500, value), 30)
    assert not np.isinf(fm.values).any()
    for stat in ("sampen", "permen", "specen", "lumpiness", "stability", "crossings"):
        assert np.all(_column(fm, f"{stat}_30m") == 0.0), stat
    assert np.isnan(_column(fm, "log_skew_10m")).all() and np.isnan(_column(fm, "acf1_60m")).all()


@pytest.mark.filterwarnings("error")
@pytest.mark.parametrize("n", [1, 2, 3, 5, 21, 40])
@pytest.mark.parametrize("kind", ["zeros", "counts", "missing"])
@pytest.mark.parametrize("epoch_seconds", [15, 30, 60])
def test_short_nights_give_finite_or_nan_without_warnings(n, kind, epoch_seconds):
    rng = np.random.default_rng(n)
    x = {"zeros": np.zeros(n), "counts": rng.poisson(5, n).astype(float),
         "missing": np.where(rng.random(n) < 0.4, np.nan, rng.poisson(5, n).astype(float))}[kind]
    fm = compute_features(x, epoch_seconds)
    assert fm.values.shape == (n, len(fm.names)) and not np.isinf(fm.values).any()


# ---- context, rules, night ----------------------------------------------------------------------

def test_context_features_by_hand():
    x = np.array([0, 0, 50, 0, np.nan, 0, 0, 0, 60, 0], dtype=float)  # 60-s epochs, level 40 counts
    fm = compute_features(x, 60, config=FeatureConfig(families=("context",)), lights_off_epoch=1,
                          lights_on_epoch=9)
    np.testing.assert_array_equal(_column(fm, "since_lights_off_min"), np.arange(10) - 1)
    np.testing.assert_array_equal(_column(fm, "to_lights_on_min"), 9 - np.arange(10))
    nan = np.nan
    np.testing.assert_array_equal(_column(fm, "since_move_min"), [1, 2, 0, 1, nan, 1, 2, 3, 0, 1])
    np.testing.assert_array_equal(_column(fm, "to_move_min"), [2, 1, 0, 1, nan, 3, 2, 1, 0, 1])
    np.testing.assert_array_equal(_column(fm, "still_run_min"), [2, 2, 0, 1, nan, 3, 3, 3, 0, 1])
    unknown = compute_features(x, 60, config=FeatureConfig(families=("context",)))
    assert np.isnan(_column(unknown, "to_lights_on_min")).all()


def test_rule_scores_are_the_rules_continuous_scores():
    from models.scoring.rules import continuous_scores

    x = _night(300, 4)
    x[10] = np.nan
    fm = compute_features(x, 30, config=FeatureConfig(families=("rules",)))
    scores = continuous_scores(x, 30)
    assert fm.names == tuple(f"rule_{k}" for k in sorted(scores))
    for key, values in scores.items():
        expected = values.astype(np.float32)
        expected[10] = np.nan  # a missing epoch has no score of its own
        np.testing.assert_array_equal(_column(fm, f"rule_{key}"), expected)


def test_rule_scores_beside_a_gap_do_not_read_it_as_stillness():
    # steady 30 counts per minute: Cole-Kripke wake (D = 1e-5 * 30 * 4035 > 1, Cole et al. 1992, from memory);
    # read as zeros, the gap would pull the epochs beside it under the wake level
    x = np.full(300, 15.0)
    x[140:170] = np.nan
    fm = compute_features(x, 30, config=FeatureConfig(families=("rules",)))
    zeros = compute_features(np.nan_to_num(x), 30, config=FeatureConfig(families=("rules",)))
    beside = [136, 137, 138, 139, 170, 171, 172, 173]
    assert (_column(fm, "rule_cole_kripke_score")[beside] < 0).all()  # score = 1 - D: wake
    assert (_column(zeros, "rule_cole_kripke_score")[beside] > 0).any()


def test_a_missing_epochs_row_still_looks_predictable():
    # window features of a missing epoch come from its observed neighbours, so its row is not all NaN and a
    # booster would return a number for it: the models discard predictions of missing epochs themselves
    x = _night(300, 5)
    x[150] = np.nan
    row = compute_features(x, 30).values[150]
    assert np.isfinite(row).sum() > row.size // 2


def test_night_normalisers_are_numpy_percentiles():
    x = _night(300, 6)
    x[:5] = np.nan
    fm = compute_features(x, 30, config=FeatureConfig(families=("night",)))
    expected = np.percentile(x[5:], [50, 75, 90, 95]).astype(np.float32)  # numpy reference
    np.testing.assert_array_equal(fm.values, np.broadcast_to(expected, (300, 4)))


def test_lags_are_neighbouring_counts_over_the_night_scale():
    x = np.array([0.0] * 95 + [10.0, 20.0, 30.0, 40.0, 50.0])
    fm = compute_features(x, 30, config=FeatureConfig(families=("lags",), windows_min=(2.0,)))
    # p90 of the counts is 0, so the scale falls back to p90 of the positive counts: 46 (numpy)
    scale = np.percentile([10.0, 20, 30, 40, 50], 90)
    assert fm.names == ("lag_-2", "lag_-1", "lag_+0", "lag_+1", "lag_+2")
    assert _column(fm, "lag_+0")[99] == np.float32(50 / scale)
    assert _column(fm, "lag_-1")[99] == np.float32(40 / scale) and np.isnan(_column(fm, "lag_+1")[99])
