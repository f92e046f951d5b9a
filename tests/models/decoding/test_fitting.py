"""Fitting a decoding on inner nights: calibration as scikit-learn fits it, Youden's threshold, the tuned
HMM decoder, JSON round trip and determinism. Probabilities are a noisy SIMULATED classifier on the
simulator's own stage sequences (models.simulation)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.isotonic import IsotonicRegression
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import brier_score_loss

from models.decoding.fitting import DEFAULT_BA_MARGIN, NightDecoding, fit_night_decoding
from models.decoding.hmm import InvalidHmmError
from models.learning.threshold import youden_threshold
from models.nights.night import stages_to_sleep
from models.scoring.parameters import sleep_parameters
from models.simulation.simulator import CohortSpec, simulate_cohort


@pytest.fixture(scope="module")
def nights() -> list[dict]:
    cohort = simulate_cohort(CohortSpec(n_participants=3, nights_min=3, nights_max=3, artefacts=False), seed=17)
    rng = np.random.default_rng(3)
    out = []
    for sim in cohort:
        truth = stages_to_sleep(sim.stages).astype(np.float64)
        logit = np.where(truth == 1, 1.2, -1.8) + rng.normal(0.0, 1.5, truth.size)  # biased towards wake
        p = 1 / (1 + np.exp(-logit))
        p[rng.random(truth.size) < 0.01] = np.nan  # a few unscored epochs
        out.append({"truth": truth, "p": p, "in_bed": sim.night.in_bed})
    return out


@pytest.fixture(scope="module")
def fitted(nights) -> NightDecoding:
    inner, train = nights[:4], nights[4:7]
    return fit_night_decoding([n["p"] for n in inner], [n["truth"] for n in inner], [n["truth"] for n in train],
                              epoch_seconds=30, in_bed=[n["in_bed"] for n in inner])


def _inner_pairs(nights: list[dict]) -> tuple[np.ndarray, np.ndarray]:
    p = np.concatenate([n["p"] for n in nights[:4]])
    y = np.concatenate([n["truth"] for n in nights[:4]])
    keep = ~np.isnan(p)
    return p[keep], y[keep]


def test_isotonic_calibration_is_scikit_learns_fit_on_the_inner_epochs(fitted, nights) -> None:
    p, y = _inner_pairs(nights)
    reference = IsotonicRegression(out_of_bounds="clip", y_min=0.0, y_max=1.0).fit(p, y)  # scikit-learn
    held = nights[8]["p"]
    scored = ~np.isnan(held)
    np.testing.assert_allclose(fitted.calibrate(held)[scored], reference.predict(held[scored]), atol=1e-12)
    assert np.isnan(fitted.calibrate(held)[~scored]).all()
    calibration = fitted.info["calibration"]
    assert calibration["method"] == "isotonic"
    assert calibration["brier_raw"] == pytest.approx(brier_score_loss(y, p))  # scikit-learn
    assert calibration["brier_calibrated"] == pytest.approx(brier_score_loss(y, reference.predict(p)))
    assert calibration["brier_calibrated"] < calibration["brier_raw"]
    assert sum(calibration["reliability"]["count"]) == p.size


def test_platt_calibration_is_a_logistic_regression_on_the_logit(nights) -> None:
    inner = nights[:4]
    d = fit_night_decoding([n["p"] for n in inner], [n["truth"] for n in inner], [n["truth"] for n in nights[4:]],
                           epoch_seconds=30, calibration="platt")
    p, y = _inner_pairs(nights)
    logit = np.log(p / (1 - p))[:, None]
    # Platt's smoothed targets make it differ slightly from a plain logistic fit (scikit-learn, unpenalised)
    plain = LogisticRegression(C=np.inf).fit(logit, y)
    q = np.array([0.1, 0.4, 0.7, 0.95])
    np.testing.assert_allclose(d.calibrate(q), plain.predict_proba(np.log(q / (1 - q))[:, None])[:, 1], atol=0.01)


def test_threshold_decoder_is_youden_on_the_calibrated_inner_predictions(nights) -> None:
    inner = nights[:4]
    d = fit_night_decoding([n["p"] for n in inner], [n["truth"] for n in inner], [n["truth"] for n in nights[4:]],
                           epoch_seconds=30, decoder="threshold", min_sensitivity=0.9)
    p, y = _inner_pairs(nights)
    expected = youden_threshold(y, d.calibrate(p), min_sensitivity=0.9)  # scikit-learn roc_curve
    assert d.info["decoder"]["threshold"] == pytest.approx(expected)
    q = d.calibrate(nights[8]["p"])
    np.testing.assert_array_equal(d.decode(q), np.where(np.isnan(q), np.nan, (q >= expected).astype(float)))


def test_hmm_decoder_meets_the_floor_and_counts_awakenings_better_on_other_nights(fitted, nights) -> None:
    hmm, threshold = fitted.info["hmm_decoder"], fitted.info["threshold_decoder"]
    assert fitted.info["decoder"] == hmm and hmm["floor_met"]
    assert hmm["ba_floor"] == pytest.approx(threshold["balanced_accuracy"] - DEFAULT_BA_MARGIN)
    assert hmm["balanced_accuracy"] >= hmm["ba_floor"]
    errors = {"hmm": [], "threshold": []}
    for night in nights[7:]:  # neither inner nor training nights
        first, stop = night["in_bed"]
        truth = sleep_parameters(night["truth"], 30, lights_off_idx=first, lights_on_idx=stop).awakenings
        q = fitted.calibrate(night["p"])
        for name, calls in (("hmm", fitted.decode(q)),
                            ("threshold", (q >= threshold["threshold"]).astype(float))):
            errors[name].append(abs(sleep_parameters(calls, 30, lights_off_idx=first,
                                                     lights_on_idx=stop).awakenings - truth))
    assert np.mean(errors["hmm"]) < 0.5 * np.mean(errors["threshold"])


def test_json_round_trip_is_bit_identical(fitted, nights) -> None:
    restored = NightDecoding.from_dict(json.loads(json.dumps(fitted.to_dict(), allow_nan=False)))
    night = nights[8]
    q = fitted.calibrate(night["p"])
    np.testing.assert_array_equal(restored.calibrate(night["p"]), q)
    np.testing.assert_array_equal(restored.decode(q), fitted.decode(q))
    a = fitted.intervals(q, epoch_seconds=30, lights_off_idx=night["in_bed"][0], lights_on_idx=night["in_bed"][1])
    b = restored.intervals(q, epoch_seconds=30, lights_off_idx=night["in_bed"][0], lights_on_idx=night["in_bed"][1])
    assert a.to_dict() == b.to_dict()
    assert restored.to_dict() == fitted.to_dict()


def test_same_inputs_give_the_same_decoding(fitted, nights) -> None:
    inner = nights[:4]
    again = fit_night_decoding([n["p"] for n in inner], [n["truth"] for n in inner],
                               [n["truth"] for n in nights[4:7]], epoch_seconds=30,
                               in_bed=[n["in_bed"] for n in inner])
    assert json.dumps(again.to_dict()) == json.dumps(fitted.to_dict())


def test_inner_labels_change_the_fit(fitted, nights) -> None:
    """The fit does depend on its inner nights (so the leakage tests of the trainers can fail)."""
    inner = nights[:4]
    flipped = [1.0 - n["truth"] for n in inner]
    other = fit_night_decoding([n["p"] for n in inner], flipped, [n["truth"] for n in nights[4:7]],
                               epoch_seconds=30, in_bed=[n["in_bed"] for n in inner])
    q = nights[8]["p"]
    assert not np.array_equal(other.calibrate(q), fitted.calibrate(q), equal_nan=True)


def test_bad_choices_and_mismatched_nights_are_refused(nights) -> None:
    n = nights[0]
    with pytest.raises(InvalidHmmError, match="decoder must be one of"):
        fit_night_decoding([n["p"]], [n["truth"]], [n["truth"]], epoch_seconds=30, decoder="median")
    with pytest.raises(InvalidHmmError, match="calibration"):
        fit_night_decoding([n["p"]], [n["truth"]], [n["truth"]], epoch_seconds=30, calibration="beta")
    with pytest.raises(InvalidHmmError, match="same inner nights"):
        fit_night_decoding([n["p"]], [n["truth"][:-1]], [n["truth"]], epoch_seconds=30)
    with pytest.raises(InvalidHmmError, match="calibrator, decoder, chain and info"):
        NightDecoding.from_dict({"decoder": {}})


def test_one_class_inner_nights_keep_the_raw_probabilities(nights) -> None:
    n = nights[0]
    d = fit_night_decoding([n["p"]], [np.ones_like(n["truth"])], [n["truth"]], epoch_seconds=30)
    assert d.calibrator is None and d.info["calibration"]["method"] == "none"
    np.testing.assert_array_equal(d.calibrate(n["p"]), n["p"])


def test_intervals_are_centred_on_the_decoded_night_and_scaled_on_the_inner_nights(fitted, nights) -> None:
    """The stored scales are the conformal scales of the inner nights at the chosen paths (recomputed
    here from the module's own pieces), and a night's interval holds its decoded value."""
    settings = fitted.info["intervals"]
    assert settings["centre"] == "decoded" and set(settings["spread_scale"]) >= {"tst_min", "waso_min"}
    assert all(v >= 0 for v in settings["spread_scale"].values())
    night = nights[8]
    q = fitted.calibrate(night["p"])
    first, stop = night["in_bed"]
    iv = fitted.intervals(q, epoch_seconds=30, lights_off_idx=first, lights_on_idx=stop)
    decoded = sleep_parameters(fitted.decode(q), 30, lights_off_idx=first, lights_on_idx=stop)
    for name in ("tst_min", "waso_min"):
        low, high = iv.intervals[name]
        assert low <= getattr(decoded, name) <= high


def test_a_decoding_stored_without_scales_keeps_the_posterior_intervals(fitted, nights) -> None:
    """Decodings stored before the scales existed load and give the posterior's own intervals."""
    from models.decoding.intervals import night_intervals

    values = json.loads(json.dumps(fitted.to_dict(), allow_nan=False))
    for key in ("centre", "spread_scale", "inner_coverage"):
        values["info"]["intervals"].pop(key)
    old = NightDecoding.from_dict(values)
    night = nights[8]
    q = old.calibrate(night["p"])
    first, stop = night["in_bed"]
    settings = values["info"]["intervals"]
    expected = night_intervals(q, old.chain, 30, lights_off_idx=first, lights_on_idx=stop, n_paths=200,
                               stickiness=settings["stickiness"], emission_weight=settings["emission_weight"])
    assert old.intervals(q, epoch_seconds=30, lights_off_idx=first, lights_on_idx=stop).to_dict() == expected.to_dict()
