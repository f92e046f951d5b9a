"""The review queue: evidence terms in minutes, readable reasons, and a ranking that puts the night with a
wide interval and disagreeing methods above a clean night, deterministically (ties by night id)."""

from __future__ import annotations

import numpy as np
import pytest

from models.review.corrections import InvalidReviewError
from models.review.error_model import evidence_matrix, fit_priority_weights
from models.review.evidence import EVIDENCE_TERMS, NightEvidence, evidence_figures
from models.review.priority import DEFAULT_PRIORITY_WEIGHTS, expected_change, rank_nights

AUTO = {"sol_min": 20.0, "tst_min": 400.0, "waso_min": 40.0, "awakenings": 8.0, "sleep_efficiency_pct": 87.0}


def _clean(night_id: str, **kwargs: object) -> NightEvidence:
    params = {"auto": AUTO, "pooled": dict(AUTO, tst_min=402.0, waso_min=39.0)}
    base: dict[str, object] = {"parameters": params, "intervals": {"tst_min": [395.0, 405.0],
                                                                   "waso_min": [37.0, 43.0],
                                                                   "sol_min": [18.0, 22.0]},
                               "uncertainty_min": 4.0}
    return NightEvidence(night_id=night_id, participant_id="P1", epoch_seconds=30, **(base | kwargs))  # type: ignore[arg-type]


def test_wide_interval_and_disagreement_rank_above_a_clean_night() -> None:
    doubtful = _clean("b-doubtful", intervals={"tst_min": [340.0, 435.0], "waso_min": [20.0, 90.0],
                                               "sol_min": [10.0, 60.0]}, uncertainty_min=45.0,
                      parameters={"auto": AUTO, "pooled": dict(AUTO, tst_min=360.0, waso_min=90.0)},
                      relabel_min={"to_wake": 30.0, "to_sleep": 15.0})
    clean = {"relabel_min": {"to_wake": 4.0, "to_sleep": 2.0}}
    for weights in ({}, {"uncertainty": 0.5, "model_disagreement": 0.5}):  # the defaults, and weights on both terms
        ranked = rank_nights([_clean("a-clean", **clean), doubtful, _clean("c-clean", **clean)], weights=weights)
        assert [it.night_id for it in ranked] == ["b-doubtful", "a-clean", "c-clean"]  # equal priorities: by id
        top = ranked[0]
        assert top.expected_change_min > ranked[1].expected_change_min
        assert top.priority == top.expected_change_min
    assert "TST interval 95 min wide, WASO interval 70 min wide" in top.reasons
    assert any(r.startswith("models disagree on WASO by 50 min (pooled 90 vs auto 40)") for r in top.reasons)


def test_order_is_deterministic_whatever_the_input_order() -> None:
    nights = [_clean(f"n{k}", diary_offsets_min={"bed_time": float(10 * k)}) for k in range(6)]
    first = [it.night_id for it in rank_nights(nights)]
    again = [it.night_id for it in rank_nights(list(reversed(nights)))]
    assert first == again
    # diary offsets beyond the 15-min tolerance raise the priority in order of their size
    assert first[:4] == ["n5", "n4", "n3", "n2"]


def test_expected_change_is_log_linear_in_the_terms_and_reasons_name_the_minutes_added() -> None:
    e = _clean("x", nonwear_share=0.12, qc_flags=["off_wrist"], diary_offsets_min={"bed_time": 70.0})
    item = expected_change(e)
    w = DEFAULT_PRIORITY_WEIGHTS
    figures = evidence_figures(e)
    assert figures["diary"].value == 55.0  # |70| minus the 15-min tolerance
    assert figures["nonwear"].value == pytest.approx(0.12 * 100 * 400 / 87)  # share x 100 x TST / efficiency
    want = w["base_min"] * np.exp(sum(w[t] * f.value for t, f in figures.items()))
    assert item.expected_change_min == pytest.approx(want)
    # a term adds the expected change with it minus the expected change without it
    without_diary = expected_change(_clean("x", nonwear_share=0.12, qc_flags=["off_wrist"]))
    assert item.contributions["diary"] == pytest.approx(item.expected_change_min - without_diary.expected_change_min)
    assert "12 % of the rest period off-wrist (55 min)" in item.reasons
    assert "diary bed time 70 min after the detected rest start" in item.reasons
    # a term weighted 0 adds nothing and is no reason
    zero = expected_change(e, weights={"diary": 0.0})
    assert zero.contributions["diary"] == 0.0 and not any(r.startswith("diary") for r in zero.reasons)


def _simulated_errors(n: int, seed: int) -> tuple[list[NightEvidence], dict[str, float], dict[str, float]]:
    """Nights with diary offsets and off-wrist shares, errors drawn Poisson from a known log-linear mean."""
    rng = np.random.default_rng(seed)
    truth = {"base_min": 20.0, "diary": 0.02, "nonwear": 0.01}
    nights, errors = [], {}
    for k in range(n):
        e = _clean(f"n{k:03d}", diary_offsets_min={"bed_time": float(rng.uniform(0, 90))},
                   nonwear_share=float(rng.uniform(0, 0.3)), uncertainty_min=None, intervals=None,
                   parameters={"auto": AUTO})
        f = evidence_figures(e)
        mean = truth["base_min"] * np.exp(truth["diary"] * f["diary"].value + truth["nonwear"] * f["nonwear"].value)
        nights.append(e)
        errors[e.night_id] = float(rng.poisson(mean))
    return nights, errors, truth


