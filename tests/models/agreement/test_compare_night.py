"""The one method-versus-reference comparison: epoch metrics against scikit-learn, parameter
differences against a night worked by hand from the published definitions, and the study tables.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import balanced_accuracy_score, cohen_kappa_score, recall_score, roc_auc_score

from models.agreement.bland_altman import REFERENCE
from models.agreement.comparison import ERROR_PARAMETERS, PARAMETER_COLUMNS, compare_night, comparison_tables
from models.agreement.epoch_metrics import agreement_table
from models.scoring.parameters import InvalidInBedIntervalError
from models.scoring.rescoring import InvalidSleepVectorError

NAN = np.nan


def _random_night(seed: int, n_epochs: int = 300):
    rng = np.random.default_rng(seed)
    reference = (rng.random(n_epochs) < 0.8).astype(float)
    reference[rng.choice(n_epochs, 25, replace=False)] = NAN  # unscored, inside and outside bed
    sleep = np.where(rng.random(n_epochs) < 0.85, np.nan_to_num(reference, nan=1.0), 1 - np.nan_to_num(reference))
    score = np.where(sleep == 1, rng.uniform(0.4, 1.0, n_epochs), rng.uniform(0.0, 0.6, n_epochs))
    return reference, sleep.astype(np.int8), score


def test_epoch_metrics_match_scikit_learn_on_the_scored_in_bed_epochs() -> None:
    reference, sleep, score = _random_night(3)
    first, stop = 20, 270
    out = compare_night(reference, {"m": (sleep, score)}, epoch_seconds=30, lights_off_idx=first,
                        lights_on_idx=stop).epoch_metrics["m"]
    # independently: the in-bed epochs, minus those the reference left unscored (sleep = positive class)
    ref_bed, sleep_bed, score_bed = reference[first:stop], sleep[first:stop], score[first:stop]
    keep = ~np.isnan(ref_bed)
    y, p, s = ref_bed[keep].astype(int), sleep_bed[keep], score_bed[keep]
    assert out["n_epochs"] == keep.sum() and out["excluded_epochs"] == (~keep).sum() > 0
    assert out["balanced_accuracy"] == pytest.approx(balanced_accuracy_score(y, p))  # scikit-learn
    assert out["kappa"] == pytest.approx(cohen_kappa_score(y, p))
    assert out["sensitivity"] == pytest.approx(recall_score(y, p, pos_label=1))
    assert out["specificity"] == pytest.approx(recall_score(y, p, pos_label=0))
    assert out["auc"] == pytest.approx(roc_auc_score(y, s))


# A night of 60-s epochs, worked by hand. In bed: epochs 1-10 (lights-off 1, lights-on 11).
#   epoch      0  1  2  3  4  5  6  7  8  9  10  11
#   reference  W  W  W  S  S  W  ?  S  S  W  W   S     (? = unscored)
#   method     S  W  S  S  S  S  W  S  W  W  S   W
# Definitions of /work/shared/reference/published-methods.md, section 2 (AASM style, Iber et al.
# 2007) and section 3 (unscored epochs left out of TST, WASO and their denominators):
#   SOL  = lights-off to the first sleep epoch:  reference epoch 3 -> 2 min; method epoch 2 -> 1 min
#   TST  = sleep epochs x 1 min:                 reference 3,4,7,8 -> 4 min; method 2,3,4,5,7,10 -> 6 min
#   WASO = wake after onset up to lights-on:     reference 5,9,10 -> 3 min; method 8,9 -> 2 min (its wake
#          at epoch 6 is where the reference is unscored, so it is masked: 3 min if it were counted)
#   SE   = 100 x TST / scored time in bed (9 min): reference 400/9 %, method 600/9 %
#   NA   = wake bouts after onset: reference {5}, {9, 10} -> 2; method {8, 9} -> 1
REFERENCE_NIGHT = np.array([0, 0, 0, 1, 1, 0, NAN, 1, 1, 0, 0, 1])
METHOD_NIGHT = np.array([1, 0, 1, 1, 1, 1, 0, 1, 0, 0, 1, 0])


def test_parameter_differences_of_a_night_worked_by_hand() -> None:
    out = compare_night(REFERENCE_NIGHT, {"m": (METHOD_NIGHT, None)}, epoch_seconds=60, lights_off_idx=1,
                        lights_on_idx=11)
    ref = out.reference_parameters
    assert (ref.sol_min, ref.tst_min, ref.waso_min, ref.awakenings) == (2.0, 4.0, 3.0, 2.0)
    assert ref.sleep_efficiency_pct == pytest.approx(400 / 9) and ref.unscored_epochs == 1
    own = out.parameters["m"]
    assert (own.sol_min, own.tst_min, own.waso_min, own.awakenings) == (1.0, 6.0, 2.0, 1.0)
    diff = out.differences["m"]
    assert (diff["sol_min"], diff["tst_min"], diff["waso_min"], diff["awakenings"]) == (-1.0, 2.0, -1.0, -1.0)
    assert diff["sleep_efficiency_pct"] == pytest.approx(200 / 9)


def test_parameter_options_reach_both_sides() -> None:
    # WASO counted only up to the final awakening (the actigraphy variant of section 2):
    # reference: last sleep epoch 8, wake after onset before it: epoch 5 -> 1 min;
    # method: last sleep epoch 10, wake 8, 9 -> 2 min; difference +1 min (it was -1 to lights-on)
    out = compare_night(REFERENCE_NIGHT, {"m": (METHOD_NIGHT, None)}, epoch_seconds=60, lights_off_idx=1,
                        lights_on_idx=11, parameter_options={"waso_end": "final_awakening"})
    assert out.reference_parameters.waso_min == 1.0 and out.parameters["m"].waso_min == 2.0
    assert out.differences["m"]["waso_min"] == 1.0


def test_study_tables_follow_the_night_comparisons() -> None:
    nights = []
    for i, (pid, label) in enumerate([("a", "a-1"), ("a", "a-2"), ("b", None)]):
        reference, sleep, score = _random_night(10 + i)
        sides = {"m1": (sleep, score), "m2": (np.ones_like(sleep), None)}
        nights.append(compare_night(reference, sides, epoch_seconds=30, lights_off_idx=5, lights_on_idx=290,
                                    participant_id=pid, night_id=f"n{i}", label=label))
    tables = comparison_tables(nights)
    params = tables.parameters
    assert list(params.columns) == list(PARAMETER_COLUMNS)
    assert list(params["method"]) == [REFERENCE, "m1", "m2"] * 3 and list(params["label"][:3]) == ["a-1"] * 3
    errors = tables.parameter_errors.set_index(["night_id", "method"])
    for night in nights:
        for method in ("m1", "m2"):
            for name in ERROR_PARAMETERS:
                assert errors.loc[(night.night_id, method), f"{name}_error"] == night.differences[method][name]
    # Bland & Altman 1986: bias = mean difference over the nights (numpy, ddof=1 for the SD)
    tst = np.array([n.differences["m1"]["tst_min"] for n in nights])
    row = tables.bland_altman.set_index(["method", "parameter"]).loc[("m1", "tst_min")]
    assert row["n"] == 3 and row["bias"] == pytest.approx(tst.mean())
    assert row["loa_upper"] == pytest.approx(tst.mean() + 1.96 * tst.std(ddof=1))
    # the night metrics handed to agreement_table are the ones it computes itself
    pd.testing.assert_frame_equal(tables.epoch_metrics, agreement_table([s for n in nights for s in n.scored]))
    night_rows = tables.epoch_metrics[tables.epoch_metrics["level"] == "night"].set_index(["night_id", "method"])
    assert night_rows.loc[("n2", "m1"), "kappa"] == nights[2].epoch_metrics["m1"]["kappa"]


def test_bad_sides_and_intervals_are_refused() -> None:
    reference = np.ones(10)
    with pytest.raises(InvalidSleepVectorError):
        compare_night(reference, {"m": (np.ones(9), None)}, epoch_seconds=30)
    with pytest.raises(InvalidSleepVectorError):
        compare_night(reference, {"m": (np.ones(10), np.ones(8))}, epoch_seconds=30)
    with pytest.raises(InvalidInBedIntervalError):
        compare_night(reference, {"m": (np.ones(10), None)}, epoch_seconds=30, lights_off_idx=4, lights_on_idx=2)


# ---------------------------------------------------------------------------------------------
# Epochs without counts: no method scores them, so they leave every side of the comparison


def _night_with_gap(seed: int):
    reference, sleep, score = _random_night(seed)
    missing = np.zeros(reference.size, dtype=bool)
    missing[120:150] = True  # 30 epochs without counts, all in bed
    calls = np.where(missing, NAN, sleep.astype(float))
    return reference, calls, np.where(missing, NAN, score), missing


def test_epoch_metrics_leave_out_missing_epochs_like_scikit_learn_on_the_present_ones() -> None:
    reference, calls, score, missing = _night_with_gap(4)
    first, stop = 20, 270
    out = compare_night(reference, {"m": (calls, score), "always-sleep": (np.ones(reference.size), None)},
                        epoch_seconds=30, lights_off_idx=first, lights_on_idx=stop)
    bed = slice(first, stop)
    ref_bed, calls_bed, score_bed, gap = reference[bed], calls[bed], score[bed], missing[bed]
    keep = ~np.isnan(ref_bed) & ~gap  # scored by the reference and with counts
    y, p = ref_bed[keep].astype(int), calls_bed[keep].astype(int)
    m = out.epoch_metrics["m"]
    assert m["n_epochs"] == keep.sum() and m["unscored_epochs"] == 30 and m["excluded_epochs"] == (~keep).sum()
    assert m["balanced_accuracy"] == pytest.approx(balanced_accuracy_score(y, p))  # scikit-learn, present epochs
    assert m["kappa"] == pytest.approx(cohen_kappa_score(y, p))
    assert m["auc"] == pytest.approx(roc_auc_score(y, score_bed[keep]))
    # the baseline calls every epoch sleep, but is compared on the same epochs as the method
    base = out.epoch_metrics["always-sleep"]
    assert base["n_epochs"] == m["n_epochs"] and base["unscored_epochs"] == 30
    assert base["sensitivity"] == 1.0 and base["accuracy"] == pytest.approx(y.mean())


def test_missing_epochs_are_masked_on_both_sides_of_the_parameters() -> None:
    reference, calls, _, missing = _night_with_gap(5)
    first, stop = 20, 270
    out = compare_night(reference, {"m": (calls, None)}, epoch_seconds=30, lights_off_idx=first, lights_on_idx=stop)
    alone = compare_night(reference, {}, epoch_seconds=30, lights_off_idx=first, lights_on_idx=stop, missing=missing)
    # AASM TST (Iber et al. 2007, from memory): sleep epochs x 0.5 min, here over the reference epochs that are scored
    # and have counts (pandas drops the NaN)
    ref_bed = pd.Series(np.where(missing, NAN, reference)[first:stop]).dropna()
    assert out.reference_parameters.tst_min == alone.reference_parameters.tst_min == (ref_bed == 1).sum() * 0.5
    unscored = int((np.isnan(reference) | missing)[first:stop].sum())
    assert out.reference_parameters.unscored_epochs == out.parameters["m"].unscored_epochs == unscored
    own = pd.Series(calls[first:stop]).where(~np.isnan(reference[first:stop])).dropna()
    assert out.parameters["m"].tst_min == (own == 1).sum() * 0.5
    assert out.differences["m"]["tst_min"] == out.parameters["m"].tst_min - out.reference_parameters.tst_min
    # without the mask the reference would also count its sleep inside the gap
    unmasked = compare_night(reference, {}, epoch_seconds=30, lights_off_idx=first, lights_on_idx=stop)
    assert unmasked.reference_parameters.tst_min > out.reference_parameters.tst_min


def test_missing_must_cover_the_recording() -> None:
    with pytest.raises(InvalidSleepVectorError):
        compare_night(np.ones(10), {}, epoch_seconds=30, missing=np.zeros(9, dtype=bool))
