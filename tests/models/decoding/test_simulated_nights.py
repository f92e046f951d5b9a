"""On SIMULATED nights (models.simulation) with noisy per-epoch probabilities, HMM decoding counts
awakenings closer to the truth than thresholding each epoch: independent epoch errors make spurious
one-epoch awakenings, which a chain with few switches does not follow (the motivation of temporal
decoding; Bourlard & Morgan 1994 for the hybrid model, from memory for the sleep use). The truth is
the simulator's own stage sequence, computed into parameters by sleep_parameters."""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.metrics import balanced_accuracy_score

from models.decoding.calibration import IsotonicCalibrator
from models.decoding.decoders import HmmDecoder, ThresholdDecoder, make_decoder
from models.decoding.hmm import SleepWakeHmm, fit_sleep_wake_hmm
from models.decoding.tuning import DEFAULT_DECODER_GRID, tune_decoder
from models.nights.night import stages_to_sleep
from models.scoring.parameters import sleep_parameters
from models.scoring.protocol import StudyProtocol
from models.simulation.simulator import CohortSpec, simulate_cohort


@pytest.fixture(scope="module")
def nights() -> list[dict]:
    cohort = simulate_cohort(CohortSpec(n_participants=4, nights_min=3, nights_max=3, artefacts=False), seed=7)
    rng = np.random.default_rng(0)
    out = []
    for sim in cohort:
        truth = stages_to_sleep(sim.stages)
        # a classifier that is right on average but noisy epoch by epoch (SIMULATED)
        logit = np.where(truth == 1, 1.5, -1.5) + rng.normal(0.0, 1.6, truth.size)
        out.append({"truth": truth, "p": 1 / (1 + np.exp(-logit)), "in_bed": sim.night.in_bed})
    return out


def _awakenings(calls: np.ndarray, in_bed: tuple[int, int], protocol: StudyProtocol) -> float:
    return sleep_parameters(calls, 30, lights_off_idx=in_bed[0], lights_on_idx=in_bed[1],
                            protocol=protocol).awakenings


@pytest.mark.parametrize("protocol", [StudyProtocol(), StudyProtocol(min_awakening_epochs=2)],
                         ids=["one-epoch", "two-epoch"])
def test_hmm_decoding_cuts_the_awakenings_overcount(nights: list[dict], protocol: StudyProtocol) -> None:
    train, test = nights[:6], nights[6:]
    calibrator = IsotonicCalibrator().fit(np.concatenate([n["p"] for n in train]),
                                          np.concatenate([n["truth"] for n in train]))
    hmm = fit_sleep_wake_hmm([n["truth"] for n in train])
    decoders = {"threshold": ThresholdDecoder(), "viterbi": HmmDecoder(hmm),
                "marginal": HmmDecoder(hmm, method="marginal")}
    errors: dict[str, list[float]] = {name: [] for name in decoders}
    for night in test:
        p = calibrator.transform(night["p"])
        true_count = _awakenings(night["truth"], night["in_bed"], protocol)
        for name, decoder in decoders.items():
            errors[name].append(_awakenings(decoder.decode(p), night["in_bed"], protocol) - true_count)
    over = {name: float(np.mean(e)) for name, e in errors.items()}
    mae = {name: float(np.mean(np.abs(e))) for name, e in errors.items()}
    assert over["threshold"] > 10  # epoch-by-epoch thresholding: many spurious awakenings
    for name in ("viterbi", "marginal"):
        assert mae[name] < mae["threshold"] / 3, mae


