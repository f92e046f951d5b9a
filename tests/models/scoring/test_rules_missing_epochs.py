"""Missing epochs (NaN counts, left by gap filling) are unscored by every rule, by Webster rescoring and by
the sleep parameters.

References: the rule formulas (Cole et al. 1992, Sadeh et al. 1994, the Oakley 1997 report; coefficients
from memory, published-methods section 1), written out here; the window convention for missing epochs
(weights renormalised over the present epochs, common practice, no published source) is checked against
pandas' own NaN handling (rolling windows skip NaN), numpy masked-array weighted means and scipy's
``correlate1d``; the sleep parameters against the AASM definitions (Iber et al. 2007, from memory)
computed with pandas on the scored epochs only.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.lib.stride_tricks import sliding_window_view
from scipy.ndimage import correlate1d

from models.scoring.parameters import sleep_parameters
from models.scoring.rescoring import webster_rescore
from models.scoring.rules import METHOD_IDS, continuous_scores, score_with_rule

NAN = np.nan
# Cole et al. 1992 max-10s set, (P, weights for t-4 .. t+2): from memory (published-methods 1a)
CK_P, CK_W = 0.00001, np.array([404, 598, 326, 441, 1408, 508, 350], dtype=float)
# Oakley 1997 weights at 60 s, offsets -2 .. +2 (from memory, published-methods 1d)
CT_W = np.array([1 / 25, 1 / 5, 1.0, 1 / 5, 1 / 25])


def _recording(n_epochs: int, epoch_seconds: int, seed: int) -> np.ndarray:
    """Counts per epoch in stretches of 10 epochs (still to active), with missing blocks and single missing epochs."""
    rng = np.random.default_rng(seed)
    per_minute = np.repeat(rng.choice([0.0, 3.0, 25.0, 60.0, 300.0], size=n_epochs // 10 + 1), 10)[:n_epochs]
    counts = rng.poisson(per_minute * epoch_seconds / 60.0).astype(float)
    counts[n_epochs // 3:n_epochs // 3 + 25] = NAN  # a gap
    counts[rng.choice(n_epochs, size=n_epochs // 20, replace=False)] = NAN  # scattered missing epochs
    return counts


@pytest.mark.parametrize("epoch_seconds", [15, 30, 60])
@pytest.mark.parametrize("method", METHOD_IDS)
def test_missing_epochs_are_unscored_and_present_epochs_scored(method, epoch_seconds):
    counts = _recording(500, epoch_seconds, seed=epoch_seconds)
    result = score_with_rule(counts, epoch_seconds, method)
    missing = np.isnan(counts)
    assert np.isnan(result.sleep[missing]).all() and np.isnan(result.score[missing]).all()
    assert np.isin(result.sleep[~missing], [0.0, 1.0]).all() and np.isfinite(result.score[~missing]).all()
    np.testing.assert_array_equal(result.unscored, missing)
    assert 0 < np.nanmean(result.sleep) < 1  # both calls occur among the scored epochs


def test_continuous_scores_are_nan_at_missing_epochs():
    counts = _recording(300, 30, seed=4)
    for name, score in continuous_scores(counts, 30).items():
        np.testing.assert_array_equal(np.isnan(score), np.isnan(counts), err_msg=name)


# ---------------------------------------------------------------------------------------------
# Windows over missing epochs: weights renormalised over the present epochs


def test_cole_kripke_worked_example_with_a_missing_minute():
    # t = 2 sees minutes -2, -1 (before the start: zeros), 0, 1, 2 = 200, 3 = missing, 4 = 0
    result = score_with_rule([0, 0, 200, NAN, 0, 0, 0, 0], 60, "cole-kripke")
    d2 = CK_P * 1408 * 200 * CK_W.sum() / (CK_W.sum() - 508)  # weight 508 (t+1) is missing
    d4 = CK_P * 326 * 200 * CK_W.sum() / (CK_W.sum() - 441)  # t = 4: minute 2 is t-2 (326), 3 is t-1 (441)
    assert result.score[[2, 4]] == pytest.approx([1 - d2, 1 - d4])
    assert result.sleep[2] == 0.0 and np.isnan(result.sleep[3]) and np.isnan(result.score[3])


def test_cole_kripke_equals_numpy_masked_weighted_mean():
    # D = P * sum(W) * (weighted mean of the present minutes of t-4 .. t+2), zeros outside the recording
    counts = _recording(400, 60, seed=8)
    padded = np.ma.masked_invalid(np.concatenate([np.zeros(4), counts, np.zeros(2)]))
    windows = sliding_window_view(padded.data, 7)
    masks = sliding_window_view(np.ma.getmaskarray(padded), 7)
    d = np.array([CK_P * CK_W.sum() * np.ma.average(np.ma.array(w, mask=m), weights=CK_W) if not m.all() else NAN
                  for w, m in zip(windows, masks, strict=True)])
    result = score_with_rule(counts, 60, "cole-kripke")
    present = ~np.isnan(counts)
    np.testing.assert_allclose(result.score[present], 1.0 - d[present], rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(result.sleep[present], (d < 1.0)[present])


def _sadeh_pandas_with_gaps(minutes: np.ndarray) -> np.ndarray:
    """PS from pandas rolling windows, which skip NaN (missing) minutes; zeros outside the recording."""
    padded = pd.Series(np.concatenate([np.zeros(5), minutes, np.zeros(5)]))
    inside = slice(5, 5 + minutes.size)
    centred = padded.rolling(11, center=True, min_periods=1)
    mean = centred.mean().to_numpy()[inside]  # mean of the present minutes t-5 .. t+5
    nat_share = ((padded >= 50) & (padded < 100)).astype(float).where(padded.notna())
    nat = 11 * nat_share.rolling(11, center=True, min_periods=1).mean().to_numpy()[inside]
    sd = padded.rolling(6, min_periods=2).std(ddof=1).fillna(0.0).to_numpy()[inside]  # present minutes t-5 .. t
    return 7.601 - 0.065 * mean - 1.08 * nat - 0.056 * sd - 0.703 * np.log(minutes + 1.0)


def test_sadeh_equals_pandas_rolling_windows_that_skip_missing_minutes():
    counts = _recording(600, 60, seed=12)
    ps = _sadeh_pandas_with_gaps(counts)
    result = score_with_rule(counts, 60, "sadeh")
    present = ~np.isnan(counts)
    np.testing.assert_allclose(result.score[present], ps[present], rtol=1e-9, atol=1e-6)
    assert (((counts >= 50) & (counts < 100))[present]).any()  # NAT is exercised


def test_partly_missing_minute_is_estimated_from_its_present_epochs():
    # 30-s epochs: minute 6 holds 100 counts in one epoch and a missing one, i.e. 200 per minute
    r30 = score_with_rule([0] * 12 + [100, NAN] + [0] * 10, 30, "sadeh")
    r60 = score_with_rule([0] * 6 + [200] + [0] * 5, 60, "sadeh")
    assert r30.score[12] == pytest.approx(r60.score[6])
    assert np.isnan(r30.score[13]) and np.isnan(r30.sleep[13])
    ck30 = score_with_rule([0] * 4 + [NAN, 30, 30, 30] + [0] * 8, 15, "cole-kripke")  # 15 s: 90 of 3/4 minute
    ck60 = score_with_rule([0, 120, 0, 0], 60, "cole-kripke")
    assert ck30.score[5] == pytest.approx(ck60.score[1])


def test_count_threshold_worked_example_with_a_missing_epoch():
    result = score_with_rule([0, 0, 100, NAN, 0, 0], 60, "count-threshold")
    present_2 = CT_W.sum() - 1 / 5  # the t+1 weight is missing
    ta_2 = 100 * 1.0 * CT_W.sum() / present_2
    ta_4 = 100 / 25 * CT_W.sum() / (CT_W.sum() - 1 / 5)  # t-2 = 100 (1/25), t-1 missing (1/5)
    assert result.score[[2, 4]] == pytest.approx([40 - ta_2, 40 - ta_4])
    assert result.sleep[[0, 2, 4]].tolist() == [1.0, 0.0, 1.0] and np.isnan(result.sleep[3])


@pytest.mark.parametrize("epoch_seconds", [15, 30, 60])
def test_count_threshold_equals_scipy_renormalised_window(epoch_seconds):
    # TA = correlate(present counts, w) * sum(w) / correlate(presence, w); outside the recording counts are
    # zeros that are present (cval 0 for the counts, 1 for the presence)
    weights = {60: CT_W, 30: np.array([1 / 25] * 2 + [1 / 5] * 2 + [2.0] + [1 / 5] * 2 + [1 / 25] * 2),
               15: np.array([1 / 25] * 4 + [1 / 5] * 4 + [4.0] + [1 / 5] * 4 + [1 / 25] * 4)}[epoch_seconds]
    counts = _recording(500, epoch_seconds, seed=20 + epoch_seconds)
    present = ~np.isnan(counts)
    with np.errstate(invalid="ignore", divide="ignore"):  # inside the gap no weight is present: NaN, not compared
        ta = correlate1d(np.where(present, counts, 0.0), weights, mode="constant", cval=0.0) * weights.sum() \
            / correlate1d(present.astype(float), weights, mode="constant", cval=1.0)
    result = score_with_rule(counts, epoch_seconds, "count-threshold")
    np.testing.assert_allclose(result.score[present], (40 - ta)[present], rtol=1e-9, atol=1e-9)
    clear = present & (np.abs(40 - ta) > 1e-9)
    np.testing.assert_array_equal(result.sleep[clear], (ta <= 40)[clear])


@pytest.mark.parametrize(("base", "per_minute"), [("cole-kripke", 30.0), ("sadeh", 100.0), ("count-threshold", 30.0)])
def test_missing_counts_are_not_read_as_stillness(base, per_minute):
    # steady activity just above the rule's wake level (Cole-Kripke: 24.8 counts per minute, the count threshold:
    # 40 / 1.48 = 27; Sadeh: PS < 0 from about 90, all from the formulas) with a 20-minute gap: renormalised
    # windows keep every present epoch wake, as on the complete recording; zeros in the gap call sleep beside it
    counts = np.full(240, per_minute / 2)
    gapped = counts.copy()
    gapped[100:140] = NAN
    complete, ours = score_with_rule(counts, 30, base), score_with_rule(gapped, 30, base)
    inner = slice(20, 220)  # away from the recording's ends (zero-padded on both)
    present = ~np.isnan(gapped)
    np.testing.assert_array_equal(ours.sleep[inner][present[inner]], complete.sleep[inner][present[inner]])
    assert (complete.sleep[inner] == 0).all()
    as_zeros = score_with_rule(np.nan_to_num(gapped), 30, base)
    assert (as_zeros.sleep[95:100] == 1).any() or (as_zeros.sleep[140:145] == 1).any()


@pytest.mark.parametrize("base", ["cole-kripke", "count-threshold"])
def test_a_constant_level_is_unchanged_by_missing_epochs(base):
    # renormalised weights average the present values: a constant night gives the same score whatever is missing
    rng = np.random.default_rng(1)
    counts = np.full(400, 12.0)
    gapped = counts.copy()
    gapped[rng.choice(400, 120, replace=False)] = NAN
    a, b = score_with_rule(counts, 30, base), score_with_rule(gapped, 30, base)
    inner = np.zeros(400, dtype=bool)
    inner[20:380] = True
    keep = inner & ~np.isnan(gapped)
    np.testing.assert_allclose(b.score[keep], a.score[keep], rtol=1e-12)


# ---------------------------------------------------------------------------------------------
# Webster rescoring skips unscored epochs


def test_webster_skips_unscored_epochs():
    # 4 min of wake, 2 unscored minutes, then sleep: rule 1 (>= 4 min wake -> next 1 min of sleep is wake) applies
    # across the unscored stretch, which stays unscored (Webster et al. 1982 via Cole et al. 1992, from memory)
    got = webster_rescore([0, 0, 0, 0, NAN, NAN, 1, 1], 60)
    np.testing.assert_array_equal(got, [0, 0, 0, 0, NAN, NAN, 0, 1])
    # 3 min of wake, unscored, 1 min of wake: one 4-minute wake run
    np.testing.assert_array_equal(webster_rescore([0, 0, 0, NAN, 0, 1, 1], 60), [0, 0, 0, NAN, 0, 0, 1])


@pytest.mark.parametrize("epoch_seconds", [15, 30, 60])
def test_webster_with_unscored_epochs_equals_webster_without_them(epoch_seconds):
    rng = np.random.default_rng(epoch_seconds)
    sleep = np.repeat(rng.integers(0, 2, 80), rng.integers(1, 30, 80)).astype(float)
    sleep[rng.choice(sleep.size, sleep.size // 8, replace=False)] = NAN
    unscored = np.isnan(sleep)
    got = webster_rescore(sleep, epoch_seconds)
    assert np.array_equal(np.isnan(got), unscored)
    np.testing.assert_array_equal(got[~unscored], webster_rescore(sleep[~unscored], epoch_seconds))
    assert not np.array_equal(got[~unscored], sleep[~unscored])  # some epoch was rescored


# ---------------------------------------------------------------------------------------------
# Sleep parameters of a night with a block of missing epochs


def _aasm_pandas(sleep: np.ndarray, lights_off: int, lights_on: int, epoch_min: float) -> dict[str, float]:
    """TST, WASO, SE and SOL on the scored in-bed epochs only, with pandas.

    AASM definitions (Iber et al. 2007, from memory): TST = minutes of sleep epochs; SOL = lights-off to the first
    sleep epoch; WASO = wake epochs after sleep onset up to lights-on; SE = 100 x TST / time in bed. Unscored epochs
    are dropped first (our rule: they are neither sleep nor wake), so time in bed for SE is the scored time in bed,
    while SOL stays a clock interval: the index of the pandas Series keeps each epoch's clock position.
    """
    scored = pd.Series(sleep[lights_off:lights_on], index=np.arange(lights_off, lights_on)).dropna()
    onset = scored[scored == 1].index.min()
    after = scored.loc[onset:]
    tst = float((scored == 1).sum()) * epoch_min
    return {"tst_min": tst, "waso_min": float((after == 0).sum()) * epoch_min,
            "sleep_efficiency_pct": 100.0 * tst / (scored.size * epoch_min),
            "sol_min": float(onset - lights_off) * epoch_min}


@pytest.mark.parametrize("method", METHOD_IDS)
def test_missing_block_is_excluded_from_tst_waso_and_efficiency(method):
    counts = _recording(960, 30, seed=31)
    counts[:] = np.where(np.isnan(counts), 2.0, counts)  # no scattered gaps: one block only
    counts[500:530] = NAN  # 30 missing epochs (15 min) inside the sleep period
    off, on = 40, 900
    sleep = score_with_rule(counts, 30, method).sleep
    p = sleep_parameters(sleep, 30, lights_off_idx=off, lights_on_idx=on)
    expected = _aasm_pandas(sleep, off, on, 0.5)
    assert p.unscored_epochs == 30
    for name, value in expected.items():
        assert getattr(p, name) == pytest.approx(value), name
    # the same night with the block cut out: the same TST, WASO, efficiency and awakenings (block inside bed)
    cut = sleep_parameters(np.delete(sleep, np.arange(500, 530)), 30, lights_off_idx=off, lights_on_idx=on - 30)
    for name in ("tst_min", "waso_min", "sleep_efficiency_pct", "awakenings", "longest_awakening_min", "sol_min"):
        assert getattr(p, name) == pytest.approx(getattr(cut, name)), name
    assert p.time_in_bed_min == cut.time_in_bed_min + 15.0  # the block is in bed, as clock time


def test_missing_block_before_sleep_onset_counts_in_the_clock_latency():
    sleep = np.array([0.0] * 10 + [NAN] * 6 + [0.0] * 4 + [1.0] * 30 + [0.0] * 5)
    p = sleep_parameters(sleep, 60)
    expected = _aasm_pandas(sleep, 0, sleep.size, 1.0)
    assert p.sol_min == expected["sol_min"] == 20.0  # clock time, unscored minutes included
    cut = sleep_parameters(np.delete(sleep, np.arange(10, 16)), 60)
    assert p.sol_min == cut.sol_min + 6.0 and p.tst_min == cut.tst_min and p.waso_min == cut.waso_min


def test_unscored_epochs_neither_split_nor_create_an_awakening():
    # S W ? ? W S: one awakening of 2 min; S ? S: no awakening (the unscored minute is not wake)
    one = sleep_parameters([1, 0, NAN, NAN, 0, 1], 60)
    none = sleep_parameters([1, NAN, 1], 60)
    assert (one.awakenings, one.longest_awakening_min, one.waso_min) == (1.0, 2.0, 2.0)
    assert (none.awakenings, none.waso_min, none.tst_min, none.unscored_epochs) == (0.0, 0.0, 2.0, 1)
