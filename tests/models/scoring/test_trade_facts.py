"""Facts of the trade, checked on the simulated demo study."""

from __future__ import annotations

from models import NightRecord, compare_rules_with_reference, demo_nights


def test_count_threshold_over_calls_sleep_on_demo_study() -> None:
    # Marino et al. 2013 (Sleep 36(11)), 30-s epochs: sensitivity 0.965, specificity 0.329 -> the
    # count-threshold rule detects sleep well (> 0.9) and wake poorly (< 0.6).
    records = [NightRecord.from_night(s.night) for s in demo_nights() if s.night.has_reference]
    table = compare_rules_with_reference(records, methods=["count-threshold"]).epoch_metrics
    row = table.query("level == 'pooled' and method == 'count-threshold'")
    assert row.sensitivity.item() > 0.9
    assert row.specificity.item() < 0.6
