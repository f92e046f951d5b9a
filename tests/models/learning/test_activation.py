"""Activation as a selection: compared nights versus the candidate's nights the comparison did not use."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from models.learning.activation import activation_evidence


def _table(values: dict[str, float], method: str = "personal") -> pd.DataFrame:
    return pd.DataFrame([{"night_hash": n, "method": method, "balanced_accuracy": v} for n, v in values.items()])


def test_fresh_nights_give_a_selection_free_figure() -> None:
    candidate = _table({"a": 0.80, "b": 0.82, "c": 0.78, "d": 0.70})
    active = _table({"a": 0.75, "b": 0.80, "c": 0.79, "e": 0.99})  # e: a night the candidate does not hold out
    evidence = activation_evidence(candidate, active)
    assert evidence.compared_nights == ("a", "b", "c") and evidence.fresh_nights == ("d",)
    # paired comparison on the shared nights (numpy means), not the versions' overall means
    assert evidence.candidate_value == pytest.approx(np.mean([0.80, 0.82, 0.78]))
    assert evidence.active_value == pytest.approx(np.mean([0.75, 0.80, 0.79]))
    assert evidence.activate  # better on the shared nights although its overall mean is lower
    assert np.mean([0.80, 0.82, 0.78, 0.70]) < np.mean([0.75, 0.80, 0.79, 0.99])
    assert evidence.selection_free and evidence.fresh_value == pytest.approx(0.70)
    json.dumps(evidence.to_dict(), allow_nan=False)


def test_without_fresh_nights_the_figure_is_flagged_as_a_selection_figure() -> None:
    candidate = _table({"a": 0.80, "b": 0.82})
    evidence = activation_evidence(candidate, _table({"a": 0.85, "b": 0.84}))
    assert not evidence.activate and not evidence.selection_free and np.isnan(evidence.fresh_value)
    assert "selection figure" in evidence.note
    # control: with no active version nothing was compared, so every candidate night is fresh
    first = activation_evidence(candidate, None)
    assert first.activate and first.selection_free and first.fresh_value == pytest.approx(0.81)


def test_method_filter_for_pooled_versions() -> None:
    candidate = pd.concat([_table({"a": 0.8}, "pooled"), _table({"a": 0.1}, "pooled+offset")])
    active = _table({"a": 0.7}, "pooled")
    evidence = activation_evidence(candidate, active, method="pooled")
    assert evidence.candidate_value == pytest.approx(0.8) and evidence.activate
