"""Participant offsets: the penalised class-balanced intercept, its shrinkage, and its effect."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import minimize_scalar
from scipy.special import expit

from models.agreement.epoch_metrics import epoch_agreement
from models.errors import NightbankError
from models.learning.config import TrainingConfig
from models.learning.descriptors import participant_descriptors
from models.learning.offset import choose_shrinkage, estimate_offset, offset_log_likelihood, participant_offset
from models.learning.pooled import train_pooled
from models.simulation.simulator import CohortSpec, PersonTraits, simulate_cohort, simulate_night


def _balanced_weights(y: np.ndarray) -> np.ndarray:
    return np.where(y == 1, y.size / (2 * (y == 1).sum()), y.size / (2 * (y == 0).sum()))


def _data(n: int, *, shift: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Margins of a pooled model and labels from a participant whose true log-odds differ by ``shift``."""
    rng = np.random.default_rng(seed)
    m = rng.normal(1.5, 1.5, n)
    y = (rng.random(n) < expit(m + shift)).astype(float)
    return m, y


def test_unpenalised_offset_matches_statsmodels_weighted_glm() -> None:
    # Reference: statsmodels GLM, binomial family, intercept only, margin as offset, balanced freq_weights.
    sm = pytest.importorskip("statsmodels.api")
    m, y = _data(400, shift=-0.8, seed=1)
    fit = sm.GLM(y, np.ones((y.size, 1)), family=sm.families.Binomial(), offset=m,
                 freq_weights=_balanced_weights(y)).fit(tol=1e-12)
    assert estimate_offset(m, y, shrinkage=0.0) == pytest.approx(fit.params[0], abs=1e-7)


@pytest.mark.parametrize("penalty", [0.5, 20.0, 500.0])
def test_penalised_offset_matches_scipy_minimisation(penalty: float) -> None:
    # Reference: scipy.optimize.minimize_scalar on the written-out objective of the module docstring.
    m, y = _data(300, shift=1.2, seed=2)
    w = _balanced_weights(y)

    def negative(b: float) -> float:
        z = m + b
        return -float(np.sum(w * (y * z - np.logaddexp(0.0, z)))) + penalty * b * b / 2

    reference = minimize_scalar(negative, bounds=(-10, 10), method="bounded", options={"xatol": 1e-10}).x
    assert estimate_offset(m, y, shrinkage=penalty) == pytest.approx(reference, abs=1e-6)
    log_likelihood = -negative(reference) + penalty * reference**2 / 2
    assert offset_log_likelihood(m, y, offset=reference) == pytest.approx(log_likelihood)


def test_offset_shrinks_toward_zero_with_fewer_labelled_epochs_and_more_penalty() -> None:
    m, y = _data(4000, shift=-1.0, seed=3)
    ratios = []
    for n in (100, 400, 1600, 4000):  # nested subsets: fewer labelled epochs -> stronger shrinkage
        free = estimate_offset(m[:n], y[:n], shrinkage=0.0)
        ratios.append(estimate_offset(m[:n], y[:n], shrinkage=50.0) / free)
    assert all(0 < r < 1 for r in ratios)
    assert ratios == sorted(ratios)
    offsets = [estimate_offset(m, y, shrinkage=lam) for lam in (0.0, 1.0, 100.0, 1e4)]
    assert offsets[0] < 0 and all(abs(a) > abs(b) for a, b in zip(offsets, offsets[1:], strict=False))


def test_offset_is_zero_without_both_classes_and_ignores_unscored_epochs() -> None:
    assert estimate_offset([], [], shrinkage=1.0) == 0.0
    assert estimate_offset([0.3, -2.0], [1, 1], shrinkage=0.0) == 0.0
    m, y = _data(200, shift=0.7, seed=4)
    with_gaps = np.concatenate([y, [np.nan, np.nan]])
    assert estimate_offset(np.concatenate([m, [50.0, -50.0]]), with_gaps, shrinkage=3.0) == \
        estimate_offset(m, y, shrinkage=3.0)


@pytest.mark.parametrize("kwargs", [dict(margin=[0.0], reference=[1, 0], shrinkage=1.0),
                                    dict(margin=[0.0, 1.0], reference=[1, 0], shrinkage=-1.0),
                                    dict(margin=[np.inf, 1.0], reference=[1, 0], shrinkage=1.0)])
def test_offset_input_errors(kwargs: dict) -> None:
    with pytest.raises(NightbankError) as info:
        estimate_offset(kwargs.pop("margin"), kwargs.pop("reference"), **kwargs)
    assert info.value.code == "invalid_offset_input"


