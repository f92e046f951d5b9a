"""Rule calibration scores nights laid end to end exactly as it would score each night alone.

Check: every night's per-setting balanced accuracy from :func:`calibrate_rule`'s batched scoring equals
the balanced accuracy of :func:`models.score_with_rule` on that night alone (bit for bit), for every
rule, with and without Webster rescoring, at 15, 30 and 60 s epochs, with nights of uneven lengths,
partial minutes and missing counts (seeded simulated counts; invented data). The balanced accuracy
itself is (sensitivity + specificity) / 2 with sleep as the positive class (common practice).
"""

from __future__ import annotations

import numpy as np
import pytest

from models import METHOD_IDS, NightRecord, score_with_rule
from models.agreement import calibrate_rule
from models.agreement.rule_calibration import _grid_scores


def _nights(epoch_seconds: int, seed: int) -> list[NightRecord]:
    rng = np.random.default_rng(seed)
    out = []
    for i in range(9):
        n = int(rng.integers(40, 200))
        reference = (rng.random(n) > 0.3).astype(np.float64)
        reference[rng.random(n) < 0.05] = np.nan  # unscored reference epochs
        counts = np.where(reference == 1, rng.poisson(15, n), rng.poisson(220, n)).astype(np.float64)
        if i % 4 == 3:
            counts[rng.integers(0, n, 5)] = np.nan  # missing counts: scored alone
        counts[0] = -3.0 if i % 3 == 0 else counts[0]  # negative counts count as 0
        out.append(NightRecord(participant_id=f"p{i % 3}", night_id=f"n{i}", reference=reference, counts=counts,
                               epoch_seconds=epoch_seconds, lights_off_idx=int(rng.integers(0, 10)),
                               lights_on_idx=None if i % 2 else n - int(rng.integers(1, 10))))
    return out


def _alone(night: NightRecord, method: str, kwargs: dict[str, float]) -> float:
    bed = slice(night.lights_off_idx, night.lights_on_idx)
    sleep = score_with_rule(night.counts, night.epoch_seconds, method, **kwargs).sleep[bed]
    truth = night.reference[bed]
    keep = np.isfinite(truth) & np.isfinite(sleep)
    y, s = truth[keep], sleep[keep]
    if not (y == 1).any() or not (y == 0).any():
        return float("nan")
    return 0.5 * (float(np.sum((y == 1) & (s == 1))) / int(np.sum(y == 1))
                  + float(np.sum((y == 0) & (s == 0))) / int(np.sum(y == 0)))


@pytest.mark.parametrize("epoch_seconds", [15, 30, 60])
@pytest.mark.parametrize("method", METHOD_IDS)
def test_batched_scores_equal_scoring_each_night_alone(epoch_seconds, method):
    nights = _nights(epoch_seconds, seed=epoch_seconds)
    if method.startswith("count-threshold"):
        settings = [{"threshold": t, "count_scale": 1.0} for t in (10.0, 40.0 * 2 ** 0.5, 160.0)]
    else:
        settings = [{"count_scale": c} for c in (2 ** -1.5, 1.0, 2 ** 2.5)]
    found = _grid_scores(nights, method, {}, settings)
    expected = np.array([[_alone(n, method, kw) for kw in settings] for n in nights])
    np.testing.assert_array_equal(found, expected)


def test_calibration_chooses_from_the_batched_scores():
    nights = _nights(30, seed=4)
    calibration = calibrate_rule(nights, "count-threshold")
    expected = np.array([[_alone(n, "count-threshold", {"threshold": t}) for t in calibration.grid] for n in nights])
    with np.errstate(invalid="ignore"):
        assert calibration.mean_balanced_accuracy == pytest.approx(tuple(np.nanmean(expected, axis=0)), rel=1e-15)
