"""Trained models carry a decoding fitted on validation nights only: calibrated probabilities, decoded
calls, per-night intervals; stored and restored bit-identically; held-out nights never reach it.
SIMULATED nights (models.simulation)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.special import expit

from models.learning.artifacts import model_from_bytes, model_to_bytes
from models.learning.config import InvalidTrainingConfigError, TrainingConfig
from models.learning.personal import train_personal
from models.learning.pooled import train_pooled
from models.nights.night import Night
from models.scoring.parameters import sleep_parameters
from models.simulation.simulator import CohortSpec, simulate_cohort

CONFIG = TrainingConfig(n_trials=3, max_rounds=60, interval_paths=50)


def _with_reference(night: Night, reference: np.ndarray) -> Night:
    return Night(participant_id=night.participant_id, start=night.start, epoch_seconds=night.epoch_seconds,
                 counts=night.counts, reference=reference, lights_off=night.lights_off, lights_on=night.lights_on,
                 label=night.label)


@pytest.fixture(scope="module")
def nights() -> list[Night]:
    sims = simulate_cohort(CohortSpec(n_participants=1, nights_min=5, nights_max=5, labelled_share=1.0,
                                      few_labels_participants=0, artefacts=False), seed=23)
    return sorted((s.night for s in sims), key=lambda n: n.start)


@pytest.fixture(scope="module")
def result(nights):
    return train_personal(nights, config=CONFIG)


def test_personal_model_predicts_calibrated_decoded_with_intervals(result, nights) -> None:
    model = result.model
    assert model.decoding_ is not None
    info = model.decoding_.info
    assert info["calibration"]["method"] == "isotonic" and info["decoder"]["decoder"] == "hmm"
    assert info["n_inner_nights"] >= 1
    night = nights[0]
    raw = model.raw_proba(night)
    p = model.predict_proba(night)
    np.testing.assert_array_equal(p, model.decoding_.calibrate(raw))
    np.testing.assert_array_equal(model.predict(night), model.decoding_.decode(p))
    intervals = model.intervals(p, night, n_paths=50)
    assert intervals is not None and intervals.level == 0.9
    low, high = intervals.intervals["tst_min"]
    first, stop = night.in_bed  # the interval is centred on the decoded night's TST
    assert low <= sleep_parameters(model.predict(night), night.epoch_seconds, lights_off_idx=first,
                                   lights_on_idx=stop).tst_min <= high
    assert info["intervals"]["centre"] == "decoded" and info["intervals"]["spread_scale"]["tst_min"] >= 0
    for h in result.outer:
        assert h.intervals is not None and h.intervals.n_paths == CONFIG.interval_paths


def test_decoded_model_round_trips_bit_identically(result, nights) -> None:
    raw, metadata = model_to_bytes(result.model)
    assert metadata["decoding"] == json.loads(json.dumps(result.model.decoding_.to_dict()))
    restored = model_from_bytes(raw, json.loads(json.dumps(metadata)))
    for night in nights[:2]:
        p = result.model.predict_proba(night)
        np.testing.assert_array_equal(restored.predict_proba(night), p)
        np.testing.assert_array_equal(restored.predict(night), result.model.predict(night))
        assert restored.intervals(p, night, seed=3).to_dict() == result.model.intervals(p, night, seed=3).to_dict()
    assert model_to_bytes(restored) == (raw, metadata)


def test_metadata_without_decoding_loads_as_a_threshold_model(result, nights) -> None:
    raw, metadata = model_to_bytes(result.model)
    del metadata["decoding"]
    old = model_from_bytes(raw, metadata)
    assert old.decoding_ is None
    night = nights[1]
    p = old.predict_proba(night)
    np.testing.assert_array_equal(p, old.raw_proba(night))
    np.testing.assert_array_equal(old.predict(night), (p >= old.threshold_).astype(np.float64))
    assert old.intervals(p, night) is None


def test_held_out_nights_never_reach_the_decoding(result, nights) -> None:
    k = 2
    first, stop = nights[k].in_bed
    flipped = nights[k].reference.copy()
    flipped[first:stop] = np.where(np.isin(flipped[first:stop], ["W"]), "N2", "W")
    changed = [*nights[:k], _with_reference(nights[k], flipped), *nights[k + 1:]]
    other = train_personal(changed, config=CONFIG)
    a, b = result.outer[k], other.outer[k]
    np.testing.assert_array_equal(a.p_sleep, b.p_sleep)
    np.testing.assert_array_equal(a.sleep, b.sleep)
    assert a.intervals.to_dict() == b.intervals.to_dict()
    # the flipped labels did reach the other nights' models and the final decoding (the check can fail)
    assert any(not np.array_equal(x.p_sleep, y.p_sleep) for i, (x, y) in enumerate(zip(result.outer, other.outer,
                                                                                    strict=True)) if i != k)
    assert other.model.decoding_.to_dict() != result.model.decoding_.to_dict()


def test_threshold_decoder_calls_each_epoch_on_its_own(nights) -> None:
    res = train_personal(nights, config=TrainingConfig(n_trials=2, max_rounds=40, decoder="threshold",
                                                       calibration="platt", interval_paths=20))
    decoding = res.model.decoding_
    assert decoding.info["decoder"]["decoder"] == "threshold" and decoding.info["calibration"]["method"] == "platt"
    p = res.model.predict_proba(nights[0])
    cut = decoding.info["decoder"]["threshold"]
    np.testing.assert_array_equal(res.model.calls(p), np.where(np.isnan(p), np.nan, (p >= cut).astype(float)))


def test_pooled_fits_decode_validation_participants_and_offsets_go_before_calibration() -> None:
    sims = simulate_cohort(CohortSpec(n_participants=4, nights_min=2, nights_max=2, labelled_share=1.0,
                                      few_labels_participants=0, artefacts=False), seed=41)
    by: dict[str, list[Night]] = {}
    for s in sims:
        by.setdefault(s.night.participant_id, []).append(s.night)
    res = train_pooled(by, config=TrainingConfig(pooled_folds=2, max_rounds=40, interval_paths=20))
    model = res.model
    assert model.decoding_ is not None
    assert model.decoding_.info["n_inner_nights"] == sum(
        len(by[pid]) for pid in model.info_["validation_participants"])
    checked = 0
    for held in res.offset_held_out.values():
        for h in held:
            plain = next(x for x in res.held_out[h.participant_id] if x.night_hash == h.night_hash)
            np.testing.assert_array_equal(h.margin, plain.margin)
            assert h.intervals is not None and plain.intervals is not None
            scored = ~np.isnan(h.margin)
            # one fold model calibrates both: cal(expit(margin + offset)) moves with the offset's sign
            if h.offset > 0:
                assert (h.p_sleep[scored] >= plain.p_sleep[scored]).all()
            elif h.offset < 0:
                assert (h.p_sleep[scored] <= plain.p_sleep[scored]).all()
            raw = expit(h.margin + h.offset)
            assert not np.array_equal(h.p_sleep, raw, equal_nan=True)  # calibrated, not the raw probability
            checked += 1
    assert checked > 0


def test_config_refuses_unknown_decoders() -> None:
    with pytest.raises(InvalidTrainingConfigError, match="decoder must be one of"):
        TrainingConfig(decoder="median")
    with pytest.raises(InvalidTrainingConfigError, match="interval_level"):
        TrainingConfig(interval_level=1.0)
