"""Reference plausibility: a simulated night passes, the same night with its reference reversed is refused.

Outside references: scikit-learn's ``balanced_accuracy_score`` for the rule agreement, and the
definition sleep efficiency = 100 x sleep / scored time in bed (AASM, Iber et al. 2007, from memory)
computed with numpy.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import balanced_accuracy_score

from models import (
    CohortSpec,
    ImportProfile,
    InvalidNightError,
    Night,
    PlausibilityConfig,
    check_reference,
    guess_profile,
    night_from_csv,
    reference_plausibility,
    score_with_rule,
    simulate_cohort,
)


@pytest.fixture(scope="module")
def night() -> Night:
    """A labelled simulated night (SIMULATED data)."""
    sims = simulate_cohort(CohortSpec(n_participants=2, nights_min=3, nights_max=3, artefacts=False), seed=11)
    return next(s.night for s in sims if s.night.reference is not None)


def _reversed(night: Night) -> Night:
    """The reference read the wrong way round: wake epochs called sleep and sleep epochs called wake."""
    ref = np.where(night.reference == "W", "S", "W")
    return replace(night, reference=ref)


def test_figures_match_outside_definitions(night: Night) -> None:
    report = reference_plausibility(night)
    first, stop = night.in_bed
    ref = night.reference_sleep()
    calls = score_with_rule(night.counts, 30, "cole-kripke").sleep
    assert report.checked and report.n_scored_epochs == stop - first
    assert report.sleep_efficiency_pct == pytest.approx(100 * ref[first:stop].mean())  # in bed
    capped = np.minimum(night.counts, np.percentile(night.counts, 99))  # counts capped at the 99th percentile
    assert report.mean_counts_sleep == pytest.approx(capped[ref == 1].mean())  # whole recording
    assert report.mean_counts_wake == pytest.approx(capped[ref == 0].mean())
    assert report.rule_balanced_accuracy == pytest.approx(balanced_accuracy_score(ref.astype(int), calls))


def test_simulated_night_is_plausible(night: Night) -> None:
    report = reference_plausibility(night)
    assert report.plausible and report.reasons == []
    assert check_reference(night) is None


def test_reversed_reference_is_refused(night: Night) -> None:
    bad = _reversed(night)
    report = reference_plausibility(bad)
    calls = score_with_rule(bad.counts, 30, "cole-kripke").sleep
    # balanced accuracy is symmetric: reversing the reference turns b into 1 - b (scikit-learn as reference)
    assert report.rule_balanced_accuracy == pytest.approx(
        1 - balanced_accuracy_score(night.reference_sleep().astype(int), calls))
    assert report.rule_balanced_accuracy < 0.5
    assert not report.plausible and len(report.reasons) >= 2
    assert report.mean_counts_sleep > report.mean_counts_wake
    with pytest.raises(InvalidNightError) as info:
        check_reference(bad)
    (problem,) = info.value.problems
    assert problem.code == "reference_implausible" and problem.location["field"] == "reference"
    assert f"{report.sleep_efficiency_pct:.1f}%" in problem.message
    assert problem.location["rule_balanced_accuracy"] == pytest.approx(report.rule_balanced_accuracy, abs=1e-4)


def test_accepted_reversed_reference_is_flagged(night: Night) -> None:
    flag = check_reference(_reversed(night), accept=True)
    assert flag is not None and flag.code == "reference_implausible"
    assert flag.ranges == [night.in_bed] and "sleep efficiency" in flag.message


def test_unchecked_nights(night: Night) -> None:
    assert check_reference(replace(night, reference=None)) is None
    short = replace(night, reference=np.where(np.arange(night.n_epochs) < 100, "W", "?"))
    report = reference_plausibility(short)
    assert not report.checked and report.n_scored_epochs < PlausibilityConfig().min_scored_epochs
    assert check_reference(short) is None
    assert report.to_dict()["sleep_efficiency_pct"] is None


def test_thresholds_are_settings(night: Night) -> None:
    strict = PlausibilityConfig(min_sleep_efficiency_pct=100.0)
    assert any("sleep efficiency" in r for r in reference_plausibility(night, config=strict).reasons)
    reasons = reference_plausibility(night, config=PlausibilityConfig(min_rule_balanced_accuracy=0.99)).reasons
    assert len(reasons) == 1 and "cole-kripke" in reasons[0]


def test_binary_export_read_with_the_wrong_polarity_is_refused(night: Night) -> None:
    # the lab writes 1 for wake; the guessed profile proposes 1 = sleep until someone confirms the polarity
    local = night.epoch_times().tz_convert("Europe/Oslo")
    code = np.where(night.reference == "W", 1, 0)
    text = "time,activity,sleep_wake\n" + "\n".join(
        f"{t.isoformat()},{int(c)},{s}" for t, c, s in zip(local, night.counts, code, strict=True))
    lights = f"# lights_off: {night.lights_off.isoformat()}\n# lights_on: {night.lights_on.isoformat()}\n"
    data = (lights + text).encode()
    guess = guess_profile(data)
    assert guess.profile.stage_codes == {"0": "W", "1": "S"}
    with pytest.raises(InvalidNightError):
        check_reference(night_from_csv(data, profile=guess.profile))
    confirmed = ImportProfile.from_dict({**guess.profile.to_dict(), "stage_codes": {"0": "S", "1": "W"}})
    read = night_from_csv(data, profile=confirmed)
    assert read.in_bed == night.in_bed and read.start == pd.Timestamp(night.start)
    assert check_reference(read) is None


def test_one_spike_in_a_sleep_epoch_does_not_turn_the_movement_check_round(night: Night) -> None:
    # the plausible simulated night with one huge count (a sensor glitch) inside reference sleep
    sleep = night.reference_sleep()
    asleep = np.flatnonzero(sleep == 1)
    counts = night.counts.copy()
    counts[asleep[asleep.size // 2]] = 98765.0
    report = reference_plausibility(replace(night, counts=counts))
    # numpy is the outside reference for the capped means the check compares
    capped = np.minimum(counts, np.nanpercentile(counts, 99))
    assert report.mean_counts_sleep == pytest.approx(np.nanmean(capped[sleep == 1]))
    assert report.plausible, report.reasons
