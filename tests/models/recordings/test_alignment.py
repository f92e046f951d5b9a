"""Clock alignment on simulated nights (models.simulation) with known PSG clock offsets; the correlation curve
is checked against scipy.stats.pearsonr and numpy.corrcoef at the lags where the PSG grid meets the actigraph's.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from models import (
    AlignmentConfig,
    AlignmentError,
    CohortSpec,
    Hypnogram,
    NightbankError,
    estimate_clock_offset,
    hypnogram_on_epochs,
    simulate_cohort,
    stages_to_sleep,
)

OFFSETS_S = (95.0, -240.0, 7.0)
#: the accuracy goal of the estimate on simulated nights, seconds (one 30-s epoch)
GOAL_S = 30.0


@pytest.fixture(scope="module")
def nights():
    """Twelve simulated nights of four invented participants, every night with its true stages."""
    spec = CohortSpec(n_participants=4, nights_min=2, nights_max=2, artefacts=False, few_labels_participants=0,
                      labelled_share=1.0)
    return simulate_cohort(spec, seed=2)


def _psg(sim, offset_s: float) -> Hypnogram:
    """The in-bed stages as a PSG system whose clock is ``offset_s`` behind the actigraph's would write them."""
    i0, i1 = sim.night.in_bed
    start = sim.night.start + pd.Timedelta(seconds=30 * i0 - offset_s)
    return Hypnogram(start=start, epoch_seconds=30, stages=sim.stages[i0:i1])


def _align(sim, offset_s: float, **kwargs):
    n = sim.night
    return estimate_clock_offset(n.counts, counts_start=n.start, epoch_seconds=30, hypnogram=_psg(sim, offset_s),
                                 **kwargs)


def test_known_offsets_are_recovered(nights) -> None:
    results = [(off, _align(sim, off)) for sim in nights for off in OFFSETS_S]
    trusted = [(off, a) for off, a in results if not a.weak]
    assert len(trusted) >= 0.8 * len(results)
    errors = [abs(a.clock_offset_s - off) for off, a in trusted]
    assert max(errors) <= GOAL_S, errors
    assert all(not a.at_edge and a.searched_s == 600.0 and a.quality >= 0.2 for _, a in trusted)


