"""Classical count rules against worked examples from the published formulas and against reference computations.

Every coefficient below is written out here from published-methods.md section 1 (Cole et al. 1992, Sadeh et al.
1994, the Oakley 1997 report), where all of them are tagged "from memory" [M]; the tests never read the rule
module's own tables. Two kinds of check: small worked examples computed by hand from the formula, and whole
recordings scored independently of our code, with ``scipy.ndimage.correlate1d`` (weighted windows) and pandas
rolling windows (Sadeh's window statistics).
"""

from __future__ import annotations

import math
import statistics
from fractions import Fraction

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy.ndimage import correlate1d

from models.errors import NightbankError
from models.scoring.rescoring import UnsupportedEpochLengthError, webster_rescore
from models.scoring.rules import (
    METHOD_IDS,
    RULES,
    InvalidRuleOptionError,
    UnknownMethodError,
    continuous_scores,
    score_with_rule,
)


def _rule(counts, epoch_seconds, method, **options):
    return score_with_rule(np.asarray(counts, dtype=float), epoch_seconds, method, **options)


def _minutes(counts: np.ndarray, epoch_seconds: int) -> tuple[np.ndarray, int]:
    """1-minute totals of 15/30-s counts (common practice), a trailing partial minute completed with zeros."""
    per_min = 60 // epoch_seconds
    return np.pad(counts, (0, -counts.size % per_min)).reshape(-1, per_min).sum(axis=1), per_min