def _participants(spread: float, *, seed: int) -> dict[str, list[tuple[np.ndarray, np.ndarray]]]:
    """Three nights for each of 8 participants; margins include the population baseline."""
    rng = np.random.default_rng(seed)
    raw = {}
    for p in range(8):
        shift = rng.normal(0.0, spread)
        raw[f"p{p}"] = [_data(300, shift=shift, seed=seed * 100 + p * 10 + k) for k in range(3)]
    everything = [pair for nights in raw.values() for pair in nights]
    baseline = estimate_offset(np.concatenate([m for m, _ in everything]), np.concatenate([y for _, y in everything]),
                               shrinkage=0.0)
    return {pid: [(m + baseline, y) for m, y in nights] for pid, nights in raw.items()}


def test_penalty_is_large_without_true_offsets_and_small_with_large_ones() -> None:
    none = choose_shrinkage(_participants(0.0, seed=5))
    large = choose_shrinkage(_participants(2.0, seed=6))
    assert none.shrinkage >= 100  # no real offsets: estimated ones only add noise
    assert large.shrinkage <= 50
    assert len(large.log_likelihood) == len(large.grid)


def test_penalty_without_a_participant_equals_a_search_without_them() -> None:
    data = _participants(1.0, seed=7)
    search = choose_shrinkage(data)
    rest = choose_shrinkage({k: v for k, v in data.items() if k != "p3"})
    assert search.excluding("p3") == rest.shrinkage
    assert search.excluding("not-there") == search.shrinkage


# ---- with a pooled model on simulated participants ------------------------------------------

@pytest.fixture(scope="module")
def pooled():
    sims = simulate_cohort(CohortSpec(n_participants=5, nights_min=2, nights_max=3, few_labels_participants=0,
                                      spread=0.5, artefacts=False), seed=11)
    by: dict[str, list] = {}
    for s in sims:
        by.setdefault(s.night.participant_id, []).append(s.night)
    return train_pooled(by, config=TrainingConfig(pooled_folds=3))


def _person(quiet_wake_movement: float) -> list:
    rng = np.random.default_rng(3)
    traits = PersonTraits(gain=1.0, sleep_movement=1.0, quiet_wake_movement=quiet_wake_movement, sol_mean_min=30,
                          awakenings_mean=8, shift_every_min=35)
    start = pd.Timestamp("2031-05-01 22:00", tz="UTC")
    return [simulate_night(rng, traits, participant_id="X", start=start + pd.Timedelta(days=k), labelled=True).night
            for k in range(3)]


@pytest.mark.parametrize("quiet_wake_movement, sign", [(0.2, -1), (3.0, 1)])
def test_offset_moves_the_decision_toward_the_participants_wake(pooled, quiet_wake_movement: float, sign: int) -> None:
    # 0.2: quiet wake far stiller than anyone in training (wake looks like sleep) -> negative offset,
    # more wake called; 3.0: restless quiet wake -> positive offset.
    nights = _person(quiet_wake_movement)
    desc = participant_descriptors(nights)
    offset = participant_offset(pooled.model, nights, shrinkage=pooled.shrinkage, descriptors=desc)
    assert np.sign(offset) == sign
    if sign < 0:
        spec = [[epoch_agreement(n.reference_sleep()[slice(*n.in_bed)],
                                 pooled.model.predict(n, offset=b, descriptors=desc)[slice(*n.in_bed)])["specificity"]
                 for n in nights] for b in (0.0, offset)]
        assert np.mean(spec[1]) > np.mean(spec[0])
    # fewer labelled epochs -> closer to zero (same penalty)
    one = participant_offset(pooled.model, nights[:1], shrinkage=pooled.shrinkage, descriptors=desc)
    assert abs(one) < abs(offset)


def test_pooled_offsets_and_held_out_offset_figures(pooled) -> None:
    assert set(pooled.offsets) == set(pooled.held_out)
    assert pooled.shrinkage in pooled.shrinkage_search.grid
    for pid, held in pooled.offset_held_out.items():
        assert len(held) == len(pooled.held_out[pid]) >= 2
        for h, base in zip(held, pooled.held_out[pid], strict=True):
            assert h.method == "pooled+offset" and h.night_hash == base.night_hash
            # the offset is added to the margin before the fold model's (monotone) calibration: over both
            # nights' epochs, the calibrated probability never decreases as expit(margin + offset) grows
            raw = np.concatenate([expit(base.margin), expit(base.margin + h.offset)])
            calibrated = np.concatenate([base.p_sleep, h.p_sleep])
            keep = ~np.isnan(raw)
            order = np.argsort(raw[keep], kind="stable")
            assert (np.diff(calibrated[keep][order]) >= -1e-12).all()