def test_fitted_weights_match_a_poisson_glm_of_statsmodels() -> None:
    # the reference: statsmodels GLM, Poisson family (log link), on the same design; the true weights are
    # positive, so the fit's bound at 0 is inactive and both maximise the same quasi-likelihood
    import statsmodels.api as sm

    nights, errors, truth = _simulated_errors(300, seed=11)
    fitted = fit_priority_weights(nights, errors)
    x = evidence_matrix(nights)
    used = [EVIDENCE_TERMS.index(t) for t in ("diary", "nonwear")]
    glm = sm.GLM(np.array([errors[e.night_id] for e in nights]), sm.add_constant(x[:, used]),
                 family=sm.families.Poisson()).fit()
    assert fitted["base_min"] == pytest.approx(float(np.exp(glm.params[0])), rel=1e-4)
    assert fitted["diary"] == pytest.approx(float(glm.params[1]), rel=1e-3)
    assert fitted["nonwear"] == pytest.approx(float(glm.params[2]), rel=1e-3)
    assert fitted["diary"] == pytest.approx(truth["diary"], rel=0.2)  # and near the simulated truth
    # terms the same on every night (no uncertainty or disagreement; the wake in bed of AUTO) get no weight
    assert fitted["uncertainty"] == fitted["model_disagreement"] == fitted["wake_in_bed"] == fitted["relabel"] == 0.0
    with pytest.raises(InvalidReviewError, match="errors_min"):
        fit_priority_weights(nights[:3], {nights[0].night_id: 1.0})


def test_unusual_night_for_the_participant() -> None:
    history = [dict(AUTO, tst_min=t) for t in (540.0, 550.0, 555.0, 560.0)]
    item = expected_change(_clean("x", history=history), weights={"unusual": 0.01})  # the fitted default is 0
    # median of the other nights 552.5; 152.5 min below it
    assert "TST 152 min below this participant's usual" in item.reasons or \
        "TST 153 min below this participant's usual" in item.reasons
    assert "unusual" not in evidence_figures(_clean("y", history=history[:2]))  # fewer than 3 other nights: not judged


def test_missing_uncertainty_falls_back_to_interval_widths_and_then_to_nothing() -> None:
    with_widths = evidence_figures(_clean("x", uncertainty_min=None))
    # E|X - median| of a normal variable per unit of 90 % interval width: sqrt(2/pi) / (2 z_0.95)
    factor = np.sqrt(2 / np.pi) / (2 * 1.6448536)
    assert with_widths["uncertainty"].value == pytest.approx(factor * (10.0 + 6.0))
    bare = evidence_figures(_clean("x", uncertainty_min=None, intervals=None))
    assert "uncertainty" not in bare and "sol_interval" not in bare


def test_evidence_without_auto_or_with_bad_share_is_refused() -> None:
    with pytest.raises(InvalidReviewError, match="parameters") as err:
        NightEvidence(night_id="x", participant_id="P", epoch_seconds=30, parameters={"pooled": AUTO})
    assert err.value.code == "invalid_review"
    with pytest.raises(InvalidReviewError, match="nonwear_share"):
        _clean("x", nonwear_share=1.5)


def test_repeated_night_and_unknown_weight_are_refused() -> None:
    with pytest.raises(InvalidReviewError, match=r"evidence\[1\].night_id"):
        rank_nights([_clean("a"), _clean("a")])
    with pytest.raises(InvalidReviewError, match="weights.nonsense"):
        rank_nights([_clean("a")], weights={"nonsense": 1.0})
    with pytest.raises(InvalidReviewError, match="weights.diary"):
        rank_nights([_clean("a")], weights={"diary": -1.0})


def test_wake_in_bed_is_sol_plus_waso_of_auto() -> None:
    figures = evidence_figures(_clean("x"))
    assert figures["wake_in_bed"].value == 60.0  # SOL 20 + WASO 40 of AUTO
    assert figures["wake_in_bed"].reason.startswith("60 min awake in bed (SOL 20, WASO 40)")


@pytest.mark.parametrize(("kwargs", "field"), [
    ({"qc_flags": ["off_wrist", 3]}, "qc_flags[1]"),
    ({"history": [AUTO, 5]}, "history[1]"),
    ({"intervals": {"tst_min": [1.0]}}, "intervals.tst_min"),
    ({"diary_offsets_min": {"bed_time": "late"}}, "diary_offsets_min.bed_time"),
    ({"uncertainty_min": -1.0}, "uncertainty_min"),
])
def test_malformed_evidence_names_its_field(kwargs: dict, field: str) -> None:
    with pytest.raises(InvalidReviewError) as err:
        _clean("x", **kwargs)
    assert [p.location["field"] for p in err.value.problems] == [field]


def test_expected_relabel_sums_the_probability_of_the_other_state_over_in_bed_epochs() -> None:
    from models.review.evidence import expected_relabel

    # worked by hand (common practice: the expected count of misclassified epochs is the sum of each
    # epoch's probability of the other class): epochs 1-4 in bed; the first and the unscored last left out
    p = [0.99, 0.9, 0.6, 0.2, np.nan, 0.5]
    calls = [1, 1, 1, 0, np.nan, 0]
    found = expected_relabel(p, calls, (1, 5), 30)
    assert found["to_wake"] == pytest.approx((0.1 + 0.4) * 0.5)
    assert found["to_sleep"] == pytest.approx(0.2 * 0.5)
    e = _clean("x", relabel_min=found)
    figure = evidence_figures(e)["relabel"]
    assert figure.value == pytest.approx(0.35)
    assert figure.reason.startswith("the model expects about 0 min of its in-bed calls to be wrong")
    with pytest.raises(InvalidReviewError, match=r"relabel_min\.to_wake"):
        _clean("x", relabel_min={"to_wake": -1.0})