@pytest.mark.parametrize("epoch_seconds", [15, 60])
def test_15_and_60_s_counts(nights, epoch_seconds: int) -> None:
    rng = np.random.default_rng(epoch_seconds)
    for sim in nights[:4]:
        counts = sim.night.counts
        if epoch_seconds == 60:
            counts = counts[: counts.size // 2 * 2].reshape(-1, 2).sum(axis=1)
        else:  # each 30-s count split at random over its two halves (simulated)
            first = rng.binomial(counts.astype(np.int64), 0.5)
            counts = np.column_stack([first, counts - first]).ravel().astype(float)
        for off in (95.0, -240.0):
            a = estimate_clock_offset(counts, counts_start=sim.night.start, epoch_seconds=epoch_seconds,
                                      hypnogram=_psg(sim, off))
            assert not a.weak and abs(a.clock_offset_s - off) <= GOAL_S


def test_correlations_match_pearsonr_where_the_grids_meet(nights) -> None:
    sim, off = nights[0], 95.0
    n = sim.night
    hyp = _psg(sim, off)
    a = _align(sim, off)
    y = np.log1p(n.counts)

    def stages_at(lag: float) -> np.ndarray:
        return hypnogram_on_epochs(hyp, start=n.start, epoch_seconds=30, n_epochs=n.n_epochs, clock_offset_s=lag)

    common = (stages_at(-a.searched_s) != "?") & (stages_at(a.searched_s) != "?")  # covered at every lag
    assert a.n_epochs == common.sum()
    lags = np.array(a.lags_s)
    checked = 0
    for i in np.flatnonzero((lags - off) % 30 == 0):  # PSG epochs fall exactly on actigraph epochs
        wake = 1.0 - stages_to_sleep(stages_at(lags[i]))
        ref = stats.pearsonr(wake[common], y[common]).statistic
        assert a.correlations[i] == pytest.approx(ref, abs=1e-9)
        assert a.correlations[i] == pytest.approx(np.corrcoef(wake[common], y[common])[0, 1], abs=1e-9)
        checked += 1
    assert checked == 40
    best = int(np.argmax(a.correlations))
    assert a.quality == max(a.correlations) and a.clock_offset_s == lags[best]
    # on this night the chosen lag is itself one where the grids meet: its quality is scipy's r there
    assert (a.clock_offset_s - off) % 30 == 0
    wake = 1.0 - stages_to_sleep(stages_at(a.clock_offset_s))
    assert a.quality == pytest.approx(stats.pearsonr(wake[common], y[common]).statistic, abs=1e-9)


def test_the_offset_is_added_to_psg_times(nights) -> None:
    sim = nights[0]
    a = _align(sim, -240.0)
    i0, i1 = sim.night.in_bed
    n = sim.night

    def agreement(offset_s: float) -> float:
        got = hypnogram_on_epochs(_psg(sim, -240.0), start=n.start, epoch_seconds=30, n_epochs=n.n_epochs,
                                  clock_offset_s=offset_s)
        return float(np.mean(got[i0:i1] == sim.stages[i0:i1]))

    assert agreement(a.clock_offset_s) >= 0.95 > agreement(-a.clock_offset_s)


def test_flat_counts_give_a_weak_alignment(nights) -> None:
    sim = nights[0]
    a = estimate_clock_offset(np.zeros(sim.night.n_epochs), counts_start=sim.night.start, epoch_seconds=30,
                              hypnogram=_psg(sim, 95.0))
    assert a.weak and a.reasons == ("no_correlation",) and math.isnan(a.quality) and a.clock_offset_s == 0.0
    assert json.loads(json.dumps(a.to_dict(), allow_nan=False))["quality"] is None


def test_counts_unrelated_to_the_stages_give_a_weak_alignment(nights) -> None:
    sim = nights[0]
    counts = np.random.default_rng(7).poisson(20.0, sim.night.n_epochs).astype(float)  # simulated, no sleep in it
    a = estimate_clock_offset(counts, counts_start=sim.night.start, epoch_seconds=30, hypnogram=_psg(sim, 95.0))
    assert a.weak and "low_correlation" in a.reasons and abs(a.quality) < 0.2


def test_a_periodic_night_has_an_ambiguous_peak() -> None:
    # wake for 1 min every 5 min, counts exactly where the wake is: every 300 s of lag fits as well
    stages = np.tile(np.array(["W", "W", "N2", "N2", "N2", "N2", "N2", "N2", "N2", "N2"]), 100)
    start = pd.Timestamp("2031-03-02T23:00:00+01:00")
    counts = np.where(stages == "W", 50.0, 0.0)
    hyp = Hypnogram(start=start - pd.Timedelta(seconds=60), epoch_seconds=30, stages=stages)
    a = estimate_clock_offset(np.r_[np.zeros(40), counts, np.zeros(40)],
                              counts_start=start - pd.Timedelta(minutes=20), epoch_seconds=30, hypnogram=hyp)
    assert a.weak and "ambiguous_peak" in a.reasons and a.runner_up == pytest.approx(a.quality)


def test_an_offset_beyond_the_window_is_at_its_edge(nights) -> None:
    sim = nights[2]
    a = _align(sim, 900.0)
    assert a.at_edge and a.clock_offset_s == 600.0
    wide = _align(sim, 900.0, search_s=1200.0)
    assert not wide.at_edge and abs(wide.clock_offset_s - 900.0) <= GOAL_S and wide.searched_s == 1200.0


def test_a_short_hypnogram_is_weak(nights) -> None:
    sim = nights[0]
    i0 = sim.night.in_bed[0] + 120
    hyp = Hypnogram(start=sim.night.start + pd.Timedelta(seconds=30 * i0), epoch_seconds=30,
                    stages=sim.stages[i0: i0 + 100])  # 50 min of PSG: 30 min left on every lag of +-10 min
    a = estimate_clock_offset(sim.night.counts, counts_start=sim.night.start, epoch_seconds=30, hypnogram=hyp,
                              config=AlignmentConfig(min_quality=0.0))
    assert a.weak and "short_overlap" in a.reasons and a.n_epochs == 60


def test_bad_inputs_are_refused(nights) -> None:
    sim = nights[0]
    n = sim.night
    later = Hypnogram(start=n.start + pd.Timedelta(days=2), epoch_seconds=30, stages=sim.stages)
    with pytest.raises(AlignmentError) as info:
        estimate_clock_offset(n.counts, counts_start=n.start, epoch_seconds=30, hypnogram=later)
    assert info.value.code == "hypnogram_outside_recording"
    hyp = _psg(sim, 0.0)
    with pytest.raises(ValueError, match="15, 30 or 60"):
        estimate_clock_offset(n.counts, counts_start=n.start, epoch_seconds=20, hypnogram=hyp)
    with pytest.raises(ValueError, match="search_s"):
        estimate_clock_offset(n.counts, counts_start=n.start, epoch_seconds=30, hypnogram=hyp, search_s=-1.0)
    with pytest.raises(ValueError, match="timezone-aware"):
        estimate_clock_offset(n.counts, counts_start=n.start.tz_localize(None), epoch_seconds=30, hypnogram=hyp)
    with pytest.raises(NightbankError, match="step_s"):
        AlignmentConfig(step_s=0.0)