def _recording(n_epochs: int, epoch_seconds: int, seed: int) -> np.ndarray:
    """Counts per epoch: stretches of 10 epochs, each still, restless or active (0 to 300 counts per minute)."""
    rng = np.random.default_rng(seed)
    per_minute = np.repeat(rng.choice([0.0, 3.0, 25.0, 60.0, 300.0], size=n_epochs // 10 + 1), 10)[:n_epochs]
    return rng.poisson(per_minute * epoch_seconds / 60.0).astype(float)


# Cole et al. 1992 1-minute sets, (P, weights for t-4 .. t+2): from memory (published-methods 1a)
CK_MAX_10S = (0.00001, (404, 598, 326, 441, 1408, 508, 350))
CK_MEAN_1MIN = (0.001, (106, 54, 58, 76, 230, 74, 67))


# ---------------------------------------------------------------------------------------------
# Cole-Kripke (Cole et al. 1992; coefficients from memory, published-methods 1a)
# D[t] = P * (W-4 A[t-4] + ... + W+2 A[t+2]); sleep if D < 1; score = 1 - D


def test_cole_kripke_max10s_worked_example_60s():
    # P = 0.00001, W = 404, 598, 326, 441, 1408, 508, 350 (from memory)
    counts = [10, 20, 30, 40, 50, 60, 70]
    d_first = 0.00001 * (1408 * 10 + 508 * 20 + 350 * 30)  # t=0: t-4..t-1 lie before the recording (zeros)
    d_middle = 0.00001 * (404 * 10 + 598 * 20 + 326 * 30 + 441 * 40 + 1408 * 50 + 508 * 60 + 350 * 70)
    d_last = 0.00001 * (404 * 30 + 598 * 40 + 326 * 50 + 441 * 60 + 1408 * 70)  # t+1, t+2 past the end
    result = _rule(counts, 60, "cole-kripke", coefficients="max-10s")
    assert result.score[[0, 4, 6]] == pytest.approx([1 - d_first, 1 - d_middle, 1 - d_last])
    assert result.sleep[[0, 4, 6]].tolist() == [1, 0, 0]


def test_cole_kripke_single_burst_shows_each_weight():
    # one minute of 200 counts at t=2; D[t] = 1e-5 * W(2-t) * 200 (from memory)
    result = _rule([0, 0, 200, 0, 0, 0, 0, 0], 60, "cole-kripke")
    d = [350 * 200e-5, 508 * 200e-5, 1408 * 200e-5, 441 * 200e-5, 326 * 200e-5, 598 * 200e-5, 404 * 200e-5, 0.0]
    assert result.score == pytest.approx([1 - v for v in d])
    assert result.sleep.tolist() == [1, 0, 0, 1, 1, 0, 1, 1]  # wake where W * 200e-5 >= 1: 508, 1408, 598
    assert result.sleep.dtype == np.float64  # 1.0 / 0.0, NaN where unscored


def test_cole_kripke_mean_1min_coefficients():
    # P = 0.001, W = 106, 54, 58, 76, 230, 74, 67 (from memory)
    counts = [0, 1, 0, 0, 2, 0, 0]
    d1 = 0.001 * (76 * 0 + 230 * 1 + 74 * 0 + 67 * 0)
    d2 = 0.001 * (58 * 0 + 76 * 1 + 230 * 0 + 74 * 0 + 67 * 2)
    d4 = 0.001 * (106 * 0 + 54 * 1 + 58 * 0 + 76 * 0 + 230 * 2 + 74 * 0 + 67 * 0)
    result = _rule(counts, 60, "cole-kripke", coefficients="mean-1min")
    assert result.score[[1, 2, 4]] == pytest.approx([1 - d1, 1 - d2, 1 - d4])


def test_cole_kripke_30s_sums_minutes_and_copies_calls_back():
    # 30-s epochs summed in pairs (common practice): minutes = [0, 200, 0, 0, 0(+partial)]
    counts = [0, 0, 100, 100, 0, 0, 0, 0, 0]
    d_min = [508 * 200e-5, 1408 * 200e-5, 441 * 200e-5, 326 * 200e-5, 598 * 200e-5]
    result = _rule(counts, 30, "cole-kripke")
    assert result.sleep.tolist() == [0, 0, 0, 0, 1, 1, 1, 1, 0]  # minute calls W W S S W, the last minute partial
    assert result.score == pytest.approx(np.repeat([1 - v for v in d_min], 2)[:9])


def test_cole_kripke_trailing_partial_minute_is_completed_with_zeros():
    # 11 epochs of 30 s: the 6th minute holds one epoch of 60 counts and one missing epoch (0)
    counts = [0] * 10 + [60]
    result = _rule(counts, 30, "cole-kripke")
    assert result.score[-1] == pytest.approx(1 - 1408 * 60e-5)  # D = 0.8448 -> sleep
    assert result.sleep[-1] == 1


@pytest.mark.parametrize("epoch_seconds", [15, 30, 60])
@pytest.mark.parametrize(("name", "published"), [("max-10s", CK_MAX_10S), ("mean-1min", CK_MEAN_1MIN)])
def test_cole_kripke_equals_scipy_weighted_window(epoch_seconds, name, published):
    # D = P * sum_k W_k A[t+k], k = -4..+2, zero outside the recording: scipy's correlate1d with a 7-tap kernel
    # and origin=1 puts kernel index j at offset j - 4; score = 1 - D, sleep if D < 1 (Cole et al. 1992)
    counts = _recording(601, epoch_seconds, seed=epoch_seconds)
    scale, weights = published
    if name == "mean-1min":
        counts = counts / 50.0  # near that set's scale (wake threshold 1.5 counts per minute)
    minutes, per_min = _minutes(counts, epoch_seconds)
    d = scale * correlate1d(minutes, np.asarray(weights, dtype=float), mode="constant", cval=0.0, origin=1)
    result = _rule(counts, epoch_seconds, "cole-kripke", coefficients=name)
    np.testing.assert_allclose(result.score, np.repeat(1.0 - d, per_min)[:counts.size], rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(result.sleep, np.repeat(d < 1.0, per_min)[:counts.size])
    assert 0.1 < result.sleep.mean() < 0.9  # both calls occur, so the comparison means something


def test_cole_kripke_15s_sums_four_epochs():
    counts = [50, 50, 50, 50] + [0] * 8
    result = _rule(counts, 15, "cole-kripke")
    assert result.score[:4] == pytest.approx([1 - 1408 * 200e-5] * 4)
    assert result.score[4:8] == pytest.approx([1 - 441 * 200e-5] * 4)


# ---------------------------------------------------------------------------------------------
# Sadeh (Sadeh et al. 1994; coefficients as reproduced in later papers, from memory)
# PS = 7.601 - 0.065 MEAN - 1.08 NAT - 0.056 SD - 0.703 LG; sleep if PS >= 0


def _ps(mean, nat, sd, lg):
    return 7.601 - 0.065 * mean - 1.08 * nat - 0.056 * sd - 0.703 * lg


def test_sadeh_worked_example_60s():
    counts = [0] * 6 + [200] + [0] * 5
    sd_6 = statistics.stdev([0, 0, 0, 0, 0, 200])  # sample SD of minutes t-5..t (ddof=1, from memory)
    expected = {
        0: _ps(0.0, 0, 0.0, 0.0),  # window 0..5 all zero (zero-padding before the start)
        1: _ps(200 / 11, 0, 0.0, 0.0),  # centred window -4..6 holds the burst; trailing SD window is all zero
        6: _ps(200 / 11, 0, sd_6, math.log(201)),
        11: _ps(200 / 11, 0, sd_6, 0.0),  # window 6..16 runs past the end (zeros)
    }
    result = _rule(counts, 60, "sadeh")
    for t, ps in expected.items():
        assert result.score[t] == pytest.approx(ps), t
    assert result.sleep[[0, 1, 6, 11]].tolist() == [1, 1, 0, 1]


@pytest.mark.parametrize(("burst", "nat"), [(49, 0), (50, 1), (99, 1), (100, 0)])
def test_sadeh_nat_counts_minutes_from_50_to_below_100(burst, nat):
    counts = [0] * 6 + [burst] + [0] * 5
    sd_6 = statistics.stdev([0, 0, 0, 0, 0, burst])
    result = _rule(counts, 60, "sadeh")
    assert result.score[6] == pytest.approx(_ps(burst / 11, nat, sd_6, math.log(burst + 1)))


def _sadeh_pandas(minutes: np.ndarray) -> np.ndarray:
    """PS from pandas rolling windows over the zero-padded minutes (Sadeh et al. 1994, coefficients from memory)."""
    padded = pd.Series(np.concatenate([np.zeros(5), minutes, np.zeros(5)]))
    inside = slice(5, 5 + minutes.size)
    mean = padded.rolling(11, center=True).mean().to_numpy()[inside]  # minutes t-5 .. t+5
    nat = ((padded >= 50) & (padded < 100)).astype(float).rolling(11, center=True).sum().to_numpy()[inside]
    sd = padded.rolling(6).std(ddof=1).to_numpy()[inside]  # minutes t-5 .. t
    return 7.601 - 0.065 * mean - 1.08 * nat - 0.056 * sd - 0.703 * np.log(minutes + 1.0)


@pytest.mark.parametrize("epoch_seconds", [15, 30, 60])
def test_sadeh_equals_pandas_rolling_windows(epoch_seconds):
    counts = _recording(601, epoch_seconds, seed=100 + epoch_seconds)
    minutes, per_min = _minutes(counts, epoch_seconds)
    ps = _sadeh_pandas(minutes)
    result = _rule(counts, epoch_seconds, "sadeh")
    np.testing.assert_allclose(result.score, np.repeat(ps, per_min)[:counts.size], rtol=1e-9, atol=1e-6)
    np.testing.assert_array_equal(result.sleep[np.abs(result.score) > 1e-6],
                                  np.repeat(ps >= 0, per_min)[:counts.size][np.abs(result.score) > 1e-6])
    assert 0.1 < result.sleep.mean() < 0.9
    assert ((minutes >= 50) & (minutes < 100)).any()  # NAT is exercised


def test_sadeh_30s_uses_minute_sums():
    counts_30 = [0] * 12 + [100, 100] + [0] * 10  # minute 6 holds 200
    counts_60 = [0] * 6 + [200] + [0] * 5
    r30, r60 = _rule(counts_30, 30, "sadeh"), _rule(counts_60, 60, "sadeh")
    np.testing.assert_allclose(r30.score, np.repeat(r60.score, 2))


# ---------------------------------------------------------------------------------------------
# Weighted count threshold (Oakley 1997 report; weights and thresholds from memory, 1d)
# TA = sum w_k A[t+k]; sleep if TA <= threshold; score = threshold - TA


def test_count_threshold_worked_example_60s():
    counts = [0, 0, 100, 0, 0, 0]
    ta = [100 / 25, 100 / 5, 100.0, 100 / 5, 100 / 25, 0.0]  # 1/25, 1/5, 1, 1/5, 1/25
    result = _rule(counts, 60, "count-threshold")
    assert result.score == pytest.approx([40 - v for v in ta])
    assert result.sleep.tolist() == [1, 1, 0, 1, 1, 1]
    assert _rule(counts, 60, "count-threshold", threshold=20).sleep.tolist() == [1, 1, 0, 1, 1, 1]  # 20 <= 20
    assert _rule(counts, 60, "count-threshold", threshold=19).sleep.tolist() == [1, 0, 0, 0, 1, 1]


def test_count_threshold_30s_fixed_span_weights():
    # window t-2 min .. t+2 min: 1/25 at t+-3, t+-4; 1/5 at t+-1, t+-2; 2 at t (from memory)
    counts = [10, 20, 30, 40, 50, 60, 70, 80, 90]
    ta_4 = 0.04 * 10 + 0.04 * 20 + 0.2 * 30 + 0.2 * 40 + 2 * 50 + 0.2 * 60 + 0.2 * 70 + 0.04 * 80 + 0.04 * 90
    ta_0 = 2 * 10 + 0.2 * 20 + 0.2 * 30 + 0.04 * 40 + 0.04 * 50
    result = _rule(counts, 30, "count-threshold")
    assert result.score[[0, 4]] == pytest.approx([40 - ta_0, 40 - ta_4])


def test_count_threshold_30s_fixed_taps_weights():
    # the five weights on five consecutive 30-s epochs (the other convention, from memory)
    counts = [10, 20, 30, 40, 50, 60, 70, 80, 90]
    ta_4 = 30 / 25 + 40 / 5 + 50 + 60 / 5 + 70 / 25
    result = _rule(counts, 30, "count-threshold", convention="fixed-taps")
    assert result.score[4] == pytest.approx(40 - ta_4)


def test_count_threshold_15s_fixed_span_covers_two_minutes_each_side():
    counts = np.zeros(17)
    counts[0] = counts[16] = 100.0  # 8 epochs (2 min) either side of t=8
    counts[4] = 10.0  # 4 epochs (1 min) before t=8
    result = _rule(counts, 15, "count-threshold")
    assert result.score[8] == pytest.approx(40 - (100 / 25 + 100 / 25 + 10 / 5))


# weights from the published description, from memory (published-methods 1d): the 60-s taper, and at 15/30 s
# either the same +/-2 minutes ("fixed-span", centre weight = epochs per minute) or the 5 taps on 5 epochs
_TAPER = [1 / 25, 1 / 5, 1, 1 / 5, 1 / 25]
THRESHOLD_WEIGHTS = {
    ("fixed-span", 60): _TAPER,
    ("fixed-span", 30): [1 / 25] * 2 + [1 / 5] * 2 + [2] + [1 / 5] * 2 + [1 / 25] * 2,
    ("fixed-span", 15): [1 / 25] * 4 + [1 / 5] * 4 + [4] + [1 / 5] * 4 + [1 / 25] * 4,
    ("fixed-taps", 30): _TAPER,
    ("fixed-taps", 15): _TAPER,
}


@pytest.mark.parametrize(("convention", "epoch_seconds"), list(THRESHOLD_WEIGHTS))
@pytest.mark.parametrize("threshold", [20.0, 40.0, 80.0])
def test_count_threshold_equals_scipy_weighted_window(convention, epoch_seconds, threshold):
    # TA = sum_k w_k A[t+k] over a centred window, zero outside the recording; sleep if TA <= threshold
    counts = _recording(500, epoch_seconds, seed=200 + epoch_seconds)
    ta = correlate1d(counts, np.asarray(THRESHOLD_WEIGHTS[(convention, epoch_seconds)], dtype=float),
                     mode="constant", cval=0.0)
    result = _rule(counts, epoch_seconds, "count-threshold", threshold=threshold, convention=convention)
    np.testing.assert_allclose(result.score, threshold - ta, rtol=1e-12, atol=1e-9)
    # the calls from exact rational arithmetic (Python's fractions): TA == threshold is sleep, whatever the rounding
    weights = [Fraction(w).limit_denominator(25) for w in THRESHOLD_WEIGHTS[(convention, epoch_seconds)]]
    padded = [0] * (len(weights) // 2) + [int(c) for c in counts] + [0] * (len(weights) // 2)
    exact_ta = [sum(w * a for w, a in zip(weights, padded[t:t + len(weights)], strict=True))
                for t in range(counts.size)]
    np.testing.assert_array_equal(result.sleep, [int(v <= Fraction(threshold)) for v in exact_ta])
    assert 0.05 < result.sleep.mean() < 0.95


def test_count_threshold_exact_tie_is_sleep():
    # 30-s fixed-span weights (from memory): (145 + 14 + 8 + 13) / 25 + (15 + 10 + 8 + 11) / 5 + 2 * 12
    # = 7.2 + 8.8 + 24 = 40 exactly, so TA <= 40 calls sleep; a plain float64 sum gives 40.00000000000001
    result = _rule([145, 14, 15, 10, 12, 8, 11, 8, 13], 30, "count-threshold")
    assert result.sleep[4] == 1 and result.score[4] == 0.0


# ---------------------------------------------------------------------------------------------
# Shared input handling, registry, errors


@pytest.mark.parametrize("method", METHOD_IDS)
def test_negative_counts_count_as_zero_and_non_finite_counts_are_unscored(method):
    counts = np.array([0, 5, np.nan, 300, -4, np.inf, 20, 0, 0, 0, 0, 0, 0, 0])
    a = _rule(counts, 30, method)
    b = _rule(np.where(counts == -4, 0.0, counts), 30, method)
    np.testing.assert_array_equal(a.sleep, b.sleep)
    np.testing.assert_array_equal(a.score, b.score)
    assert np.isnan(a.sleep[[2, 5]]).all() and np.isnan(a.score[[2, 5]]).all()
    assert not np.isnan(np.delete(a.sleep, [2, 5])).any()


@pytest.mark.parametrize("method", METHOD_IDS)
def test_count_scale_multiplies_counts_before_the_rule(method):
    counts = np.random.default_rng(3).poisson(30, 200).astype(float)
    a, b = _rule(counts, 30, method, count_scale=0.5), _rule(counts * 0.5, 30, method)
    np.testing.assert_array_equal(a.sleep, b.sleep)
    np.testing.assert_allclose(a.score, b.score)


@pytest.mark.parametrize("base", list(RULES))
@pytest.mark.parametrize("epoch_seconds", [15, 30, 60])
def test_webster_suffix_rescores_the_base_calls_and_keeps_the_score(base, epoch_seconds):
    counts = np.random.default_rng(7).poisson(25, 600).astype(float)
    plain, rescored = _rule(counts, epoch_seconds, base), _rule(counts, epoch_seconds, base + "+webster")
    np.testing.assert_array_equal(rescored.sleep, webster_rescore(plain.sleep, epoch_seconds))
    np.testing.assert_array_equal(rescored.score, plain.score)
    assert rescored.method == base + "+webster"


@pytest.mark.parametrize("base", list(RULES))
@pytest.mark.parametrize("epoch_seconds", [15, 30, 60])
def test_score_orientation_higher_means_sleep(base, epoch_seconds):
    counts = np.random.default_rng(11).gamma(0.5, epoch_seconds, 500)  # about 30 counts per minute
    result = _rule(counts, epoch_seconds, base)
    assert 0 < result.sleep.mean() < 1
    assert result.score[result.sleep == 0].max() < result.score[result.sleep == 1].min() + 1e-12
    assert set(np.unique(result.sleep)) <= {0, 1}
    quiet = _rule(np.zeros(40), epoch_seconds, base)
    assert quiet.sleep.tolist() == [1] * 40


@pytest.mark.parametrize("base", ["cole-kripke", "count-threshold"])
@settings(max_examples=50, deadline=None)
@given(extra=arrays(np.float64, 120, elements=st.floats(0, 500)))
def test_more_activity_never_raises_linear_scores(base, extra):
    counts = np.random.default_rng(5).poisson(10, 120).astype(float)
    assert np.all(_rule(counts + extra, 30, base).score <= _rule(counts, 30, base).score + 1e-9)


@settings(max_examples=60, deadline=None)
@given(counts=arrays(np.float64, st.integers(0, 130), elements=st.one_of(
    st.floats(min_value=-1e6, max_value=1e6), st.sampled_from([np.nan, np.inf, -np.inf]))),
       epoch_seconds=st.sampled_from([15, 30, 60]), method=st.sampled_from(METHOD_IDS))
def test_rules_never_fail_on_arbitrary_counts(counts, epoch_seconds, method):
    result = _rule(counts, epoch_seconds, method)
    assert result.sleep.shape == result.score.shape == counts.shape
    present = np.isfinite(counts)
    assert np.isfinite(result.score[present]).all() and np.isin(result.sleep[present], [0.0, 1.0]).all()
    assert np.isnan(result.score[~present]).all() and np.isnan(result.sleep[~present]).all()


def test_continuous_scores_match_each_rule():
    counts = np.random.default_rng(2).poisson(40, 300).astype(float)
    scores = continuous_scores(counts, 30)
    assert list(scores) == ["cole_kripke_score", "sadeh_score", "count_threshold_score"]
    for rule in RULES.values():
        np.testing.assert_array_equal(scores[rule.score_name], _rule(counts, 30, rule.method_id).score)


def test_empty_recording_gives_empty_results():
    assert _rule([], 30, "sadeh+webster").sleep.shape == (0,)
    assert all(v.shape == (0,) for v in continuous_scores([], 60).values())


@pytest.mark.parametrize("method", ["", "cole", "sadeh+foo", "webster", "count-threshold+webster+webster"])
def test_unknown_method_is_a_typed_error_listing_valid_ids(method):
    with pytest.raises(UnknownMethodError, match="valid methods: cole-kripke, cole-kripke\\+webster") as info:
        _rule([0, 1], 30, method)
    assert info.value.code == "unknown_method"
    assert isinstance(info.value, ValueError) and isinstance(info.value, NightbankError)


@pytest.mark.parametrize(("method", "options"), [
    ("cole-kripke", {"coefficients": "nope"}), ("count-threshold", {"convention": "nope"}),
    ("count-threshold", {"threshold": float("nan")}), ("sadeh", {"threshold": 3}),
    ("cole-kripke", {"count_scale": 0.0}),
])
def test_invalid_rule_options_are_typed_errors(method, options):
    with pytest.raises(InvalidRuleOptionError) as info:
        _rule([0, 1, 2], 60, method, **options)
    assert info.value.code == "invalid_rule_option"


@pytest.mark.parametrize("epoch_seconds", [20, 0, 45.5, True, "30"])
def test_unsupported_epoch_length(epoch_seconds):
    with pytest.raises(UnsupportedEpochLengthError) as info:
        _rule([0, 1, 2], epoch_seconds, "sadeh")
    assert info.value.code == "unsupported_epoch_length"


def test_method_ids_cover_every_rule_with_and_without_webster():
    assert METHOD_IDS == ("cole-kripke", "cole-kripke+webster", "sadeh", "sadeh+webster",
                          "count-threshold", "count-threshold+webster")