def test_tuned_decoder_holds_up_on_other_nights(nights: list[dict]) -> None:
    # raw (uncalibrated) probabilities: centred on 0.5 for both classes while the chain's prior is ~0.8 sleep,
    # a mismatch the scaled likelihood turns into too much wake unless the settings compensate
    protocol = StudyProtocol()
    inner, outer = nights[:6], nights[6:]
    choice = tune_decoder([n["p"] for n in inner], [n["truth"] for n in inner], protocol=protocol, ba_floor=0.7,
                          in_bed=[n["in_bed"] for n in inner])
    assert choice.floor_met and choice.balanced_accuracy >= 0.7
    g = DEFAULT_DECODER_GRID
    n_paths = len(g["stickiness"]) * len(g["emission_weight"])
    assert len(choice.trials) == n_paths * (1 + len(g["threshold"]))  # Viterbi ignores the threshold
    assert choice.objective == min(t["objective"] for t in choice.trials if t["balanced_accuracy"] >= 0.7)
    # the shared decoding passes give what each grid point's own decoder gives
    for trial in choice.trials[:: max(1, len(choice.trials) // 7)]:
        decoder = make_decoder("hmm", hmm=choice.decoder.hmm, **{k: trial[k] for k in g})
        calls = np.concatenate([decoder.decode(n["p"]) for n in inner])
        truth = np.concatenate([n["truth"] for n in inner])
        assert trial["balanced_accuracy"] == pytest.approx(balanced_accuracy_score(truth, calls))  # scikit-learn
    # on nights it did not see, the tuned decoder beats the untuned chain on awakenings and WASO together
    untuned = make_decoder("hmm", hmm=choice.decoder.hmm)
    error = {"tuned": 0.0, "untuned": 0.0}
    for night in outer:
        truth = sleep_parameters(night["truth"], 30, lights_off_idx=night["in_bed"][0],
                                 lights_on_idx=night["in_bed"][1])
        for name, decoder in (("tuned", choice.decoder), ("untuned", untuned)):
            got = sleep_parameters(decoder.decode(night["p"]), 30, lights_off_idx=night["in_bed"][0],
                                   lights_on_idx=night["in_bed"][1])
            error[name] += abs(got.awakenings - truth.awakenings) / 3 + abs(got.waso_min - truth.waso_min) / 15
    assert error["tuned"] <= error["untuned"]


def test_an_unreachable_floor_keeps_the_most_accurate_setting(nights: list[dict]) -> None:
    inner = nights[:3]
    choice = tune_decoder([n["p"] for n in inner], [n["truth"] for n in inner], ba_floor=1.0,
                          grid={"stickiness": [1.0, 4.0], "method": ["viterbi"]})
    assert not choice.floor_met
    assert choice.balanced_accuracy == max(t["balanced_accuracy"] for t in choice.trials)
    assert set(choice.settings) == {"stickiness", "method"}
    with pytest.raises(ValueError, match="unknown"):
        tune_decoder([inner[0]["p"]], [inner[0]["truth"]], grid={"temperature": [1.0]})
    with pytest.raises(ValueError, match="bias_weight"):
        tune_decoder([inner[0]["p"]], [inner[0]["truth"]], bias_weight=-1.0)


def test_decoders_keep_unscored_epochs_unscored() -> None:
    p = np.array([0.9, np.nan, 0.2, 0.6, np.nan])
    hmm = fit_sleep_wake_hmm([np.array([1, 1, 0, 1, 1, 1, 0, 0])])
    for decoder in (ThresholdDecoder(0.5), HmmDecoder(hmm), HmmDecoder(hmm, method="marginal", threshold=0.4)):
        calls = decoder.decode(p)
        assert np.isnan(calls[[1, 4]]).all() and set(calls[[0, 2, 3]]) <= {0.0, 1.0}
        assert decoder.settings()["decoder"] in ("threshold", "hmm")
    np.testing.assert_array_equal(ThresholdDecoder(0.5).decode(p)[[0, 2, 3]], [1.0, 0.0, 1.0])
    # a decoder is rebuilt from its JSON settings (and its chain's)
    tuned = HmmDecoder(hmm, method="marginal", stickiness=2.0, emission_weight=0.5, threshold=0.4)
    settings = json.loads(json.dumps(tuned.settings()))
    again = make_decoder(settings.pop("decoder"), hmm=SleepWakeHmm.from_dict(hmm.to_dict()), **settings)
    np.testing.assert_array_equal(again.decode(p), tuned.decode(p))
    with pytest.raises(ValueError, match="decoder must be one of"):
        make_decoder("argmax")
    with pytest.raises(ValueError, match="fitted chain"):
        make_decoder("hmm", stickiness=2.0)


def test_settings_the_chain_cannot_take_are_left_out() -> None:
    """A chain fitted on shuffled labels switches at most epochs: a stickiness of 0.5 would make its
    switching probabilities exceed 1, so that grid point is skipped (and only that one)."""
    rng = np.random.default_rng(5)
    labels = [rng.integers(0, 2, 400).astype(float) for _ in range(3)]
    p = [np.clip(y * 0.6 + 0.2 + rng.normal(0, 0.1, y.size), 0, 1) for y in labels]
    choice = tune_decoder(p, labels, ba_floor=0.0, grid={"stickiness": [0.5, 1.0], "method": ["viterbi"]})
    assert [t["stickiness"] for t in choice.trials] == [1.0]
    with pytest.raises(ValueError, match="no setting of the grid"):
        tune_decoder(p, labels, grid={"stickiness": [0.5], "method": ["viterbi"]})


def test_the_objective_adds_mean_absolute_and_signed_errors_over_the_margins() -> None:
    """Written out with pandas (mean of |error| and |mean error| per parameter, over the margins)."""
    import pandas as pd

    from models.decoding.tuning import BIAS_PARAMETERS, BIAS_WEIGHT, MAE_PARAMETERS, parameter_objective

    decoded = [{"awakenings": 5, "waso_min": 40.0, "tst_min": 400.0},
               {"awakenings": 2, "waso_min": None, "tst_min": 380.0},
               {"awakenings": 7, "waso_min": 20.0, "tst_min": 300.0}]
    truth = [{"awakenings": 4, "waso_min": 30.0, "tst_min": 410.0},
             {"awakenings": 6, "waso_min": 25.0, "tst_min": 385.0},
             {"awakenings": 7, "waso_min": 35.0, "tst_min": 330.0}]
    margins = {"awakenings": 3.0, "waso_min": 15.0, "tst_min": 15.0}
    error = pd.DataFrame(decoded, dtype=float) - pd.DataFrame(truth, dtype=float)  # NaN rows skipped by pandas
    for weight in (1.0, 2.5, 0.0):
        expected = (sum(error[n].abs().mean() / margins[n] for n in MAE_PARAMETERS)
                    + weight * sum(abs(error[n].mean()) / margins[n] for n in BIAS_PARAMETERS))
        objective, terms = parameter_objective(decoded, truth, margins, bias_weight=weight)
        assert objective == pytest.approx(expected)
    default = (sum(error[n].abs().mean() / margins[n] for n in MAE_PARAMETERS)
               + BIAS_WEIGHT * sum(abs(error[n].mean()) / margins[n] for n in BIAS_PARAMETERS))
    assert parameter_objective(decoded, truth, margins)[0] == pytest.approx(default)
    assert terms["tst_min_bias"] == pytest.approx(-15.0) and terms["waso_min_mae"] == pytest.approx(12.5)
